"""A board emulator on a pseudo-terminal, with a model cell behind its ADC and DAC.

It speaks ``firmware_protocol/PROTOCOL.md`` exactly as the portable C board core
(``firmware_protocol/c/ccb_core.c``) does: same replies, same counters, same
status bits, same rules for which COMMAND is applied, so that the host cannot
tell it from a board.  Behind the converters sits a model cell
(``simulated_rig.cells``) seen through the experiment's ``[amplifier]`` scaling
(``clampcore.calibration``: ``mV_to_counts`` for the ADC, ``counts_to_pA`` for the DAC).

Timing model (DEVELOPERS.md, "The loop's timing model"), tick k at t_k = k / rate:

1. take every frame that has arrived; the newest valid COMMAND is the command in
   force (a command answers one sample and applies to the samples after it);
2. if k > 0, advance the cell over (t_{k-1}, t_k] with the current of the
   command in force (the fault value before any command and after a watchdog trip);
3. measure V with that current, convert it to an ADC count and send SAMPLE k.

Two clocks:

- ``lockstep``: after SAMPLE k the rig waits for the COMMAND answering k (or a
  KEEPALIVE, or a frame that turns out bad or that fault injection discarded), then
  takes sample k+1 at once.  Time only moves when the host answers, so a run equals
  ``clampcore.simulate`` of the same experiment and seed sample for sample.  A host
  that stays silent for the watchdog timeout or ``lockstep_patience_s`` of wall
  time, whichever is longer (default 10 s, so that a host held up by a busy
  machine does not break the determinism), is taken as gone: the watchdog trips,
  the fault value goes out, and the rig samples on the wall clock from then on,
  until a COMMAND comes again.
- ``wall``: tick k is taken at start + k / rate on CLOCK_MONOTONIC, like hardware
  with its own clock.  Between ticks the rig sleeps (``clock_nanosleep`` to an
  absolute time) until ``wake_us`` before the tick (under SCHED_FIFO 50 µs, at most
  a quarter period; otherwise 2 ms, as a sleeping ordinary thread wakes too late), then
  watches the clock; at the tick it reads everything that has arrived, applies
  the newest valid COMMAND and takes the sample, as a board's sampling interrupt
  would.  ``serve()`` asks for 1 ns timer slack and, where permitted and asked
  for, SCHED_FIFO (``realtime_priority``, e.g. 60; off by default), so that those
  sleeps end on time.  By default, then, the rig watches the clock from 2 ms before
  each tick, which above 500 Hz means it spins one core for the whole run; under
  SCHED_FIFO it leaves most of the core to others (a real board takes no host
  core).  A late COMMAND is applied late; none for the watchdog timeout trips the
  watchdog.  If the rig itself is preempted it takes the overdue samples as soon
  as it can and flags them (``LOG_BEHIND`` in the ground-truth log).

Each START rebuilds the model cell at rest (cell seed ``[cell] seed + (seed << 20)``,
as ``clampcore.simulate`` does), so every run starts from the same state.

The per-sample path is one compiled function, ``rig_serve`` (``clampcore.jit.kernel``:
njit, cached, no GIL), which reads the port, deframes, applies COMMAND and
KEEPALIVE, ticks, writes SAMPLEs (and the STATUS report of a watchdog trip) and
fills the ground-truth records.  It returns to Python for every other message
(GET_HELLO, CONFIGURE, START, STOP, GET_STATUS, unknown types), when its record or
event buffer is full, and at least every ``_BUDGET_NS`` (0.25 s) so that the log is
written and signals are seen.  Python answers and calls it again.

Fault injection (seeded, for tests): a fraction of the host's per-sample frames
(COMMAND, KEEPALIVE) received while running can be discarded or have one byte
changed before decoding; a fraction of outgoing SAMPLEs can be discarded or have
one byte changed; the rig can stall once (no reading, no ticking) for N ms at
sample K.  A byte changed is always a COBS data byte, never a code byte or the
delimiter, so that the frame stays one frame with exactly one payload byte wrong,
which CRC-16 always detects (a CRC with a degree-16 generator catches every error
burst of at most 16 bits: Peterson & Brown 1961, Proc. IRE 49:228).

Public names: ``Board``, ``Faults``, ``BOARD_IDENTITY``, ``MAX_RATE_HZ``, ``WAKE_US``,
``WAKE_US_ORDINARY``,
``LOCKSTEP_PATIENCE_S``, ``WATCHDOG_MIN_US``, ``WATCHDOG_MAX_US``, ``board_hello``, ``open_pty``,
``encode_status``, ``rig_serve``, ``N_INPUTS``, ``N_OUTPUTS``; the layout of
``rig_serve``'s arrays (``S_*``, ``F_*``), its return codes ``R_*`` and event kinds
``EV_*``; ``start_rig`` and ``RigProcess`` re-exported from ``simulated_rig.launch``.
"""

from __future__ import annotations

import os
import queue
import time
import tty
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
from numba import config as numba_config

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_pA,
    mV_to_counts,
)
from clampcore.experiment import Experiment, load_experiment
from clampcore.jit import kernel
from clampcore.links import LINKS
from clampcore.realtime import fifo_scheduling, fine_timer_slack
from clampcore.rng import seed_state, uniform
from clampcore.sysio import fd_read, fd_wait_readable, fd_write, monotonic_ns, sleep_until_ns
from firmware_protocol import boardlaw, codec, lawmsg
from firmware_protocol.codec import (
    COMMAND_ANSWERS,
    COMMAND_NFIELDS,
    COMMAND_SEQ,
    DEFRAMER_BAD,
    MAX_CHANNELS,
    MAX_PAYLOAD,
    MAX_WIRE,
    MIN_PAYLOAD,
    MSG_COMMAND,
    MSG_CONFIGURE,
    MSG_GET_HELLO,
    MSG_GET_STATUS,
    MSG_KEEPALIVE,
    MSG_START,
    MSG_STATUS,
    MSG_STOP,
    RESULT_BAD_FAULT_VALUE,
    RESULT_BAD_INPUTS,
    RESULT_BAD_RATE,
    RESULT_BAD_STATE,
    RESULT_BAD_WATCHDOG,
    RESULT_OK,
    RESULT_REPORT,
    STATE_READY,
    STATE_RUNNING,
    STATE_UNCONFIGURED,
    STATUS_FAULT_OUTPUT,
    STATUS_LATE,
    STATUS_RX_ERROR,
    STATUS_WATCHDOG,
    cobs_decode,
    decode_command,
    deframe_next,
    encode_frame,
    encode_sample,
)
from simulated_rig.cells import (
    cell_advance,
    cell_measure_mV,
    cell_v_true_mV,
    make_cell,
)
from simulated_rig.groundtruth import (
    LOG_BEHIND,
    LOG_DTYPE,
    LOG_FAULT_OUTPUT,
    LOG_TX_CORRUPTED,
    LOG_TX_DROPPED,
    LOG_TX_FAILED,
    LOG_WATCHDOG,
    NO_COMMAND,
    LogWriter,
)
from simulated_rig.launch import RigProcess, start_rig  # noqa: F401 (re-exported)

# ---------------------------------------------------------------------------
# What the rig tells the host in HELLO.
# ---------------------------------------------------------------------------
BOARD_IDENTITY = "clampcore-simrig"  # 16 ASCII characters: the whole identity field
N_INPUTS = 1
N_OUTPUTS = 1
# 50 kHz: the brief's figure for the rig; above what a 12 Mbit/s USB-serial board carries
# comfortably with 20-byte frames both ways (our estimate).
MAX_RATE_HZ = 50_000
# Watchdog range (our choice): 1 ms is a few samples at the usual 10-20 kHz; 60 s covers a
# host that answers slowly on purpose (lockstep under a debugger).
WATCHDOG_MIN_US = 1_000
WATCHDOG_MAX_US = 60_000_000
_UV_PER_V = 1_000_000
# Lockstep: how long a silent host may take before it is taken as gone (our choice: far
# longer than any pause of a loaded machine seen here, far shorter than a human's patience).
LOCKSTEP_PATIENCE_S = 10.0

_M32 = 0xFFFFFFFF
_NS_PER_S = 1_000_000_000
_NS_PER_MS = 1_000_000
_NS_PER_US = 1_000
# rig_serve returns to Python at least this often (log written, signals seen): 0.25 s keeps
# the ground-truth log inside the 0.5 s flush the brief asks for, with few interruptions.
_BUDGET_NS = 250_000_000
# Idle (not running): wait for input this long per poll (ms).
_IDLE_POLL_MS = 20
# Wall clock: sleep until this long before each tick, then watch the clock. Waking from a
# timed sleep took 4 µs median, 18 µs p99 here with /dev/cpu_dma_latency at 0 and SCHED_FIFO,
# 20-40 µs median without (measured in a throw-away C test, not kept). Under SCHED_FIFO
# never more than a quarter period, so that the rig sleeps most of every period
# whatever the rate (a real-time thread that never sleeps starves the others).
WAKE_US = 50
# Without SCHED_FIFO a sleeping thread wakes too late for a 100 µs period, so by default
# the rig then watches the clock from 2 ms before each tick (it spins at high rates).
WAKE_US_ORDINARY = 2000
_STATUS_BODY = 46  # PROTOCOL.md §4.3: STATUS payload 51 bytes = 46 body + type, seq, CRC
_LOG_ROWS = 16384  # ground-truth records per buffer: more than 0.25 s up to 50 kHz
_LOG_SPARES = 3  # buffers being written or ready, beside the one being filled
_EVENTS = 4096  # kernel events per buffer (one read may bring hundreds of frames)
_CHUNK = 4096  # bytes per read(2)

