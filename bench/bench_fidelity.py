"""How close each way of clamping comes to a zero-latency clamp, over each link model.

    .venv/bin/python bench/bench_fidelity.py [--seconds 5] [--rates 10000,20000]

For each link model (``clampcore.links``), rate, host stall (none, or one a second
of 2, 5 or 10 ms) and mode (current mode: the host computes the current from the
newest V it has; law mode: the host sends the current law ahead by the default
lead and the board evaluates it at its own V), the same experiment with the same
seed runs in ``clampcore.linksim`` and is compared with the *ideal* run of the same
seed (every law evaluated on time at the board):

- e: the current error sqrt(sum (I_k - I*_k)^2) / sqrt(sum I*_k^2), I_k the current
  applied over sample k, on a subthreshold experiment (passive 100 pF cell, leak,
  two Poisson-driven synapses, two Ornstein–Uhlenbeck conductances);
- on a threshold-and-reset experiment (the same cell made integrate-and-fire, driven
  by Poisson excitation): firing-rate error against the ideal and the coincidence
  factor Gamma of Kistler, Gerstner & van Hemmen (1997, Neural Comput 9:1015) with a
  +-1 ms window (1 = the ideal's spikes exactly, 0 = chance);
- the lowest membrane potential below the experiment's floor (its lowest rest,
  reset or reversal potential; a conductance clamp cannot drive V below it);
- bytes per second each way, against half the link's throughput ceiling.

Time here is the board's sample clock: links, batching and stalls are modelled, the
machine's own scheduling is not (that is ``bench_loop.py``'s job). The "ideal" row
is the baseline measured in the same run.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from clampcore import linksim
from clampcore.links import LINKS

_CELL = {
    "model": "passive",
    "capacitance_pF": 100.0,
    "leak_nS": 5.0,
    "rest_mV": -70.0,
    "noise_pA": 2.0,
    "seed": 1,
}
_AMPLIFIER = {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0}

# Invented scenarios for the benchmark.
SUBTHRESHOLD = {
    "loop": {"rate_hz": 20000, "max_current_pA": 800.0, "spike_threshold_mV": -20.0},
    "cell": _CELL,
    "amplifier": _AMPLIFIER,
    "element": [
        {"kind": "leak", "name": "extra_leak", "g_nS": 5.0, "e_mV": -70.0},
        {
            "kind": "synapse",
            "name": "exc_inputs",
            "g_max_nS": 2.0,
            "e_mV": 0.0,
            "tau_decay_ms": 3.0,
            "source": "poisson",
            "rate_hz": 200.0,
            "seed": 1,
        },
        {
            "kind": "synapse",
            "name": "inh_inputs",
            "g_max_nS": 3.0,
            "e_mV": -75.0,
            "tau_decay_ms": 8.0,
            "source": "poisson",
            "rate_hz": 150.0,
            "seed": 2,
        },
        {
            "kind": "noise",
            "name": "bg_exc",
            "g_mean_nS": 3.0,
            "g_sd_nS": 1.0,
            "tau_ms": 2.7,
            "e_mV": 0.0,
            "seed": 3,
        },
        {
            "kind": "noise",
            "name": "bg_inh",
            "g_mean_nS": 6.0,
            "g_sd_nS": 2.0,
            "tau_ms": 10.5,
            "e_mV": -75.0,
            "seed": 4,
        },
    ],
}

THRESHOLD_RESET = {
    "loop": {"rate_hz": 20000, "max_current_pA": 800.0, "spike_threshold_mV": -45.0},
    "cell": _CELL,
    "amplifier": _AMPLIFIER,
    "element": [
        {
            "kind": "threshold_reset",
            "name": "imposed_spike",
            "threshold_mV": -50.0,
            "reset_mV": -65.0,
            "refractory_ms": 2.0,
            "g_nS": 60.0,
        },
        {
            "kind": "synapse",
            "name": "drive",
            "g_max_nS": 3.0,
            "e_mV": 0.0,
            "tau_decay_ms": 3.0,
            "source": "poisson",
            "rate_hz": 900.0,
            "seed": 5,
        },
        {
            "kind": "noise",
            "name": "bg_inh",
            "g_mean_nS": 4.0,
            "g_sd_nS": 1.5,
            "tau_ms": 10.5,
            "e_mV": -75.0,
            "seed": 6,
        },
    ],
}


def floor_mV(exp: dict) -> float:
    """The experiment's lowest rest, reset or reversal potential."""
    values = [exp["cell"]["rest_mV"]]
    for e in exp["element"]:
        values += [e[k] for k in ("e_mV", "reset_mV") if k in e]
    return min(values)


