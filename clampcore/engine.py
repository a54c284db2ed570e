"""Run an experiment on a board: the loop process, the recorder and the controls.

``Engine`` is what the command line and the window use::

    engine = Engine("examples/imposed_lif.toml", port="sim", rig_factory=start_rig)
    engine.start(duration_s=5)
    engine.change("imposed_spike", "threshold_mV", -48.0)   # applied at a sample boundary
    result = engine.finish()                                # waits, records NWB

Port "sim" is the simulated rig, started by the ``rig_factory`` the caller hands in
(``clampcore.simulated_rig.start_rig``): the engine never imports the rig itself.

The loop runs in its own process (``_loop_process``): it opens the port, asks
the board for its capabilities, refuses to start when the calibration is missing
or the board cannot represent the current limit, configures and starts the
board and then stays inside the compiled ``clampcore.hostloop.fd_loop`` until a
stop request, the duration, or a port failure. Whatever happens, it then
commands 0 pA, stops the board and reports. Data leave it only through the
shared-memory ring (``clampcore.shared``); the ``Recorder`` in this process
copies them into the journal and writes NWB at the end.

The loop process is started with multiprocessing's "spawn" method (no fork of a
process that may hold GUI threads), so a script that uses ``Engine`` must keep its
top-level code under ``if __name__ == "__main__":``.

Public names: ``Engine``, ``RunOptions``, ``RunResult``, ``EngineError``, ``status_line``,
``SPIN_SHARE``.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import math
import multiprocessing as mp
import shutil
import signal
import tempfile
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from clampcore.board_link import BoardError, BoardLink
from clampcore.calibration import (
    current_range_pA,
)
from clampcore.experiment import Experiment, ExperimentError, load_experiment
from clampcore.firmware_protocol.lawmsg import rules_body, table_bodies
from clampcore.health import loop_health
from clampcore.hostloop import (
    EXIT_BOARD_SILENT,
    EXIT_DURATION,
    EXIT_MESSAGES,
    EXIT_PORT_CLOSED,
    EXIT_PORT_ERROR,
    EXIT_STOP_REQUEST,
    LinkArrays,
    PortRun,
    fd_loop,
    new_link,
    process_rx,
    record_turnaround,
)
from clampcore.law import CURRENT_MODE, LAW_MODE, board_arrays
from clampcore.lawloop import (
    LawLinkArrays,
    law_fd_loop,
    new_law_link,
    process_rx_law,
    top_up_laws,
)
from clampcore.preflight import Plan, PreflightError, preflight
from clampcore.program import (
    MAIL_TARGETS,
    Program,
    ProgramArrays,
    build_program,
    check_live_change,
)
from clampcore.realtime import fifo_scheduling, hold_cpu_dma_latency_zero
from clampcore.recorder import Recorder, check_free_space, recording_meta
from clampcore.shared import (
    CTRL_EXIT,
    CTRL_STATE,
    CTRL_STOP,
    CTRL_WRITTEN,
    CTRL_ZERO,
    LAT_BINS,
    STATE_FAILED,
    STATE_RUNNING,
    STATE_STARTING,
    STATE_STOPPED,
    STATE_STOPPING,
    LoopShared,
    RingLayout,
    SharedRun,
)

_PR_SET_PDEATHSIG = 1  # <linux/prctl.h>
# Before stopping, wait this long for a sample newer than the last one answered, so that the
# 0 pA command has a sample to answer: a running board sends one per period; the slack covers
# a scheduling stall of the host (a few ms on these machines; DEVELOPERS.md, "Figures the
# code relies on").
_ZERO_WAIT_PERIODS = 3
_ZERO_WAIT_SLACK_S = 0.05
# Law mode: how long the teardown waits for a sample that shows the board's ZERO in force
# before it sends STOP. Measured: with both cores of a test machine busy (load 9) the rig
# was descheduled for more than 0.2 s, and STOP then arrived before the ZERO had acted.
_ZERO_CONFIRM_S = 1.0


class EngineError(RuntimeError):
    """A run that could not start or did not end cleanly; says why."""


@dataclass
class RunOptions:
    """How to run; defaults are the conservative ones."""

    seed: int = 0
    # The board's watchdog: no command for this long and it outputs 0 pA. Several times
    # the worst scheduling stall measured on these machines (~4 ms; DEVELOPERS.md, Figures).
    watchdog_ms: float = 20.0
    # Spin this long for input before sleeping in poll(): waking a sleeping reader costs
    # 50-90 µs here (DEVELOPERS.md, Figures). Longer spins starve the other processes on a 2-core
    # machine: 30 µs gave the fewest late commands against the simulated rig (bench_loop.py).
    spin_us: float = 30.0
    # The loop stops if the board sends nothing for this long (a vanished board).
    silent_ms: int = 1000
    # Hold /dev/cpu_dma_latency at 0 while running, where permitted (clampcore.realtime).
    # On by default: at 10 kHz against the wall-clock rig, 97.5% of commands within 2 samples
    # with it, 94.9% without (bench_loop.py; README, Benchmarks).
    low_latency: bool = True
    # Run the loop process under SCHED_FIFO at this priority (1-99, e.g. LOOP_FIFO_PRIORITY;
    # 0 = ordinary scheduling), where permitted: standard Linux practice for real-time
    # acquisition. Off by default: against the simulated rig it gained little once
    # cpu_dma_latency was held, and with the rig also real-time it cut the window from
    # about 35 to 23 redraws/s at 20 kHz (bench_gui.py; README, Benchmarks).
    realtime_priority: int = 0
    # Do the serial I/O with pyserial from Python (slower) instead of inside the compiled
    # loop: what ports without a file descriptor (some pyserial URLs) always get.
    python_io: bool = False
    # Keep the journal after the NWB file was written and checked (default: removed).
    keep_journal: bool = False
    rig_clock: str = "wall"  # for port "sim": the simulated rig's clock
    rig_log: Path | None = None  # for port "sim": the rig's ground-truth log
    rig_realtime_priority: int = 0  # for port "sim": the rig's SCHED_FIFO priority, 0 = none
    rig_faults: dict[str, Any] = field(default_factory=dict)
    rig_link: str | None = None  # for port "sim": a link model (clampcore.links), wall clock only
    # "current" or "law" (PROTOCOL.md §10) instead of the experiment's [loop] mode; None: as set.
    mode: str | None = None
    # Law mode: this look-ahead in samples instead of law_lead_samples' (None). One longer
    # than a cell-driven synapse's delay allows makes its spikes late (delivered late, counted).
    lead_samples: int | None = None
    # The stability guard at start (clampcore.preflight, clampcore.stability): the loop delay
    # in samples (None: that of the mode that runs), measured cell values (None: [cell]),
    # and whether to start above the stable limit anyway (logged).
    delay_samples: int | None = None
    cell_c_pF: float | None = None
    cell_g_nS: float | None = None
    override_stability: bool = False
    # Extra fields for the recording's metadata (e.g. the stability guard's "stability"),
    # written at start and again at the end (a window may update them during the run).
    extra_meta: dict[str, Any] = field(default_factory=dict)


@dataclass
class RunResult:
    exit_reason: str
    exit_code: int
    samples: int
    nwb_path: Path | None
    journal_path: Path | None
    timing: dict[str, float]
    summary: dict[str, Any]
    board_status: dict[str, Any] | None
    error: str | None = None
    # What the loop process got: SCHED_FIFO priority (0 = ordinary) and cpu_dma_latency.
    scheduling: dict[str, Any] = field(default_factory=dict)
    mode: str = "current"  # how the current was computed: "current" or "law" (PROTOCOL.md §10)
    notice: str | None = None  # e.g. why law mode fell back to current mode


# The loop spins for input at most this share of a sample period before sleeping in
# poll(): under SCHED_FIFO a loop that never sleeps would hold a whole core and starve the
# recorder and the window (with SCHED_FIFO for loop and rig at 20 kHz, an uncapped 30 µs
# spin left the window 11 redraws/s, capped about 22; bench_gui.py --realtime 50
# --rig-realtime 60).
SPIN_SHARE = 0.25


def nwb_path_for(out: Path | str) -> Path:
    """The NWB path of ``--out``: the user's name, with ``.nwb`` added unless it ends so
    (``slice1.cell2`` gives ``slice1.cell2.nwb``, never ``slice1.nwb``)."""
    out = Path(out)
    return out if out.suffix.lower() == ".nwb" else out.with_name(out.name + ".nwb")


def _check_outputs(nwb_path: Path, journal_path: Path, force: bool) -> None:
    """Refuse to overwrite a recording unless ``force``; never lose an unconverted journal."""
    if nwb_path.is_dir():
        raise EngineError(f"{nwb_path} is a folder: choose a file name for --out")
    if nwb_path.exists() and not force:
        raise EngineError(f"{nwb_path} exists: choose another --out, or pass --force to replace it")
    if journal_path.exists() and any(journal_path.iterdir()):
        if not (journal_path / "final.json").is_file() or not nwb_path.exists():
            raise EngineError(
                f"{journal_path} holds a recording that was never converted: run "
                f"`clampcore recover {journal_path}` or choose another --out"
            )
        if not force:
            raise EngineError(f"{journal_path} exists: choose another --out, or pass --force")
        shutil.rmtree(journal_path)  # a finished run's journal; its NWB is replaced too


def _die_with_parent() -> None:
    """Linux: end this process if the one that started it dies (the board's watchdog then
    takes the output to 0 pA), so no loop is ever left running without its recorder."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c"), use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGTERM)
    except (OSError, AttributeError):
        pass