# rig_serve's return codes.
R_BUDGET = 0
R_CONTROL = 1  # a message for Python waits in ctrl[:st[S_CTRL_LEN]]
R_LOG_FULL = 2
R_EVENTS_FULL = 3
R_STOP = 4

# Board state array (int64) layout.
S_STATE = 0
S_COUNTER = 1  # samples taken so far in this run (the next sample's counter)
S_RATE_HZ = 2
S_N_INPUTS = 3
S_WATCHDOG_US = 4
S_FAULT_COUNTS = 5
S_HAVE_CMD = 6
S_TRIPPED = 7
S_FLAGS = 8  # STATUS_LATE / STATUS_RX_ERROR since the previous sample
S_CMD_SEQ = 9
S_CMD_ANSWERS = 10  # u32 as on the wire
S_CMD_COUNTS = 11
S_LAST_RX_NS = 12
S_TX_SEQ = 13
S_BAD_FRAMES = 14
S_UNKNOWN = 15
S_REJECTED = 16
S_LATE = 17
S_MISSING = 18
S_TRIPS = 19
S_APPLIED = 20
S_LOCKSTEP = 21
S_WAITING = 22  # lockstep: the answer to the last sample has not come yet
S_BASE_NS = 23  # wall schedule: tick k is due at BASE_NS + (k - BASE_K) / rate
S_BASE_K = 24
S_EPOCH_NS = 25  # board clock zero
S_LOG_ON = 26
S_LOG_N = 27
S_EV_N = 28
S_CHUNK_N = 29
S_CHUNK_POS = 30
S_RAW_N = 31
S_RAW_OVER = 32
S_CTRL_LEN = 33
S_STOP = 34
S_RUN = 35
S_STALL_AT = 36
S_STALL_MS = 37
S_STALL_DONE = 38
S_BEHIND = 39
S_TX_DROPPED = 40
S_TX_CORRUPTED = 41
S_RX_DROPPED = 42
S_RX_CORRUPTED = 43
S_TX_FAILED = 44
S_BUDGET_NS = 45
S_DAC_MAX = 46
S_PATIENCE_NS = 47  # lockstep: wall time without an answer before the watchdog may trip
S_EV_LOST = 48  # events that did not fit in the event buffer
S_WAKE_NS = 49  # wall clock: sleep until this long before a tick, then watch the clock
S_REALTIME = 50  # 1 under SCHED_FIFO: then never watch the clock more than a quarter period
S_LAW_MODE = 51  # 1 after BOARD_RULES: the board evaluates queued laws (PROTOCOL.md §10)
S_LAW_SEEN = 52  # lockstep: the newest sample the host had when it sent its last LAWS
S_LAWS_LATE = 53  # laws that arrived after their own sample (not applied)
S_LAWS_AHEAD = 54  # laws too far ahead for the queue (not applied)
N_ST = 64

# Float parameters (float64 array).
F_CORRUPT_RX = 0
F_DROP_RX = 1
F_CORRUPT_TX = 2
F_DROP_TX = 3
F_DT_MS = 4
N_FF = 5

# Kernel event kinds (ev[i, 0]); ev[i, 1] = run, ev[i, 2] = counter, ev[i, 3:5] = details.
EV_WATCHDOG_TRIP = 1  # details: last valid rx and trip time, board clock µs
EV_WATCHDOG_CLEAR = 2  # details: seq and answered counter of the command that cleared it
EV_RX_DROPPED = 3  # details: message type, seq
EV_RX_CORRUPTED = 4  # details: message type, seq
EV_STALL = 5  # details: stall ms
_EV_COLS = 5
_EVENT_NAMES = {
    EV_WATCHDOG_TRIP: ("watchdog_trip", "last_rx_clock_us", "clock_us"),
    EV_WATCHDOG_CLEAR: ("watchdog_clear", "seq", "answers"),
    EV_RX_DROPPED: ("rx_dropped", "type", "seq"),
    EV_RX_CORRUPTED: ("rx_corrupted", "type", "seq"),
    EV_STALL: ("stall", "ms", None),
}


# ---------------------------------------------------------------------------
# Compiled per-sample path
# ---------------------------------------------------------------------------
# ---------------------------------------------------------------------------
# Link models on the wall clock (clampcore.links): bytes are held until the link
# would have delivered them.
# ---------------------------------------------------------------------------
_LINK_BYTES = 1 << 18  # bytes in flight each way: far more than 20 ms at 50 kHz
_LINK_CHUNKS = 1 << 14  # writes (or reads) in flight each way
LN_ON, LN_FRAME_NS, LN_TRANSIT_NS, LN_JITTER_NS = 0, 1, 2, 3
# ends[i, 0]: ring position after chunk i; ends[i, 1]: when it is delivered (ns).
Q_HEAD, Q_TAIL, Q_BYTES_IN, Q_BYTES_OUT, Q_LAST_NS = 0, 1, 2, 3, 4


class LinkShape(NamedTuple):
    """A link model's timing and the bytes it holds, each way (out: to the host)."""

    p: np.ndarray  # int64[4]: LN_*
    rng: np.ndarray  # uint64[1]: jitter stream
    obuf: np.ndarray  # uint8[_LINK_BYTES]
    oends: np.ndarray  # int64[_LINK_CHUNKS, 2]
    oq: np.ndarray  # int64[5]: Q_*
    ibuf: np.ndarray
    iends: np.ndarray
    iq: np.ndarray


def new_link_shape(link_name: str | None, seed: int) -> LinkShape:
    """The rig's link model ``link_name`` (a ``clampcore.links.LINKS`` name; None: direct pty)."""
    p = np.zeros(4, dtype=np.int64)
    if link_name is not None:
        if link_name not in LINKS:
            raise ValueError(f"link {link_name!r}: one of {', '.join(LINKS)}")
        link = LINKS[link_name]
        if link.baud > 0:
            raise ValueError(f"link {link_name!r}: the wall-clock rig models USB links only")
        p[LN_ON] = 1
        p[LN_FRAME_NS] = round(link.frame_us * _NS_PER_US)
        p[LN_TRANSIT_NS] = round(link.transit_us * _NS_PER_US)
        p[LN_JITTER_NS] = round(link.jitter_us * _NS_PER_US)
    return LinkShape(
        p,
        np.array([seed_state(seed, stream=0xF2)], dtype=np.uint64),
        np.zeros(_LINK_BYTES, dtype=np.uint8),
        np.zeros((_LINK_CHUNKS, 2), dtype=np.int64),
        np.zeros(5, dtype=np.int64),
        np.zeros(_LINK_BYTES, dtype=np.uint8),
        np.zeros((_LINK_CHUNKS, 2), dtype=np.int64),
        np.zeros(5, dtype=np.int64),
    )


