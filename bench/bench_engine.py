"""Benchmark of the engine: the step, the offline loop around it, and a C reference.

For the typical experiment of project issue 2 (leak + threshold_reset + two synapses +
two noise conductances + one virtual LIF neuron) at 20 kHz, in one run, repeats
interleaved:

1. step alone: the cost of one ``step`` in ns, called for every sample of a recorded
   membrane-potential trace inside one numba function (no Python call per sample).
2. C reference: the same maths written out by hand in C (``bench/step_reference.c``,
   plain -O2), called the same way. Its currents are checked equal to the step's before
   anything is timed. The step's ratio to it is the price of the generic step.
3. simulate, passive cell: ``clampcore.simulate`` end to end (program, model cell,
   converters, closed loop, recording) per simulated sample, and its ratio to the step
   alone: what the cell, the converters and the recording add (project issue 10: at
   most 1.6).
4. simulate, Hodgkin-Huxley cell: the same, in simulated seconds per second.

Times are the CPU time of the benchmark's thread (on a quiet machine the same as the
wall time; on a shared one it leaves out the time spent waiting for a core), medians of
the repeats. Prints a markdown table for the README.

    .venv/bin/python bench/bench_engine.py

Public names: ``main``, ``typical_experiment``.
"""

from __future__ import annotations

import ctypes
import math
import os
import statistics
import subprocess
import tempfile
import time
from pathlib import Path

import numpy as np
from clampcore.firmware_protocol.cboard import find_c_compiler
from numba import njit

import clampcore
from clampcore import build_program
from clampcore.program import Program
from clampcore.step import step

RATE_HZ = 20000.0  # the loop's usual sample rate
N_STEPS = 200_000  # 10 s of samples per timed repeat of the step loop
SIM_DURATION_S = 5.0
REPEATS = 9
TARGET_STEP_NS = 200.0  # project issue 2
TARGET_PASSIVE_SPEED = 100.0  # x real time, project issue 2
TARGET_SIM_OVER_STEP = 1.6  # project issue 10
TARGET_STEP_OVER_C = 1.5  # project issue 10 (stretch)
_C_SOURCE = Path(__file__).resolve().parent / "step_reference.c"


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


@njit(cache=True, nogil=True)
def _step_loop(v_trace, n0, pa, out) -> None:
    """Call ``step`` for ``out.size`` samples, V read from ``v_trace`` (cyclically)."""
    n_v = v_trace.size
    for k in range(out.size):
        out[k] = step(v_trace[k % n_v], n0 + k, pa)


class _StepRun:
    """The typical experiment's step over a V trace, the sample index counting on."""

    def __init__(self, v_trace: np.ndarray) -> None:
        self.v_trace = v_trace
        self.arrays = build_program(typical_experiment()).arrays()
        self.out = np.empty(N_STEPS)
        _step_loop(v_trace, 0, self.arrays, self.out[:10])  # compile (or load from the cache)
        self.n0 = 10  # neuron refractoriness reads the sample index, as in a run

    def ns_per_sample(self) -> float:
        t0 = time.thread_time_ns()
        _step_loop(self.v_trace, self.n0, self.arrays, self.out)
        elapsed = time.thread_time_ns() - t0
        self.n0 += N_STEPS
        return elapsed / N_STEPS


