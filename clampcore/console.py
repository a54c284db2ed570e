"""A run on a terminal: the live status line, timing warnings, the end-of-run summary.

Used by the command line (``clampcore run``) and the demo.

Public names: ``run_with_status``, ``scheduling_text``, ``TimingWatch``.
"""

from __future__ import annotations

import signal
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

# Warn once when, over one status interval, more than this share of commands came late
# (the board's LATE bit) or the p99 latency reaches this many samples. On this project's
# machines a healthy run stays below 1% late and p99 4 samples at 20 kHz (README, Benchmarks).
WARN_LATE_PERCENT = 5.0
WARN_LATENCY_SAMPLES = 8


class TimingWatch:
    """Warns once when, over one status interval, the late share or p99 latency crosses
    its threshold (the loop's timing collapsing mid-run)."""

    def __init__(
        self,
        late_percent: float = WARN_LATE_PERCENT,
        latency_samples: int = WARN_LATENCY_SAMPLES,
    ) -> None:
        self.late_percent = late_percent
        self.latency_samples = latency_samples
        self._last: dict[str, Any] | None = None
        self.warned = False

    def check(self, status: dict[str, Any], rate_hz: float) -> str | None:
        """The warning to print for this status, once per run; else None."""
        last, self._last = self._last, status
        if self.warned or not status or last is None or not last:
            return None
        samples = status["samples"] - last["samples"]
        if samples < rate_hz * 0.2:  # too few samples in this interval to judge
            return None
        late = 100.0 * (status["late"] - last["late"]) / samples
        hist = status["latency_hist"] - last["latency_hist"]
        total = float(hist.sum())
        p99 = int(np.searchsorted(np.cumsum(hist), 0.99 * total)) if total else 0
        why = []
        if late > self.late_percent:
            why.append(
                f"{late:.1f}% of commands came late (--warn-late-percent {self.late_percent:g})"
            )
        if total and p99 >= self.latency_samples:
            last_bin = hist.size - 1
            shown = f">= {last_bin}" if p99 >= last_bin else f"{p99}"
            why.append(
                f"latency p99 {shown} samples (--warn-latency-samples {self.latency_samples})"
            )
        if not why:
            return None
        self.warned = True
        return (
            f"warning: the loop's timing collapsed at t = {status['elapsed_s']:.1f} s: "
            + "; ".join(why)
            + ". Close other programs; the run goes on (warned once)"
        )


def _interrupt_handlers(
    journal: Path | None,
) -> tuple[Callable[[int, Any], None], Callable[[int, Any], None]]:
    """The handler of the first Ctrl-C / SIGTERM: it installs the second one's, then stops
    the run. The second (and any later) only says that the recording is being written and
    how to rebuild it if the program is killed now."""

    def again(signum: int, frame: Any) -> None:
        where = f"`clampcore recover {journal}`" if journal else "`clampcore recover JOURNAL`"
        print(
            "\nalready stopping: the recording is being written, please wait. If this program "
            f"is killed now, the journal keeps every sample and {where} rebuilds the NWB file",
            file=sys.stderr,
            flush=True,
        )

    def first(signum: int, frame: Any) -> None:
        signal.signal(signal.SIGINT, again)
        signal.signal(signal.SIGTERM, again)
        raise KeyboardInterrupt

    return first, again


def run_with_status(
    engine: Any,
    duration_s: float | None,
    out: str | None,
    force: bool = False,
    watch: TimingWatch | None = None,
) -> Any:
    """Start ``engine``, print a live status line until it ends (or Ctrl-C), then a summary.

    A second Ctrl-C (or SIGTERM) while stopping does not interrupt writing the recording:
    it says so, and how to rebuild the NWB from the journal if the program is killed.
    """
    from clampcore.engine import status_line

    rate = float(engine.experiment.loop["rate_hz"])
    watch = watch or TimingWatch()
    engine.start(duration_s=duration_s, out=out, force=force)
    # SIGTERM (e.g. `kill`) stops the run as cleanly as Ctrl-C does.
    first, again = _interrupt_handlers(getattr(engine.recorder, "path", None))
    signal.signal(signal.SIGINT, first)
    signal.signal(signal.SIGTERM, first)
    tty = sys.stdout.isatty()
    warned: set[str] = set()
    try:
        while not engine.wait(0.5):
            status = engine.status()
            line = status_line(status, rate)
            print(("\r" + line) if tty else line, end="" if tty else "\n", flush=True)
            for warning in (watch.check(status, rate), status.get("recording_warning")):
                if warning and warning not in warned:
                    warned.add(warning)
                    print(("\n" if tty else "") + warning, file=sys.stderr, flush=True)
    except KeyboardInterrupt:
        print("\nstopping: 0 pA first, then the board, then the recording", flush=True)
    signal.signal(signal.SIGINT, again)  # from here on nothing interrupts the writing
    signal.signal(signal.SIGTERM, again)
    try:
        result = engine.finish()
    finally:
        signal.signal(signal.SIGINT, signal.default_int_handler)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if result.samples:
        print(("\n" if tty else "") + status_line(result.summary, rate))
    if result.error:
        print(f"clampcore: {result.error}", file=sys.stderr)  # the reason, printed once
    else:
        print(f"ended: {result.exit_reason}")
    t = result.timing
    if result.notice:
        print(f"note: {result.notice}")
    if result.samples == 0:
        print("no samples were recorded; no recording written")
    elif result.mode == "law":
        s = result.summary
        share = 1.0 - s.get("faults", 0) / max(1, result.samples)
        print(
            f"law mode: the board evaluated the law at its own V on {share:.2%} of samples; "
            f"{s.get('faults', 0)} at 0 pA (no law young enough, or a fault), "
            f"{s.get('late', 0)} flagged with late laws; {s.get('late_spikes', 0)} cell spikes "
            "heard too late by a cell-driven synapse (each delivered with the next law made)"
        )
    elif t.get("latency_p50_samples") is not None and t.get("turnaround_p50_us") is not None:
        print(
            "timing: latency p50 {:.0f} / p99 {:.0f} samples; within 1/2/3 samples "
            "{:.2%} / {:.2%} / {:.2%}; host turnaround p50 {:.1f} µs, p99.9 {:.1f} µs".format(
                t["latency_p50_samples"],
                t["latency_p99_samples"],
                t["share_within_1_samples"],
                t["share_within_2_samples"],
                t["share_within_3_samples"],
                t["turnaround_p50_us"],
                t["turnaround_p99.9_us"],
            )
        )
    else:
        print("timing: too few answered samples to measure latency")
    if result.samples and result.scheduling:
        print(scheduling_text(result.scheduling))
    if result.nwb_path:
        print(f"recording: {result.nwb_path}")
    if result.journal_path and result.journal_path.exists():
        print(f"journal kept: {result.journal_path}")
    return result


def scheduling_text(scheduling: dict[str, Any]) -> str:
    """One line: what the loop process got of the real-time settings it asked for."""
    prio = scheduling.get("fifo_priority", 0)
    fifo = f"SCHED_FIFO {prio}" if prio else "ordinary scheduling"
    dma = "held at 0" if scheduling.get("cpu_dma_latency_held") else "not held"
    return f"loop process: {fifo}; /dev/cpu_dma_latency {dma} (see README, timing options)"