@dataclass
class _Session:
    """What the loop process's teardown needs, filled in as the run gets that far."""

    link: BoardLink | None = None
    started: bool = False  # the board was told to start
    zero: Callable[[], Any] | None = None  # commands 0 pA on this run's link, in its mode


def _loop_process(
    exp_text: str,
    port: str,
    names: dict[str, str],
    options: RunOptions,
    max_samples: int,
    allow_default_calibration: bool,
    conn: Any,
) -> None:
    """Body of the loop process. Never raises: reports through ``conn``."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the main process decides when to stop
    _die_with_parent()
    report: dict[str, Any] = {"exit_code": 0, "error": None, "board_status": None}
    shared = None
    session = _Session()
    try:
        program = build_program(exp_text, seed=options.seed)
        shared = SharedRun.attach(names, RingLayout.for_program(program))
        session.link = BoardLink(port)
        code = _serve(
            session, program, shared, options, max_samples, allow_default_calibration, report
        )
        report["exit_code"] = int(code)
        shared.ctrl[CTRL_STATE] = STATE_STOPPING
        if code in (EXIT_PORT_CLOSED, EXIT_PORT_ERROR, EXIT_BOARD_SILENT):
            report["error"] = EXIT_MESSAGES[code]
    except (BoardError, EngineError, PreflightError, OSError) as exc:
        report["error"] = str(exc)
    except Exception:
        report["error"] = traceback.format_exc()
    finally:
        if session.link is not None:
            _stop_board(session, report)
        if shared is not None:
            shared.ctrl[CTRL_STATE] = STATE_FAILED if report["error"] else STATE_STOPPED
            shared.ctrl[CTRL_EXIT] = report["exit_code"]
            shared.close()
        conn.send(report)
        conn.close()


def _serve(
    session: _Session,
    program: Program,
    shared: SharedRun,
    options: RunOptions,
    max_samples: int,
    allow_default_calibration: bool,
    report: dict[str, Any],
) -> int:
    """Greet and configure the board, warm up, then run the loop until it ends; returns the
    loop's ``EXIT_*`` code. ``report`` gets the board, the mode and the scheduling held."""
    link, exp = session.link, program.experiment
    assert link is not None
    hello = link.handshake()
    report["board"] = {k: getattr(hello, k) for k in hello.__dataclass_fields__}
    shared.publish_board(report["board"])  # the journal's header: any board's counts
    plan = preflight(hello, exp, options, simulated=allow_default_calibration)
    conv, rate = plan.conv, plan.rate_hz
    report["notice"] = plan.notice
    shared.publish_current_range(*current_range_pA(conv))  # live changes: the same rule
    link.configure(rate, plan.watchdog_us, plan.zero_counts)
    arrays = new_link(conv)
    pa, sh = program.arrays(), shared.loop(program.spike_rows())
    report["mode"] = plan.mode
    law = None
    if plan.mode == LAW_MODE:
        law = _law_setup(link, program, plan, sh)
        session.zero = lambda: link.zero_now(confirm_s=_ZERO_CONFIRM_S)
    else:
        _compile_before_start(arrays, pa, sh)
        # A command answering the newest sample, so that the board applies it (PROTOCOL.md §5.2).
        session.zero = lambda: link.command_after(
            int(arrays.lk[0]["next_seq"]),
            int(arrays.lk[0]["last_counter"]),
            plan.zero_counts,
            timeout_s=_ZERO_WAIT_PERIODS / rate + _ZERO_WAIT_SLACK_S,
        )
    report["realtime"] = fifo_scheduling(options.realtime_priority)
    spin_us = min(options.spin_us, SPIN_SHARE * 1e6 / rate)
    with hold_cpu_dma_latency_zero(options.low_latency) as held:
        report["low_latency_held"] = held
        link.start()
        session.started = True
        shared.ctrl[CTRL_STATE] = STATE_RUNNING
        fd = None if options.python_io else link.blocking_fd()
        if law is not None:
            if fd is None:
                raise EngineError("law mode needs a port with a file descriptor")
            return _law_loop(link, fd, law, spin_us, options.silent_ms, max_samples)
        # Samples that came with the replies must be answered before the loop waits.
        _feed(link, link.take_unread(), arrays, pa, sh)
        if fd is None:
            return _python_loop(link, arrays, pa, sh, options, max_samples)
        return fd_loop(PortRun(fd, spin_us, options.silent_ms, max_samples), arrays, pa, sh)


