"""A quick-look figure of a recording: membrane potential, command current, spikes.

Public names: ``plot_recording``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np


def plot_recording(summary: dict[str, Any], png: Path, title: str = "") -> Path:
    """Write a PNG of V, I and spike rasters from ``clampcore.nwb.read_nwb_summary`` output."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    v = np.asarray(summary["v_mV"])
    i = np.asarray(summary["i_pA"])
    t = np.arange(v.size) / float(summary["rate_hz"])
    spikes: dict[str, np.ndarray] = summary.get("spike_times_s", {})
    fig, axes = plt.subplots(
        3, 1, figsize=(10, 6.5), sharex=True, gridspec_kw={"height_ratios": [3, 2, 1]}
    )
    ax_v, ax_i, ax_s = axes
    ax_v.plot(t, v, lw=0.6, color="#1b4f72")
    cell = np.asarray(spikes.get("cell", []))
    if cell.size:
        idx = np.clip(np.round(cell * summary["rate_hz"]).astype(int), 0, v.size - 1)
        ax_v.plot(cell, v[idx], "v", color="#c0392b", ms=4, label="detected spikes")
        ax_v.legend(loc="upper right", fontsize=8)
    ax_v.set_ylabel("membrane potential (mV)")
    ax_i.plot(t, i, lw=0.6, color="#7d3c98")
    ax_i.set_ylabel("command current (pA)")
    names = list(spikes)
    for row, name in enumerate(names):
        times = np.asarray(spikes[name])
        ax_s.vlines(times, row + 0.1, row + 0.9, color="#c0392b" if name == "cell" else "#117a65")
    ax_s.set_yticks(np.arange(len(names)) + 0.5, names, fontsize=8)
    ax_s.set_ylim(0, max(1, len(names)))
    ax_s.set_xlabel("time (s)")
    ax_s.set_ylabel("spikes")
    if title:
        fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    fig.savefig(png, dpi=110)
    plt.close(fig)
    return Path(png)
