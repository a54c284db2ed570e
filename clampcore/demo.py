"""The demo: an example experiment on the simulated rig, recorded and plotted.

Runs ``examples/imposed_lif.toml`` (a passive model cell turned into an
integrate-and-fire neuron) in law mode (PROTOCOL.md §10) through the whole real
path: simulated board on a pseudo-terminal, loop process, live status, NWB
recording, and a PNG of V, I and spikes.

Public names: ``run_demo``, ``example_path``.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from clampcore.console import run_with_status
from clampcore.engine import Engine, RunOptions
from clampcore.law import LAW_MODE
from clampcore.nwb import read_nwb_summary, validate_nwb
from clampcore.plot import plot_recording
from clampcore.simulated_rig import start_rig

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def example_path(name: str) -> Path:
    return EXAMPLES / name


def run_demo(out_dir: Path, duration_s: float = 5.0, example: str = "imposed_lif.toml") -> int:
    out_dir.mkdir(parents=True, exist_ok=True)
    shutil.rmtree(out_dir / "demo.journal", ignore_errors=True)  # the demo's own last run
    exp = example_path(example)
    print(
        f"clampcore demo: {exp.name} on the simulated rig for {duration_s:g} s, law mode "
        "(the board evaluates the current law at its own V)"
    )
    engine = Engine(exp, "sim", RunOptions(mode=LAW_MODE), rig_factory=start_rig)
    result = run_with_status(engine, duration_s, str(out_dir / "demo.nwb"), force=True)
    if result.nwb_path is None:
        return 1
    problems = validate_nwb(result.nwb_path)
    print("NWB validator: " + ("no problems" if not problems else "; ".join(problems)))
    png = plot_recording(
        read_nwb_summary(result.nwb_path),
        out_dir / "demo.png",
        title=f"{exp.name} on the simulated rig",
    )
    print(f"plot: {png}")
    return 0 if result.error is None and not problems else 1