def _stop_board(session: _Session, report: dict[str, Any]) -> None:
    """Teardown, whatever happened: 0 pA first, then STOP (its status into ``report``), then
    close the port. Never raises."""
    link = session.link
    assert link is not None
    if session.started:
        if session.zero is not None:  # safety first
            with contextlib.suppress(BoardError, OSError):
                session.zero()
        with contextlib.suppress(BoardError, OSError):
            status = link.stop()
            if status is not None:
                report["board_status"] = {
                    k: getattr(status, k) for k in status.__dataclass_fields__
                }
    link.close()


@dataclass
class _LawRun:
    """Law mode's buffers and the compiled loop's other arguments."""

    arrays: LawLinkArrays
    pa: ProgramArrays
    sh: LoopShared


def _law_setup(link: BoardLink, program: Program, plan: Plan, sh: LoopShared) -> _LawRun:
    """Give the board its rules and the first laws (its HELLO said it evaluates laws)."""
    conv = plan.conv
    bf, bi, _bs, _law, table = board_arrays(program, conv, LAW_MODE, plan.lifetime_samples)
    link.law_setup(rules_body(bf, bi), table_bodies(table) if table.size else [])
    n_neurons = sh.neuron_rows.size
    a = new_law_link(plan.lead_samples, table.size > 0, len(program.names), n_neurons, conv, bf, bi)
    pa = program.arrays()
    # Compile (or load) before the board starts, then send the first laws (samples 0..lead-1).
    length = top_up_laws(a, 0, pa, sh)
    process_rx_law(0, a, pa, sh)
    link.serial.write(a.io.tx[:length].tobytes())
    law_fd_loop(PortRun(-1, 0.0, 0, 0), a, pa, _stop_requested(sh))
    return _LawRun(a, pa, sh)


