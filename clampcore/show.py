"""``clampcore show``: a text summary and the figure of any clampcore recording or a slice.

Reads only through :func:`clampcore.nwb.read_nwb_summary` (pynwb), so files of every
format this project has written are shown alike.

Public names: ``show``, ``summary_text``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from clampcore.lawloop import FLAG_STALE
from clampcore.nwb import NwbError, read_nwb_summary
from clampcore.plot import plot_recording
from clampcore.step import FAULT_BAD_V, FAULT_NONFINITE, FLAG_LIMITED


def _window(summary: dict[str, Any], from_s: float | None, to_s: float | None) -> tuple:
    start = float(summary["starting_time_s"])
    end = start + summary["n_samples"] / float(summary["rate_hz"])
    lo = start if from_s is None else float(from_s)
    hi = end if to_s is None else float(to_s)
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        raise NwbError(f"--from {lo:g} --to {hi:g}: the slice must end after it starts")
    if hi <= start or lo >= end:
        raise NwbError(f"--from {lo:g} --to {hi:g}: outside the recording ({start:g}-{end:g} s)")
    return max(lo, start), min(hi, end)


def summary_text(summary: dict[str, Any], lo: float, hi: float) -> str:
    """Duration, rate, spikes and rates, timing statistics, faults and parameter changes."""
    rate = float(summary["rate_hz"])
    first = int(summary["first_sample"])
    rows = slice(
        max(0, round(lo * rate) - first), max(0, round(hi * rate) - first)
    )  # rows of the slice
    span = hi - lo
    lines = [
        f"{summary.get('source') or 'unknown source'}, started "
        f"{summary['session']['session_start']}; "
        + ("complete" if summary["complete"] else "recovered from an interrupted journal"),
        f"recording: {summary['n_samples'] / rate:.3f} s at {rate:g} Hz "
        f"({summary['n_samples']} samples); shown: {lo:.3f}-{hi:.3f} s",
    ]
    for name, times in summary["spike_times_s"].items():
        n = int(np.count_nonzero((times >= lo) & (times < hi)))
        lines.append(f"spikes {name}: {n} ({n / span:.2f} Hz)")
    columns = summary["columns"]

    def known(name: str) -> np.ndarray:  # the slice's known values of a column
        values = columns.get(name, np.zeros(0))[rows]
        return values[np.isfinite(values)]

    lat = known("latency_samples")
    if lat.size:
        lines.append(
            f"latency: p50 {np.percentile(lat, 50):.0f}, p99 {np.percentile(lat, 99):.0f}, "
            f"max {lat.max():.0f} samples; within 1 sample {np.mean(lat <= 1):.2%}"
        )
    turn = known("turnaround_us")
    if turn.size:
        lines.append(
            f"host turnaround: p50 {np.percentile(turn, 50):.1f}, "
            f"p99.9 {np.percentile(turn, 99.9):.1f}, max {turn.max():.1f} µs"
        )
    counter = columns.get("sample_counter")
    if counter is not None and counter[rows].size > 1:
        missing = int(np.sum(np.diff(counter[rows]) - 1))
        lines.append(f"samples missing (gaps in the board's counter): {missing}")
    flags = columns.get("flags")
    if flags is not None:
        f = np.nan_to_num(flags[rows]).astype(np.int64)
        faults = int(np.count_nonzero(f & (FAULT_BAD_V | FAULT_NONFINITE)))
        limited = int(np.count_nonzero(f & FLAG_LIMITED))
        line = f"fault samples (0 pA injected): {faults}; at the current limit: {limited}"
        stale = int(np.count_nonzero(f & FLAG_STALE))
        if stale:  # law mode: the board had no law young enough (PROTOCOL.md §10)
            line += f"; without a young law (0 pA): {stale}"
        lines.append(line)
    events = [e for e in summary["events"] if lo <= e["time_s"] < hi]
    others = [e for e in events if e["kind"] != "param"]
    lines.append(f"events: {len(others)}" + ("" if not others else ":"))
    for e in others[:20]:
        fields = ", ".join(
            f"{k}={v}" for k, v in e.items() if k not in ("sample", "kind", "time_s")
        )
        lines.append(f"  {e['time_s']:9.4f} s  {e['kind']}  {fields}")
    changes = [e for e in events if e["kind"] == "param"]
    lines.append(f"parameter changes: {len(changes)}" + ("" if not changes else ":"))
    for e in changes:
        lines.append(
            f"  {e['time_s']:9.4f} s  {e.get('element')}.{e.get('field')} = {e.get('new')}"
        )
    return "\n".join(lines)


def show(
    path: Path, from_s: float | None = None, to_s: float | None = None, out: str | None = None
) -> int:
    """Print the summary of ``path`` (or of a slice) and write its figure; returns 0."""
    summary = read_nwb_summary(Path(path))
    lo, hi = _window(summary, from_s, to_s)
    print(summary_text(summary, lo, hi))
    png = Path(out) if out else Path(path).with_suffix(".png")
    title = f"{Path(path).name}, {lo:.3f}-{hi:.3f} s"
    plot_recording(summary, png, title=title, from_s=lo, to_s=hi)
    print(f"figure: {png}")
    return 0
