"""Benchmark of the model cells: cost of one sample inside a compiled loop.

Runs ``cell_advance`` + ``cell_measure_mV`` for 1 s of simulated time at
20 kHz, inside one numba function (no Python call per sample), for the passive
and the Hodgkin–Huxley cell (default substeps), repeated; prints medians in ns
per sample, simulated seconds per wall second, and the ratio to a baseline loop
measured in the same run that only reads the cell (``cell_measure_mV``).

    .venv/bin/python bench/bench_cells.py

Public names: ``main``.
"""

from __future__ import annotations

import statistics
import time

import numpy as np
from clampcore.simulated_rig.cells import cell_advance, cell_measure_mV, make_cell
from numba import njit

RATE_HZ = 20000.0  # the loop's usual sample rate
DT_MS = 1000.0 / RATE_HZ
N_SAMPLES = 20000  # 1 s simulated
REPEATS = 15


@njit(cache=True, nogil=True)
def _run_loop(kind, params, state, rng, i_pA, dt_ms, n, out, advance):
    for k in range(n):
        if advance:
            cell_advance(kind, params, state, rng, i_pA, dt_ms)
        out[k] = cell_measure_mV(kind, params, state, rng, i_pA)


def _median_ns_per_sample(cell: dict, i_pA: float, advance: bool) -> float:
    c = make_cell(cell, DT_MS)
    out = np.empty(N_SAMPLES)
    _run_loop(c.kind, c.params, c.state, c.rng, i_pA, DT_MS, 10, out, advance)  # compile
    times_ns = []
    for _ in range(REPEATS):
        t0 = time.perf_counter_ns()
        _run_loop(c.kind, c.params, c.state, c.rng, i_pA, DT_MS, N_SAMPLES, out, advance)
        times_ns.append(time.perf_counter_ns() - t0)
    return statistics.median(times_ns) / N_SAMPLES


def main() -> None:
    """Print the benchmark's figures."""
    noisy = {"noise_pA": 10.0, "measurement_noise_mV": 0.1}
    cases = [
        ("baseline (measure only, passive)", {"model": "passive", **noisy}, 50.0, False),
        ("passive", {"model": "passive", **noisy}, 50.0, True),
        ("hh, 5 substeps, 10 uA/cm2 (firing)", {"model": "hh", **noisy}, 1000.0, True),
    ]
    baseline_ns = None
    print(f"model cells, {N_SAMPLES} samples at {RATE_HZ:.0f} Hz, median of {REPEATS}")
    for name, cell, i_pA, advance in cases:
        ns = _median_ns_per_sample(cell, i_pA, advance)
        if baseline_ns is None:
            baseline_ns = ns
        speed = 1e9 / (ns * RATE_HZ)  # simulated s per wall s
        print(
            f"  {name:38s} {ns:8.1f} ns/sample  {speed:10.0f}x real time"
            f"  {ns / baseline_ns:6.1f}x baseline"
        )


if __name__ == "__main__":
    main()
