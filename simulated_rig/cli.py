"""Command line of the simulated rig: ``python -m simulated_rig`` and ``clampcore rig``.

    python -m simulated_rig [EXPERIMENT] [--rate HZ] [--clock wall|lockstep] [--log FILE]
                            [--seed N] [--lockstep-patience S] [--corrupt-rx F] [--drop-rx F]
                            [--wake-us US] [--realtime PRIO] [--corrupt-tx F] [--drop-tx F]
                            [--stall-ms N --stall-at K]

Opens a pseudo-terminal, prints its device path as the first line of standard
output (flushed), and serves it as a board until SIGTERM or SIGINT, or until
standard input is closed when it is a pipe or a terminal (a parent that holds
the pipe and dies takes the rig with it).  EXPERIMENT supplies the model cell and
the ``[amplifier]`` scaling (defaults without it); the sample rate, watchdog
timeout and fault output come from the host's CONFIGURE.  A summary goes to
standard error at the end.

Public names: ``add_arguments``, ``add_parser``, ``run``, ``main``.
"""

from __future__ import annotations

import argparse
import os
import signal
import stat
import sys
import threading
from typing import Any

from clampcore.simulated_rig.board import (
    LOCKSTEP_PATIENCE_S,
    MAX_RATE_HZ,
    WAKE_US,
    WAKE_US_ORDINARY,
    Board,
    Faults,
    open_pty,
)

from clampcore.links import LINKS
from clampcore.realtime import LOOP_FIFO_PRIORITY, RIG_FIFO_PRIORITY


def _fraction(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0.0 <= value <= 1.0:
        raise argparse.ArgumentTypeError(f"{text} is not a fraction between 0 and 1")
    return value


def _non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"{text} is negative")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value >= 0.0:  # also refuses NaN
        raise argparse.ArgumentTypeError(f"{text} is not >= 0")
    return value


def _positive_int(text: str) -> int:
    value = _non_negative_int(text)
    if value == 0:
        raise argparse.ArgumentTypeError("must be at least 1")
    return value


def _priority(text: str) -> int:
    value = _non_negative_int(text)
    if value > 99:
        raise argparse.ArgumentTypeError("must be 0 .. 99")
    return value


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The rig's options (shared by ``python -m simulated_rig`` and ``clampcore rig``)."""
    parser.add_argument(
        "experiment",
        nargs="?",
        help="experiment file: model cell and [amplifier] scaling (default: built-in defaults)",
    )
    parser.add_argument(
        "--rate",
        type=_positive_int,
        default=MAX_RATE_HZ,
        metavar="HZ",
        help=f"highest sample rate the rig accepts and reports in HELLO (default {MAX_RATE_HZ})",
    )
    parser.add_argument(
        "--clock",
        choices=("wall", "lockstep"),
        default="wall",
        help="wall: sample on the wall clock like hardware (default); lockstep: wait for "
        "each command before the next sample (deterministic)",
    )
    parser.add_argument(
        "--lockstep-patience",
        type=_non_negative_float,
        default=LOCKSTEP_PATIENCE_S,
        metavar="S",
        help="lockstep: seconds a silent host may take before the watchdog trips (the "
        f"configured timeout if longer; default {LOCKSTEP_PATIENCE_S:g})",
    )
    parser.add_argument(
        "--wake-us",
        type=_non_negative_int,
        default=None,
        metavar="US",
        help="wall clock: sleep until this long before each sample, then watch the clock "
        f"(default {WAKE_US} under SCHED_FIFO, at most a quarter period; "
        f"else {WAKE_US_ORDINARY})",
    )
    parser.add_argument(
        "--realtime",
        type=_priority,
        default=0,
        metavar="PRIO",
        help="SCHED_FIFO priority, where permitted; 0: ordinary scheduling "
        f"(e.g. {RIG_FIFO_PRIORITY}, above the host loop's {LOOP_FIFO_PRIORITY}; default 0)",
    )
    parser.add_argument(
        "--link",
        choices=[name for name in LINKS if name != "ideal"],
        default=None,
        help="wall clock: hold bytes as this link would (README: choosing a link); "
        "default: the pseudo-terminal alone",
    )
    parser.add_argument("--log", metavar="FILE", help="write the ground-truth log here")
    parser.add_argument(
        "--seed", type=_non_negative_int, default=0, help="cell and fault seed (default 0)"
    )
    faults = parser.add_argument_group("fault injection (seeded by --seed)")
    faults.add_argument(
        "--corrupt-rx",
        type=_fraction,
        default=0.0,
        metavar="F",
        help="fraction of the host's COMMAND/KEEPALIVE frames with one byte changed",
    )
    faults.add_argument(
        "--drop-rx",
        type=_fraction,
        default=0.0,
        metavar="F",
        help="fraction of the host's COMMAND/KEEPALIVE frames discarded",
    )
    faults.add_argument(
        "--corrupt-tx",
        type=_fraction,
        default=0.0,
        metavar="F",
        help="fraction of SAMPLE frames sent with one byte changed",
    )
    faults.add_argument(
        "--drop-tx",
        type=_fraction,
        default=0.0,
        metavar="F",
        help="fraction of SAMPLE frames not sent",
    )
    faults.add_argument(
        "--stall-ms",
        type=_non_negative_int,
        default=0,
        metavar="N",
        help="freeze the rig (no reading, no sampling) for N ms once, at sample --stall-at",
    )
    faults.add_argument(
        "--stall-at", type=_non_negative_int, default=0, metavar="K", help="sample of the stall"
    )


