"""``clampcore characterize``: run the characterisation protocols, analyse, report.

    clampcore characterize --port PORT [--out DIR] [--experiment FILE]

1. The passive protocol (hyperpolarising steps sized from the ``[cell]`` model's
   input resistance, or ``--r-estimate-MOhm``) → resting potential, input
   resistance, τ, capacitance.
2. The active protocol (depolarising steps sized from the *measured* input
   resistance, a slow ramp, a seeded noise current) → spikes, f–I, rheobase,
   ISI CV, adaptation.

Each protocol is one run through the normal loop and recording path (``Engine``
on the port; ``--offline`` simulates against the model cell instead), recorded to
NWB in ``DIR``. ``DIR`` also gets ``characterization.json`` (every value with its
unit, method and fit quality, and which recordings it came from) and the one-page
report ``characterization.png`` / ``.pdf``. The experiment's own elements (a
virtual leak, a threshold_reset...) stay in force; the stability guard applies.
Each recording keeps its protocol and the names of both recordings in its metadata,
so ``reanalyse_recordings`` analyses them again with no other file.

Public names: ``characterize``, ``reanalyse``, ``reanalyse_recordings``, ``add_parser``,
``require_analysis``, ``DEFAULT_EXPERIMENT``, ``RECORDING_NAMES``.
"""

from __future__ import annotations

import argparse
import json
import math
import time
from pathlib import Path
from typing import Any

from clampcore import stability
from clampcore.experiment import load_experiment
from clampcore.protocols import active_protocol, dac_quantiser, passive_protocol, run_protocol

DEFAULT_EXPERIMENT = Path(__file__).resolve().parent.parent / "examples" / "hh_cell.toml"
JSON_NAME = "characterization.json"
REPORT_STEM = "characterization"
# The recordings of a characterisation, by protocol, in its output folder.
RECORDING_NAMES = {"passive": "passive.nwb", "active": "active.nwb"}


def characterize(
    experiment: Any = DEFAULT_EXPERIMENT,
    port: str | None = "sim",
    out_dir: Path = Path("characterization"),
    seed: int = 0,
    rig_clock: str = "wall",
    r_estimate_MOhm: float | None = None,
    report: bool = True,
    quantise: bool = True,
    log: Any = print,
) -> dict[str, Any]:
    """Run both protocols on ``port`` (None: offline) and write the outputs to ``out_dir``.

    Returns the JSON document (``values``, ``recordings``, ``protocol_s``, ``analysis_s``).
    """
    require_analysis("characterize")
    from clampcore.cellfeatures import characterise

    exp = load_experiment(experiment)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    delay = stability.default_delay_samples(exp, port)
    stability.guard(stability.assess(exp, delay), False, "a stable experiment")
    limit = float(exp.loop["max_current_pA"])
    if r_estimate_MOhm is None:
        _, g_nS = stability.cell_conductance(exp.cell, exp.dt_ms)
        r_estimate_MOhm = 1000.0 / g_nS
    where = "offline" if port is None else f"port {port}"
    dac = dac_quantiser(exp)
    passive = passive_protocol(r_estimate_MOhm, limit, dac=dac)
    log(f"passive protocol: steps and pulses, {passive.duration_ms / 1000:g} s ({where})")
    names = RECORDING_NAMES
    run_p = run_protocol(
        exp, passive, port, out_dir / names["passive"], seed, rig_clock, quantise, names
    )
    t0 = time.perf_counter()
    first = characterise(run_p, None)
    analysis_s = time.perf_counter() - t0
    r_measured = first["values"]["input_resistance"]["value"]
    if r_measured is None or not r_measured > 0 or not math.isfinite(r_measured):
        raise RuntimeError(f"input resistance could not be measured ({r_measured!r} MOhm)")
    active = active_protocol(r_measured, limit, seed=seed, dac=dac)
    log(f"active protocol: steps, ramp, noise, {active.duration_ms / 1000:g} s ({where})")
    run_a = run_protocol(
        exp, active, port, out_dir / names["active"], seed, rig_clock, quantise, names
    )
    t0 = time.perf_counter()
    result = characterise(run_p, run_a)
    analysis_s += time.perf_counter() - t0
    doc = {
        "values": result["values"],
        "recordings": {"passive": str(run_p.nwb_path), "active": str(run_a.nwb_path)},
        "source": _source(port, rig_clock),
        "experiment": str(getattr(exp, "path", None) or "(given as data)"),
        "cell_model": dict(exp.cell),
        "rate_hz": float(exp.loop["rate_hz"]),
        "protocol_s": (passive.duration_ms + active.duration_ms) / 1000.0,
        "analysis_s": analysis_s,
        "protocols": {p.name: [s.__dict__ for s in p.segments] for p in (passive, active)},
    }
    (out_dir / JSON_NAME).write_text(json.dumps(doc, indent=1), encoding="utf-8")
    if report:
        png, pdf = _report(result, run_p, run_a, out_dir, doc)
        doc["report"] = [str(png), str(pdf)]
        (out_dir / JSON_NAME).write_text(json.dumps(doc, indent=1), encoding="utf-8")
    return doc