def _law_loop(
    link: BoardLink, fd: int, law: _LawRun, spin_us: float, silent_ms: int, max_samples: int
) -> int:
    """Law mode's loop: samples that came with the replies first, then the compiled loop."""
    a = law.arrays
    data = link.take_unread()
    if data:
        a.io.rx[: len(data)] = np.frombuffer(data, dtype=np.uint8)
        length = process_rx_law(len(data), a, law.pa, law.sh)
        link.serial.write(a.io.tx[:length].tobytes())
    return law_fd_loop(PortRun(fd, spin_us, silent_ms, max_samples), a, law.pa, law.sh)


def _stop_requested(sh: LoopShared) -> LoopShared:
    """``sh`` with a copy of its control words that asks the loop to stop at once."""
    ctrl = sh.ctrl.copy()
    ctrl[CTRL_STOP] = 1
    return sh._replace(ctrl=ctrl)


def _compile_before_start(arrays: LinkArrays, pa: ProgramArrays, sh: LoopShared) -> None:
    """Load or compile the loop before the board starts sampling (compiling takes seconds).

    The loop is entered once with a stop request already set, so it returns at once.
    """
    stopped = _stop_requested(sh)
    fd_loop(PortRun(-1, 0.0, 0, 0), arrays, pa, stopped)
    process_rx(0, arrays, pa, stopped)


