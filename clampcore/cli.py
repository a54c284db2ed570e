"""The ``clampcore`` command line.

    clampcore check EXPERIMENT                  validate and summarise
    clampcore simulate EXPERIMENT --duration S [--out FILE.nwb|.npz] [--seed N] [--force]
    clampcore run EXPERIMENT --port PORT [--duration S] [--out FILE.nwb] [--force]
    clampcore rig [EXPERIMENT] [--rate HZ] [--clock wall|lockstep] [--log FILE]
    clampcore ports                             serial ports with their USB identity
    clampcore recover JOURNAL [--out FILE.nwb] [--force]  NWB from what a crashed run left
    clampcore show RUN.nwb [--from S --to S] [--out FIG.png]   summary and figure
    clampcore gui [EXPERIMENT] [--port PORT]    the tuning window
    clampcore demo                              an example on the simulated rig
    clampcore characterize --port PORT [--out DIR]   measure the cell (clampcore.characterize)
    clampcore fit CHARACTERIZATION.json [--out FILE]  a virtual neuron like it (clampcore.cellfit)

Every value is checked before anything starts; a bad one gets one line naming the
option, the value and what is accepted. No existing recording is replaced without
``--force``. Errors are printed once, as one line; ``--debug`` adds the traceback.

Public names: ``main``, ``real_option``, ``int_option``, ``experiment_argument``,
``add_run_options``. The live status line and the end-of-run summary are in
``clampcore.console``.
"""

from __future__ import annotations

import argparse
import math
import os
import re
import sys
import traceback
from collections.abc import Callable
from pathlib import Path
from typing import NoReturn

from clampcore import stability
from clampcore.console import (
    WARN_LATE_PERCENT,
    WARN_LATENCY_SAMPLES,
    TimingWatch,
    run_with_status,
)
from clampcore.elements import SPECS
from clampcore.experiment import (
    Experiment,
    ExperimentError,
    load_experiment,
    model_warnings,
)
from clampcore.links import LINKS
from clampcore.realtime import LOOP_FIFO_PRIORITY
from clampcore.simulated_rig import start_rig

# Accepted ranges of the command line's values (each says where it comes from).
WATCHDOG_MS_RANGE = (1.0, 1000.0)  # the rig's 1 ms floor; beyond 1 s a stalled host would
# keep injecting for too long (conservative; the board may narrow it further)
SPIN_US_RANGE = (0.0, 1000.0)  # the engine caps it at a quarter sample period anyway
SEED_RANGE = (0, 2**63 - 1)  # seeds are mixed into 64-bit generator states (clampcore.rng)
PRIORITY_RANGE = (0, 99)  # SCHED_FIFO priorities on Linux (sched(7)); 0: ordinary
OFFLINE_MEMORY_SHARE = 0.5  # an offline simulation may take at most half the free memory


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line (no usage block), exit code 2."""

    def error(self, message: str) -> NoReturn:
        message = re.sub(r"^argument (\S+?): ", r"\1 ", message)  # "--seed '-1': must be ..."
        self.exit(2, f"{self.prog}: {message} (see {self.prog} --help)\n")


def real_option(
    low: float,
    high: float = math.inf,
    low_open: bool = False,
    unit: str = "",
) -> Callable[[str], float]:
    """An argparse type: a finite real number in [low, high] ((low, high] if ``low_open``)."""
    unit_text = f" {unit}" if unit else ""
    if math.isinf(high):
        accepted = f"a finite number {'>' if low_open else '>='} {low:g}{unit_text}"
    else:
        above = f"above {low:g} and at most" if low_open else f"from {low:g} to"
        accepted = f"a number {above} {high:g}{unit_text}"

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        ok = math.isfinite(value) and (value > low if low_open else value >= low) and value <= high
        if not ok:
            raise argparse.ArgumentTypeError(f"{text!r}: must be {accepted}")
        return value

    return parse


def int_option(low: int, high: int) -> Callable[[str], int]:
    """An argparse type: an integer in [low, high]."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            value = low - 1
        if not low <= value <= high:
            raise argparse.ArgumentTypeError(f"{text!r}: must be an integer from {low} to {high}")
        return value

    return parse


def experiment_argument(text: str) -> Experiment:
    """Load the experiment a command line names: always a file path, never TOML text."""
    if not text.strip():
        raise ExperimentError("experiment file ''", None, None, "no file given (an empty path)")
    return load_experiment(Path(text))


def _print_warnings(exp: Experiment) -> None:
    for warning in model_warnings(exp):
        print(f"warning: {warning}", file=sys.stderr)


def _refuse_existing(path: Path, force: bool) -> None:
    """An existing output is replaced only with --force."""
    if path.is_dir():
        raise FileExistsError(f"{path} is a folder: choose a file name for --out")
    if path.exists() and not force:
        raise FileExistsError(f"{path} exists: choose another --out, or pass --force to replace it")


