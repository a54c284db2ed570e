"""How close each way of clamping comes to a zero-latency clamp, over each link model.

    .venv/bin/python bench/bench_fidelity.py [--seconds 5] [--rates 10000,20000]
    .venv/bin/python bench/bench_fidelity.py --wall [--seconds 2]   # through the rig

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

By default time is the board's sample clock (``clampcore.linksim``): links,
batching and stalls are modelled, the machine's own scheduling is not. With
``--wall`` every row is a real run on the wall clock: the host's loop process and
the simulated rig over a pseudo-terminal, the rig holding bytes as the link would
(``clampcore rig --link``, every link model), host stalls made by stopping the loop
process (SIGSTOP) for the stall's length once a second, and I_k read from the rig's
ground-truth log. The "ideal" row is the baseline of the same run.
"""

from __future__ import annotations

import argparse
import os
import signal
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import read_log

from clampcore import linksim
from clampcore.engine import Engine, RunOptions
from clampcore.links import LINKS
from clampcore.nwb import read_nwb_summary

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


def _stall_host(engine: Engine, stall_ms: float, stop: threading.Event) -> None:
    """Stop the loop process for ``stall_ms`` once a second (SIGSTOP, then SIGCONT)."""
    while not stop.wait(1.0 - stall_ms / 1000.0):
        pid = engine.loop_pid
        if pid is None:
            continue
        try:
            os.kill(pid, signal.SIGSTOP)
            time.sleep(stall_ms / 1000.0)
            os.kill(pid, signal.SIGCONT)
        except ProcessLookupError:  # the run ended meanwhile
            return


def wall_run(exp: dict, seconds: float, link: str, mode: str, stall_ms: float) -> linksim.LinkRun:
    """One run through the rig on the wall clock, as a ``LinkRun`` read from its logs."""
    with tempfile.TemporaryDirectory() as tmp:
        log = Path(tmp) / "rig.log"
        options = RunOptions(
            rig_clock="wall", rig_log=log, rig_link=None if link == "direct" else link,
            mode=mode, watchdog_ms=100.0,
        )  # fmt: skip
        engine = Engine(exp, "sim", options, rig_factory=start_rig)
        engine.start(duration_s=seconds, out=Path(tmp) / "run.nwb")
        stop = threading.Event()
        staller = threading.Thread(target=_stall_host, args=(engine, stall_ms, stop))
        if stall_ms > 0:
            staller.start()
        engine.wait(seconds + 60)
        stop.set()
        if stall_ms > 0:
            staller.join()
        result = engine.finish()
        gt = read_log(log).for_run(1)
        rec = read_nwb_summary(result.nwb_path)
    n = int(min(len(gt) - 1, rec["n_samples"]))
    spikes = np.zeros(n, dtype=np.int64)
    cell = rec["columns"]["spike/cell"][:n] != 0
    spikes[cell] = 1
    # Record k + 1 of the log holds the current that drove the cell over (t_k, t_k+1].
    return linksim.LinkRun(
        mode=mode, link=link, rate_hz=float(exp["loop"]["rate_hz"]), lead_samples=0,
        adc=gt.adc_counts[:n].astype(np.int64), v_true_mV=gt.v_true_mV[:n],
        i_pA=gt.i_applied_pA[1 : n + 1], flags=spikes, g_nS=np.zeros((n, 0)),
        i_element_pA=np.zeros((n, 0)), up_bytes=0, down_bytes=0, late_spikes=0,
    )  # fmt: skip


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=5.0)
    ap.add_argument("--rates", default="10000,20000")
    ap.add_argument("--links", default="direct,usb-hs,usb-fs,bridge")
    ap.add_argument("--stalls", default="0,2,5,10", help="host stall lengths, ms (one a second)")
    ap.add_argument("--wall", action="store_true", help="real runs through the simulated rig")
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
                    if args.wall:
                        r_sub = wall_run(sub, args.seconds, name, mode, stall)
                        r_tr = wall_run(tr, args.seconds, name, mode, stall)
                        n_sub = min(r_sub.i_pA.size, ideal_sub.i_pA.size)
                        n_tr = min(r_tr.flags.size, ideal_tr.flags.size)
                        r_sub.i_pA, i_sub = r_sub.i_pA[:n_sub], ideal_sub.i_pA[:n_sub]
                        r_tr.flags = r_tr.flags[:n_tr]
                        ideal_times_tr = ideal_times[ideal_times < n_tr / rate]
                    else:
                        r_sub = linksim.run(sub, args.seconds, link=name, mode=mode,
                                            stall_ms=stall)  # fmt: skip
                        r_tr = linksim.run(tr, args.seconds, link=name, mode=mode, stall_ms=stall)
                        i_sub = ideal_sub.i_pA
                        ideal_times_tr = ideal_times
                    times = np.flatnonzero(r_tr.spikes) / rate
                    rate_err = (times.size - ideal_times_tr.size) / ideal_times_tr.size
                    gamma = coincidence(times, ideal_times_tr, rate, 1e-3)
                    below = min(
                        0.0,
                        r_sub.v_true_mV.min() - floor_mV(sub),
                        r_tr.v_true_mV.min() - floor_mV(tr),
                    )
                    if args.wall:  # bytes as the sample-time model counts them
                        model = linksim.run(sub, 0.5, link=name, mode=mode)
                        up, down = model.up_bytes / 0.5, model.down_bytes / 0.5
                    else:
                        up = max(r_sub.up_bytes, r_tr.up_bytes) / args.seconds
                        down = max(r_sub.down_bytes, r_tr.down_bytes) / args.seconds
                    e = float(np.linalg.norm(r_sub.i_pA - i_sub) / np.linalg.norm(i_sub))
                    fits = (
                        (up + down) <= link.ceiling_Bps / 2
                        if link.baud == 0
                        else (max(up, down) <= link.ceiling_Bps / 2)
                    )
                    print(
                        f"| {name} | {rate // 1000} kHz | {stall:g} ms | {mode} "
                        f"| {100 * e:.2f}% | {100 * rate_err:+.1f}% "
                        f"| {gamma:.3f} | {below:.2f} mV | {up:,.0f} | {down:,.0f} "
                        f"| {'yes' if fits else 'no'} |",
                        flush=True,
                    )
    print(f"\n{args.seconds:g} s per run; whole benchmark {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
