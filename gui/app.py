"""``clampcore gui [EXPERIMENT] [--port PORT]``: open the tuning window.

Public names: ``add_parser``, ``run_window``, ``display_problem``.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Any


def add_parser(sub: Any, name: str) -> None:
    """Add the ``gui`` subcommand to ``clampcore``'s subparsers."""
    from clampcore.cli import add_run_options

    p = sub.add_parser(name, help="the tuning window (needs the 'gui' extra)")
    p.add_argument("experiment", nargs="?", help="experiment file (.toml); empty if omitted")
    p.add_argument("--port", default="sim", help="device path, pyserial URL, or 'sim' (default)")
    p.add_argument(
        "--record-dir",
        default=None,
        help="folder for the NWB recordings (default: 'recordings' in the user's data folder, "
        "e.g. ~/.local/share/clampcore/recordings)",
    )
    add_run_options(p)
    p.add_argument("--rig-clock", choices=("wall", "lockstep"), default="wall", help="for 'sim'")
    p.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    from clampcore.cli import experiment_argument
    from clampcore.engine import RunOptions

    experiment = experiment_argument(args.experiment) if args.experiment is not None else None

    options = RunOptions(seed=args.seed, watchdog_ms=args.watchdog_ms, rig_clock=args.rig_clock)
    record_dir = Path(args.record_dir) if args.record_dir else None
    return run_window(experiment, args.port, options, record_dir)


_HEADLESS_HINT = (
    "to run the window without a screen (tests, a remote machine), set "
    "QT_QPA_PLATFORM=offscreen; otherwise log in with a display (or ssh -X)"
)


def display_problem(env: dict[str, str] | None = None) -> str | None:
    """Why Qt cannot open a window here, or None; checked before any QApplication exists
    (Qt aborts the process when its platform plugin cannot start)."""
    env = dict(os.environ) if env is None else env
    platform = env.get("QT_QPA_PLATFORM", "").split(":")[0]
    if platform in ("offscreen", "minimal", "vnc", "eglfs", "linuxfb", "windows", "cocoa"):
        return None
    if sys.platform != "linux":
        return None  # Windows and macOS always have their window system
    if platform == "wayland":
        if env.get("WAYLAND_DISPLAY"):
            return None
        return f"QT_QPA_PLATFORM=wayland but WAYLAND_DISPLAY is not set; {_HEADLESS_HINT}"
    if platform == "xcb" or not env.get("WAYLAND_DISPLAY"):
        if not env.get("DISPLAY"):
            return f"no display (DISPLAY and WAYLAND_DISPLAY are not set); {_HEADLESS_HINT}"
        missing = _missing_xcb_libraries()
        if missing:
            return (
                f"Qt's X11 (xcb) platform plugin needs {', '.join(missing)}, not installed "
                f"(e.g. apt install {' '.join(missing)}); {_HEADLESS_HINT}"
            )
    return None


def _missing_xcb_libraries() -> list[str]:
    """System libraries Qt 6's xcb plugin needs that the dynamic linker cannot find
    (Qt 6 documentation, "Qt for X11 Requirements": libxcb-cursor0 since Qt 6.5)."""
    import ctypes.util

    return [lib for lib in ("xcb-cursor",) if ctypes.util.find_library(lib) is None]


def run_window(
    experiment: Any = None,
    port: str = "sim",
    options: Any = None,
    record_dir: Path | None = None,
) -> int:
    """Open the window and run Qt's event loop until it closes; returns the exit code."""
    try:
        from clampcore.gui.window import TuningWindow
        from PySide6 import QtWidgets
    except ImportError as exc:
        print(
            f"clampcore gui needs PySide6 and pyqtgraph (pip install 'clampcore[gui]'): {exc}",
            file=sys.stderr,
        )
        return 1
    app = QtWidgets.QApplication.instance()
    if app is None:
        problem = display_problem()
        if problem:
            print(f"clampcore gui: {problem}", file=sys.stderr)
            return 1
        app = QtWidgets.QApplication(sys.argv[:1])
    window = TuningWindow(experiment, port=port, options=options, record_dir=record_dir)
    window.show()
    return int(app.exec())