def current_error(run: linksim.LinkRun, ideal: linksim.LinkRun) -> float:
    return float(np.linalg.norm(run.i_pA - ideal.i_pA) / np.linalg.norm(ideal.i_pA))


def coincidence(spikes: np.ndarray, ref: np.ndarray, rate_hz: float, window_s: float) -> float:
    """Kistler et al. (1997) coincidence factor of ``spikes`` against ``ref`` (times, s).

    Gamma = (N_coinc - <N_coinc>) / (0.5 (N_ref + N)) / (1 - 2 nu Delta), with
    <N_coinc> = 2 nu Delta N_ref the coincidences a Poisson train of the same rate
    nu would have by chance (the form used by Jolivet et al. 2008, from memory).
    """
    if spikes.size == 0 or ref.size == 0:
        return 0.0
    duration = max(spikes[-1], ref[-1])
    nu = spikes.size / duration
    idx = np.searchsorted(spikes, ref)
    near = np.minimum(
        np.abs(spikes[np.clip(idx, 0, spikes.size - 1)] - ref),
        np.abs(spikes[np.clip(idx - 1, 0, spikes.size - 1)] - ref),
    )
    n_coinc = int(np.count_nonzero(near <= window_s))
    expected = 2 * nu * window_s * ref.size
    return (n_coinc - expected) / (0.5 * (ref.size + spikes.size)) / (1 - 2 * nu * window_s)


def _with_rate(exp: dict, rate_hz: int) -> dict:
    out = dict(exp)
    out["loop"] = {**exp["loop"], "rate_hz": rate_hz}
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=5.0)
    ap.add_argument("--rates", default="10000,20000")
    ap.add_argument("--links", default="direct,usb-hs,usb-fs,bridge")
    ap.add_argument("--stalls", default="0,2,5,10", help="host stall lengths, ms (one a second)")
    args = ap.parse_args()
    rates = [int(r) for r in args.rates.split(",")]
    stalls = [float(s) for s in args.stalls.split(",")]
    linksim.run(SUBTHRESHOLD, 0.01, mode="ideal")  # compile before timing anything
    print(
        "| link | rate | stall | mode | e (subthreshold) | rate error | Gamma ±1 ms "
        "| lowest V below floor | up B/s | down B/s | within half the ceiling |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    t0 = time.perf_counter()
    for rate in rates:
        sub = _with_rate(SUBTHRESHOLD, rate)
        tr = _with_rate(THRESHOLD_RESET, rate)
        ideal_sub = linksim.run(sub, args.seconds, mode="ideal")
        ideal_tr = linksim.run(tr, args.seconds, mode="ideal")
        ideal_times = np.flatnonzero(ideal_tr.spikes) / rate
        ideal_rate = ideal_times.size / args.seconds
        print(
            f"| ideal | {rate // 1000} kHz | – | law, every law on time | 0 (baseline) "
            f"| {ideal_rate:.1f} Hz | 1 | – | – | – | – |"
        )
        for name in args.links.split(","):
            link = LINKS[name]
            for stall in stalls:
                for mode in ("current", "law"):
                    r_sub = linksim.run(sub, args.seconds, link=name, mode=mode, stall_ms=stall)
                    r_tr = linksim.run(tr, args.seconds, link=name, mode=mode, stall_ms=stall)
                    times = np.flatnonzero(r_tr.spikes) / rate
                    rate_err = (times.size / args.seconds - ideal_rate) / ideal_rate
                    gamma = coincidence(times, ideal_times, rate, 1e-3)
                    below = min(
                        0.0,
                        r_sub.v_true_mV.min() - floor_mV(sub),
                        r_tr.v_true_mV.min() - floor_mV(tr),
                    )
                    up = max(r_sub.up_bytes, r_tr.up_bytes) / args.seconds
                    down = max(r_sub.down_bytes, r_tr.down_bytes) / args.seconds
                    fits = (
                        (up + down) <= link.ceiling_Bps / 2
                        if link.baud == 0
                        else (max(up, down) <= link.ceiling_Bps / 2)
                    )
                    print(
                        f"| {name} | {rate // 1000} kHz | {stall:g} ms | {mode} "
                        f"| {100 * current_error(r_sub, ideal_sub):.2f}% | {100 * rate_err:+.1f}% "
                        f"| {gamma:.3f} | {below:.2f} mV | {up:,.0f} | {down:,.0f} "
                        f"| {'yes' if fits else 'no'} |",
                        flush=True,
                    )
    print(f"\n{args.seconds:g} s per run; whole benchmark {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
