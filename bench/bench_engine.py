"""Benchmark of the engine: one ``step`` inside a compiled loop, and offline simulation.

1. The cost of one ``step`` in ns, measured inside one numba function that calls
   it for every sample of a recorded membrane-potential trace (no Python call
   per sample), for the typical experiment of project issue 2 (leak +
   threshold_reset + two synapses + two noise conductances + one virtual LIF
   neuron), beside a baseline measured in the same run: the same compiled loop
   with a leak-only program.
2. Offline simulation speed, ``clampcore.simulate`` end to end (program, model
   cell, closed loop, recording), in simulated seconds per wall second at
   20 kHz, for the typical experiment on the passive and on the Hodgkin–Huxley
   cell, beside the leak-only experiment on the passive cell.

Figures are medians of repeats; ratios are to the baseline of the same run.
Targets (project issue 2): a step under 200 ns; offline simulation with the
passive cell at least 100x real time. Prints a markdown table for the README.

    .venv/bin/python bench/bench_engine.py

Public names: ``main``, ``typical_experiment``.
"""

from __future__ import annotations

import os
import statistics
import time

import numpy as np
from numba import njit

import clampcore
from clampcore import build_program
from clampcore.program import Program
from clampcore.step import step

RATE_HZ = 20000.0  # the loop's usual sample rate
N_STEPS = 200_000  # 10 s of samples per timed repeat of the step loop
STEP_REPEATS = 15
SIM_DURATION_S = 5.0
SIM_REPEATS = 5
TARGET_STEP_NS = 200.0  # project issue 2
TARGET_PASSIVE_SPEED = 100.0  # x real time, project issue 2


def typical_experiment(cell_model: str = "passive") -> dict:
    """Leak + threshold_reset + two synapses + two noise + one virtual LIF neuron."""
    return {
        "loop": {"rate_hz": RATE_HZ, "max_current_pA": 800.0},
        "cell": {"model": cell_model, "capacitance_pF": 100.0, "noise_pA": 5.0, "seed": 1},
        "element": [
            {"kind": "leak", "name": "vleak", "g_nS": 3.0, "e_mV": -65.0},
            {"kind": "threshold_reset", "name": "imposed", "threshold_mV": -50.0},
            {
                "kind": "synapse",
                "name": "ampa",
                "kinetics": "dual_exp",
                "tau_rise_ms": 0.5,
                "tau_decay_ms": 3.0,
                "g_max_nS": 4.0,
                "source": "poisson",
                "rate_hz": 40.0,
                "seed": 2,
            },
            {
                "kind": "synapse",
                "name": "from_virtual",
                "kinetics": "exp",
                "tau_decay_ms": 8.0,
                "g_max_nS": 3.0,
                "e_mV": -75.0,
                "source": "partner",
                "tau_rec_ms": 300.0,
            },
            {"kind": "noise", "name": "ge", "g_mean_nS": 6.0, "g_sd_nS": 2.0, "seed": 3},
            {
                "kind": "noise",
                "name": "gi",
                "g_mean_nS": 15.0,
                "g_sd_nS": 4.0,
                "tau_ms": 10.5,
                "e_mV": -75.0,
                "seed": 4,
            },
            {"kind": "neuron", "name": "partner", "model": "lif", "bias_pA": 220.0},
        ],
    }


def _leak_only(cell_model: str = "passive") -> dict:
    exp = typical_experiment(cell_model)
    exp["element"] = [exp["element"][0]]
    return exp


@njit(cache=True, nogil=True)
def _step_loop(v_trace, n0, pa, out) -> None:
    """Call ``step`` for ``out.size`` samples, V read from ``v_trace`` (cyclically)."""
    n_v = v_trace.size
    for k in range(out.size):
        out[k] = step(v_trace[k % n_v], n0 + k, pa)


def _median_step_ns(program: Program, v_trace: np.ndarray) -> float:
    out = np.empty(N_STEPS)
    arrays = program.arrays()
    _step_loop(v_trace, 0, arrays, out[:10])  # compile (or load from the cache)
    n0 = 10  # the sample index keeps counting, as in a run (neuron refractoriness uses it)
    times = []
    for _ in range(STEP_REPEATS):
        t0 = time.perf_counter_ns()
        _step_loop(v_trace, n0, arrays, out)
        times.append(time.perf_counter_ns() - t0)
        n0 += N_STEPS
    return statistics.median(times) / N_STEPS


def _median_sim_speed(exp: dict) -> float:
    clampcore.simulate(exp, 0.01)  # compile (or load from the cache)
    times = []
    for _ in range(SIM_REPEATS):
        t0 = time.perf_counter()
        clampcore.simulate(exp, SIM_DURATION_S)
        times.append(time.perf_counter() - t0)
    return SIM_DURATION_S / statistics.median(times)


def main() -> None:
    """Print the benchmark's figures as a markdown table."""
    typical = typical_experiment("passive")
    # A realistic V trace: 10 s of the typical experiment on the passive cell.
    rec = clampcore.simulate(typical, N_STEPS / RATE_HZ)
    v_trace = np.ascontiguousarray(rec.v_mV)
    rows = []
    base_ns = _median_step_ns(build_program(_leak_only()), v_trace)
    step_ns = _median_step_ns(build_program(typical), v_trace)
    rows.append(("step, leak only (baseline)", f"{base_ns:.1f} ns", "1.0", ""))
    rows.append(
        (
            "step, typical experiment (7 elements)",
            f"{step_ns:.1f} ns",
            f"{step_ns / base_ns:.1f}",
            f"< {TARGET_STEP_NS:.0f} ns: {'met' if step_ns < TARGET_STEP_NS else 'MISSED'}",
        )
    )
    base_speed = _median_sim_speed(_leak_only("passive"))
    passive_speed = _median_sim_speed(typical)
    hh_speed = _median_sim_speed(typical_experiment("hh"))
    rows.append(("simulate, passive cell, leak only (baseline)", f"{base_speed:.0f}x", "1.0", ""))
    met = "met" if passive_speed >= TARGET_PASSIVE_SPEED else "MISSED"
    rows.append(
        (
            "simulate, passive cell, typical experiment",
            f"{passive_speed:.0f}x",
            f"{passive_speed / base_speed:.2f}",
            f">= {TARGET_PASSIVE_SPEED:.0f}x: {met}",
        )
    )
    rows.append(
        (
            "simulate, HH cell, typical experiment",
            f"{hh_speed:.0f}x",
            f"{hh_speed / base_speed:.2f}",
            "",
        )
    )
    print(
        f"Engine at {RATE_HZ:.0f} Hz: step cost inside a compiled loop (median of "
        f"{STEP_REPEATS} x {N_STEPS} samples) and offline simulation speed in simulated s "
        f"per wall s (median of {SIM_REPEATS} x {SIM_DURATION_S:g} s, clampcore.simulate "
        "end to end)"
    )
    # Other work on the machine inflates every figure; the ratios suffer less.
    print(f"load average at the end: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores\n")
    print("| measurement | median | ratio to baseline | target |")
    print("|---|---|---|---|")
    for row in rows:
        print("| " + " | ".join(row) + " |")


if __name__ == "__main__":
    main()