def _feed(
    link: BoardLink, data: bytes, arrays: LinkArrays, pa: ProgramArrays, sh: LoopShared
) -> None:
    """Run bytes already received through the per-sample path and send the answer."""
    if not data:
        return
    t_ready = time.monotonic()
    io = arrays.io
    io.rx[: len(data)] = np.frombuffer(data, dtype=np.uint8)
    length = process_rx(len(data), arrays, pa, sh)
    if length > 0:
        try:
            link.serial.write(io.tx[:length].tobytes())
        except Exception as exc:
            raise BoardError(link.port, "sending a command", str(exc)) from exc
        record_turnaround(arrays.lk, sh.ring, sh.stats, (time.monotonic() - t_ready) * 1e6)


def _python_loop(
    link: BoardLink,
    arrays: LinkArrays,
    pa: ProgramArrays,
    sh: LoopShared,
    options: RunOptions,
    max_samples: int,
) -> int:
    """The same per-sample path with pyserial doing the I/O (URL ports without a descriptor)."""
    ser = link.serial
    idle_since = time.monotonic()
    rx_size = arrays.io.rx.size
    while True:
        if sh.ctrl[CTRL_STOP]:
            return EXIT_STOP_REQUEST
        if max_samples > 0 and arrays.lk[0]["samples"] >= max_samples:
            return EXIT_DURATION
        try:
            data = ser.read(max(1, min(ser.in_waiting, rx_size)))
        except Exception:
            return EXIT_PORT_ERROR
        if not data:
            if (time.monotonic() - idle_since) * 1000 > options.silent_ms:
                return EXIT_BOARD_SILENT
            continue
        idle_since = time.monotonic()
        try:
            _feed(link, data, arrays, pa, sh)
        except BoardError:
            return EXIT_PORT_ERROR