def add_parser(sub: Any, name: str) -> argparse.ArgumentParser:
    """Add the ``clampcore rig`` subcommand to ``sub`` (an argparse subparsers object)."""
    parser = sub.add_parser(
        name,
        help="serve a simulated board with a model cell on a pseudo-terminal",
        description=__doc__.split("\n\n")[2],
    )
    add_arguments(parser)
    parser.set_defaults(func=run)
    return parser


def _watch_stdin(board: Board) -> None:
    """Stop the board when standard input closes (only for a pipe, socket or terminal)."""
    try:
        mode = os.fstat(sys.stdin.fileno()).st_mode
    except (OSError, ValueError, AttributeError):
        return
    if not (stat.S_ISFIFO(mode) or stat.S_ISSOCK(mode) or os.isatty(sys.stdin.fileno())):
        return  # /dev/null or a file: EOF at once would mean nothing

    def wait() -> None:
        fd = sys.stdin.fileno()
        try:
            while os.read(fd, 4096):
                pass
        except OSError:
            pass
        board.request_stop()

    threading.Thread(target=wait, name="stdin watch", daemon=True).start()


def run(args: argparse.Namespace) -> int:
    """Serve one pseudo-terminal with the options in ``args``; returns the exit code."""
    from clampcore.experiment import ExperimentError, load_experiment

    try:
        experiment = load_experiment(args.experiment) if args.experiment else None
        faults = Faults(
            corrupt_rx=args.corrupt_rx,
            drop_rx=args.drop_rx,
            corrupt_tx=args.corrupt_tx,
            drop_tx=args.drop_tx,
            stall_ms=args.stall_ms,
            stall_at=args.stall_at,
        )
    except (ExperimentError, ValueError) as exc:
        print(f"simulated rig: {exc}", file=sys.stderr)
        return 2
    if experiment is not None and experiment.loop["extra_delay_samples"]:
        print(
            "simulated rig: note: [loop] extra_delay_samples applies to offline simulation "
            "only; the rig applies each command from the sample after the one it answers",
            file=sys.stderr,
        )
    master, slave, path = open_pty()
    try:
        board = Board(
            master,
            experiment,
            clock=args.clock,
            max_rate_hz=args.rate,
            seed=args.seed,
            faults=faults,
            log_path=args.log,
            lockstep_patience_s=args.lockstep_patience,
            wake_us=args.wake_us,
            realtime_priority=args.realtime,
            link=args.link,
        )
    except (OSError, ValueError, RuntimeError) as exc:  # RuntimeError: the C core's build
        print(f"simulated rig: {exc}", file=sys.stderr)
        return 2
    previous = {}
    for signum in (signal.SIGTERM, signal.SIGINT):
        previous[signum] = signal.signal(signum, lambda *_: board.request_stop())
    board.warm_up()
    print(path, flush=True)
    _watch_stdin(board)
    try:
        board.serve()
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        os.close(master)
        os.close(slave)
    status = board.status()
    print(
        f"simulated rig ({args.clock}): {status.counter} samples in the last run, "
        f"{status.commands_applied} commands applied, late {status.late_commands}, "
        f"missing {status.missing_commands}, bad frames {status.bad_frames}, "
        f"unknown {status.unknown_messages}, watchdog trips {status.watchdog_trips}; "
        + (f"SCHED_FIFO {args.realtime}" if board.realtime else "ordinary scheduling"),
        file=sys.stderr,
    )
    return 0


def main(argv: list[str] | None = None) -> int:
    """``python -m simulated_rig``."""
    parser = argparse.ArgumentParser(
        prog="python -m simulated_rig",
        description="Serve a simulated board with a model cell on a pseudo-terminal.",
    )
    add_arguments(parser)
    return run(parser.parse_args(argv))
