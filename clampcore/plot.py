"""A quick-look figure of a recording: V with detected spikes, command, conductances, rasters.

Public names: ``plot_recording``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

# Above this many points a trace is drawn as its min/max envelope per bin: a 10-inch figure
# at 110 dpi is ~1100 pixels wide, so 4000 bins keep every spike visible (common practice).
_ENVELOPE_BINS = 4000


def _trace(ax: Any, t: np.ndarray, y: np.ndarray, **kw: Any) -> None:
    """Plot ``y`` against ``t``; long traces as a min/max envelope (spikes stay visible)."""
    if y.size <= 2 * _ENVELOPE_BINS:
        ax.plot(t, y, lw=0.6, **kw)
        return
    width = -(-y.size // _ENVELOPE_BINS)  # ceil: the last bin may be shorter, none is lost
    starts = np.arange(0, y.size, width)
    lo, hi = np.minimum.reduceat(y, starts), np.maximum.reduceat(y, starts)
    ax.fill_between(t[starts], lo, hi, lw=0.4, **kw)


def plot_recording(
    summary: dict[str, Any],
    png: Path,
    title: str = "",
    from_s: float | None = None,
    to_s: float | None = None,
) -> Path:
    """Write a PNG of ``clampcore.nwb.read_nwb_summary`` output, between ``from_s`` and ``to_s``
    (s from the session start; default: all): membrane potential with the detected spikes,
    command current, every element's conductance, and the spike raster of every source."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rate = float(summary["rate_hz"])
    v = np.asarray(summary["v_mV"] if summary["v_mV"] is not None else [], dtype=np.float64)
    i = np.asarray(summary["i_pA"] if summary["i_pA"] is not None else [], dtype=np.float64)
    t = float(summary.get("starting_time_s", 0.0)) + np.arange(v.size) / rate
    lo = t[0] if from_s is None and t.size else (from_s or 0.0)
    hi = t[-1] if to_s is None and t.size else (to_s if to_s is not None else lo)
    keep = (t >= lo) & (t <= hi)
    conductances = {
        name.partition("/")[2]: np.asarray(values)[keep]
        for name, values in summary["columns"].items()
        if name.startswith("g_nS/") and np.any(np.asarray(values)[keep] != 0)
    }
    spikes = {
        name: times[(times >= lo) & (times <= hi)]
        for name, times in summary.get("spike_times_s", {}).items()
    }
    heights = [3, 2] + ([2] if conductances else []) + [1]
    fig, axes = plt.subplots(
        len(heights), 1, figsize=(10, 1.6 * sum(heights) / 1.4), sharex=True,
        gridspec_kw={"height_ratios": heights},
    )  # fmt: skip
    ax_v, ax_i, *rest = axes
    ax_s = rest[-1]
    tk = t[keep]
    _trace(ax_v, tk, v[keep], color="#1b4f72")
    cell = spikes.get("cell", np.zeros(0))
    if cell.size and v.size:
        idx = np.clip(np.round((cell - t[0]) * rate).astype(int), 0, v.size - 1)
        ax_v.plot(cell, v[idx], "v", color="#c0392b", ms=4, label="detected spikes")
        ax_v.legend(loc="upper right", fontsize=8)
    ax_v.set_ylabel("membrane\npotential (mV)")
    _trace(ax_i, tk, i[keep] if i.size else np.zeros(tk.size), color="#7d3c98")
    ax_i.set_ylabel("command\ncurrent (pA)")
    if conductances:
        ax_g = rest[0]
        colours = plt.get_cmap("tab10")
        for k, (name, g) in enumerate(conductances.items()):
            _trace(ax_g, tk, g, color=colours(k % 10), label=name)
        ax_g.set_ylabel("conductance\n(nS)")
        ax_g.legend(loc="upper right", fontsize=7, ncol=min(3, len(conductances)))
    names = list(spikes)
    for row, name in enumerate(names):
        ax_s.vlines(
            spikes[name], row + 0.1, row + 0.9, color="#c0392b" if name == "cell" else "#117a65"
        )
    ax_s.set_yticks(np.arange(len(names)) + 0.5, names, fontsize=8)
    ax_s.set_ylim(0, max(1, len(names)))
    ax_s.set_xlabel("time (s)")
    ax_s.set_ylabel("spikes")
    if hi > lo:
        ax_s.set_xlim(lo, hi)
    if title:
        fig.suptitle(title, fontsize=10)
    fig.align_ylabels(axes)
    fig.tight_layout()
    fig.savefig(png, dpi=110)
    plt.close(fig)
    return Path(png)