def reanalyse(doc: dict[str, Any]) -> tuple[dict[str, Any], Any, Any]:
    """Analyse again the NWB recordings a characterisation document names.

    Returns (the analysis, the passive run, the active run); the protocols come from the
    document, the data from the recordings.
    """
    require_analysis("characterize")
    from clampcore.cellfeatures import characterise
    from clampcore.protocols import Protocol, Segment, read_protocol_run

    runs = []
    for name in ("passive", "active"):
        segs = tuple(Segment(**seg) for seg in doc["protocols"][name])
        proto = Protocol(name, segs, max(seg.end_ms for seg in segs))
        runs.append(read_protocol_run(Path(doc["recordings"][name]), proto))
    return characterise(runs[0], runs[1]), runs[0], runs[1]


def reanalyse_recordings(paths: list[Path]) -> dict[str, Any]:
    """Analyse a characterisation again from its NWB recordings alone (read with pynwb).

    ``paths``: both recordings (passive and active) or one of them, the other then being
    the one its metadata names, beside it. Returns a document like ``characterization.json``
    (``values``, ``rate_hz``, ``recordings``); ``ValueError`` names a file that is not a
    characterisation recording, or the recording missing.
    """
    require_analysis("fit")
    from clampcore.cellfeatures import characterise
    from clampcore.protocols import read_protocol_recording

    runs: dict[str, Any] = {}
    for path in map(Path, paths):
        run = read_protocol_recording(path)
        if run.protocol.name in runs:
            raise ValueError(
                f"{path}: a second {run.protocol.name} recording (give one of each protocol)"
            )
        runs[run.protocol.name] = run
    for run in list(runs.values()):
        for name, file in run.companions.items():
            other = run.nwb_path.parent / file
            if name not in runs and other.is_file():
                runs[name] = read_protocol_recording(other)
    for name in RECORDING_NAMES:
        if name not in runs:
            raise ValueError(
                f"{paths[0]}: the {name} recording of this characterisation is missing "
                f"(give both, e.g. DIR/passive.nwb DIR/active.nwb)"
            )
    result = characterise(runs["passive"], runs["active"])
    return {
        "values": result["values"],
        "rate_hz": runs["passive"].rate_hz,
        "recordings": {name: str(runs[name].nwb_path) for name in RECORDING_NAMES},
    }


def _source(port: str | None, rig_clock: str) -> str:
    if port is None:
        return "offline simulation"
    return f"simulated rig, {rig_clock} clock" if port == "sim" else port


def require_analysis(command: str) -> None:
    """A one-line error when the analysis extra (scipy, matplotlib) is not installed."""
    import importlib.util

    missing = [m for m in ("scipy", "matplotlib") if importlib.util.find_spec(m) is None]
    if missing:
        raise RuntimeError(
            f"clampcore {command} needs {' and '.join(missing)}: pip install 'clampcore[analysis]'"
        )


def _report(result: dict, run_p: Any, run_a: Any, out_dir: Path, doc: dict) -> tuple[Path, Path]:
    from clampcore.report import write_report

    title = (
        f"cell characterisation ({doc['source']}, {doc['rate_hz'] / 1000:g} kHz; "
        f"protocols {doc['protocol_s']:.1f} s, analysis {doc['analysis_s']:.2f} s)"
    )
    return write_report(result, run_p, run_a, out_dir / REPORT_STEM, title)


def _command(args: argparse.Namespace) -> int:
    port = None if args.offline else args.port
    if port is None and not args.offline:
        raise ValueError("--port PORT is required (or --offline)")
    doc = characterize(
        args.experiment or DEFAULT_EXPERIMENT,
        port,
        Path(args.out),
        seed=args.seed,
        rig_clock=args.rig_clock,
        r_estimate_MOhm=args.r_estimate_MOhm,
    )
    for name, entry in doc["values"].items():
        if name in ("fi_curve", "isi_train"):
            continue
        v = entry["value"]
        shown = "n/a" if v is None else f"{v:.4g} {entry['unit']}"
        print(f"  {name:<24} {shown}")
    print(f"protocol time {doc['protocol_s']:.1f} s, analysis {doc['analysis_s']:.2f} s")
    print(f"wrote {Path(args.out) / JSON_NAME}, " + ", ".join(doc.get("report", [])))
    return 0


def add_parser(sub: Any, name: str) -> None:
    p = sub.add_parser(name, help="measure the recorded cell: passive values, spikes, f-I")
    p.add_argument("--port", default=None, help="device path, pyserial URL, or 'sim'")
    p.add_argument("--offline", action="store_true", help="simulate against [cell] instead")
    p.add_argument("--out", default="characterization", help="output folder")
    p.add_argument(
        "--experiment",
        default=None,
        help="loop, amplifier, cell and elements (default: examples/hh_cell.toml)",
    )
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--rig-clock", choices=("wall", "lockstep"), default="wall", help="for 'sim'")
    p.add_argument(
        "--r-estimate-MOhm",
        type=float,
        default=None,
        dest="r_estimate_MOhm",
        help="input-resistance estimate that sizes the passive steps (default: from [cell])",
    )
    p.set_defaults(func=_command)