@kernel
def _link_due(ln: LinkShape, q: np.ndarray, now: int) -> int:
    """When bytes handed to the link now are delivered: after the transit, at the next
    (micro)frame boundary, plus jitter, and never before what went in earlier."""
    t = now + ln.p[LN_TRANSIT_NS]
    frame = ln.p[LN_FRAME_NS]
    if frame > 0:
        t = (t // frame + 1) * frame
    if ln.p[LN_JITTER_NS] > 0:
        t += int(uniform(ln.rng, 0) * ln.p[LN_JITTER_NS])
    t = max(t, q[Q_LAST_NS])
    q[Q_LAST_NS] = t
    return t


@kernel
def _link_put(
    ln: LinkShape,
    buf: np.ndarray,
    ends: np.ndarray,
    q: np.ndarray,
    src: np.ndarray,
    n: int,
    now: int,
) -> bool:
    """Queue src[:n]; False when the link is full (the bytes are lost, as on an overrun)."""
    full = q[Q_TAIL] - q[Q_HEAD] >= ends.shape[0]
    if full or q[Q_BYTES_IN] - q[Q_BYTES_OUT] + n > buf.shape[0]:
        return False
    mask = buf.shape[0] - 1
    for i in range(n):
        buf[(q[Q_BYTES_IN] + i) & mask] = src[i]
    q[Q_BYTES_IN] += n
    slot = q[Q_TAIL] & (ends.shape[0] - 1)
    ends[slot, 0] = q[Q_BYTES_IN]
    ends[slot, 1] = _link_due(ln, q, now)
    q[Q_TAIL] += 1
    return True


@kernel
def _link_send(fd: int, ln: LinkShape, tx: np.ndarray, n: int, now: int) -> int:
    """Write tx[:n] to the host now, or hand it to the link model; bytes taken (or -1)."""
    if ln.p[LN_ON] == 0:
        return fd_write(fd, tx, 0, n)
    return n if _link_put(ln, ln.obuf, ln.oends, ln.oq, tx, n, now) else -1


@kernel
def _link_flush(fd: int, ln: LinkShape, now: int) -> None:
    """Deliver to the host every byte the link model has due by ``now``."""
    q = ln.oq
    mask = ln.obuf.shape[0] - 1
    while q[Q_HEAD] < q[Q_TAIL]:
        slot = q[Q_HEAD] & (ln.oends.shape[0] - 1)
        if ln.oends[slot, 1] > now:
            return
        end = ln.oends[slot, 0]
        while q[Q_BYTES_OUT] < end:
            start = q[Q_BYTES_OUT] & mask
            run = min(end - q[Q_BYTES_OUT], ln.obuf.shape[0] - start)
            w = fd_write(fd, ln.obuf, start, run)
            if w <= 0:
                q[Q_BYTES_OUT] = end  # the host is not reading: lost, as on a serial line
                break
            q[Q_BYTES_OUT] += w
        q[Q_HEAD] += 1


@kernel
def _link_read(fd: int, ln: LinkShape, chunk: np.ndarray, now: int) -> int:
    """Bytes from the host: read now, or what the link model has delivered by ``now``."""
    if ln.p[LN_ON] == 0:
        return fd_read(fd, chunk, 0, chunk.shape[0])
    got = fd_read(fd, chunk, 0, chunk.shape[0])
    if got > 0:
        _link_put(ln, ln.ibuf, ln.iends, ln.iq, chunk, got, now)
    q = ln.iq
    mask = ln.ibuf.shape[0] - 1
    n = 0
    while q[Q_HEAD] < q[Q_TAIL] and n < chunk.shape[0]:
        slot = q[Q_HEAD] & (ln.iends.shape[0] - 1)
        if ln.iends[slot, 1] > now:
            break
        end = ln.iends[slot, 0]
        while q[Q_BYTES_OUT] < end and n < chunk.shape[0]:
            chunk[n] = ln.ibuf[q[Q_BYTES_OUT] & mask]
            q[Q_BYTES_OUT] += 1
            n += 1
        if q[Q_BYTES_OUT] == end:
            q[Q_HEAD] += 1
    if n > 0:
        return n
    return got if got < 0 else 0


# The board's law queue: a power of two above any look-ahead the host asks for (the host's
# default 10 ms is 500 samples at 50 kHz).
LAW_QUEUE = 1024
BLOCK_POINTS = 1025  # room for clampcore.law.block_table on a 16-bit ADC
RULES_QUEUE = 4  # live rule changes (RULES_AT) held until their sample, as the C core's default


class LawBoard(NamedTuple):
    """What a law-evaluating board holds (``firmware_protocol.boardlaw`` arrays, its queue)."""

    bf: np.ndarray  # float32[N_BF]
    bi: np.ndarray  # int64[N_BI]
    bs: np.ndarray  # int64[N_BS]
    law: np.ndarray  # float32[4], the law in force
    table: np.ndarray  # float32[BLOCK_POINTS]
    qbits: np.ndarray  # uint32[LAW_QUEUE, 4]: the queued laws' float32 bits
    qlaw: np.ndarray  # float32 view of qbits
    qdue: np.ndarray  # int64[LAW_QUEUE]: the sample each slot's law is for (-1: empty)
    fields: np.ndarray  # int64[lawmsg.N_FIELDS]
    one: np.ndarray  # int64[3]: adc, dac, flags of the sample being sent
    rq_bits: np.ndarray  # uint32[RULES_QUEUE + 1, N_BF]: RULES_AT float rules (bits) waiting
    # (row RULES_QUEUE: the one being read)
    rq_f: np.ndarray  # float32 view of rq_bits
    rq_i: np.ndarray  # int64[RULES_QUEUE + 1, N_BI]: their integer rules
    rq_at: np.ndarray  # int64[RULES_QUEUE]: the sample each takes effect at
    rq_n: np.ndarray  # int64[2]: head, count (arrival order)


def new_law_board() -> LawBoard:
    bf, bi, bs, law, _ = boardlaw.new_board_arrays()
    qbits = np.zeros((LAW_QUEUE, 4), dtype=np.uint32)
    rq_bits = np.zeros((RULES_QUEUE + 1, boardlaw.N_BF), dtype=np.uint32)
    return LawBoard(
        bf,
        bi,
        bs,
        law,
        np.ones(BLOCK_POINTS, dtype=np.float32),
        qbits,
        qbits.view(np.float32),
        np.full(LAW_QUEUE, -1, dtype=np.int64),
        np.zeros(lawmsg.N_FIELDS, dtype=np.int64),
        np.zeros(3, dtype=np.int64),
        rq_bits,
        rq_bits.view(np.float32),
        np.zeros((RULES_QUEUE + 1, boardlaw.N_BI), dtype=np.int64),
        np.zeros(RULES_QUEUE, dtype=np.int64),
        np.zeros(2, dtype=np.int64),
    )


@kernel
def _on_rules_at(frame: np.ndarray, n: int, st: np.ndarray, lb: LawBoard) -> None:
    """RULES_AT (PROTOCOL.md §10.4), as the C core: held until its sample; late ones counted
    and applied at the next tick; malformed unknown; outside a running law-mode board, with
    another block_shift or with the holding queue full, rejected."""
    r = RULES_QUEUE  # read into the spare row, kept only when accepted
    at = lawmsg.decode_rules_at(frame, n, lb.rq_bits[r], lb.rq_i[r])
    shift = lb.rq_i[r, boardlaw.BI_BLOCK_SHIFT]
    if at < 0 or shift < -1 or shift > 16:
        st[S_UNKNOWN] += 1
        st[S_FLAGS] |= STATUS_RX_ERROR
        return
    if (
        st[S_STATE] != STATE_RUNNING
        or st[S_LAW_MODE] == 0
        or shift != lb.bi[boardlaw.BI_BLOCK_SHIFT]
        or lb.rq_n[1] >= RULES_QUEUE
    ):
        st[S_REJECTED] += 1
        st[S_FLAGS] |= STATUS_RX_ERROR
        return
    if at < st[S_COUNTER]:
        st[S_LAWS_LATE] += 1
        st[S_FLAGS] |= STATUS_LATE
    q = (lb.rq_n[0] + lb.rq_n[1]) % RULES_QUEUE
    for j in range(boardlaw.N_BF):
        lb.rq_bits[q, j] = lb.rq_bits[r, j]
    for j in range(boardlaw.N_BI):
        lb.rq_i[q, j] = lb.rq_i[r, j]
    lb.rq_i[q, boardlaw.BI_DAC_TOP] = lb.bi[boardlaw.BI_DAC_TOP]
    lb.rq_i[q, boardlaw.BI_FAULT_COUNTS] = lb.bi[boardlaw.BI_FAULT_COUNTS]
    lb.rq_at[q] = at
    lb.rq_n[1] += 1


@kernel
def _apply_due_rules(k: int, lb: LawBoard) -> None:
    """Put in force every held rule change due at or before sample ``k``."""
    while lb.rq_n[1] > 0 and lb.rq_at[lb.rq_n[0]] <= k:
        h = lb.rq_n[0]
        for j in range(boardlaw.N_BF):
            lb.bf[j] = lb.rq_f[h, j]
        for j in range(boardlaw.N_BI):
            lb.bi[j] = lb.rq_i[h, j]
        lb.rq_n[0] = (h + 1) % RULES_QUEUE
        lb.rq_n[1] -= 1


@kernel
def _on_laws(frame: np.ndarray, n: int, st: np.ndarray, lb: LawBoard, ts: np.ndarray) -> None:
    """Queue the laws of a LAWS frame (READY or RUNNING); late or too-early ones are counted."""
    count = lawmsg.decode_laws(frame, n, lb.fields)
    if count < 0 or st[S_STATE] == STATE_UNCONFIGURED:
        st[S_UNKNOWN] += 1
        st[S_FLAGS] |= STATUS_RX_ERROR
        return
    blocked = lb.fields[lawmsg.LAWS_BLOCKED] != 0
    taken = st[S_COUNTER] if st[S_STATE] == STATE_RUNNING else 0
    first = lb.fields[lawmsg.LAWS_FIRST]
    for i in range(count):
        sample = first + i
        if sample < taken:
            st[S_LAWS_LATE] += 1
            st[S_FLAGS] |= STATUS_LATE
            continue
        if sample - taken >= LAW_QUEUE:
            st[S_LAWS_AHEAD] += 1
            st[S_FLAGS] |= STATUS_RX_ERROR
            continue
        slot = sample & (LAW_QUEUE - 1)
        for j in range(4 if blocked else 2):
            lb.qbits[slot, j] = lawmsg.law_word(frame, blocked, i, j)
        if not blocked:
            lb.qbits[slot, 2] = 0
            lb.qbits[slot, 3] = 0
        lb.qdue[slot] = sample
    st[S_APPLIED] += count
    st[S_LAW_SEEN] = lb.fields[lawmsg.LAWS_SEEN]
    if st[S_STATE] == STATE_RUNNING:
        st[S_LAST_RX_NS] = monotonic_ns(ts)
        if st[S_TRIPPED] != 0:
            st[S_TRIPPED] = 0
        if st[S_LOCKSTEP] != 0 and st[S_LAW_SEEN] >= taken - 1:
            st[S_WAITING] = 0


@kernel
def _put_le(buf: np.ndarray, at: int, value: int, nbytes: int) -> None:
    for j in range(nbytes):
        buf[at + j] = (value >> (8 * j)) & 0xFF


@kernel
def _sticky(st: np.ndarray) -> int:
    """Status bits that hold while their condition lasts (as in ccb_core.c)."""
    s = 0
    if st[S_STATE] != STATE_UNCONFIGURED and (st[S_HAVE_CMD] == 0 or st[S_TRIPPED] != 0):
        s |= STATUS_FAULT_OUTPUT
    if st[S_TRIPPED] != 0:
        s |= STATUS_WATCHDOG
    return s


@kernel
def encode_status(
    st: np.ndarray, ack_seq: int, result: int, body: np.ndarray, out: np.ndarray
) -> int:
    """A STATUS frame (PROTOCOL.md §4.3) from the board state ``st`` into ``out``.

    Uses and advances the board's transmit seq; returns the wire length.
    """
    _put_le(body, 0, st[S_STATE], 1)
    _put_le(body, 1, _sticky(st), 1)
    _put_le(body, 2, ack_seq, 2)
    _put_le(body, 4, result, 1)
    _put_le(body, 5, st[S_COUNTER] & _M32, 4)
    _put_le(body, 9, st[S_BAD_FRAMES] & _M32, 4)
    _put_le(body, 13, st[S_UNKNOWN] & _M32, 4)
    _put_le(body, 17, st[S_REJECTED] & _M32, 4)
    _put_le(body, 21, st[S_LATE] & _M32, 4)
    _put_le(body, 25, st[S_MISSING] & _M32, 4)
    _put_le(body, 29, st[S_TRIPS] & _M32, 4)
    _put_le(body, 33, st[S_APPLIED] & _M32, 4)
    _put_le(body, 37, st[S_RATE_HZ] & _M32, 4)
    _put_le(body, 41, st[S_N_INPUTS], 1)
    _put_le(body, 42, st[S_WATCHDOG_US] & _M32, 4)
    n = encode_frame(MSG_STATUS, st[S_TX_SEQ] & 0xFFFF, body, _STATUS_BODY, out)
    st[S_TX_SEQ] = (st[S_TX_SEQ] + 1) & 0xFFFF
    return n


@kernel
def _event(st: np.ndarray, ev: np.ndarray, kind: int, a: int, b: int) -> None:
    i = st[S_EV_N]
    if i < ev.shape[0]:
        ev[i, 0] = kind
        ev[i, 1] = st[S_RUN]
        ev[i, 2] = st[S_COUNTER]
        ev[i, 3] = a
        ev[i, 4] = b
        st[S_EV_N] = i + 1
    else:
        st[S_EV_LOST] += 1


@kernel
def _newer(a: int, b: int) -> bool:
    """a comes after b counting modulo 2**32 (serial-number arithmetic, RFC 1982)."""
    return a != b and ((a - b) & _M32) < 0x80000000


@kernel
def _flip_data_byte(wire: np.ndarray, n: int, frng: np.ndarray, stream: int) -> None:
    """Change one COBS data byte of wire[:n] (no delimiter) to another non-zero value."""
    n_data = 0
    code_at = 0
    for i in range(n):
        if i == code_at:
            code_at += max(int(wire[i]), 1)
        else:
            n_data += 1
    if n_data == 0:
        return
    pick = min(int(uniform(frng, stream) * n_data), n_data - 1)
    code_at = 0
    for i in range(n):
        if i == code_at:
            code_at += max(int(wire[i]), 1)
            continue
        if pick == 0:
            new = 1 + min(int(uniform(frng, stream) * 254), 253)  # 1 .. 254
            if new >= wire[i]:
                new += 1  # 1 .. 255 without the old value: neither the old byte nor 0
            wire[i] = new
            return
        pick -= 1


@kernel
def _bad_frame(st: np.ndarray) -> None:
    st[S_BAD_FRAMES] += 1
    st[S_FLAGS] |= STATUS_RX_ERROR
    if st[S_STATE] == STATE_RUNNING and st[S_LOCKSTEP] != 0:
        st[S_WAITING] = 0  # it may have been the answer: do not wait for it


@kernel
def _on_command(
    frame: np.ndarray,
    n: int,
    st: np.ndarray,
    ev: np.ndarray,
    dac_tmp: np.ndarray,
    fields: np.ndarray,
    ts: np.ndarray,
) -> None:
    """Apply a COMMAND if it is valid (same rules as ccb_core.c's on_command)."""
    k = decode_command(frame, n, dac_tmp, fields)
    if k != N_OUTPUTS:
        st[S_UNKNOWN] += 1  # other length or version: ignore and count, never act
        st[S_FLAGS] |= STATUS_RX_ERROR
        return
    if st[S_STATE] != STATE_RUNNING or dac_tmp[0] > st[S_DAC_MAX]:
        st[S_REJECTED] += 1
        st[S_FLAGS] |= STATUS_RX_ERROR
        return
    answers = fields[COMMAND_ANSWERS]
    taken = st[S_COUNTER] & _M32  # samples sent so far: 0 .. taken - 1
    if not _newer(taken, answers) or (
        st[S_HAVE_CMD] != 0 and not _newer(answers, st[S_CMD_ANSWERS])
    ):
        st[S_REJECTED] += 1  # answers a sample not sent yet, or older than the one in force
        st[S_FLAGS] |= STATUS_RX_ERROR
        return
    if ((taken - answers) & _M32) > 1:
        st[S_LATE] += 1  # sample answers + 1 was taken without it: applied late
        st[S_FLAGS] |= STATUS_LATE
    if st[S_HAVE_CMD] != 0:
        st[S_MISSING] += (answers - st[S_CMD_ANSWERS] - 1) & _M32
    else:
        st[S_MISSING] += answers
    st[S_CMD_COUNTS] = dac_tmp[0]
    st[S_HAVE_CMD] = 1
    st[S_CMD_SEQ] = fields[COMMAND_SEQ]
    st[S_CMD_ANSWERS] = answers
    st[S_APPLIED] += 1
    st[S_LAST_RX_NS] = monotonic_ns(ts)
    if st[S_TRIPPED] != 0:
        st[S_TRIPPED] = 0
        _event(st, ev, EV_WATCHDOG_CLEAR, fields[COMMAND_SEQ], answers)
    if st[S_LOCKSTEP] != 0 and answers == ((taken - 1) & _M32):
        st[S_WAITING] = 0


@kernel
def _on_raw_frame(
    st: np.ndarray,
    ff: np.ndarray,
    raw: np.ndarray,
    frame: np.ndarray,
    scratch: np.ndarray,
    ctrl: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    dac_tmp: np.ndarray,
    fields: np.ndarray,
    frng: np.ndarray,
    ev: np.ndarray,
    ts: np.ndarray,
    lb: LawBoard,
) -> bool:
    """Handle one frame raw[:st[S_RAW_N]] (wire bytes, delimiter not included).

    Injects receive faults, deframes (CRC), applies COMMAND and KEEPALIVE; any
    other message is copied to ``ctrl`` for Python and True is returned.
    """
    n = st[S_RAW_N]
    running = st[S_STATE] == STATE_RUNNING
    if running and (ff[F_DROP_RX] > 0.0 or ff[F_CORRUPT_RX] > 0.0):
        m = cobs_decode(raw, n, scratch)
        if m >= 3 and scratch[0] in (MSG_COMMAND, MSG_KEEPALIVE, lawmsg.MSG_LAWS):
            seq = int(scratch[1]) | (int(scratch[2]) << 8)
            u = uniform(frng, 0)
            if u < ff[F_DROP_RX]:
                st[S_RX_DROPPED] += 1
                _event(st, ev, EV_RX_DROPPED, scratch[0], seq)
                if st[S_LOCKSTEP] != 0:
                    st[S_WAITING] = 0  # the board never sees it: do not wait for it
                return False
            if u < ff[F_DROP_RX] + ff[F_CORRUPT_RX]:
                st[S_RX_CORRUPTED] += 1
                _event(st, ev, EV_RX_CORRUPTED, scratch[0], seq)
                _flip_data_byte(raw, n, frng, 0)
    raw[n] = 0
    bad_before = dstate[DEFRAMER_BAD]
    m = deframe_next(dstate, dbuf, raw, n + 1, frame)
    if m > 0:
        deframe_next(dstate, dbuf, raw, n + 1, frame)  # returns 0: this chunk is used up
    if dstate[DEFRAMER_BAD] != bad_before or m <= 0:
        _bad_frame(st)
        return False
    typ = frame[0]
    if typ == MSG_COMMAND:
        _on_command(frame, m, st, ev, dac_tmp, fields, ts)
        return False
    if typ == lawmsg.MSG_LAWS:
        _on_laws(frame, m, st, lb, ts)
        return False
    if typ == lawmsg.MSG_RULES_AT:
        _on_rules_at(frame, m, st, lb)
        return False
    if typ == lawmsg.MSG_ZERO and m == MIN_PAYLOAD + 1:
        lb.bs[boardlaw.BS_HOLD_ZERO] = 1 if frame[3] != 0 else 0  # on arrival, ahead of laws
        return False
    if typ == MSG_KEEPALIVE and m == MIN_PAYLOAD:
        if running:
            st[S_LAST_RX_NS] = monotonic_ns(ts)
            if st[S_LOCKSTEP] != 0:
                st[S_WAITING] = 0  # the host lets this sample pass without a command
        return False
    for i in range(m):
        ctrl[i] = frame[i]
    st[S_CTRL_LEN] = m
    return True


@kernel
def _pump(
    fd: int,
    st: np.ndarray,
    ff: np.ndarray,
    chunk: np.ndarray,
    raw: np.ndarray,
    frame: np.ndarray,
    scratch: np.ndarray,
    ctrl: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    dac_tmp: np.ndarray,
    fields: np.ndarray,
    frng: np.ndarray,
    ev: np.ndarray,
    ts: np.ndarray,
    lb: LawBoard,
    ln: LinkShape,
) -> bool:
    """Read and handle everything that has arrived; True when a message waits for Python."""
    while True:
        pos = st[S_CHUNK_POS]
        n = st[S_CHUNK_N]
        if pos >= n:
            got = _link_read(fd, ln, chunk, monotonic_ns(ts))
            if got <= 0:
                st[S_CHUNK_POS] = 0
                st[S_CHUNK_N] = 0
                return False
            pos = 0
            n = got
            st[S_CHUNK_N] = n
        while pos < n:
            b = chunk[pos]
            pos += 1
            if b != 0:
                r = st[S_RAW_N]
                if r < raw.shape[0] - 1:
                    raw[r] = b
                    st[S_RAW_N] = r + 1
                else:
                    st[S_RAW_OVER] = 1  # longer than any frame: dropped at its delimiter
                continue
            if st[S_RAW_OVER] != 0:
                st[S_RAW_OVER] = 0
                st[S_RAW_N] = 0
                _bad_frame(st)
                continue
            if st[S_RAW_N] == 0:
                continue  # repeated delimiter: an empty frame, ignored
            wants_python = _on_raw_frame(
                st, ff, raw, frame, scratch, ctrl, dstate, dbuf, dac_tmp, fields, frng, ev, ts, lb
            )
            st[S_RAW_N] = 0
            if wants_python:
                st[S_CHUNK_POS] = pos
                return True
        st[S_CHUNK_POS] = pos


@kernel
def _tick(
    fd: int,
    st: np.ndarray,
    ff: np.ndarray,
    due_ns: int,
    tx: np.ndarray,
    body: np.ndarray,
    adc: np.ndarray,
    frng: np.ndarray,
    ts: np.ndarray,
    cell_kind: int,
    cell_p: np.ndarray,
    cell_s: np.ndarray,
    cell_rng: np.ndarray,
    conv: np.ndarray,
    log: np.ndarray,
    ev: np.ndarray,
    lb: LawBoard,
    ln: LinkShape,
) -> None:
    """Take sample st[S_COUNTER]: watchdog, cell, ADC, SAMPLE, ground truth.

    In law mode (PROTOCOL.md §10) the DAC count that drove the cell since the last tick
    was computed at that tick from its own ADC count; this tick puts the law queued for
    it in force, evaluates it at the fresh count and sends SAMPLES.
    """
    k = st[S_COUNTER]
    now = monotonic_ns(ts)
    clock_us = (now - st[S_EPOCH_NS]) // _NS_PER_US
    if st[S_TRIPPED] == 0 and now - st[S_LAST_RX_NS] >= st[S_WATCHDOG_US] * _NS_PER_US:
        st[S_TRIPPED] = 1
        st[S_TRIPS] += 1
        _event(
            st, ev, EV_WATCHDOG_TRIP, (st[S_LAST_RX_NS] - st[S_EPOCH_NS]) // _NS_PER_US, clock_us
        )
        nw = encode_status(st, 0, RESULT_REPORT, body, tx)
        if _link_send(fd, ln, tx, nw, now) != nw:
            st[S_TX_FAILED] += 1
        if st[S_LOCKSTEP] != 0:
            st[S_BASE_NS] = now  # no answers: sample on the wall clock from here
            st[S_BASE_K] = k
            due_ns = now
    law_mode = st[S_LAW_MODE] != 0
    fault = st[S_HAVE_CMD] == 0 or st[S_TRIPPED] != 0
    counts = st[S_FAULT_COUNTS] if fault else st[S_CMD_COUNTS]
    i_pA = counts_to_pA(conv, counts)
    if k > 0:
        cell_advance(cell_kind, cell_p, cell_s, cell_rng, i_pA, ff[F_DT_MS])
    v_mV = cell_measure_mV(cell_kind, cell_p, cell_s, cell_rng, i_pA)
    adc[0] = mV_to_counts(conv, v_mV)
    if law_mode:
        _apply_due_rules(k, lb)
        slot = k & (LAW_QUEUE - 1)
        if lb.qdue[slot] == k:
            boardlaw.board_set_law(lb.bs, lb.law, lb.qlaw[slot], k)
            lb.qdue[slot] = -1
        packed = boardlaw.board_eval(adc[0], k, lb.bf, lb.bi, lb.bs, lb.law, lb.table)
        out_flags = packed >> 16
        if st[S_TRIPPED] != 0:  # the link watchdog overrides every law
            out_flags |= boardlaw.BF_FLAG_FAULT
        st[S_CMD_COUNTS] = packed & 0xFFFF
        st[S_HAVE_CMD] = 0 if out_flags & boardlaw.BF_FLAG_FAULT else 1
        lb.one[0] = adc[0]
        lb.one[1] = st[S_FAULT_COUNTS] if st[S_TRIPPED] != 0 else st[S_CMD_COUNTS]
        lb.one[2] = out_flags
    status = _sticky(st) | st[S_FLAGS]
    st[S_FLAGS] = 0
    if st[S_LOCKSTEP] != 0:
        clock_us = (k * 1_000_000) // st[S_RATE_HZ]  # lockstep: the board's time is virtual
        lag_ns = 0
    else:
        lag_ns = now - due_ns
    cmd_seq = st[S_CMD_SEQ] if st[S_HAVE_CMD] != 0 else 0
    if law_mode:
        n = lawmsg.encode_samples(
            st[S_TX_SEQ], k, clock_us, status, 1, lb.one[0:1], lb.one[1:2], lb.one[2:3], tx
        )
    else:
        n = encode_sample(st[S_TX_SEQ], k & _M32, clock_us & _M32, cmd_seq, status, adc, tx)
    st[S_TX_SEQ] = (st[S_TX_SEQ] + 1) & 0xFFFF
    flags = 0
    send = True
    if ff[F_DROP_TX] > 0.0 or ff[F_CORRUPT_TX] > 0.0:
        u = uniform(frng, 1)
        if u < ff[F_DROP_TX]:
            send = False
            flags |= LOG_TX_DROPPED
            st[S_TX_DROPPED] += 1
        elif u < ff[F_DROP_TX] + ff[F_CORRUPT_TX]:
            _flip_data_byte(tx, n - 1, frng, 1)
            flags |= LOG_TX_CORRUPTED
            st[S_TX_CORRUPTED] += 1
    if send and _link_send(fd, ln, tx, n, now) != n:
        flags |= LOG_TX_FAILED
        st[S_TX_FAILED] += 1
    period_ns = _NS_PER_S // st[S_RATE_HZ]
    if lag_ns >= period_ns:
        flags |= LOG_BEHIND
        st[S_BEHIND] += 1
    if fault:
        flags |= LOG_FAULT_OUTPUT
    if st[S_TRIPPED] != 0:
        flags |= LOG_WATCHDOG
    if st[S_LOG_ON] != 0:
        i = st[S_LOG_N]
        row = log[i]
        row["counter"] = k
        row["v_true_mV"] = cell_v_true_mV(cell_kind, cell_p, cell_s)
        row["i_applied_pA"] = i_pA
        row["clock_us"] = clock_us & _M32
        row["lag_us"] = min(lag_ns // _NS_PER_US, 0x7FFFFFFF)
        row["adc_counts"] = adc[0]
        row["dac_counts"] = counts
        row["status"] = status
        row["flags"] = flags
        if fault or law_mode:
            row["cmd_seq"] = NO_COMMAND
            row["cmd_answers"] = NO_COMMAND
        else:
            row["cmd_seq"] = st[S_CMD_SEQ]
            row["cmd_answers"] = k - ((k - st[S_CMD_ANSWERS]) & _M32)
        st[S_LOG_N] = i + 1
    st[S_COUNTER] = k + 1
    if st[S_LOCKSTEP] != 0:
        # A sample the host will never see (dropped, or dropped by its CRC check) gets no
        # answer: do not wait for one.
        st[S_WAITING] = (
            1 if (flags & (LOG_TX_DROPPED | LOG_TX_CORRUPTED | LOG_TX_FAILED)) == 0 else 0
        )


@kernel
def rig_serve(
    fd: int,
    st: np.ndarray,
    ff: np.ndarray,
    chunk: np.ndarray,
    raw: np.ndarray,
    frame: np.ndarray,
    scratch: np.ndarray,
    ctrl: np.ndarray,
    tx: np.ndarray,
    body: np.ndarray,
    adc: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    dac_tmp: np.ndarray,
    fields: np.ndarray,
    frng: np.ndarray,
    ts: np.ndarray,
    pollfd: np.ndarray,
    cell_kind: int,
    cell_p: np.ndarray,
    cell_s: np.ndarray,
    cell_rng: np.ndarray,
    conv: np.ndarray,
    log: np.ndarray,
    ev: np.ndarray,
    lb: LawBoard,
    ln: LinkShape,
) -> int:
    """Serve the port until Python is needed; returns an ``R_*`` reason.

    Real-time rules here: no allocation, no Python objects, no file system; the only
    system calls are read/write on the port, poll and clock_gettime.
    """
    budget_end = monotonic_ns(ts) + st[S_BUDGET_NS]
    while True:
        if st[S_STOP] != 0:
            return R_STOP
        _link_flush(fd, ln, monotonic_ns(ts))
        if _pump(
            fd,
            st,
            ff,
            chunk,
            raw,
            frame,
            scratch,
            ctrl,
            dstate,
            dbuf,
            dac_tmp,
            fields,
            frng,
            ev,
            ts,
            lb,
            ln,
        ):
            return R_CONTROL
        now = monotonic_ns(ts)
        if st[S_STATE] != STATE_RUNNING:
            if now >= budget_end:
                return R_BUDGET
            fd_wait_readable(fd, _IDLE_POLL_MS, pollfd)
            continue
        if st[S_LOG_ON] != 0 and st[S_LOG_N] >= log.shape[0]:
            return R_LOG_FULL
        if st[S_EV_N] > ev.shape[0] // 2:
            return R_EVENTS_FULL
        k = st[S_COUNTER]
        if st[S_LOCKSTEP] != 0 and st[S_TRIPPED] == 0:
            due = now
            if st[S_WAITING] != 0:
                limit = max(st[S_WATCHDOG_US] * _NS_PER_US, st[S_PATIENCE_NS])
                left = st[S_LAST_RX_NS] + limit - now
                if left > 0:  # else: the watchdog's time is up, the tick trips it
                    if now >= budget_end:
                        return R_BUDGET
                    wait_ns = min(left, budget_end - now)
                    fd_wait_readable(fd, wait_ns // _NS_PER_MS + 1, pollfd)
                    continue
        else:
            due = st[S_BASE_NS] + ((k - st[S_BASE_K]) * _NS_PER_S) // st[S_RATE_HZ]
            if now < due:
                if now >= budget_end:
                    return R_BUDGET
                margin = st[S_WAKE_NS]
                if st[S_REALTIME] != 0:  # a real-time thread must leave the core to others
                    margin = min(margin, _NS_PER_S // (4 * st[S_RATE_HZ]))
                wake = due - margin
                if now < wake:
                    sleep_until_ns(min(wake, budget_end), ts)
                else:
                    while monotonic_ns(ts) < due:  # the last stretch: the clock only
                        pass
                continue
        if k == st[S_STALL_AT] and st[S_STALL_MS] > 0 and st[S_STALL_DONE] == 0:
            st[S_STALL_DONE] = 1
            _event(st, ev, EV_STALL, st[S_STALL_MS], 0)
            end = now + st[S_STALL_MS] * _NS_PER_MS
            while monotonic_ns(ts) < end:  # frozen: no reading, no ticking
                sleep_until_ns(end, ts)
            continue
        _tick(
            fd,
            st,
            ff,
            due,
            tx,
            body,
            adc,
            frng,
            ts,
            cell_kind,
            cell_p,
            cell_s,
            cell_rng,
            conv,
            log,
            ev,
            lb,
            ln,
        )
        if now >= budget_end:
            return R_BUDGET


# ---------------------------------------------------------------------------
# Python side
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Faults:
    """Fault injection: fractions in [0, 1] of frames affected, and one stall."""

    corrupt_rx: float = 0.0
    drop_rx: float = 0.0
    corrupt_tx: float = 0.0
    drop_tx: float = 0.0
    stall_ms: int = 0
    stall_at: int = 0

    def __post_init__(self) -> None:
        for name in ("corrupt_rx", "drop_rx", "corrupt_tx", "drop_tx"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise ValueError(f"{name} must be a number, got {value!r}")
            if not 0.0 <= value <= 1.0:
                raise ValueError(f"{name} = {value!r}: a fraction of frames, between 0 and 1")
        for rx_tx in ("rx", "tx"):
            total = getattr(self, f"corrupt_{rx_tx}") + getattr(self, f"drop_{rx_tx}")
            if total > 1.0:
                raise ValueError(f"corrupt_{rx_tx} + drop_{rx_tx} = {total:g} is more than 1")
        for name in ("stall_ms", "stall_at"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                raise ValueError(f"{name} must be an integer >= 0, got {value!r}")


def board_hello(max_rate_hz: int = MAX_RATE_HZ) -> codec.Hello:
    """The capabilities the rig reports (16-bit, +-10 V converters, one in, one out)."""
    return codec.Hello(
        identity=BOARD_IDENTITY,
        adc_bits=DEFAULT_BOARD_ADC.bits,
        dac_bits=DEFAULT_BOARD_DAC.bits,
        n_inputs=N_INPUTS,
        n_outputs=N_OUTPUTS,
        adc_min_uV=round(DEFAULT_BOARD_ADC.min_V * _UV_PER_V),
        adc_max_uV=round(DEFAULT_BOARD_ADC.max_V * _UV_PER_V),
        dac_min_uV=round(DEFAULT_BOARD_DAC.min_V * _UV_PER_V),
        dac_max_uV=round(DEFAULT_BOARD_DAC.max_V * _UV_PER_V),
        max_rate_hz=max_rate_hz,
        watchdog_min_us=WATCHDOG_MIN_US,
        watchdog_max_us=WATCHDOG_MAX_US,
        capabilities=codec.CAP_LAW,
        law_queue=LAW_QUEUE,
        mg_groups=1,  # one Mg block table (PROTOCOL.md §10.2)
        max_samples=1,  # one sample per SAMPLES frame
    )


def open_pty() -> tuple[int, int, str]:
    """A pseudo-terminal for the rig: (master fd, slave fd, slave path).

    The slave is put in raw mode (no echo, no line editing, 8 bits through) and
    kept open by the rig, so that the master never sees a hang-up when a host
    closes the port and another opens it.  The master is non-blocking: a write
    that the host does not read in time fails instead of stopping the rig.
    """
    master, slave = os.openpty()
    tty.setraw(slave)
    os.set_blocking(master, False)
    return master, slave, os.ttyname(slave)


class Board:
    """The board emulator serving one port (``fd``: the pty master, non-blocking).

    ``serve()`` runs until ``request_stop()`` (safe from another thread or a
    signal handler) or until ``should_stop()`` returns True.
    """

    def __init__(
        self,
        fd: int,
        experiment: Any = None,
        clock: str = "wall",
        max_rate_hz: int = MAX_RATE_HZ,
        seed: int = 0,
        faults: Faults | None = None,
        log_path: str | Path | None = None,
        lockstep_patience_s: float = LOCKSTEP_PATIENCE_S,
        wake_us: int | None = None,
        realtime_priority: int = 0,
        link: str | None = None,
    ) -> None:
        if not (isinstance(lockstep_patience_s, int | float) and lockstep_patience_s >= 0):
            raise ValueError(f"lockstep_patience_s must be >= 0, got {lockstep_patience_s!r}")
        if wake_us is not None and (
            isinstance(wake_us, bool) or not isinstance(wake_us, int) or wake_us < 0
        ):
            raise ValueError(f"wake_us must be an integer >= 0, got {wake_us!r}")
        if isinstance(realtime_priority, bool) or not isinstance(realtime_priority, int):
            raise ValueError(f"realtime_priority must be an integer, got {realtime_priority!r}")
        if not 0 <= realtime_priority <= 99:
            raise ValueError(f"realtime_priority = {realtime_priority}: must be 0 .. 99")
        if clock not in ("wall", "lockstep"):
            raise ValueError(f"clock must be 'wall' or 'lockstep', got {clock!r}")
        if isinstance(max_rate_hz, bool) or not isinstance(max_rate_hz, int):
            raise ValueError(f"max_rate_hz must be an integer, got {max_rate_hz!r}")
        if not 1 <= max_rate_hz <= _M32:
            raise ValueError(f"max_rate_hz = {max_rate_hz}: must be 1 .. 2**32 - 1")
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise ValueError(f"seed must be an integer >= 0, got {seed!r}")
        self.fd = fd
        self.experiment: Experiment = load_experiment(experiment if experiment is not None else {})
        self.clock = clock
        self.seed = seed
        self.realtime_priority = realtime_priority
        self.wake_us = wake_us  # None: WAKE_US under SCHED_FIFO, else WAKE_US_ORDINARY
        self.faults = faults or Faults()
        self.hello = board_hello(max_rate_hz)
        self.conv = conversion_array(
            DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, self.experiment.amplifier
        )
        self.cell = make_cell(self._cell_config(), self.experiment.dt_ms)

        st = np.zeros(N_ST, dtype=np.int64)
        st[S_STATE] = STATE_UNCONFIGURED
        st[S_LOCKSTEP] = 1 if clock == "lockstep" else 0
        st[S_EPOCH_NS] = time.monotonic_ns()
        st[S_BUDGET_NS] = _BUDGET_NS
        st[S_STALL_AT] = self.faults.stall_at
        st[S_STALL_MS] = self.faults.stall_ms
        st[S_DAC_MAX] = 2**self.hello.dac_bits - 1
        st[S_PATIENCE_NS] = round(lockstep_patience_s * _NS_PER_S)
        st[S_RATE_HZ] = 1  # never divided by before CONFIGURE, but keep it non-zero
        st[S_LOG_ON] = 1 if log_path is not None else 0
        self.st = st
        self._apply_scheduling(realtime=False)  # serve() applies what it is granted
        ff = np.zeros(N_FF, dtype=np.float64)
        ff[F_CORRUPT_RX] = self.faults.corrupt_rx
        ff[F_DROP_RX] = self.faults.drop_rx
        ff[F_CORRUPT_TX] = self.faults.corrupt_tx
        ff[F_DROP_TX] = self.faults.drop_tx
        ff[F_DT_MS] = self.experiment.dt_ms
        self.ff = ff
        self._chunk = np.zeros(_CHUNK, dtype=np.uint8)
        self._raw = np.zeros(2 * MAX_WIRE, dtype=np.uint8)
        self._frame = np.zeros(MAX_WIRE, dtype=np.uint8)
        self._scratch = np.zeros(2 * MAX_WIRE, dtype=np.uint8)
        self._ctrl = np.zeros(MAX_WIRE, dtype=np.uint8)
        self._tx = np.zeros(MAX_WIRE, dtype=np.uint8)
        self._body = np.zeros(MAX_PAYLOAD, dtype=np.uint8)
        self._adc = np.zeros(N_INPUTS, dtype=np.int64)
        self._dstate, self._dbuf = codec.new_deframer()
        self._dac_tmp = np.zeros(MAX_CHANNELS, dtype=np.int64)
        self._fields = np.zeros(COMMAND_NFIELDS, dtype=np.int64)
        # Fault-injection streams: 0 receive, 1 transmit (stream numbers are ours).
        self._frng = np.array(
            [seed_state(seed, stream=0xF0), seed_state(seed, stream=0xF1)], dtype=np.uint64
        )
        self._ts = np.zeros(2, dtype=np.int64)
        self._pollfd = np.zeros(2, dtype=np.int32)
        self._log = np.zeros(_LOG_ROWS, dtype=LOG_DTYPE)
        # Spare record buffers: the kernel fills one while the log writer writes others.
        self._spare_logs: queue.SimpleQueue[np.ndarray] = queue.SimpleQueue()
        for _ in range(_LOG_SPARES):
            self._spare_logs.put(np.zeros(_LOG_ROWS, dtype=LOG_DTYPE))
        self._ev = np.zeros((_EVENTS, _EV_COLS), dtype=np.int64)
        self.law_board = new_law_board()
        if link is not None and clock != "wall":
            raise ValueError("a link model needs the wall clock (lockstep time is virtual)")
        self.link_name = link
        self.link = new_link_shape(link, seed)
        self._stop_requested = False
        self._writer: LogWriter | None = None
        if log_path is not None:
            self._writer = LogWriter(log_path, self._log_header())

    # -- public ---------------------------------------------------------------
    def request_stop(self) -> None:
        """Make ``serve()`` return soon (at once from another thread, within 0.25 s from a
        signal handler)."""
        self._stop_requested = True
        self.st[S_STOP] = 1

    def warm_up(self) -> None:
        """Load (or compile) the compiled path now, so that the first message gets its answer."""
        budget = self.st[S_BUDGET_NS]
        self.st[S_BUDGET_NS] = 0
        try:
            self._serve_once()
        finally:
            self.st[S_BUDGET_NS] = budget

    def serve(self, should_stop: Callable[[], bool] | None = None) -> None:
        """Answer the host and take samples until asked to stop; then close the log.

        The calling thread gets 1 ns timer slack and, where permitted and asked for,
        SCHED_FIFO (``realtime_priority``), so that its timed sleeps end on time.
        """
        fine_timer_slack()
        self._apply_scheduling(fifo_scheduling(self.realtime_priority))
        try:
            while not self._stop_requested and not (should_stop and should_stop()):
                self._serve_once()
        finally:
            self._drain()
            if self.st[S_STATE] == STATE_RUNNING:
                self._log_events([self._stop_event("rig shut down")])
            self.close()

    def _apply_scheduling(self, realtime: bool) -> None:
        """Record whether SCHED_FIFO was granted and choose the wall clock's wake margin."""
        self.realtime = realtime
        self.st[S_REALTIME] = 1 if realtime else 0
        wake_us = self.wake_us
        if wake_us is None:
            wake_us = WAKE_US if realtime else WAKE_US_ORDINARY
        self.st[S_WAKE_NS] = wake_us * _NS_PER_US

    def _serve_once(self) -> None:
        reason = rig_serve(
            self.fd,
            self.st,
            self.ff,
            self._chunk,
            self._raw,
            self._frame,
            self._scratch,
            self._ctrl,
            self._tx,
            self._body,
            self._adc,
            self._dstate,
            self._dbuf,
            self._dac_tmp,
            self._fields,
            self._frng,
            self._ts,
            self._pollfd,
            self.cell.kind,
            self.cell.params,
            self.cell.state,
            self.cell.rng,
            self.conv,
            self._log,
            self._ev,
            self.law_board,
            self.link,
        )
        self._drain()
        if reason == R_CONTROL:
            self._on_control(self._ctrl[: self.st[S_CTRL_LEN]].tobytes())

    def close(self) -> None:
        """Write what is queued to the ground-truth log and close it (the port stays open)."""
        if self._writer is not None:
            writer, self._writer = self._writer, None
            writer.close()

    def status(self, ack_seq: int = 0, result: int = RESULT_OK) -> codec.Status:
        """The STATUS the board would send now."""
        out = np.zeros(MAX_WIRE, dtype=np.uint8)
        seq = int(self.st[S_TX_SEQ])
        n = encode_status(self.st, ack_seq, result, self._body, out)
        self.st[S_TX_SEQ] = seq  # not sent: do not use up a seq
        _, message = codec.decode_message(out[:n].tobytes())
        assert isinstance(message, codec.Status)
        return message

    # -- messages -------------------------------------------------------------
    def _send(self, wire: bytes) -> None:
        try:
            os.write(self.fd, wire)
        except OSError:  # buffer full (nobody reads): lost, as on a serial line
            self.st[S_TX_FAILED] += 1

    def _send_status(self, ack_seq: int, result: int) -> None:
        out = np.zeros(MAX_WIRE, dtype=np.uint8)
        n = encode_status(self.st, ack_seq, result, self._body, out)
        self._send(out[:n].tobytes())

    def _reply(self, ack_seq: int, result: int) -> None:
        if result != RESULT_OK:
            self.st[S_REJECTED] += 1
            self.st[S_FLAGS] |= STATUS_RX_ERROR
        self._send_status(ack_seq, result)

    def _unknown(self, msg_type: int) -> None:
        self.st[S_UNKNOWN] += 1
        self.st[S_FLAGS] |= STATUS_RX_ERROR
        self._log_events([self._event("unknown_message", type=msg_type)])

    def _on_control(self, payload: bytes) -> None:
        msg_type = payload[0]
        seq = payload[1] | (payload[2] << 8)
        if msg_type == MSG_CONFIGURE:
            self._on_configure(payload, seq)
            return
        if msg_type in (lawmsg.MSG_BOARD_RULES, lawmsg.MSG_BLOCK_TABLE):
            self._on_law_setup(msg_type, payload[3:-2], seq)
            return
        if len(payload) != MIN_PAYLOAD:
            self._unknown(msg_type)  # every other host message has an empty body
        elif msg_type == MSG_GET_HELLO:
            wire = codec.encode_message(self.hello, int(self.st[S_TX_SEQ]))
            self.st[S_TX_SEQ] = (self.st[S_TX_SEQ] + 1) & 0xFFFF
            self._send(wire)
        elif msg_type == MSG_START:
            self._on_start(seq)
        elif msg_type == MSG_STOP:
            self._on_stop(seq)
        elif msg_type == MSG_GET_STATUS:
            self._send_status(seq, RESULT_OK)
        else:
            self._unknown(msg_type)

    def _on_law_setup(self, msg_type: int, body: bytes, seq: int) -> None:
        """BOARD_RULES or BLOCK_TABLE (READY only): the board will evaluate laws."""
        lb = self.law_board
        if self.st[S_STATE] != STATE_READY:
            self._reply(seq, RESULT_BAD_STATE)
            return
        try:
            if msg_type == lawmsg.MSG_BOARD_RULES:
                lawmsg.parse_rules(body, lb.bf, lb.bi)
                lb.bi[boardlaw.BI_DAC_TOP] = self.st[S_DAC_MAX]
                lb.bi[boardlaw.BI_FAULT_COUNTS] = self.st[S_FAULT_COUNTS]
                self.st[S_LAW_MODE] = 1
                self._log_events([self._event("law_mode", rules=body.hex())])
            else:
                lawmsg.parse_table(body, lb.table)
        except ValueError:
            self._unknown(msg_type)
            return
        self._reply(seq, RESULT_OK)

    def _on_configure(self, payload: bytes, seq: int) -> None:
        try:
            _, cfg = codec.parse_payload(payload)
        except codec.FrameError:
            self._unknown(MSG_CONFIGURE)  # other version or length: ignore and count
            return
        assert isinstance(cfg, codec.Configure)
        if len(cfg.fault_counts) != N_OUTPUTS:
            self._unknown(MSG_CONFIGURE)
            return
        st = self.st
        if st[S_STATE] == STATE_RUNNING:
            result = RESULT_BAD_STATE
        elif not 1 <= cfg.rate_hz <= self.hello.max_rate_hz:
            result = RESULT_BAD_RATE
        elif not 1 <= cfg.n_inputs <= N_INPUTS:
            result = RESULT_BAD_INPUTS
        elif not WATCHDOG_MIN_US <= cfg.watchdog_us <= WATCHDOG_MAX_US:
            result = RESULT_BAD_WATCHDOG
        elif any(c > st[S_DAC_MAX] for c in cfg.fault_counts):
            result = RESULT_BAD_FAULT_VALUE
        else:
            result = RESULT_OK
            st[S_RATE_HZ] = cfg.rate_hz
            st[S_N_INPUTS] = cfg.n_inputs
            st[S_WATCHDOG_US] = cfg.watchdog_us
            st[S_FAULT_COUNTS] = cfg.fault_counts[0]
            st[S_STATE] = STATE_READY
            st[S_HAVE_CMD] = 0
            st[S_TRIPPED] = 0
            st[S_LAW_MODE] = 0  # until BOARD_RULES come again
            self.law_board.qdue[:] = -1
            self.law_board.rq_n[1] = 0
        self._log_events(
            [
                self._event(
                    "configure",
                    rate_hz=cfg.rate_hz,
                    n_inputs=cfg.n_inputs,
                    watchdog_us=cfg.watchdog_us,
                    fault_counts=list(cfg.fault_counts),
                    result=result,
                )
            ]
        )
        self._reply(seq, result)

    def _on_start(self, seq: int) -> None:
        st = self.st
        if st[S_STATE] != STATE_READY:
            self._reply(seq, RESULT_BAD_STATE)
            return
        rate_hz = int(st[S_RATE_HZ])
        self.ff[F_DT_MS] = 1000.0 / rate_hz
        self.cell = make_cell(self._cell_config(), 1000.0 / rate_hz)
        for i in (
            S_BAD_FRAMES,
            S_UNKNOWN,
            S_REJECTED,
            S_LATE,
            S_MISSING,
            S_TRIPS,
            S_APPLIED,
            S_COUNTER,
            S_HAVE_CMD,
            S_TRIPPED,
            S_FLAGS,
            S_CMD_SEQ,
            S_CMD_ANSWERS,
            S_CMD_COUNTS,
            S_WAITING,
            S_STALL_DONE,
            S_BEHIND,
            S_TX_DROPPED,
            S_TX_CORRUPTED,
            S_RX_DROPPED,
            S_RX_CORRUPTED,
            S_TX_FAILED,
            S_EV_LOST,
            S_LAW_SEEN,
            S_LAWS_LATE,
            S_LAWS_AHEAD,
        ):
            st[i] = 0  # counters cover one run
        lb = self.law_board
        lb.bs[:] = boardlaw.new_board_arrays()[2]  # detector disarmed, no law, zero request off
        lb.rq_n[1] = 0  # a rule change of the last run never acts in this one
        st[S_CMD_COUNTS] = st[S_FAULT_COUNTS]  # laws queued in READY for samples 0.. stay
        st[S_RUN] += 1
        self._log_events(
            [
                self._event(
                    "start",
                    rate_hz=rate_hz,
                    watchdog_us=int(st[S_WATCHDOG_US]),
                    fault_counts=[int(st[S_FAULT_COUNTS])],
                    fault_pA=float(counts_to_pA(self.conv, float(st[S_FAULT_COUNTS]))),
                    clock=self.clock,
                    seed=self.seed,
                    cell_seed=self._cell_config()["seed"],
                    unix_time_s=time.time(),
                )
            ]
        )
        st[S_STATE] = STATE_RUNNING
        self._reply(seq, RESULT_OK)
        now = time.monotonic_ns()  # the same clock as monotonic_ns (CLOCK_MONOTONIC)
        st[S_LAST_RX_NS] = now
        st[S_BASE_NS] = now
        st[S_BASE_K] = 0

    def _on_stop(self, seq: int) -> None:
        st = self.st
        self.law_board.qdue[:] = -1  # a stopped run's laws never act in the next one
        self.law_board.rq_n[1] = 0
        if st[S_STATE] == STATE_RUNNING:
            self._log_events([self._stop_event("STOP")])
            st[S_STATE] = STATE_READY
            st[S_HAVE_CMD] = 0
            st[S_TRIPPED] = 0
        self._reply(seq, RESULT_OK)

    # -- ground truth -----------------------------------------------------------
    def _cell_config(self) -> dict[str, Any]:
        cfg = dict(self.experiment.cell)
        cfg["seed"] = int(cfg["seed"]) + (self.seed << 20)  # as clampcore.simulate does
        return cfg

    def _log_header(self) -> dict[str, Any]:
        exp = self.experiment
        return {
            "identity": self.hello.identity,
            "max_rate_hz": self.hello.max_rate_hz,
            "clock": self.clock,
            "seed": self.seed,
            "faults": asdict(self.faults),
            "experiment_path": str(exp.path) if exp.path else None,
            "experiment_text": exp.text,
            "cell": exp.cell,
            "amplifier": exp.amplifier,
            "conversion": self.conv.tolist(),
            "compiled": not numba_config.DISABLE_JIT,
        }

    def _event(self, kind: str, **details: Any) -> dict[str, Any]:
        return {
            "event": kind,
            "run": int(self.st[S_RUN]),
            "counter": int(self.st[S_COUNTER]),
            **details,
        }

    def _stop_event(self, why: str) -> dict[str, Any]:
        st = self.st
        fault = st[S_HAVE_CMD] == 0 or st[S_TRIPPED] != 0
        return self._event(
            "stop",
            why=why,
            # What the DAC held when the stop came: a command's count (and its seq) or the
            # fault value (cmd_seq -1).
            dac_counts=int(st[S_FAULT_COUNTS] if fault else st[S_CMD_COUNTS]),
            cmd_seq=-1 if fault else int(st[S_CMD_SEQ]),
            samples=int(st[S_COUNTER]),
            status=asdict(self.status()),
            behind=int(st[S_BEHIND]),
            tx_dropped=int(st[S_TX_DROPPED]),
            tx_corrupted=int(st[S_TX_CORRUPTED]),
            tx_failed=int(st[S_TX_FAILED]),
            rx_dropped=int(st[S_RX_DROPPED]),
            rx_corrupted=int(st[S_RX_CORRUPTED]),
            events_lost=int(st[S_EV_LOST]),
        )

    def _log_events(self, events: list[dict[str, Any]]) -> None:
        if self._writer is not None:
            self._writer.events(events)

    def _drain(self) -> None:
        """Hand the kernel's records and events to the log writer; empty the buffers."""
        st = self.st
        n_ev = int(st[S_EV_N])
        if n_ev:
            events = []
            for kind, run, counter, a, b in self._ev[:n_ev].tolist():
                name, a_name, b_name = _EVENT_NAMES[kind]
                event: dict[str, Any] = {"event": name, "run": run, "counter": counter, a_name: a}
                if b_name:
                    event[b_name] = b
                events.append(event)
            st[S_EV_N] = 0
            self._log_events(events)
        n = int(st[S_LOG_N])
        if n:
            if self._writer is not None:
                full, spares = self._log, self._spare_logs
                self._writer.rows(full[:n], done=lambda: spares.put(full))
                self._log = spares.get()  # waits only if the disk is slower than the rig
            st[S_LOG_N] = 0
