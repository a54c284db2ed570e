"""Benchmark: the tuning window's redraw rate, and whether it disturbs the loop.

One wall-clock run of ``examples/slice_background.toml`` on the simulated rig at
20 kHz, with a 10 s trace window and every conductance drawn. After a warm-up
that fills the 10 s window, phases alternate within the same run:

- ``closed``: the window hidden and its timer stopped (the loop and the
  recorder only);
- ``open``: the window shown, redrawing at its normal rate (``REFRESH_HZ``);

and one last ``flat out`` phase redraws as fast as the machine allows (timer
interval 0), which measures the redraw capacity (also as the GUI thread's own CPU
time per redraw, which contention from other work does not inflate much). For each
phase: the loop's
late-command rate (board-flagged late samples / samples) and the share of
commands within 2 samples (from the loop's latency histogram), the window's
refreshes and repaints per second, and the median cost of one refresh (ms).
Medians over the repeated phases are compared: open vs closed, same run.

Usage: ``QT_QPA_PLATFORM=offscreen .venv/bin/python bench/bench_gui.py [--phase-s S]
[--repeats N] [--realtime PRIO] [--rig-realtime PRIO] [--no-low-latency]``. Timing on a
2-core virtual machine varies from run to run (DEVELOPERS.md, Figures the code relies on):
read the ratios, not the
absolute figures.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def _counters(engine) -> tuple[float, float, float, float]:
    """(samples, late, answered, answered within 2 samples) so far."""
    from clampcore.shared import LAT_BINS, ST_LAT_HIST, ST_LATE, ST_SAMPLES

    st = engine.shared.stats.copy()
    lat = st[ST_LAT_HIST : ST_LAT_HIST + LAT_BINS]
    return st[ST_SAMPLES], st[ST_LATE], lat.sum(), lat[:3].sum()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--phase-s", type=float, default=5.0, help="seconds per phase")
    parser.add_argument("--repeats", type=int, default=3, help="closed/open pairs")
    parser.add_argument("--warmup-s", type=float, default=11.0, help="fills the 10 s window")
    parser.add_argument("--realtime", type=int, default=0, help="loop SCHED_FIFO priority")
    parser.add_argument("--rig-realtime", type=int, default=0, help="rig SCHED_FIFO priority")
    parser.add_argument(
        "--low-latency", action=argparse.BooleanOptionalAction, default=True,
        help="hold /dev/cpu_dma_latency at 0 (the engine's default)",
    )  # fmt: skip
    args = parser.parse_args()

    from clampcore.gui.window import REFRESH_HZ, TuningWindow
    from PySide6 import QtCore, QtWidgets

    from clampcore.engine import RunOptions

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])
    tmp = tempfile.TemporaryDirectory(prefix="bench-gui-")
    window = TuningWindow(
        ROOT / "examples" / "slice_background.toml",
        port="sim",
        options=RunOptions(
            rig_clock="wall",
            low_latency=args.low_latency,
            realtime_priority=args.realtime,
            rig_realtime_priority=args.rig_realtime,
        ),
        record_dir=Path(tmp.name),
    )
    window.resize(1500, 920)
    window.traces.set_window_s(10.0)
    for name in window.traces.conductance_names():
        window.traces.show_conductance(name, True)

    # Count repaints of the trace plots, and time each refresh (the timer's whole job).
    paints = [0]

    class _PaintCounter(QtCore.QObject):
        def eventFilter(self, obj, event):
            if event.type() == QtCore.QEvent.Type.Paint:
                paints[0] += 1
            return False

    counter = _PaintCounter()
    window.traces.plots.viewport().installEventFilter(counter)
    costs: list[float] = []
    tick = window._tick

    def timed_tick() -> None:
        t0 = time.perf_counter()
        tick()
        costs.append(time.perf_counter() - t0)

    window.timer.timeout.disconnect()
    window.timer.timeout.connect(timed_tick)

    def run_events(seconds: float) -> None:
        loop = QtCore.QEventLoop()
        QtCore.QTimer.singleShot(round(seconds * 1000), loop.quit)
        loop.exec()

    load0 = os.getloadavg()[0]  # other work on the machine disturbs every figure below
    window.show()
    if not window.start_run():
        print(f"cannot start: {window.last_error}")
        return 1
    deadline = time.monotonic() + 180
    while window.state != "running" and time.monotonic() < deadline:
        run_events(0.1)
    if window.state != "running":
        print(f"the run did not start: {window.last_error}")
        return 1
    # Warm up until the loop has taken warmup_s of samples (it starts after "running").
    rate = float(window.engine.experiment.loop["rate_hz"])
    while _counters(window.engine)[0] < args.warmup_s * rate and time.monotonic() < deadline:
        run_events(0.5)

    engine = window.engine
    rows: list[dict] = []
    plan = ["closed", "open"] * args.repeats + ["flat out"]
    for phase in plan:
        if phase == "closed":
            window.timer.stop()
            window.hide()
        else:
            window.show()
            window.timer.setInterval(0 if phase == "flat out" else round(1000 / REFRESH_HZ))
            window.timer.start()
        costs.clear()
        refresh0, paints0 = window.traces.redraws, paints[0]
        c0 = _counters(engine)
        t0 = time.monotonic()
        cpu0 = time.thread_time()  # the GUI thread's own CPU time
        if phase == "closed":
            time.sleep(args.phase_s)  # nothing runs in the GUI thread
        else:
            run_events(args.phase_s)
        elapsed = time.monotonic() - t0
        cpu = time.thread_time() - cpu0
        c1 = _counters(engine)
        samples = c1[0] - c0[0]
        answered = c1[2] - c0[2]
        rows.append(
            {
                "phase": phase,
                "s": elapsed,
                "samples": samples,
                "late": (c1[1] - c0[1]) / samples if samples else float("nan"),
                "within2": (c1[3] - c0[3]) / answered if answered else float("nan"),
                "refresh": (window.traces.redraws - refresh0) / elapsed,
                "paint": (paints[0] - paints0) / elapsed,
                "cost_ms": 1000 * statistics.median(costs) if costs else float("nan"),
                "cpu_share": cpu / elapsed,
                "cpu_ms_per_paint": 1000 * cpu / max(1, paints[0] - paints0),
            }
        )
    window.timer.setInterval(round(1000 / REFRESH_HZ))
    window.stop_run()
    result = window.wait_finished(60.0)

    print(f"\nload average (1 min) before / after: {load0:.2f} / {os.getloadavg()[0]:.2f}")
    print(
        f"tuning window, 10 s trace window at 20 kHz, {len(window.traces.conductance_names())} "
        f"conductances drawn, simulated rig (wall clock), timer {REFRESH_HZ:g} Hz"
    )
    head = (
        f"{'phase':<9} {'s':>5} {'samples':>8} {'late rate':>10} {'within 2':>9} "
        f"{'refresh/s':>10} {'paint/s':>8} {'refresh ms':>11} {'GUI CPU':>8} {'CPU ms/paint':>13}"
    )
    print(head)
    print("-" * len(head))
    for r in rows:
        print(
            f"{r['phase']:<9} {r['s']:5.1f} {r['samples']:8.0f} {r['late']:10.4%} "
            f"{r['within2']:9.2%} {r['refresh']:10.1f} {r['paint']:8.1f} {r['cost_ms']:11.2f} "
            f"{r['cpu_share']:8.1%} {r['cpu_ms_per_paint']:13.1f}"
        )

    def med(phase: str, key: str) -> float:
        return float(np.median([r[key] for r in rows if r["phase"] == phase]))

    print("-" * len(head))
    for phase in ("closed", "open"):
        print(
            f"{'median ' + phase:<16} late rate {med(phase, 'late'):.4%}, within 2 samples "
            f"{med(phase, 'within2'):.2%}, refresh/s {med(phase, 'refresh'):.1f}, "
            f"paint/s {med(phase, 'paint'):.1f}"
        )
    closed_late, open_late = med("closed", "late"), med("open", "late")
    ratio = open_late / closed_late if closed_late > 0 else float("nan")
    print(
        f"late rate open / closed: {ratio:.2f} "
        f"(open {open_late:.4%}, closed {closed_late:.4%}); redraw capacity (flat out): "
        f"{rows[-1]['refresh']:.1f} refreshes/s, {rows[-1]['paint']:.1f} paints/s; "
        f"GUI CPU per redraw {rows[-1]['cpu_ms_per_paint']:.1f} ms "
        f"(= {1000 / rows[-1]['cpu_ms_per_paint']:.0f} redraws/s on a free core)"
    )
    if result is not None and result.nwb_path:
        print(f"run: {result.exit_reason}; {result.samples} samples recorded")
    window.close()
    tmp.cleanup()
    app.quit()
    return 0


if __name__ == "__main__":
    sys.exit(main())
