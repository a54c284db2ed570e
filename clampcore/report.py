"""The one-page characterisation report (matplotlib): PNG and PDF.

Panels: the hyperpolarising step family with the exponential fits, the V–I line,
the depolarising step family (three steps: below, at and above rheobase), the f–I
curve, the ramp and noise responses, and a table of every value.

Public names: ``write_report``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from clampcore.protocols import ProtocolRun


def _fmt(entry: dict[str, Any]) -> str:
    v = entry["value"]
    if v is None:
        return "n/a"
    if isinstance(v, list):
        return f"{len(v)} points"
    unit = "" if entry["unit"] == "1" else f" {entry['unit']}"
    return f"{v:.4g}{unit}"


def write_report(
    result: dict[str, Any],
    passive: ProtocolRun,
    active: ProtocolRun | None,
    out_stem: Path,
    title: str = "",
) -> tuple[Path, Path]:
    """Draw the report and write ``out_stem``.png and .pdf; returns both paths."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(11.7, 8.3))  # A4 landscape, inches
    grid = fig.add_gridspec(3, 3, hspace=0.55, wspace=0.35)
    fp = result["figure"]["passive"]
    values = result["values"]

    ax = fig.add_subplot(grid[0, 0])
    t_ms = np.arange(passive.v_mV.size) * passive.dt_ms
    for start, end, _ in fp["steps"]:
        sel = (t_ms >= start - 50) & (t_ms < end + 100)
        ax.plot(t_ms[sel] - start, passive.v_mV[sel], lw=0.7, color="0.3")
    for (t_fit, v_fit), (start, _, _) in zip(fp["fits"], fp["steps"], strict=False):
        ax.plot(t_fit - start, v_fit, lw=1.0, color="tab:red")
    ax.set(title="hyperpolarising steps, exponential fits", xlabel="ms from step", ylabel="mV")

    ax = fig.add_subplot(grid[0, 1])
    amps, dv = fp["amps_pA"], fp["dv_mV"]
    r = values["input_resistance"]["value"]
    ax.plot(amps, dv, "o", color="0.2")
    xs = np.array([min(0.0, amps.min()), max(0.0, amps.max())])
    ax.plot(xs, fp["intercept_mV"] + r / 1000.0 * xs, color="tab:red")
    ax.set(title=f"steady-state V–I: R = {r:.4g} MΩ", xlabel="pA", ylabel="ΔV (mV)")

    ax = fig.add_subplot(grid[0, 2])
    q = values["capacitance_onset"]["quality"]
    n_on = int(q["n_samples"])
    for trace in fp["onsets_per_pA"]:  # the ones the analysis used, from their baselines
        ax.plot(np.arange(trace.size) * passive.dt_ms, trace, lw=0.5, color="0.5")
    c_on = values["capacitance_onset"]["value"]
    ax.plot([0, n_on * passive.dt_ms], [0, n_on * passive.dt_ms / c_on], "r--", lw=1.2)
    ax.set(
        title=f"{int(q['n_pulses'])} onsets per pA: C = {c_on:.4g} pF", xlabel="ms", ylabel="mV/pA"
    )

    if active is not None:
        fa = result["figure"]["active"]
        ta = np.arange(active.v_mV.size) * active.dt_ms
        ax = fig.add_subplot(grid[1, 0:2])
        rates = fa["rates_hz"]
        fired = np.flatnonzero(rates > 0)
        last = len(rates) - 1
        picks = {last}
        if fired.size:
            picks |= {max(0, fired[0] - 1), fired[0], min(fired[0] + 2, last)}
        for k in sorted(picks):
            start, end, amp = fa["steps"][k]
            sel = (ta >= start - 50) & (ta < end + 100)
            ax.plot(ta[sel] - start, active.v_mV[sel], lw=0.6, label=f"{amp:.4g} pA")
        ax.legend(loc="upper right", fontsize=8)
        ax.set(title="depolarising steps", xlabel="ms from step", ylabel="mV")

        ax = fig.add_subplot(grid[1, 2])
        ax.plot(fa["amps_pA"], rates, "o-", color="tab:blue")
        slope = values["fi_slope"]["value"]
        rheo = values["rheobase"]["value"]
        ax.set(
            title=f"f–I: rheobase {rheo:.4g} pA, slope {slope:.3g} Hz/nA"
            if slope is not None and rheo is not None
            else "f–I",
            xlabel="pA",
            ylabel="Hz",
        )

        ramp = active.protocol.of_kind("ramp")
        if ramp:
            ax = fig.add_subplot(grid[2, 0])
            s0 = ramp[0]
            sel = (ta >= s0.start_ms) & (ta < s0.end_ms)
            ax.plot(active.stimulus_pA[sel], active.v_mV[sel], lw=0.4, color="tab:green")
            rr = values.get("rheobase_ramp", {}).get("value")
            ax.set(
                title=f"slow ramp: first spike at {rr:.4g} pA" if rr else "slow ramp",
                xlabel="pA",
                ylabel="mV",
            )
        noise = active.protocol.of_kind("noise")
        if noise:
            ax = fig.add_subplot(grid[2, 1])
            s0 = noise[0]
            sel = (ta >= s0.start_ms) & (ta < s0.start_ms + 1000.0)
            ax.plot(ta[sel] - s0.start_ms, active.v_mV[sel], lw=0.4, color="tab:purple")
            ax.set(title="noise current (first second)", xlabel="ms", ylabel="mV")

    ax = fig.add_subplot(grid[2, 2])
    ax.axis("off")
    rows = [(k.replace("_", " "), _fmt(e)) for k, e in values.items() if k != "fi_curve"]
    text = "\n".join(f"{name:<23}{val}" for name, val in rows)
    ax.text(-0.1, 1.1, text, va="top", family="monospace", fontsize=7.5, transform=ax.transAxes)
    fig.suptitle(title or "cell characterisation", fontsize=12)
    png, pdf = out_stem.with_suffix(".png"), out_stem.with_suffix(".pdf")
    fig.savefig(png, dpi=110)
    fig.savefig(pdf)
    plt.close(fig)
    return png, pdf