def _check(args: argparse.Namespace) -> int:
    from clampcore.recorder import bytes_per_second

    exp = experiment_argument(args.experiment)
    loop = exp.loop
    print(
        f"{args.experiment}: valid. Loop {loop['rate_hz']:g} Hz, current limit "
        f"±{loop['max_current_pA']:g} pA, spike threshold {loop['spike_threshold_mV']:g} mV; "
        f"model cell: {exp.cell['model']}"
        + ("" if exp.amplifier_given else "; no [amplifier] calibration (simulation only)")
    )
    for el in exp.elements:
        state = "" if el["enabled"] else " (disabled)"
        describe = SPECS[el["kind"]].describe
        extra = describe(el) if describe else ""
        print(f"  {el['kind']:<16} {el['name']}{extra}{state}")
    report = stability.from_args(args, exp, args.port)
    print("\n".join(report.lines()))
    print(
        f"recording: about {bytes_per_second(exp) * 60 / 1e6:,.1f} MB per minute (journal and NWB)"
    )
    _print_warnings(exp)
    return 0


def _simulate(args: argparse.Namespace) -> int:
    from clampcore.offline import simulate
    from clampcore.recorder import bytes_per_second

    exp = experiment_argument(args.experiment)
    if args.mode:
        exp.loop["mode"] = args.mode
    _print_warnings(exp)
    report = stability.from_args(args, exp)
    print("\n".join(report.lines()[1:]))
    out = None
    if args.out:
        out = Path(args.out)
        if out.suffix != ".nwb":  # Recording.save writes .npz, adding the suffix if missing
            out = out if out.suffix == ".npz" else out.with_name(out.name + ".npz")
        _refuse_existing(out, args.force)
    # The whole run is kept in memory (about half the disk rate: no NWB copy).
    needed = bytes_per_second(exp) / 2 * args.duration
    free = _free_memory_bytes()
    if free is not None and needed > OFFLINE_MEMORY_SHARE * free:
        raise MemoryError(
            f"--duration {args.duration:g}: the offline simulation would hold about "
            f"{needed / 1e9:.1f} GB in memory, {free / 1e9:.1f} GB are free; simulate less"
        )
    rec = simulate(exp, args.duration, seed=args.seed, mode=args.mode)
    rec.extra["stability"] = report.as_meta()
    print(rec.summary_text())
    if out is not None:
        path = rec.save(out, overwrite=args.force)
        print(f"wrote {path}")
    return 0