class Engine:
    """One run of an experiment on a port ("sim" starts the simulated rig)."""

    def __init__(
        self,
        experiment: Any,
        port: str,
        options: RunOptions | None = None,
        rig_factory: Callable[..., Any] | None = None,
    ) -> None:
        """``rig_factory``: for port "sim", what starts the simulated rig
        (``clampcore.simulated_rig.start_rig``; called with the experiment file and the
        ``rig_*`` options, it returns an object with ``path`` and ``stop()``)."""
        if port == "sim" and rig_factory is None:
            raise EngineError(
                'port "sim" needs the simulated rig: pass '
                "rig_factory=clampcore.simulated_rig.start_rig"
            )
        self.experiment: Experiment = load_experiment(experiment)
        self.port = port
        self.rig_factory = rig_factory
        self.options = options or RunOptions()
        self.program = build_program(self.experiment, seed=self.options.seed)
        self.layout = RingLayout.for_program(self.program)
        self.shared: SharedRun | None = None
        self.recorder: Recorder | None = None
        self._proc: mp.Process | None = None
        self._conn: Any = None
        self._rig: Any = None
        self._tmpdir: tempfile.TemporaryDirectory[str] | None = None
        self.t_start = 0.0
        self.result: RunResult | None = None

    # ------------------------------------------------------------------ lifecycle
    def start(
        self,
        duration_s: float | None = None,
        out: Path | str | None = None,
        force: bool = False,
    ) -> None:
        """Start the loop (and the rig for port "sim") and the recorder; returns at once.

        Refuses (``EngineError``, ``RecordingError``) a duration that is not a finite number
        of seconds > 0, an existing recording at ``out`` unless ``force``, and a recording
        that will not fit on its disk.
        """
        exp = self.experiment
        if duration_s is not None and not (math.isfinite(duration_s) and duration_s > 0):
            raise EngineError(f"duration {duration_s!r} s: must be a finite number of seconds > 0")
        out_path = Path(out) if out else Path(time.strftime("clampcore-run-%Y%m%d-%H%M%S.nwb"))
        self.nwb_path = nwb_path_for(out_path)
        journal_path = self.nwb_path.with_suffix(".journal")
        _check_outputs(self.nwb_path, journal_path, force)
        check_free_space(self.nwb_path.parent, exp, duration_s)
        self._tmpdir = tempfile.TemporaryDirectory(prefix="clampcore-")
        try:
            self._start(exp, journal_path, duration_s)
        except BaseException:
            self._cleanup_failed_start()
            raise

    def _start(self, exp: Experiment, journal_path: Path, duration_s: float | None) -> None:
        port = self.port
        source = port
        if port == "sim":
            assert self._tmpdir is not None and self.rig_factory is not None
            exp_file = Path(self._tmpdir.name) / "experiment.toml"
            exp_file.write_text(exp.text or exp.to_toml(), encoding="utf-8")
            self._rig = self.rig_factory(
                exp_file,
                clock=self.options.rig_clock,
                seed=self.options.seed,
                log=self.options.rig_log,
                realtime_priority=self.options.rig_realtime_priority,
                link=self.options.rig_link,
                **self.options.rig_faults,
            )
            port = self._rig.path
            source = "simulated rig"
        self.shared = SharedRun.create(self.layout)
        meta = recording_meta(exp, source, seed=self.options.seed, **self.options.extra_meta)
        self.recorder = Recorder(self.shared, self.program, journal_path, meta, duration_s)
        max_samples = round(duration_s * exp.loop["rate_hz"]) if duration_s else 0
        ctx = mp.get_context("spawn")
        self._conn, child_conn = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(
            target=_loop_process,
            args=(
                exp.text or exp.to_toml(),
                port,
                self.shared.names,
                self.options,
                max_samples,
                self.port == "sim",
                child_conn,
            ),
            name="clampcore-loop",
            daemon=True,
        )
        self.shared.ctrl[CTRL_STATE] = STATE_STARTING
        self._proc.start()
        child_conn.close()
        self.recorder.start()
        self.t_start = time.monotonic()

    def _cleanup_failed_start(self) -> None:
        if self._proc is not None and self._proc.is_alive():
            self._proc.kill()
        if self._rig is not None:
            self._rig.stop()
        if self.shared is not None:
            self.shared.close()
            self.shared = None
        if self._tmpdir is not None:
            self._tmpdir.cleanup()

    @property
    def loop_pid(self) -> int | None:
        """Process id of the loop process (None before start)."""
        return self._proc.pid if self._proc is not None else None

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.is_alive()

    @property
    def state(self) -> int:
        return int(self.shared.ctrl[CTRL_STATE]) if self.shared is not None else STATE_STOPPED

    def request_stop(self) -> None:
        if self.shared is not None:
            self.shared.ctrl[CTRL_STOP] = 1

    def set_zero_current(self, on: bool) -> None:
        """Hold the command at 0 pA (True) or give control back to the elements (False)."""
        if self.shared is not None:
            self.shared.ctrl[CTRL_ZERO] = 1 if on else 0

    def change(self, element: str, field_name: str, value: Any) -> int:
        """Validate and send a live change; returns its mailbox number."""
        board_range = self.shared.current_range_pA() if self.shared is not None else None
        if board_range is None and (element, field_name) == ("loop", "max_current_pA"):
            raise ExperimentError(
                "section [loop]", field_name, value,
                "the board's current range is known only once the run has started: try again",
            )  # fmt: skip
        stored = check_live_change(self.program, element, field_name, value, board_range)
        slot = self.program.param_slot(element, field_name)
        if self.shared is None:
            raise EngineError("not running")
        number = self.shared.post_change(MAIL_TARGETS[slot.array], slot.row, slot.col, stored)
        # Keep our copy of the experiment in step, for saving and for later validation.
        if element == "loop":
            self.experiment.loop[field_name] = value
        else:
            self.experiment.element(element)[field_name] = value
        return number

    @property
    def law_mode_requested(self) -> bool:
        """Whether this run asks the board to evaluate the current law (PROTOCOL.md §10)."""
        return (self.options.mode or self.experiment.loop["mode"]) == LAW_MODE

    def wait(self, timeout_s: float | None = None) -> bool:
        """Wait for the loop to end by itself; True if it has."""
        if self._proc is None:
            return True
        self._proc.join(timeout_s)
        return not self._proc.is_alive()

    def finish(self, timeout_s: float = 10.0) -> RunResult:
        """Stop (if still running), wait, write NWB, stop the rig; returns the result."""
        if self.result is not None:
            return self.result
        assert self._proc is not None and self.recorder is not None and self.shared is not None
        self.request_stop()
        report: dict[str, Any] = {"exit_code": EXIT_STOP_REQUEST, "error": None}
        if self._conn.poll(timeout_s):
            try:
                report = self._conn.recv()
            except EOFError:
                report["error"] = (
                    "the loop process ended without reporting (killed?); the board's watchdog "
                    "took the output to its fault value (0 pA)"
                )
        else:
            report["error"] = "the loop process did not answer; it was ended"
        self._proc.join(2.0)
        if self._proc.is_alive():
            self._proc.kill()
            self._proc.join()
        if self._rig is not None:
            self._rig.stop()
        status = self.status()
        final = {
            # again at the end: what changed during the run (a live stability override) is kept
            **self.options.extra_meta,
            "exit_reason": report.get("error")
            or self.recorder.error
            or EXIT_MESSAGES.get(report["exit_code"], "?"),
            "summary": status,
            "board": report.get("board"),
            "board_final_status": report.get("board_status"),
            "mode": report.get("mode", CURRENT_MODE),
            "notice": report.get("notice"),
            "scheduling": {
                "fifo_priority": self.options.realtime_priority if report.get("realtime") else 0,
                "cpu_dma_latency_held": bool(report.get("low_latency_held")),
            },
        }
        nwb = None
        try:
            nwb = self.recorder.stop(final, self.nwb_path, self.options.keep_journal)
        finally:
            self.shared.close()
        timing = self.recorder.final_meta.get("timing", {})
        error = report.get("error")
        if self.recorder.error:
            error = f"{error}; {self.recorder.error}" if error else self.recorder.error
        self.result = RunResult(
            exit_reason=final["exit_reason"],
            exit_code=int(report["exit_code"]),
            samples=int(status["samples"]),
            nwb_path=nwb,
            journal_path=self.recorder.path,
            timing=timing,
            summary=status,
            board_status=report.get("board_status"),
            error=error,
            scheduling=final["scheduling"],
            mode=final["mode"],
            notice=final["notice"],
        )
        if self._tmpdir is not None:
            self._tmpdir.cleanup()
        return self.result

    # ------------------------------------------------------------------ status
    def status(self) -> dict[str, Any]:
        """Live figures from the loop's counters (cheap; safe to call often)."""
        if self.shared is None or self.shared.stats is None:
            return {}
        out = loop_health(self.shared.stats.copy(), float(self.experiment.loop["rate_hz"]))
        out["state"] = int(self.shared.ctrl[CTRL_STATE])
        out["written"] = int(self.shared.ctrl[CTRL_WRITTEN])
        out["zero_held"] = bool(self.shared.ctrl[CTRL_ZERO])
        out["recording_error"] = self.recorder.error if self.recorder is not None else None
        out["recording_warning"] = self.recorder.warning if self.recorder is not None else None
        return out


