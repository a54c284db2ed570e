"""Benchmark: what passing arrays in named bundles costs a step, against a base revision.

Compiled functions take their arrays in NamedTuple bundles (``ProgramArrays``,
``LinkArrays``, ``LoopShared``, ...) instead of 9 to 37 positional arrays. numba passes
a NamedTuple of arrays as the arrays themselves, so a step should cost the same. This
measures it: the tree of a base revision (default ``main``, exported with ``git
archive``) and this tree each run the step loop of ``bench/bench_engine.py`` (one
``step`` per sample inside one compiled function, 200,000 samples a repeat) for the
leak-only and the typical experiment, in fresh processes taking turns, so both see
the same machine load. Prints medians over every repeat of every turn.

    .venv/bin/python bench/bench_bundles.py [--base main] [--turns 3]

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tarfile
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

# Runs in a tree: times step inside a compiled loop with the tree's own signature of step.
_CHILD = r"""
import json, sys, time
import numpy as np
from numba import njit
import clampcore
from clampcore import build_program
from clampcore.step import step
sys.path.insert(0, "bench")
from bench_engine import N_STEPS, RATE_HZ, typical_experiment

STEP_REPEATS = 5  # timed repeats of N_STEPS samples per experiment and turn
LEAK_ONLY = {"loop": {"rate_hz": RATE_HZ},
             "element": [{"kind": "leak", "name": "vleak", "g_nS": 3.0, "e_mV": -65.0}]}

@njit(nogil=True)
def bundled(v, n0, pa, out):
    for k in range(out.size):
        out[k] = step(v[k % v.size], n0 + k, pa)

@njit(nogil=True)
def flat(v, n0, kind, params, state, rng, trains, g_out, i_out, loop_p, loop_s, out):
    for k in range(out.size):
        out[k] = step(v[k % v.size], n0 + k, kind, params, state, rng, trains, g_out, i_out,
                      loop_p, loop_s)

v = np.ascontiguousarray(clampcore.simulate(typical_experiment(), N_STEPS / RATE_HZ).v_mV)
result = {}
for name, exp in (("leak", LEAK_ONLY), ("typical", typical_experiment())):
    arrays = build_program(exp).arrays()
    is_bundle = hasattr(arrays, "_fields")
    def run(n0, out):
        if is_bundle:
            bundled(v, n0, arrays, out)
        else:
            flat(v, n0, *arrays, out)
    out = np.empty(N_STEPS)
    run(0, out[:10])
    n0, times = 10, []
    for _ in range(STEP_REPEATS):
        t0 = time.perf_counter_ns()
        run(n0, out)
        times.append((time.perf_counter_ns() - t0) / N_STEPS)
        n0 += N_STEPS
    result[name] = times
print(json.dumps(result))
"""


def _export(rev: str, into: Path) -> Path:
    archive = subprocess.run(
        ["git", "archive", "--format=tar", rev], cwd=ROOT, capture_output=True, check=True
    ).stdout
    tree = into / "base"
    tree.mkdir()
    tar_path = into / "base.tar"
    tar_path.write_bytes(archive)
    with tarfile.open(tar_path) as tar:
        tar.extractall(tree, filter="data")
    return tree


def _run_child(tree: Path, cache: Path) -> dict[str, list[float]]:
    env = dict(os.environ, PYTHONPATH=str(tree), NUMBA_CACHE_DIR=str(cache))
    out = subprocess.run(
        [sys.executable, "-c", _CHILD], cwd=tree, env=env, capture_output=True, text=True
    )
    if out.returncode != 0:
        raise SystemExit(f"bench_bundles: the run in {tree} failed:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> None:
    """Print the step's cost in this tree beside the base revision's, as a markdown table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", default="main", help="git revision to compare with")
    parser.add_argument("--turns", type=int, default=3, help="fresh processes per tree")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        trees = {args.base: _export(args.base, tmp_path), "this tree": ROOT}
        times: dict[str, dict[str, list[float]]] = {t: {} for t in trees}
        for _ in range(args.turns):
            for label, tree in trees.items():
                got = _run_child(tree, tmp_path / f"cache-{tree.name}")
                for name, values in got.items():
                    times[label].setdefault(name, []).extend(values)
    print(
        f"step cost inside a compiled loop, ns per sample: median of {args.turns} fresh "
        f"processes per tree, taking turns, x 15 repeats of 200,000 samples at 20 kHz"
    )
    print(f"load average at the end: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores\n")
    print(f"| experiment | {args.base} | this tree | ratio |")
    print("|---|---|---|---|")
    for name in ("leak", "typical"):
        base = statistics.median(times[args.base][name])
        this = statistics.median(times["this tree"][name])
        print(f"| {name} | {base:.1f} ns | {this:.1f} ns | {this / base:.3f} |")


if __name__ == "__main__":
    main()