def _free_memory_bytes() -> float | None:
    try:
        return float(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def _run(args: argparse.Namespace) -> int:
    from clampcore.engine import Engine, RunOptions

    exp = experiment_argument(args.experiment)
    if args.mode:
        exp.loop["mode"] = args.mode  # for the stability guard; the engine gets it below
    _print_warnings(exp)
    report = stability.from_args(args, exp, args.port)
    print("\n".join(report.lines()[1:]))
    options = RunOptions(
        mode=args.mode,
        delay_samples=args.delay_samples,
        cell_c_pF=args.cell_c_pF,
        cell_g_nS=args.cell_g_nS,
        override_stability=args.override_stability,
        rig_link=args.link,
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
    watch = TimingWatch(args.warn_late_percent, args.warn_latency_samples)
    engine = Engine(exp, args.port, options, rig_factory=start_rig)
    result = run_with_status(engine, args.duration, args.out, force=args.force, watch=watch)
    return 0 if result.error is None else 1


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
    from clampcore.engine import nwb_path_for
    from clampcore.nwb import convert_journal

    journal = Path(args.journal)
    if not str(args.journal).strip() or not journal.is_dir():
        raise FileNotFoundError(f"journal {args.journal!r}: no such journal folder")
    out = nwb_path_for(args.out) if args.out else journal.with_suffix(".nwb")
    _refuse_existing(out, args.force)
    _, removed = convert_journal(journal, out, keep_journal=args.keep_journal)
    print(f"wrote {out}" + ("; journal checked against it and removed" if removed else ""))
    return 0


def _show(args: argparse.Namespace) -> int:
    from clampcore.show import show

    return show(Path(args.recording), args.from_s, args.to_s, args.out)


def _demo(args: argparse.Namespace) -> int:
    from clampcore.demo import run_demo

    return run_demo(Path(args.out_dir), args.duration)


def _add_bounded(
    p: argparse.ArgumentParser,
    option: str,
    bounds: tuple[float, float],
    unit: str,
    default: float,
    what: str,
) -> None:
    lo, hi = bounds
    p.add_argument(
        option,
        type=real_option(lo, hi, unit=unit),
        default=default,
        help=f"{what}, {lo:g}..{hi:g} {unit} (default {default:g})",
    )


def _add_seed(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--seed",
        type=int_option(*SEED_RANGE),
        default=0,
        help=f"random seed, {SEED_RANGE[0]}..{SEED_RANGE[1]} (default 0)",
    )


def add_run_options(p: argparse.ArgumentParser) -> None:
    """Options that `run` and the window share."""
    _add_seed(p)
    _add_bounded(p, "--watchdog-ms", WATCHDOG_MS_RANGE, "ms", 20.0, "board watchdog")


_KEEP_JOURNAL_HELP = "keep the journal after the NWB file was written and checked"


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="clampcore", description="Dynamic clamp on a serial board.")
    parser.add_argument(
        "--debug", action="store_true", help="print the traceback of an error (for bug reports)"
    )
    sub = parser.add_subparsers(dest="command", required=True)
    duration = real_option(0.0, low_open=True, unit="seconds")

    p = sub.add_parser("check", help="validate an experiment file and summarise it")
    p.add_argument("experiment")
    p.add_argument("--port", default=None, help="the port the run will use (sets the delay)")
    stability.add_options(p, guard_option=False)
    p.set_defaults(func=_check)

    p = sub.add_parser("simulate", help="run an experiment offline against its model cell")
    p.add_argument("experiment")
    p.add_argument("--duration", type=duration, default=2.0, help="seconds (default 2)")
    p.add_argument("--out", help="write .nwb or .npz (other names get .npz added)")
    _add_seed(p)
    p.add_argument("--force", action="store_true", help="replace an existing --out file")
    _add_mode(p)
    stability.add_options(p)
    p.set_defaults(func=_simulate)

    p = sub.add_parser("run", help="run an experiment on a board (or 'sim')")
    p.add_argument("experiment")
    p.add_argument("--port", required=True, help="device path, pyserial URL, or 'sim'")
    p.add_argument(
        "--duration", type=duration, default=None, help="seconds (default: until Ctrl-C)"
    )
    p.add_argument(
        "--out",
        help="recording path (.nwb added unless given; its journal goes once the file is checked)",
    )
    p.add_argument("--force", action="store_true", help="replace an existing recording at --out")
    add_run_options(p)
    _add_bounded(p, "--spin-us", SPIN_US_RANGE, "µs", 30.0, "spin before sleeping")
    p.add_argument(
        "--realtime",
        type=int_option(*PRIORITY_RANGE),
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
    p.add_argument(
        "--warn-late-percent",
        type=real_option(0.0, 100.0, low_open=True, unit="%"),
        default=WARN_LATE_PERCENT,
        help="warn once when more than this share of commands comes late within a status "
        f"interval (default {WARN_LATE_PERCENT:g})",
    )
    p.add_argument(
        "--warn-latency-samples",
        type=int_option(1, 15),
        default=WARN_LATENCY_SAMPLES,
        help="warn once when the latency p99 of a status interval reaches this many samples "
        f"(default {WARN_LATENCY_SAMPLES}; 15 is the live histogram's last bin)",
    )
    _add_mode(p)
    p.add_argument(
        "--link",
        choices=[n for n in LINKS if n != "ideal"],
        default=None,
        help="for 'sim' on the wall clock: hold bytes as this link would (README: choosing a link)",
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
    p.add_argument("--out", help="NWB path (default: the journal's name with .nwb)")
    p.add_argument("--force", action="store_true", help="replace an existing --out file")
    p.add_argument("--keep-journal", action="store_true", help=_KEEP_JOURNAL_HELP)
    p.set_defaults(func=_recover)

    p = sub.add_parser("show", help="summarise a recording and plot it (or a slice of it)")
    p.add_argument("recording", help="an NWB file written by clampcore")
    p.add_argument("--from", dest="from_s", type=real_option(0.0), default=None, help="start, s")
    p.add_argument("--to", dest="to_s", type=real_option(0.0), default=None, help="end, s")
    p.add_argument("--out", help="figure path (.png; default: beside the recording)")
    p.set_defaults(func=_show)

    p = sub.add_parser("demo", help="run an example on the simulated rig and plot it")
    p.add_argument("--out-dir", default="demo-output")
    p.add_argument(
        "--duration",
        type=real_option(0.0, 600.0, low_open=True, unit="seconds"),
        default=5.0,
    )
    p.set_defaults(func=_demo)

    for name, module in _EXTRA_COMMANDS.items():
        try:
            mod = __import__(module, fromlist=["add_parser"])
        except ImportError:
            continue
        mod.add_parser(sub, name)
    return parser


def _add_mode(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--mode",
        choices=("current", "law"),
        default=None,
        help="current: the host computes each current; law: the board evaluates the current "
        "law at its own V (default: the experiment's [loop] mode; README: law mode)",
    )


# Commands that live in their own modules; each module has ``add_parser(sub, name)``.
_EXTRA_COMMANDS: dict[str, str] = {
    "rig": "clampcore.simulated_rig.cli",
    "gui": "clampcore.gui.app",
    "characterize": "clampcore.characterize",
    "fit": "clampcore.cellfit",
}


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code (2: bad input, 1: failure, 130: Ctrl-C)."""
    args = _parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        print("\nclampcore: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:
        if args.debug:
            traceback.print_exc()
        code = 2 if isinstance(exc, ExperimentError) else 1
        if isinstance(exc, (ExperimentError, RuntimeError, ValueError, OSError, MemoryError)):
            # BoardError, EngineError, RecordingError, NwbError, ...: their message says it all
            message = str(exc) or type(exc).__name__
        else:
            message = f"unexpected {type(exc).__name__}: {exc} (run with --debug, report it)"
        print(f"clampcore: {message}", file=sys.stderr)
        return code


if __name__ == "__main__":
    sys.exit(main())