def _reference_inputs(program: Program) -> tuple[np.ndarray, ...]:
    """Parameters, state, random streams and decay factors of step_reference.c, in its order.

    Read from the validated experiment (defaults filled in) and the program's streams.
    """
    exp = program.experiment
    el = {e["name"]: e for e in exp.elements}
    dt_ms, loop = exp.dt_ms, exp.loop
    leak, tr, ampa, vs = el["vleak"], el["imposed"], el["ampa"], el["from_virtual"]
    ge, gi, nrn = el["ge"], el["gi"], el["partner"]
    p = [dt_ms, loop["max_current_pA"], loop["spike_threshold_mV"]]
    p += [loop["spike_hysteresis_mV"], loop["v_fault_mV"], leak["g_nS"], leak["e_mV"]]
    p += [tr["threshold_mV"], tr["reset_mV"], tr["refractory_ms"], tr["g_nS"]]
    p += [ampa["g_max_nS"], ampa["e_mV"], ampa["tau_decay_ms"], ampa["tau_rise_ms"]]
    p += [ampa["rate_hz"], vs["g_max_nS"], vs["e_mV"], vs["tau_decay_ms"], vs["u_se"]]
    p += [vs["tau_rec_ms"], ge["g_mean_nS"], ge["g_sd_nS"], ge["tau_ms"], ge["e_mV"]]
    p += [gi["g_mean_nS"], gi["g_sd_nS"], gi["tau_ms"], gi["e_mV"], nrn["capacitance_pF"]]
    p += [nrn["leak_nS"], nrn["rest_mV"], nrn["threshold_mV"], nrn["reset_mV"]]
    p += [nrn["refractory_ms"], nrn["bias_pA"]]
    s = np.zeros(24)
    s[[9, 18]] = -math.inf  # VS_LAST_MS, NRN_LAST_SPIKE: no event yet
    s[7], s[8] = vs["u_se"], 1.0  # VS_U_LAST, VS_R_LAST as build_program sets them
    s[11], s[14] = ge["g_mean_nS"], gi["g_mean_nS"]  # GE_G, GI_G start at their mean
    s[17] = nrn["rest_mV"]  # NRN_V
    names = program.names
    rng = program.rng[[names.index(n) for n in ("ampa", "ge", "gi")]].copy()
    taus = [ampa["tau_decay_ms"], ampa["tau_rise_ms"], vs["tau_decay_ms"], ge["tau_ms"]]
    taus += [gi["tau_ms"], nrn["capacitance_pF"] / nrn["leak_nS"]]
    decay = np.array([math.exp(-dt_ms / tau) for tau in taus])
    return np.array(p, dtype=np.float64), s, rng, decay


class _CRun:
    """step_reference.c built in a temporary folder, run over the same V trace."""

    def __init__(self, v_trace: np.ndarray, tmpdir: str) -> None:
        cc = find_c_compiler()
        if cc is None:
            raise SystemExit("bench_engine: no C compiler (set CC or install cc/gcc/clang)")
        lib_path = Path(tmpdir) / "libstep_reference.so"
        flags = ["-std=c99", "-O2", "-ffp-contract=off", "-fPIC", "-shared"]
        subprocess.run([cc, *flags, str(_C_SOURCE), "-o", str(lib_path), "-lm"], check=True)
        self.lib = ctypes.CDLL(str(lib_path))
        self.lib.reference_loop.restype = None
        self.v_trace = v_trace
        self.n0 = 0
        self.program = build_program(typical_experiment())
        self.inputs = _reference_inputs(self.program)
        sizes = tuple(self.lib.reference_sizes(k) for k in range(3))
        if sizes != tuple(a.size for a in self.inputs[:3]):
            raise SystemExit(f"bench_engine: step_reference.c expects sizes {sizes}")
        self.g = np.zeros(7)
        self.i = np.zeros(7)
        self.out = np.empty(N_STEPS)

    def run(self, n_samples: int) -> np.ndarray:
        ptr = ctypes.c_void_p
        p, s, rng, decay = self.inputs
        self.lib.reference_loop(
            ptr(self.v_trace.ctypes.data), ctypes.c_long(self.v_trace.size),
            ctypes.c_long(self.n0), ctypes.c_long(n_samples), ptr(p.ctypes.data),
            ptr(s.ctypes.data), ptr(rng.ctypes.data), ptr(decay.ctypes.data),
            ptr(self.g.ctypes.data), ptr(self.i.ctypes.data), ptr(self.out.ctypes.data),
        )  # fmt: skip
        self.n0 += n_samples
        return self.out[:n_samples]

    def ns_per_sample(self) -> float:
        t0 = time.thread_time_ns()
        self.run(N_STEPS)
        return (time.thread_time_ns() - t0) / N_STEPS