def status_line(s: dict[str, Any], rate_hz: float) -> str:
    """The one-line live status (what the board reports included: late commands, samples
    under its watchdog, frames it rejected)."""
    if s.get("recording_error"):
        return "RECORDING FAILED: 0 pA commanded, stopping (see the message below)"
    if not s or s["samples"] == 0:
        return "starting: connecting to the board and loading the compiled loop"
    last_bin = LAT_BINS - 1  # the live histogram's last bin holds that many samples or more

    def lat(value: float) -> str:
        if value != value:  # NaN: nothing answered yet (a stop during start-up)
            return "-"
        return f">={last_bin}" if value >= last_bin else f"{value:.0f}"

    def us(value: float) -> str:
        return "-" if value != value else f"{value:.0f}"

    return (
        f"t {s['elapsed_s']:6.1f} s | {rate_hz / 1000:g} kHz "
        f"| latency p50 {lat(s['latency_p50_samples'])} "
        f"p99 {lat(s['latency_p99_samples'])} samples | turnaround p50 "
        f"{us(s['turnaround_p50_us'])} p99 {us(s['turnaround_p99_us'])} µs "
        f"| late {s['late']} missing {s['missing']} watchdog {s['watchdog']} "
        f"rejected {s.get('rx_errors', 0)} "
        f"| faults {s['faults']} limit {s['limited']} | spikes {s['spikes']} "
        f"({s['firing_rate_hz']:.1f} Hz)"
        + (f" late {s['late_spikes']}" if s.get("late_spikes") else "")
        + (" | ZERO CURRENT" if s["zero_held"] else "")
    )
