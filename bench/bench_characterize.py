"""Benchmark of the characterisation: protocol time, analysis time, fit time, and the figure.

Runs ``clampcore characterize`` on the default example cell (``examples/hh_cell.toml``)
on the simulated rig (wall clock, as hardware; ``--offline`` for the offline
simulation), then times, repeated on the recordings it made: the analysis (every
value), the report (PNG and PDF) and the LIF and AdEx fits; the baseline, measured in
the same run, is reading both NWB recordings back (what any analysis of them costs
at least). Prints medians; ``--update-docs`` copies the report's PNG to
``docs/characterization.png`` (the README's figure).

    .venv/bin/python bench/bench_characterize.py [--offline] [--rig-clock wall|lockstep]
                                                 [--update-docs]

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import tempfile
import time
from pathlib import Path

REPEATS = 5
ROOT = Path(__file__).resolve().parent.parent


def _median_s(fn, repeats: int = REPEATS) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    """Print the benchmark's figures."""
    from clampcore.cellfeatures import characterise
    from clampcore.cellfit import fit_neurons
    from clampcore.characterize import DEFAULT_EXPERIMENT, characterize, reanalyse
    from clampcore.nwb import read_nwb_summary
    from clampcore.report import write_report

    parser = argparse.ArgumentParser()
    parser.add_argument("--offline", action="store_true")
    parser.add_argument("--rig-clock", choices=("wall", "lockstep"), default="wall")
    parser.add_argument("--update-docs", action="store_true")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="clampcore-bench-") as tmp:
        out = Path(tmp)
        t0 = time.perf_counter()
        port = None if args.offline else "sim"
        doc = characterize(DEFAULT_EXPERIMENT, port, out, rig_clock=args.rig_clock, log=print)
        wall_s = time.perf_counter() - t0
        _, passive, active = reanalyse(doc)
        baseline = _median_s(
            lambda: [read_nwb_summary(Path(p)) for p in doc["recordings"].values()]
        )
        analysis = _median_s(lambda: characterise(passive, active))
        result = characterise(passive, active)
        report = _median_s(lambda: write_report(result, passive, active, out / "again"), 3)
        fit = _median_s(lambda: fit_neurons(doc), 3)
        print(f"\ncharacterisation of {DEFAULT_EXPERIMENT.name} ({doc['source']})")
        print(f"{'measurement':<44}{'median':>10}{'vs baseline':>13}")
        rows = [
            ("protocol time (both protocols)", doc["protocol_s"], None),
            ("wall time of characterize (runs, analysis, report)", wall_s, None),
            ("baseline: read both NWB recordings", baseline, 1.0),
            ("analysis (every value)", analysis, analysis / baseline),
            ("report (PNG and PDF)", report, report / baseline),
            ("fit (LIF and AdEx)", fit, fit / baseline),
        ]
        for name, value, ratio in rows:
            shown = f"{ratio:.2f}" if ratio is not None else ""
            print(f"{name:<44}{value:>9.2f}s{shown:>13}")
        if args.update_docs:
            shutil.copy(out / "characterization.png", ROOT / "docs" / "characterization.png")
            print("docs/characterization.png updated")


if __name__ == "__main__":
    main()
