"""The ``clampcore`` command line.

    clampcore check EXPERIMENT                  validate and summarise
    clampcore simulate EXPERIMENT --duration S [--out FILE.nwb|.npz] [--seed N]
    clampcore run EXPERIMENT --port PORT [--duration S] [--out FILE.nwb]
    clampcore rig [EXPERIMENT] [--rate HZ] [--clock wall|lockstep] [--log FILE]
    clampcore ports                             serial ports with their USB identity
    clampcore recover JOURNAL [--out FILE.nwb]  NWB from what a crashed run left
    clampcore show RUN.nwb [--from S --to S] [--out FIG.png]   summary and figure
    clampcore gui [EXPERIMENT] [--port PORT]    the tuning window
    clampcore demo                              an example on the simulated rig
    clampcore characterize --port PORT [--out DIR]   measure the cell (clampcore.characterize)
    clampcore fit CHARACTERIZATION.json [--out FILE]  a virtual neuron like it (clampcore.cellfit)

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import signal
import sys
from pathlib import Path
from typing import Any

from clampcore import stability
from clampcore.experiment import ExperimentError, load_experiment
from clampcore.realtime import LOOP_FIFO_PRIORITY


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
    report = stability.from_args(args, exp, args.port)
    print("\n".join(report.lines()))
    return 0


def _simulate(args: argparse.Namespace) -> int:
    from clampcore.offline import simulate

    report = stability.from_args(args, args.experiment)
    print("\n".join(report.lines()[1:]))
    rec = simulate(args.experiment, args.duration, seed=args.seed)
    rec.extra["stability"] = report.as_meta()
    print(rec.summary_text())
    if args.out:
        path = rec.save(args.out)
        print(f"wrote {path}")
    return 0


def _run(args: argparse.Namespace) -> int:
    from clampcore.engine import Engine, RunOptions

    report = stability.from_args(args, args.experiment, args.port)
    print("\n".join(report.lines()[1:]))
    options = RunOptions(
        seed=args.seed,
        watchdog_ms=args.watchdog_ms,
        spin_us=args.spin_us,
        low_latency=args.low_latency,
        realtime_priority=args.realtime,
        rig_clock=args.rig_clock,
        rig_log=Path(args.rig_log) if args.rig_log else None,
        keep_journal=args.keep_journal,
        extra_meta={"stability": report.as_meta()},
    )
    result = run_with_status(Engine(args.experiment, args.port, options), args.duration, args.out)
    return 0 if result.error is None else 1


def run_with_status(engine: Any, duration_s: float | None, out: str | None) -> Any:
    """Start ``engine``, print a live status line until it ends (or Ctrl-C), then a summary."""
    from clampcore.engine import status_line

    rate = float(engine.experiment.loop["rate_hz"])
    # SIGTERM (e.g. `kill`) stops the run as cleanly as Ctrl-C does.
    signal.signal(signal.SIGTERM, _interrupt)
    engine.start(duration_s=duration_s, out=out)
    tty = sys.stdout.isatty()
    try:
        while not engine.wait(0.5):
            line = status_line(engine.status(), rate)
            print(("\r" + line) if tty else line, end="" if tty else "\n", flush=True)
    except KeyboardInterrupt:
        print("\nstopping: 0 pA first, then the board, then the recording", flush=True)
    result = engine.finish()
    print(("\n" if tty else "") + status_line(result.summary, rate))
    print(f"ended: {result.exit_reason}")
    if result.error:
        print(f"clampcore: {result.error}", file=sys.stderr)
    t = result.timing
    if result.samples == 0:
        print("no samples were recorded; no recording written")
    elif t:
        print(
            "timing: latency p50 {:.0f} / p99 {:.0f} samples; within 1/2/3 samples "
            "{:.2%} / {:.2%} / {:.2%}; host turnaround p50 {:.1f} µs, p99.9 {:.1f} µs".format(
                t.get("latency_p50_samples", float("nan")),
                t.get("latency_p99_samples", float("nan")),
                t.get("share_within_1_samples", float("nan")),
                t.get("share_within_2_samples", float("nan")),
                t.get("share_within_3_samples", float("nan")),
                t.get("turnaround_p50_us", float("nan")),
                t.get("turnaround_p99.9_us", float("nan")),
            )
        )
    if result.samples and result.scheduling:
        print(scheduling_text(result.scheduling))
    if result.nwb_path:
        print(f"recording: {result.nwb_path}")
    if result.journal_path and result.journal_path.exists():
        print(f"journal kept: {result.journal_path}")
    return result


def scheduling_text(scheduling: dict[str, Any]) -> str:
    """One line: what the loop process got of the real-time settings it asked for."""
    prio = scheduling.get("fifo_priority", 0)
    fifo = f"SCHED_FIFO {prio}" if prio else "ordinary scheduling"
    dma = "held at 0" if scheduling.get("cpu_dma_latency_held") else "not held"
    return f"loop process: {fifo}; /dev/cpu_dma_latency {dma} (see README, timing options)"


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def _ports(args: argparse.Namespace) -> int:
    from clampcore.board_link import list_ports

    ports = list_ports()
    if not ports:
        print("no serial ports found (use 'sim' for the simulated rig)")
    for p in ports:
        ident = " ".join(x for x in (p["usb_id"], p["manufacturer"], p["serial_number"]) if x)
        print(f"{p['device']:<20} {ident:<40} {p['description']}")
    return 0


def _recover(args: argparse.Namespace) -> int:
    from clampcore.nwb import convert_journal

    journal = Path(args.journal)
    out = Path(args.out) if args.out else journal.with_suffix(".nwb")
    _, removed = convert_journal(journal, out, keep_journal=args.keep_journal)
    print(f"wrote {out}" + ("; journal checked against it and removed" if removed else ""))
    return 0


def _show(args: argparse.Namespace) -> int:
    from clampcore.show import show

    return show(Path(args.recording), args.from_s, args.to_s, args.out)


def _demo(args: argparse.Namespace) -> int:
    from clampcore.demo import run_demo

    return run_demo(Path(args.out_dir), args.duration)


_KEEP_JOURNAL_HELP = "keep the journal after the NWB file was written and checked"


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="clampcore", description="Dynamic clamp on a serial board."
    )
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate an experiment file and summarise it")
    p.add_argument("experiment")
    p.add_argument("--port", default=None, help="the port the run will use (sets the delay)")
    stability.add_options(p, guard_option=False)
    p.set_defaults(func=_check)

    p = sub.add_parser("simulate", help="run an experiment offline against its model cell")
    p.add_argument("experiment")
    p.add_argument("--duration", type=float, default=2.0, help="seconds (default 2)")
    p.add_argument("--out", help="write .nwb or .npz")
    p.add_argument("--seed", type=int, default=0)
    stability.add_options(p)
    p.set_defaults(func=_simulate)

    p = sub.add_parser("run", help="run an experiment on a board (or 'sim')")
    p.add_argument("experiment")
    p.add_argument("--port", required=True, help="device path, pyserial URL, or 'sim'")
    p.add_argument("--duration", type=float, default=None, help="seconds (default: until Ctrl-C)")
    p.add_argument("--out", help="recording path (.nwb; its journal goes once the file is checked)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--watchdog-ms", type=float, default=20.0, help="board watchdog (default 20)")
    p.add_argument("--spin-us", type=float, default=30.0, help="spin before sleeping (µs)")
    p.add_argument(
        "--realtime",
        type=int,
        default=0,
        metavar="PRIO",
        help="SCHED_FIFO priority of the loop, where permitted (e.g. "
        f"{LOOP_FIFO_PRIORITY}); 0: ordinary scheduling (default)",
    )
    p.add_argument(
        "--low-latency",
        action=argparse.BooleanOptionalAction,
        default=True,
        help="hold /dev/cpu_dma_latency at 0 while running, where permitted (default: on)",
    )
    p.add_argument("--rig-clock", choices=("wall", "lockstep"), default="wall", help="for 'sim'")
    p.add_argument("--rig-log", help="for 'sim': the rig's ground-truth log")
    p.add_argument("--keep-journal", action="store_true", help=_KEEP_JOURNAL_HELP)
    stability.add_options(p)
    p.set_defaults(func=_run)

    p = sub.add_parser("ports", help="list serial ports with their USB identity")
    p.set_defaults(func=_ports)

    p = sub.add_parser("recover", help="convert what a crashed run left to NWB")
    p.add_argument("journal")
    p.add_argument("--out")
    p.add_argument("--keep-journal", action="store_true", help=_KEEP_JOURNAL_HELP)
    p.set_defaults(func=_recover)

    p = sub.add_parser("show", help="summarise a recording and plot it (or a slice of it)")
    p.add_argument("recording", help="an NWB file written by clampcore")
    p.add_argument("--from", dest="from_s", type=float, default=None, help="start, s")
    p.add_argument("--to", dest="to_s", type=float, default=None, help="end, s")
    p.add_argument("--out", help="figure path (.png; default: beside the recording)")
    p.set_defaults(func=_show)

    p = sub.add_parser("demo", help="run an example on the simulated rig and plot it")
    p.add_argument("--out-dir", default="demo-output")
    p.add_argument("--duration", type=float, default=5.0)
    p.set_defaults(func=_demo)

    for name, module in _EXTRA_COMMANDS.items():
        try:
            mod = __import__(module, fromlist=["add_parser"])
        except ImportError:
            continue
        mod.add_parser(sub, name)
    return parser


# Commands that live in their own modules; each module has ``add_parser(sub, name)``.
_EXTRA_COMMANDS: dict[str, str] = {
    "rig": "simulated_rig.cli",
    "gui": "gui.app",
    "characterize": "clampcore.characterize",
    "fit": "clampcore.cellfit",
}


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except ExperimentError as exc:
        print(f"clampcore: {exc}", file=sys.stderr)
        return 2
    except (RuntimeError, ValueError, OSError) as exc:  # BoardError, EngineError, NwbError, ...
        print(f"clampcore: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
