"""The ``clampcore`` command line.

    clampcore check EXPERIMENT                  validate and summarise
    clampcore simulate EXPERIMENT --duration S [--out FILE.nwb|.npz] [--seed N]
    clampcore run EXPERIMENT --port PORT [--duration S] [--out FILE.nwb]
    clampcore rig [EXPERIMENT] [--rate HZ] [--clock wall|lockstep] [--log FILE]
    clampcore ports                             serial ports with their USB identity
    clampcore recover JOURNAL [--out FILE.nwb]  NWB from what a crashed run left
    clampcore gui [EXPERIMENT] [--port PORT]    the tuning window
    clampcore demo                              an example on the simulated rig

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import sys

from clampcore.experiment import ExperimentError, load_experiment


def _check(args: argparse.Namespace) -> int:
    exp = load_experiment(args.experiment)
    loop = exp.loop
    print(
        f"{args.experiment}: valid. Loop {loop['rate_hz']:g} Hz, current limit "
        f"±{loop['max_current_pA']:g} pA, spike threshold {loop['spike_threshold_mV']:g} mV; "
        f"model cell: {exp.cell['model']}"
        + ("" if exp.amplifier_given else "; no [amplifier] calibration (simulation only)")
    )
    for el in exp.elements:
        state = "" if el["enabled"] else " (disabled)"
        extra = ""
        if el["kind"] == "synapse":
            extra = f" {el['kinetics']}, from {el['source']} onto {el['target']}"
        elif el["kind"] in ("neuron", "current"):
            extra = f" {el.get('model') or el.get('waveform')}"
        print(f"  {el['kind']:<16} {el['name']}{extra}{state}")
    return 0


def _simulate(args: argparse.Namespace) -> int:
    from clampcore.simulate import simulate

    rec = simulate(args.experiment, args.duration, seed=args.seed)
    print(rec.summary_text())
    if args.out:
        path = rec.save(args.out)
        print(f"wrote {path}")
    return 0


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="clampcore", description="Dynamic clamp on a serial board."
    )
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate an experiment file and summarise it")
    p.add_argument("experiment")
    p.set_defaults(func=_check)

    p = sub.add_parser("simulate", help="run an experiment offline against its model cell")
    p.add_argument("experiment")
    p.add_argument("--duration", type=float, default=2.0, help="seconds (default 2)")
    p.add_argument("--out", help="write .nwb or .npz")
    p.add_argument("--seed", type=int, default=0)
    p.set_defaults(func=_simulate)

    for name, module in _EXTRA_COMMANDS.items():
        try:
            mod = __import__(module, fromlist=["add_parser"])
        except ImportError:
            continue
        mod.add_parser(sub, name)
    return parser


# Commands that live in their own modules; each module has ``add_parser(sub, name)``.
_EXTRA_COMMANDS: dict[str, str] = {}


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except ExperimentError as exc:
        print(f"clampcore: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