def _check_reference(v_trace: np.ndarray, tmpdir: str) -> float:
    """Largest |difference| in pA between the C reference's commands and the step's."""
    c_run = _CRun(v_trace, tmpdir)
    program = build_program(typical_experiment())
    out = np.empty(N_STEPS)
    _step_loop(v_trace, 0, program.arrays(), out)
    return float(np.max(np.abs(c_run.run(N_STEPS) - out)))


def _sim_ns_per_sample(exp: dict) -> float:
    t0 = time.thread_time_ns()
    clampcore.simulate(exp, SIM_DURATION_S)
    return (time.thread_time_ns() - t0) / (SIM_DURATION_S * RATE_HZ)


def main() -> None:
    """Print the benchmark's figures as a markdown table."""
    typical = typical_experiment("passive")
    hh = typical_experiment("hh")
    # A realistic V trace: 10 s of the typical experiment on the passive cell.
    v_trace = np.ascontiguousarray(clampcore.simulate(typical, N_STEPS / RATE_HZ).v_mV)
    clampcore.simulate(hh, 0.01)  # compile (or load from the cache)
    with tempfile.TemporaryDirectory() as tmpdir:
        c_diff_pA = _check_reference(v_trace, tmpdir)
        if c_diff_pA > 1e-9:
            raise SystemExit(f"bench_engine: the C reference differs from step by {c_diff_pA} pA")
        step_run, c_run = _StepRun(v_trace), _CRun(v_trace, tmpdir)
        times: dict[str, list[float]] = {"step": [], "c": [], "passive": [], "hh": []}
        for _ in range(REPEATS):  # interleaved, so that a busy spell hits all alike
            times["step"].append(step_run.ns_per_sample())
            times["c"].append(c_run.ns_per_sample())
            times["passive"].append(_sim_ns_per_sample(typical))
            times["hh"].append(_sim_ns_per_sample(hh))
    med = {k: statistics.median(v) for k, v in times.items()}
    sim_over_step = med["passive"] / med["step"]
    step_over_c = med["step"] / med["c"]

    def speed(ns: float) -> str:
        return f"{1e9 / (ns * RATE_HZ):.0f}× real time"

    def verdict(ok: bool) -> str:
        return "met" if ok else "MISSED"

    rows = [
        ("C reference, the same maths by hand (-O2)", f"{med['c']:.1f} ns", "", ""),
        (
            "step alone, typical experiment (7 elements)",
            f"{med['step']:.1f} ns",
            f"{step_over_c:.2f}× the C reference",
            f"< {TARGET_STEP_NS:.0f} ns: {verdict(med['step'] < TARGET_STEP_NS)}; "
            f"≤ {TARGET_STEP_OVER_C}× C: {verdict(step_over_c <= TARGET_STEP_OVER_C)}",
        ),
        (
            "simulate, passive cell, per sample",
            f"{med['passive']:.1f} ns ({speed(med['passive'])})",
            f"{sim_over_step:.2f}× the step alone",
            f"≤ {TARGET_SIM_OVER_STEP}× step: {verdict(sim_over_step <= TARGET_SIM_OVER_STEP)}; "
            f"≥ {TARGET_PASSIVE_SPEED:.0f}× real time: "
            f"{verdict(1e9 / (med['passive'] * RATE_HZ) >= TARGET_PASSIVE_SPEED)}",
        ),
        (
            "simulate, Hodgkin–Huxley cell, per sample",
            f"{med['hh']:.1f} ns ({speed(med['hh'])})",
            f"{med['hh'] / med['step']:.2f}× the step alone",
            "",
        ),
    ]
    print(
        f"Engine at {RATE_HZ:.0f} Hz, typical experiment: medians of {REPEATS} interleaved "
        f"repeats ({N_STEPS} samples per step or C repeat, {SIM_DURATION_S:g} s per simulate), "
        f"CPU time of the thread; the C reference's commands equal the step's "
        f"(largest difference {c_diff_pA:.1e} pA)"
    )
    print(f"load average at the end: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores\n")
    print("| measurement | median | ratio | target |")
    print("|---|---|---|---|")
    for row in rows:
        print("| " + " | ".join(row) + " |")


if __name__ == "__main__":
    main()
