"""Helpers shared by the window's tests (tests/test_gui*.py): a window on the simulated
rig, starting and stopping runs, and the passive-cell experiment they use.

Not a test module itself (no ``test_`` prefix): the test files import it.
"""

from __future__ import annotations

import os
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before pytest-qt makes the app

from clampcore.gui.window import TuningWindow

from clampcore.engine import RunOptions
from clampcore.nwb import read_nwb_summary

ROOT = Path(__file__).resolve().parents[1]
RATE_HZ = 20000.0
START_TIMEOUT_MS = 90_000  # a cold numba cache compiles the loop and the rig first

# A passive cell with one virtual leak and no noise, so that the command current is
# exactly the leak's: I = -g (V - E). E = -40 mV is 30 mV from rest: about 60 pA at 2 nS.
# The amplifier passes 400 pA/V: with the simulated board's ±10 V DAC
# (clampcore.calibration.DEFAULT_BOARD_DAC) it can command ±4000 pA.
LEAK_EXPERIMENT = {
    "loop": {"rate_hz": RATE_HZ, "max_current_pA": 2000.0},
    "cell": {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0},
    "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},
    "element": [{"kind": "leak", "name": "extra_leak", "g_nS": 2.0, "e_mV": -40.0}],
}


def make_window(qtbot, tmp_path: Path, experiment, clock: str = "lockstep", **options):
    """A shown window on the simulated rig, recording under ``tmp_path``."""
    window = TuningWindow(
        experiment,
        port="sim",
        options=RunOptions(rig_clock=clock, **options),
        record_dir=tmp_path / "recordings",
    )
    qtbot.addWidget(window)
    window.show()
    return window


def start(qtbot, window: TuningWindow, min_samples: int = 2000) -> None:
    """Start a run and wait until it is running and has taken ``min_samples``."""
    assert window.start_run(), window.last_error
    qtbot.waitUntil(
        lambda: window.state in ("running", "failed", "stopped"), timeout=START_TIMEOUT_MS
    )
    assert window.state == "running", window.last_error
    wait_samples(qtbot, window, min_samples)


def written(window: TuningWindow) -> int:
    assert window.engine is not None and window.engine.shared is not None
    return window.engine.shared.written()


def wait_samples(qtbot, window: TuningWindow, more: int) -> None:
    target = written(window) + more
    qtbot.waitUntil(lambda: written(window) >= target, timeout=30_000)


def stop(qtbot, window: TuningWindow) -> dict:
    """Stop the run, wait for its recording and read it back."""
    window.stop_run()
    result = window.wait_finished(60.0)
    assert window.state == "stopped", window.last_error
    assert result is not None and result.error is None, result
    return read_nwb_summary(result.nwb_path)
