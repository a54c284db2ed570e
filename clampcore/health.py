"""Loop health: the loop's shared counters turned into figures.

``loop_health`` reads a copy of the ``stats`` array (``clampcore.shared`` ``ST_*``):
the latency histogram in samples and µs, turnaround percentiles, late and missing
commands, bad frames, watchdog trips, faults, clipped samples, spikes. The command
line's status line and the window's health panel both show these figures.

Public names: ``loop_health``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from clampcore.shared import (
    LAT_BINS,
    ST_BAD_FRAMES,
    ST_COMMANDS,
    ST_FAULTS,
    ST_LAT_HIST,
    ST_LATE,
    ST_LATE_SPIKES,
    ST_LIMITED,
    ST_MISSING,
    ST_RX_ERROR,
    ST_SAMPLES,
    ST_SPIKES,
    ST_TURN_HIST,
    ST_UNANSWERED,
    ST_WATCHDOG,
    ST_ZEROED,
    TURN_BIN_US,
)


def _percentile(hist: np.ndarray, q: float) -> float:
    """Bin index holding the q-th percentile of a histogram (NaN when empty)."""
    total = float(hist.sum())
    if total <= 0:
        return float("nan")
    return float(np.searchsorted(np.cumsum(hist), total * q / 100.0))


def loop_health(stats: np.ndarray, rate_hz: float) -> dict[str, Any]:
    """Health figures from a copy of the loop's ``stats`` array."""
    st = np.asarray(stats, dtype=np.float64)
    sample_us = 1e6 / rate_hz
    lat = st[ST_LAT_HIST : ST_LAT_HIST + LAT_BINS]
    turn = st[ST_TURN_HIST:]
    samples = int(st[ST_SAMPLES])
    answered = float(lat.sum())
    p50 = _percentile(lat, 50)
    p99 = _percentile(lat, 99)
    return {
        "samples": samples,
        "latency_hist": lat.copy(),
        "turnaround_hist": turn.copy(),
        "latency_p50_samples": p50,
        "latency_p99_samples": p99,
        "latency_p50_us": p50 * sample_us,
        "latency_p99_us": p99 * sample_us,
        "within_2_samples": float(lat[:3].sum() / answered) if answered else float("nan"),
        # Bin centres: a turnaround in bin k lies in [k, k+1) x TURN_BIN_US.
        "turnaround_p50_us": (_percentile(turn, 50) + 0.5) * TURN_BIN_US,
        "turnaround_p99_us": (_percentile(turn, 99) + 0.5) * TURN_BIN_US,
        "late": int(st[ST_LATE]),
        "missing": int(st[ST_MISSING]),
        "unanswered": int(st[ST_UNANSWERED]),
        "bad_frames": int(st[ST_BAD_FRAMES]),
        "watchdog": int(st[ST_WATCHDOG]),
        "rx_errors": int(st[ST_RX_ERROR]),
        "faults": int(st[ST_FAULTS]),
        "limited": int(st[ST_LIMITED]),
        "zeroed": int(st[ST_ZEROED]),
        "commands": int(st[ST_COMMANDS]),
        "spikes": int(st[ST_SPIKES]),
        # Law mode: cell spikes a cell-driven synapse heard too late (delivered late).
        "late_spikes": int(st[ST_LATE_SPIKES]),
        "elapsed_s": samples / rate_hz,
        "firing_rate_hz": st[ST_SPIKES] / (samples / rate_hz) if samples else 0.0,
    }
