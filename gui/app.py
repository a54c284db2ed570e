"""``clampcore gui [EXPERIMENT] [--port PORT]``: open the tuning window.

Public names: ``add_parser``, ``run_window``.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any


def add_parser(sub: Any, name: str) -> None:
    """Add the ``gui`` subcommand to ``clampcore``'s subparsers."""
    p = sub.add_parser(name, help="the tuning window (needs the 'gui' extra)")
    p.add_argument("experiment", nargs="?", help="experiment file (.toml); empty if omitted")
    p.add_argument("--port", default="sim", help="device path, pyserial URL, or 'sim' (default)")
    p.add_argument(
        "--record-dir",
        default=None,
        help="folder for the NWB recordings (default: 'recordings' in the user's data folder, "
        "e.g. ~/.local/share/clampcore/recordings)",
    )
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--watchdog-ms", type=float, default=20.0, help="board watchdog (default 20)")
    p.add_argument("--rig-clock", choices=("wall", "lockstep"), default="wall", help="for 'sim'")
    p.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    from clampcore.engine import RunOptions

    options = RunOptions(seed=args.seed, watchdog_ms=args.watchdog_ms, rig_clock=args.rig_clock)
    record_dir = Path(args.record_dir) if args.record_dir else None
    return run_window(args.experiment, args.port, options, record_dir)


def run_window(
    experiment: Any = None,
    port: str = "sim",
    options: Any = None,
    record_dir: Path | None = None,
) -> int:
    """Open the window and run Qt's event loop until it closes; returns the exit code."""
    try:
        from PySide6 import QtWidgets

        from gui.window import TuningWindow
    except ImportError as exc:
        print(
            f"clampcore gui needs PySide6 and pyqtgraph (pip install 'clampcore[gui]'): {exc}",
            file=sys.stderr,
        )
        return 1
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(sys.argv[:1])
    window = TuningWindow(experiment, port=port, options=options, record_dir=record_dir)
    window.show()
    return int(app.exec())
