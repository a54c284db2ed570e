"""A simulated board on a pseudo-terminal: the C board core with a model cell behind it.

The board itself is the portable C core (``firmware_protocol/c/ccb_core.c`` on the
in-memory port ``ports/rig_port.c``, through ``simulated_rig.ccore``): every frame the
host sends is fed to it, every sample is its tick, every byte the host receives is what
it wrote, so the host talks to exactly the code a real board runs. Around it the rig
keeps what a board has around it: a model cell (``simulated_rig.cells``) seen through
the experiment's ``[amplifier]`` scaling (``clampcore.calibration``: ``mV_to_counts`` for
the ADC, ``counts_to_pA`` for the DAC), the clocks, the link, fault injection and the
ground-truth log.

Timing model (DEVELOPERS.md, "The loop's timing model"), tick k at t_k = k / rate:

1. hand the core every frame that has arrived (a COMMAND acts on arrival, a law is
   queued for its sample);
2. let the core check its link watchdog at t_k, then read the output in force: the
   DAC count, or the fault value when the core has no command or law in force or its
   watchdog has tripped; if k > 0, advance the cell over (t_{k-1}, t_k] with it;
3. measure V with that current, and tick the core with the ADC count: it sends SAMPLE k
   (in law mode it evaluates the law for sample k at that count and writes the DAC,
   which drives the next interval, and sends SAMPLES).

Two clocks:

- ``lockstep``: after SAMPLE k the rig waits for the COMMAND answering k (or a
  KEEPALIVE, a LAWS made from sample k or later, or a frame that turns out bad or that
  fault injection discarded), then takes sample k+1 at once. The core's clock is
  virtual (k / rate), so a run equals ``clampcore.simulate`` of the same experiment and
  seed sample for sample. A host that stays silent for the watchdog timeout or
  ``lockstep_patience_s`` of wall time, whichever is longer (default 10 s, so that a
  host held up by a busy machine does not break the determinism), is taken as gone:
  the core's clock jumps to the end of its watchdog timeout (which trips it: fault
  value out, STATUS report), and the rig samples on the wall clock from then on,
  until the core's watchdog clears again.
- ``wall``: tick k is taken at start + k / rate on CLOCK_MONOTONIC, like hardware
  with its own clock. Between ticks the rig sleeps (``clock_nanosleep`` to an
  absolute time) until ``wake_us`` before the tick (under SCHED_FIFO 50 µs, at most
  a quarter period; otherwise 2 ms, as a sleeping ordinary thread wakes too late), then
  watches the clock; at the tick it reads everything that has arrived and takes the
  sample, as a board's sampling interrupt would. ``serve()`` asks for 1 ns timer slack
  and, where permitted and asked for, SCHED_FIFO (``realtime_priority``, e.g. 60; off
  by default), so that those sleeps end on time. By default, then, the rig watches the
  clock from 2 ms before each tick, which above 500 Hz means it spins one core for the
  whole run; under SCHED_FIFO it leaves most of the core to others (a real board takes
  no host core). If the rig itself is preempted it takes the overdue samples as soon
  as it can and flags them (``LOG_BEHIND`` in the ground-truth log). The core's clock
  is the wall clock in µs since the rig started.

Each START rebuilds the model cell at rest (cell seed ``[cell] seed + (seed << 20)``,
as ``clampcore.simulate`` does), so every run starts from the same state.

The per-sample path is one compiled function, ``rig_serve`` (``clampcore.jit.kernel``:
njit, cached, no GIL), which reads the port, splits frames, feeds the per-sample ones
(COMMAND, KEEPALIVE, LAWS, ZERO) to the core, ticks it, sends what it wrote (through
the link model) and fills the ground-truth records. It returns to Python for every
other message (which Python feeds to the core and logs), when its record or event
buffer is full, and at least every ``_BUDGET_NS`` (0.25 s) so that the log is written
and signals are seen. Python answers and calls it again.

Fault injection (seeded, for tests): a fraction of the host's per-sample frames
(COMMAND, KEEPALIVE, LAWS) received while running can be discarded or have one byte
changed before the core sees them; a fraction of outgoing samples can be discarded or
have one byte changed; the rig can stall once (no reading, no ticking) for N ms at
sample K. A byte changed is always a COBS data byte, never a code byte or the
delimiter, so that the frame stays one frame with exactly one payload byte wrong,
which CRC-16 always detects (a CRC with a degree-16 generator catches every error
burst of at most 16 bits: Peterson & Brown 1961, Proc. IRE 49:228).

Public names: ``Board``, ``Faults``, ``BOARD_IDENTITY``, ``MAX_RATE_HZ``, ``WAKE_US``,
``WAKE_US_ORDINARY``, ``LOCKSTEP_PATIENCE_S``, ``WATCHDOG_MIN_US``, ``WATCHDOG_MAX_US``,
``board_hello``, ``open_pty``, ``rig_serve`` and its bundles (``RIG_STATE``,
``BoardCore``, ``RigPort``, ``RigCell``, ``Truth``, ``LinkShape``, ``new_link_shape``),
``N_INPUTS``, ``N_OUTPUTS``; its return codes ``R_*`` and event kinds ``EV_*``;
``start_rig`` and ``RigProcess`` re-exported from ``simulated_rig.launch``.
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
from clampcore.firmware_protocol import codec, lawmsg
from clampcore.firmware_protocol.codec import (
    MAX_WIRE,
    MIN_PAYLOAD,
    MSG_COMMAND,
    MSG_CONFIGURE,
    MSG_KEEPALIVE,
    MSG_SAMPLE,
    MSG_START,
    MSG_STOP,
    STATE_READY,
    STATE_RUNNING,
    STATUS_FAULT_OUTPUT,
    STATUS_WATCHDOG,
    cobs_decode,
)
from clampcore.simulated_rig.ccore import (
    N_PEEK,
    P_APPLIED,
    P_BAD_FRAMES,
    P_CMD_ANSWERS,
    P_CMD_SEQ,
    P_DAC,
    P_FAULT_COUNTS,
    P_HAVE_CMD,
    P_LAST_RX_US,
    P_LAW_MODE,
    P_RATE_HZ,
    P_STATE,
    P_TRIPPED,
    P_UNKNOWN,
    P_WATCHDOG_US,
    core_feed,
    core_peek,
    core_status,
    core_take_tx,
    core_tick,
    core_watchdog,
    new_core,
)
from clampcore.simulated_rig.cells import (
    cell_advance,
    cell_measure_mV,
    cell_v_true_mV,
    make_cell,
)
from clampcore.simulated_rig.groundtruth import (
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
from clampcore.simulated_rig.launch import RigProcess, start_rig  # noqa: F401 (re-exported)
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
_US_PER_S = 1_000_000
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
_LOG_ROWS = 16384  # ground-truth records per buffer: more than 0.25 s up to 50 kHz
_LOG_SPARES = 3  # buffers being written or ready, beside the one being filled
_EVENTS = 4096  # kernel events per buffer (one read may bring hundreds of frames)
_CHUNK = 4096  # bytes per read(2)
_TX_BYTES = 4096  # what the core sends per call: a STATUS report and a sample at most

# rig_serve's return codes.
R_BUDGET = 0
R_CONTROL = 1  # a frame for Python waits in port.ctrl[:st["ctrl_len"]]
R_LOG_FULL = 2
R_EVENTS_FULL = 3
R_STOP = 4

# The rig's own scalar state (one record): clocks, buffers, fault injection, counters of
# what the rig did to the frames (the board's counters are the core's).
RIG_STATE = np.dtype(
    [
        ("k", "<i8"),  # samples taken in this run (the next sample's number), never wrapping
        ("rate_hz", "<i8"),  # of this run (from the core at START)
        ("lockstep", "<i8"),
        ("waiting", "<i8"),  # lockstep: the answer to the last sample has not come yet
        ("wait_from_ns", "<i8"),  # lockstep: when the rig began to wait (wall clock)
        ("base_ns", "<i8"),  # wall schedule: tick k is due at base_ns + (k - base_k) / rate
        ("base_k", "<i8"),
        ("clock_base_us", "<i8"),  # lockstep: the core's clock at tick k is
        ("clock_base_k", "<i8"),  # clock_base_us + (k - clock_base_k) / rate
        ("epoch_ns", "<i8"),  # wall: the core's clock zero
        ("log_on", "<i8"),
        ("log_n", "<i8"),
        ("ev_n", "<i8"),
        ("ev_lost", "<i8"),  # events that did not fit in the event buffer
        ("chunk_n", "<i8"),
        ("chunk_pos", "<i8"),
        ("raw_n", "<i8"),
        ("raw_over", "<i8"),  # the frame being read is longer than any: passed on as is
        ("ctrl_len", "<i8"),
        ("stop", "<i8"),
        ("run", "<i8"),
        ("stall_at", "<i8"),
        ("stall_ms", "<i8"),
        ("stall_done", "<i8"),
        ("behind", "<i8"),
        ("tx_dropped", "<i8"),
        ("tx_corrupted", "<i8"),
        ("rx_dropped", "<i8"),
        ("rx_corrupted", "<i8"),
        ("tx_failed", "<i8"),
        ("budget_ns", "<i8"),
        ("patience_ns", "<i8"),  # lockstep: wall time without an answer before giving up
        ("wake_ns", "<i8"),  # wall clock: sleep until this long before a tick
        ("realtime", "<i8"),  # 1 under SCHED_FIFO: never watch the clock > a quarter period
        ("corrupt_rx", "<f8"),
        ("drop_rx", "<f8"),
        ("corrupt_tx", "<f8"),
        ("drop_tx", "<f8"),
        ("dt_ms", "<f8"),
    ]
)

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


class BoardCore(NamedTuple):
    """The C board (``simulated_rig.ccore``) and what the rig reads back from it."""

    mem: np.ndarray  # uint8: the board and its in-memory port
    peek: np.ndarray  # int64[N_PEEK]: its state after the last call (ccore.P_*)
    prev: np.ndarray  # int64[N_PEEK]: its state before the frame being fed
    tx: np.ndarray  # uint8[_TX_BYTES]: what it sent in the last call


class RigPort(NamedTuple):
    """The rig's side of the serial port: buffers, clock scratch, fault streams."""

    chunk: np.ndarray  # uint8[_CHUNK]: one read(2)
    raw: np.ndarray  # uint8: the frame being received (COBS, no delimiter)
    scratch: np.ndarray  # uint8: a frame decoded, to see its type
    ctrl: np.ndarray  # uint8: a frame for Python (R_CONTROL)
    ts: np.ndarray  # int64[2]: timespec scratch
    pollfd: np.ndarray  # int32[2]
    frng: np.ndarray  # uint64[2]: fault-injection streams (0 receive, 1 transmit)


class RigCell(NamedTuple):
    """The model cell behind the converters and the amplifier's scaling."""

    kind: int
    params: np.ndarray
    state: np.ndarray
    rng: np.ndarray
    conv: np.ndarray  # clampcore.calibration.conversion_array


class Truth(NamedTuple):
    """The ground-truth buffers the kernel fills (Python writes them to the log)."""

    log: np.ndarray  # LOG_DTYPE[_LOG_ROWS]
    ev: np.ndarray  # int64[_EVENTS, _EV_COLS]


# ---------------------------------------------------------------------------
# Compiled per-sample path
# ---------------------------------------------------------------------------
# ---------------------------------------------------------------------------
# ---------------------------------------------------------------------------
# Link models on the wall clock (clampcore.links): bytes are held until the link
# would have delivered them.
# ---------------------------------------------------------------------------
_LINK_BYTES = 1 << 18  # bytes in flight each way: far more than 20 ms at 50 kHz
_LINK_CHUNKS = 1 << 14  # writes (or reads) in flight each way
LN_ON, LN_FRAME_NS, LN_TRANSIT_NS, LN_JITTER_NS, LN_TIMER_NS, LN_BAUD = 0, 1, 2, 3, 4, 5
N_LN = 6
# ends[i, 0]: ring position after chunk i; ends[i, 1]: when it is delivered (ns).
Q_HEAD, Q_TAIL, Q_BYTES_IN, Q_BYTES_OUT, Q_LAST_NS = 0, 1, 2, 3, 4
# A serial bridge (LN_BAUD > 0): when its UART is next free, the bytes the chip holds for
# the host, when it last sent a packet, the first chunk it holds (clampcore.links).
Q_UART_FREE, Q_HELD, Q_LAST_PACKET, Q_HELD_FROM = 5, 6, 7, 8
N_Q = 9
_HELD_NS = np.iinfo(np.int64).max  # a chunk the bridge chip holds: not yet due
_UART_BITS = 10  # 8N1: start, 8 data and stop bits a byte (clampcore.links)
_BRIDGE_PACKET_BYTES = 62  # a full packet of the bridge chip (clampcore.links)


class LinkShape(NamedTuple):
    """A link model's timing and the bytes it holds, each way (out: to the host)."""

    p: np.ndarray  # int64[N_LN]: LN_*
    rng: np.ndarray  # uint64[1]: jitter stream
    obuf: np.ndarray  # uint8[_LINK_BYTES]
    oends: np.ndarray  # int64[_LINK_CHUNKS, 2]
    oq: np.ndarray  # int64[N_Q]: Q_*
    ibuf: np.ndarray
    iends: np.ndarray
    iq: np.ndarray


def new_link_shape(link_name: str | None, seed: int) -> LinkShape:
    """The rig's link model ``link_name`` (a ``clampcore.links.LINKS`` name; None: direct pty)."""
    p = np.zeros(N_LN, dtype=np.int64)
    if link_name is not None:
        if link_name not in LINKS:
            raise ValueError(f"link {link_name!r}: one of {', '.join(LINKS)}")
        link = LINKS[link_name]
        p[LN_ON] = 1
        p[LN_FRAME_NS] = round(link.frame_us * _NS_PER_US)
        p[LN_TRANSIT_NS] = round(link.transit_us * _NS_PER_US)
        p[LN_JITTER_NS] = round(link.jitter_us * _NS_PER_US)
        p[LN_TIMER_NS] = round(link.timer_ms * _NS_PER_MS)
        p[LN_BAUD] = link.baud
    return LinkShape(
        p,
        np.array([seed_state(seed, stream=0xF2)], dtype=np.uint64),
        np.zeros(_LINK_BYTES, dtype=np.uint8),
        np.zeros((_LINK_CHUNKS, 2), dtype=np.int64),
        np.zeros(N_Q, dtype=np.int64),
        np.zeros(_LINK_BYTES, dtype=np.uint8),
        np.zeros((_LINK_CHUNKS, 2), dtype=np.int64),
        np.zeros(N_Q, dtype=np.int64),
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
def _uart_ns(ln: LinkShape, n: int) -> int:
    """How long n bytes take on the bridge's UART."""
    return (n * _UART_BITS * _NS_PER_S) // ln.p[LN_BAUD]


@kernel
def _bridge_send(ln: LinkShape, ends: np.ndarray, q: np.ndarray, t: int) -> None:
    """The bridge chip sends what it holds as a packet at t (USB: at the next frame)."""
    for i in range(q[Q_HELD_FROM], q[Q_TAIL]):
        ends[i & (ends.shape[0] - 1), 1] = _link_due(ln, q, t - ln.p[LN_TRANSIT_NS])
    q[Q_HELD_FROM] = q[Q_TAIL]
    q[Q_HELD] = 0
    q[Q_LAST_PACKET] = t


@kernel
def _bridge_timer(ln: LinkShape, ends: np.ndarray, q: np.ndarray, now: int) -> None:
    """The latency timer: what the chip holds goes out once the timer has run since its
    last packet (and the held bytes are all in)."""
    if q[Q_HELD] > 0:
        t = max(q[Q_LAST_PACKET] + ln.p[LN_TIMER_NS], q[Q_UART_FREE])
        if t <= now:
            _bridge_send(ln, ends, q, t)


@kernel
def _link_put(
    ln: LinkShape,
    buf: np.ndarray,
    ends: np.ndarray,
    q: np.ndarray,
    src: np.ndarray,
    n: int,
    now: int,
    up: bool,
) -> bool:
    """Queue src[:n] (``up``: to the host); False when the link is full (the bytes are
    lost, as on an overrun).

    A serial bridge (``clampcore.links``, the same rules as its sample-time model): both
    ways the bytes cross a UART one after another at baud / 10 bytes a second; to the
    host the chip holds them until it has a full packet or its latency timer has run
    since its last packet, then sends at the next USB frame; to the board they cross USB
    at the next frame, then the UART.
    """
    full = q[Q_TAIL] - q[Q_HEAD] >= ends.shape[0]
    if full or q[Q_BYTES_IN] - q[Q_BYTES_OUT] + n > buf.shape[0]:
        return False
    mask = buf.shape[0] - 1
    for i in range(n):
        buf[(q[Q_BYTES_IN] + i) & mask] = src[i]
    q[Q_BYTES_IN] += n
    slot = q[Q_TAIL] & (ends.shape[0] - 1)
    ends[slot, 0] = q[Q_BYTES_IN]
    if ln.p[LN_BAUD] == 0:
        ends[slot, 1] = _link_due(ln, q, now)
    elif up:
        if q[Q_LAST_PACKET] == 0:
            q[Q_LAST_PACKET] = now  # the timer runs from the first bytes
        q[Q_UART_FREE] = max(q[Q_UART_FREE], now) + _uart_ns(ln, n)
        _bridge_timer(ln, ends, q, q[Q_UART_FREE])  # before this chunk's last byte is in
        ends[slot, 1] = _HELD_NS
        q[Q_HELD] += n
        if q[Q_HELD] >= _BRIDGE_PACKET_BYTES:
            q[Q_TAIL] += 1
            _bridge_send(ln, ends, q, q[Q_UART_FREE])
            return True
    else:
        t = max(q[Q_UART_FREE], _link_due(ln, q, now)) + _uart_ns(ln, n)
        q[Q_UART_FREE] = t
        q[Q_LAST_NS] = t
        ends[slot, 1] = t
    q[Q_TAIL] += 1
    return True


@kernel
def _link_send(fd: int, ln: LinkShape, tx: np.ndarray, n: int, now: int) -> int:
    """Write tx[:n] to the host now, or hand it to the link model; bytes taken (or -1)."""
    if ln.p[LN_ON] == 0:
        return fd_write(fd, tx, 0, n)
    return n if _link_put(ln, ln.obuf, ln.oends, ln.oq, tx, n, now, True) else -1


@kernel
def _link_flush(fd: int, ln: LinkShape, now: int) -> None:
    """Deliver to the host every byte the link model has due by ``now``."""
    q = ln.oq
    mask = ln.obuf.shape[0] - 1
    if ln.p[LN_BAUD] > 0:
        _bridge_timer(ln, ln.oends, q, now)
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
        _link_put(ln, ln.ibuf, ln.iends, ln.iq, chunk, got, now, False)
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


# Messages the compiled path hands to the core itself; every other one goes to Python.
# RULES_AT is here too: it names a sample, so it must not wait for Python (PROTOCOL.md §10.4).
_PER_SAMPLE = (MSG_COMMAND, MSG_KEEPALIVE, lawmsg.MSG_LAWS, lawmsg.MSG_ZERO, lawmsg.MSG_RULES_AT)
_SAMPLES_STATUS_AT = 11  # SAMPLES payload: type, seq, first u32, clock u32, status (lawmsg)
_SAMPLE_STATUS_AT = 13  # SAMPLE payload: type, seq, counter, clock, cmd_seq u16, status


@kernel
def _event(st: np.ndarray, ev: np.ndarray, kind: int, a: int, b: int) -> None:
    r = st[0]
    i = r["ev_n"]
    if i < ev.shape[0]:
        ev[i, 0] = kind
        ev[i, 1] = r["run"]
        ev[i, 2] = r["k"]
        ev[i, 3] = a
        ev[i, 4] = b
        r["ev_n"] = i + 1
    else:
        r["ev_lost"] += 1


@kernel
def _lockstep_clock_us(st: np.ndarray, k: int) -> int:
    """The core's virtual clock at tick k: k / rate, plus the jumps of hosts given up on."""
    r = st[0]
    if r["rate_hz"] <= 0:
        return r["clock_base_us"]
    return r["clock_base_us"] + ((k - r["clock_base_k"]) * _US_PER_S) // r["rate_hz"]


@kernel
def board_clock_us(st: np.ndarray, running: bool, now_ns: int) -> int:
    """The core's clock for a frame arriving now: wall µs since the rig started, or
    (lockstep) the virtual time of the newest sample (0 outside a run, so that a run's
    START and its sample 0 are at 0)."""
    r = st[0]
    if r["lockstep"] == 0:
        return (now_ns - r["epoch_ns"]) // _NS_PER_US
    if not running:
        return 0
    return _lockstep_clock_us(st, max(r["k"] - 1, r["clock_base_k"]))


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
def _send_tx(fd: int, st: np.ndarray, core: BoardCore, ln: LinkShape, now: int) -> None:
    """Send what the core wrote (a reply, a STATUS report) to the host through the link."""
    n = core_take_tx(core.mem, core.tx)
    if n > 0 and _link_send(fd, ln, core.tx, n, now) != n:
        st[0]["tx_failed"] += 1


@kernel
def after_feed(st: np.ndarray, core: BoardCore, ev: np.ndarray, payload: np.ndarray) -> None:
    """What a frame the core took (``core.prev`` before, ``core.peek`` after; ``payload``
    its decoded bytes) means for the rig: a watchdog cleared by a COMMAND, and in lockstep
    whether the host has answered the newest sample."""
    r = st[0]
    p, q = core.prev, core.peek
    typ = payload[0]
    if typ == MSG_COMMAND and p[P_TRIPPED] != 0 and q[P_TRIPPED] == 0:
        _event(st, ev, EV_WATCHDOG_CLEAR, q[P_CMD_SEQ], q[P_CMD_ANSWERS])
    if r["lockstep"] == 0 or q[P_STATE] != STATE_RUNNING:
        return
    if q[P_BAD_FRAMES] != p[P_BAD_FRAMES]:
        r["waiting"] = 0  # it may have been the answer: do not wait for it
        return
    if q[P_UNKNOWN] != p[P_UNKNOWN]:
        return
    k = r["k"]
    if typ == MSG_COMMAND:
        if q[P_APPLIED] != p[P_APPLIED] and q[P_CMD_ANSWERS] == ((k - 1) & _M32):
            r["waiting"] = 0
    elif typ == MSG_KEEPALIVE:
        r["waiting"] = 0  # the host lets this sample pass without a command
    elif typ == lawmsg.MSG_LAWS:
        seen = 0  # LAWS body: the newest sample the host had, u32 (lawmsg.decode_laws)
        for j in range(4):
            seen |= int(payload[3 + j]) << (8 * j)
        if seen >= k - 1:
            r["waiting"] = 0


@kernel
def _feed(
    fd: int, st: np.ndarray, core: BoardCore, port: RigPort, ev: np.ndarray, ln: LinkShape, n: int
) -> None:
    """Hand the frame port.raw[:n] (delimiter included; decoded in port.scratch) to the core."""
    now = monotonic_ns(port.ts)
    for i in range(N_PEEK):
        core.prev[i] = core.peek[i]
    core_feed(
        core.mem, port.raw, 0, n, board_clock_us(st, core.peek[P_STATE] == STATE_RUNNING, now)
    )
    core_peek(core.mem, core.peek)
    after_feed(st, core, ev, port.scratch)
    _send_tx(fd, st, core, ln, now)


@kernel
def _on_raw_frame(
    fd: int, st: np.ndarray, core: BoardCore, port: RigPort, ev: np.ndarray, ln: LinkShape
) -> bool:
    """Handle one frame port.raw[:raw_n] (wire bytes, delimiter not included).

    Injects receive faults and feeds the per-sample messages (and anything that is not
    a frame at all) to the core; any other message is copied to ``port.ctrl`` for Python
    and True is returned.
    """
    r = st[0]
    n = r["raw_n"]
    raw, scratch = port.raw, port.scratch
    m = cobs_decode(raw, n, scratch)
    if m < MIN_PAYLOAD:
        scratch[0] = 0  # not a frame: the core counts it as bad
    typ = int(scratch[0])
    if m >= MIN_PAYLOAD and typ not in _PER_SAMPLE:
        for i in range(n):
            port.ctrl[i] = raw[i]
        r["ctrl_len"] = n
        return True
    running = core.peek[P_STATE] == STATE_RUNNING
    if running and typ != lawmsg.MSG_ZERO and (r["drop_rx"] > 0.0 or r["corrupt_rx"] > 0.0):
        seq = int(scratch[1]) | (int(scratch[2]) << 8)
        if m >= 3 and typ != 0:
            u = uniform(port.frng, 0)
            if u < r["drop_rx"]:
                r["rx_dropped"] += 1
                _event(st, ev, EV_RX_DROPPED, typ, seq)
                if r["lockstep"] != 0:
                    r["waiting"] = 0  # the board never sees it: do not wait for it
                return False
            if u < r["drop_rx"] + r["corrupt_rx"]:
                r["rx_corrupted"] += 1
                _event(st, ev, EV_RX_CORRUPTED, typ, seq)
                _flip_data_byte(raw, n, port.frng, 0)
    raw[n] = 0
    _feed(fd, st, core, port, ev, ln, n + 1)
    return False


@kernel
def _pump(
    fd: int, st: np.ndarray, core: BoardCore, port: RigPort, ev: np.ndarray, ln: LinkShape
) -> bool:
    """Read and handle everything that has arrived; True when a message waits for Python."""
    r = st[0]
    chunk, raw = port.chunk, port.raw
    while True:
        pos = r["chunk_pos"]
        n = r["chunk_n"]
        if pos >= n:
            got = _link_read(fd, ln, chunk, monotonic_ns(port.ts))
            if got <= 0:
                r["chunk_pos"] = 0
                r["chunk_n"] = 0
                return False
            pos = 0
            n = got
            r["chunk_n"] = n
        while pos < n:
            b = chunk[pos]
            pos += 1
            if b != 0:
                k = r["raw_n"]
                if k >= raw.shape[0] - 1:  # longer than any frame: the core drops it
                    now = monotonic_ns(port.ts)
                    running = core.peek[P_STATE] == STATE_RUNNING
                    core_feed(core.mem, raw, 0, k, board_clock_us(st, running, now))
                    r["raw_over"] = 1
                    k = 0
                raw[k] = b
                r["raw_n"] = k + 1
                continue
            if r["raw_over"] != 0:  # the end of a frame longer than any
                r["raw_over"] = 0
                raw[r["raw_n"]] = 0
                port.scratch[0] = 0
                _feed(fd, st, core, port, ev, ln, r["raw_n"] + 1)
                r["raw_n"] = 0
                continue
            if r["raw_n"] == 0:
                continue  # repeated delimiter: an empty frame, ignored
            wants_python = _on_raw_frame(fd, st, core, port, ev, ln)
            r["raw_n"] = 0
            if wants_python:
                r["chunk_pos"] = pos
                return True
        r["chunk_pos"] = pos


@kernel
def _send_samples(
    fd: int, st: np.ndarray, core: BoardCore, port: RigPort, ln: LinkShape, n: int, now: int
) -> tuple[int, int]:
    """Send core.tx[:n] (what the core wrote in its tick), injecting transmit faults into
    its sample frames; returns (LOG_TX_* flags, the status byte of the last sample sent,
    or -1 when the tick sent none)."""
    r = st[0]
    tx = core.tx
    flags = 0
    status = -1
    start = 0
    for i in range(n):
        if tx[i] != 0:
            continue
        length = i - start
        m = cobs_decode(tx[start:i], length, port.scratch)
        typ = port.scratch[0] if m >= MIN_PAYLOAD else 0
        send = True
        if typ == MSG_SAMPLE or typ == lawmsg.MSG_SAMPLES:
            at = _SAMPLE_STATUS_AT if typ == MSG_SAMPLE else _SAMPLES_STATUS_AT
            status = int(port.scratch[at])
            if r["drop_tx"] > 0.0 or r["corrupt_tx"] > 0.0:
                u = uniform(port.frng, 1)
                if u < r["drop_tx"]:
                    send = False
                    flags |= LOG_TX_DROPPED
                    r["tx_dropped"] += 1
                elif u < r["drop_tx"] + r["corrupt_tx"]:
                    _flip_data_byte(tx[start:i], length, port.frng, 1)
                    flags |= LOG_TX_CORRUPTED
                    r["tx_corrupted"] += 1
        if send and _link_send(fd, ln, tx[start:], length + 1, now) != length + 1:
            flags |= LOG_TX_FAILED
            r["tx_failed"] += 1
        start = i + 1
    return flags, status


@kernel
def _tick(
    fd: int,
    st: np.ndarray,
    core: BoardCore,
    port: RigPort,
    cell: RigCell,
    truth: Truth,
    ln: LinkShape,
    due_ns: int,
) -> None:
    """Take sample k: the core's watchdog, the cell over (t_{k-1}, t_k] with the output
    in force, the ADC, the core's tick (SAMPLE, or in law mode the law at this count and
    SAMPLES), the ground truth."""
    r = st[0]
    q = core.peek
    k = r["k"]
    now = monotonic_ns(port.ts)
    lockstep = r["lockstep"] != 0
    clock_us = _lockstep_clock_us(st, k) if lockstep else (now - r["epoch_ns"]) // _NS_PER_US
    was_tripped = q[P_TRIPPED]
    core_watchdog(core.mem, clock_us)
    core_peek(core.mem, q)
    if q[P_TRIPPED] != 0 and was_tripped == 0:
        _event(st, truth.ev, EV_WATCHDOG_TRIP, q[P_LAST_RX_US], clock_us & _M32)
        _send_tx(fd, st, core, ln, now)  # the STATUS report
        if lockstep:  # no answers: sample on the wall clock from here
            r["base_ns"] = now
            r["base_k"] = k
            due_ns = now
    fault = q[P_HAVE_CMD] == 0 or q[P_TRIPPED] != 0
    counts = q[P_FAULT_COUNTS] if fault else q[P_DAC]
    law_mode = q[P_LAW_MODE] != 0
    cmd_seq = q[P_CMD_SEQ]
    cmd_answers = q[P_CMD_ANSWERS]
    sticky = (STATUS_FAULT_OUTPUT if fault else 0) | (STATUS_WATCHDOG if q[P_TRIPPED] else 0)
    i_pA = counts_to_pA(cell.conv, counts)
    if k > 0:
        cell_advance(cell.kind, cell.params, cell.state, cell.rng, i_pA, r["dt_ms"])
    v_mV = cell_measure_mV(cell.kind, cell.params, cell.state, cell.rng, i_pA)
    adc = mV_to_counts(cell.conv, v_mV)
    core_tick(core.mem, adc, clock_us)
    core_peek(core.mem, q)
    flags, status = _send_samples(fd, st, core, port, ln, core_take_tx(core.mem, core.tx), now)
    sent = status >= 0 and (flags & (LOG_TX_DROPPED | LOG_TX_CORRUPTED | LOG_TX_FAILED)) == 0
    if status < 0:
        status = sticky  # no sample frame in this tick: the bits that held
    lag_ns = 0 if lockstep else now - due_ns
    if lag_ns >= _NS_PER_S // r["rate_hz"]:
        flags |= LOG_BEHIND
        r["behind"] += 1
    if fault:
        flags |= LOG_FAULT_OUTPUT
    if q[P_TRIPPED] != 0:
        flags |= LOG_WATCHDOG
    if r["log_on"] != 0:
        row = truth.log[r["log_n"]]
        row["counter"] = k
        row["v_true_mV"] = cell_v_true_mV(cell.kind, cell.params, cell.state)
        row["i_applied_pA"] = i_pA
        row["clock_us"] = clock_us & _M32
        row["lag_us"] = min(lag_ns // _NS_PER_US, 0x7FFFFFFF)
        row["adc_counts"] = adc
        row["dac_counts"] = counts
        row["status"] = status
        row["flags"] = flags
        if fault or law_mode:
            row["cmd_seq"] = NO_COMMAND
            row["cmd_answers"] = NO_COMMAND
        else:
            row["cmd_seq"] = cmd_seq
            row["cmd_answers"] = k - ((k - cmd_answers) & _M32)
        r["log_n"] += 1
    r["k"] = k + 1
    if lockstep:
        # A sample the host will never see (dropped, or dropped by its CRC check) gets no
        # answer: do not wait for one.
        r["waiting"] = 1 if sent else 0
        r["wait_from_ns"] = now


@kernel
def _give_up_on_host(st: np.ndarray, core: BoardCore) -> None:
    """Lockstep, the host silent too long: move the core's clock on to the end of its
    watchdog timeout, so that its next tick trips the watchdog."""
    r = st[0]
    q = core.peek
    k = r["k"]
    clock_us = _lockstep_clock_us(st, k)
    ahead = (q[P_LAST_RX_US] + q[P_WATCHDOG_US] - clock_us) & _M32
    if ahead < 0x80000000:  # a timeout still to come (modulo 2^32, RFC 1982)
        r["clock_base_us"] = clock_us + ahead
        r["clock_base_k"] = k


@kernel
def rig_serve(
    fd: int,
    st: np.ndarray,
    core: BoardCore,
    port: RigPort,
    cell: RigCell,
    truth: Truth,
    ln: LinkShape,
) -> int:
    """Serve the port until Python is needed; returns an ``R_*`` reason.

    Real-time rules here: no allocation, no Python objects, no file system; the only
    system calls are read/write on the port, poll and clock_gettime (the core is plain C
    on memory).
    """
    r = st[0]
    q = core.peek
    budget_end = monotonic_ns(port.ts) + r["budget_ns"]
    while True:
        if r["stop"] != 0:
            return R_STOP
        _link_flush(fd, ln, monotonic_ns(port.ts))
        if _pump(fd, st, core, port, truth.ev, ln):
            return R_CONTROL
        now = monotonic_ns(port.ts)
        if q[P_STATE] != STATE_RUNNING:
            if now >= budget_end:
                return R_BUDGET
            fd_wait_readable(fd, _IDLE_POLL_MS, port.pollfd)
            continue
        if r["log_on"] != 0 and r["log_n"] >= truth.log.shape[0]:
            return R_LOG_FULL
        if r["ev_n"] > truth.ev.shape[0] // 2:
            return R_EVENTS_FULL
        k = r["k"]
        if r["lockstep"] != 0 and q[P_TRIPPED] == 0:
            due = now
            if r["waiting"] != 0:
                limit = max(q[P_WATCHDOG_US] * _NS_PER_US, r["patience_ns"])
                left = r["wait_from_ns"] + limit - now
                if left > 0:
                    if now >= budget_end:
                        return R_BUDGET
                    wait_ns = min(left, budget_end - now)
                    fd_wait_readable(fd, wait_ns // _NS_PER_MS + 1, port.pollfd)
                    continue
                _give_up_on_host(st, core)
        else:
            due = r["base_ns"] + ((k - r["base_k"]) * _NS_PER_S) // r["rate_hz"]
            if now < due:
                if now >= budget_end:
                    return R_BUDGET
                margin = r["wake_ns"]
                if r["realtime"] != 0:  # a real-time thread must leave the core to others
                    margin = min(margin, _NS_PER_S // (4 * r["rate_hz"]))
                wake = due - margin
                if now < wake:
                    sleep_until_ns(min(wake, budget_end), port.ts)
                else:
                    while monotonic_ns(port.ts) < due:  # the last stretch: the clock only
                        pass
                continue
        if k == r["stall_at"] and r["stall_ms"] > 0 and r["stall_done"] == 0:
            r["stall_done"] = 1
            _event(st, truth.ev, EV_STALL, r["stall_ms"], 0)
            end = now + r["stall_ms"] * _NS_PER_MS
            while monotonic_ns(port.ts) < end:  # frozen: no reading, no ticking
                sleep_until_ns(end, port.ts)
            continue
        _tick(fd, st, core, port, cell, truth, ln, due)
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
        # capabilities, law_queue, mg_groups, max_samples: left at 0, as a port leaves them;
        # the C core fills them from its build (ccb.h) in the HELLO it sends.
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


# Counters of what the rig did in a run (the core zeroes its own at START).
_RUN_COUNTERS = (
    "k",
    "waiting",
    "stall_done",
    "behind",
    "tx_dropped",
    "tx_corrupted",
    "rx_dropped",
    "rx_corrupted",
    "tx_failed",
    "ev_lost",
    "clock_base_us",
    "clock_base_k",
    "base_k",
)


class Board:
    """The simulated board serving one port (``fd``: the pty master, non-blocking).

    ``serve()`` runs until ``request_stop()`` (safe from another thread or a
    signal handler) or until ``should_stop()`` returns True. Building it builds (once)
    and loads the C core (``simulated_rig.ccore``): without a C compiler it raises
    ``ccore.CompilerMissingError``.
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
        if link is not None and clock != "wall":
            raise ValueError("a link model needs the wall clock (lockstep time is virtual)")
        self.fd = fd
        self.experiment: Experiment = load_experiment(experiment if experiment is not None else {})
        self.clock = clock
        self.seed = seed
        self.realtime_priority = realtime_priority
        self.wake_us = wake_us  # None: WAKE_US under SCHED_FIFO, else WAKE_US_ORDINARY
        self.faults = faults or Faults()
        self.hello = board_hello(max_rate_hz)
        self.link_name = link
        self.link = new_link_shape(link, seed)
        self.conv = conversion_array(
            DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, self.experiment.amplifier
        )
        self.core = BoardCore(
            new_core(self.hello),
            np.zeros(N_PEEK, dtype=np.int64),
            np.zeros(N_PEEK, dtype=np.int64),
            np.zeros(_TX_BYTES, dtype=np.uint8),
        )
        core_peek(self.core.mem, self.core.peek)
        self.cell = self._new_cell(self.experiment.dt_ms)
        self._next_cell = self.cell  # the cell of the next START (built before it)

        st = np.zeros(1, dtype=RIG_STATE)
        r = st[0]
        r["lockstep"] = 1 if clock == "lockstep" else 0
        r["epoch_ns"] = time.monotonic_ns()  # the same clock as monotonic_ns (CLOCK_MONOTONIC)
        r["budget_ns"] = _BUDGET_NS
        r["stall_at"] = self.faults.stall_at
        r["stall_ms"] = self.faults.stall_ms
        r["patience_ns"] = round(lockstep_patience_s * _NS_PER_S)
        r["rate_hz"] = 1  # never divided by before START, but keep it non-zero
        r["log_on"] = 1 if log_path is not None else 0
        r["corrupt_rx"] = self.faults.corrupt_rx
        r["drop_rx"] = self.faults.drop_rx
        r["corrupt_tx"] = self.faults.corrupt_tx
        r["drop_tx"] = self.faults.drop_tx
        r["dt_ms"] = self.experiment.dt_ms
        self.st = st
        self._apply_scheduling(realtime=False)  # serve() applies what it is granted
        self.port = RigPort(
            np.zeros(_CHUNK, dtype=np.uint8),
            np.zeros(2 * MAX_WIRE, dtype=np.uint8),
            np.zeros(2 * MAX_WIRE, dtype=np.uint8),
            np.zeros(2 * MAX_WIRE, dtype=np.uint8),
            np.zeros(2, dtype=np.int64),
            np.zeros(2, dtype=np.int32),
            # Fault-injection streams: 0 receive, 1 transmit (stream numbers are ours).
            np.array(
                [seed_state(seed, stream=0xF0), seed_state(seed, stream=0xF1)], dtype=np.uint64
            ),
        )
        self.truth = Truth(
            np.zeros(_LOG_ROWS, dtype=LOG_DTYPE), np.zeros((_EVENTS, _EV_COLS), dtype=np.int64)
        )
        # Spare record buffers: the kernel fills one while the log writer writes others.
        self._spare_logs: queue.SimpleQueue[np.ndarray] = queue.SimpleQueue()
        for _ in range(_LOG_SPARES):
            self._spare_logs.put(np.zeros(_LOG_ROWS, dtype=LOG_DTYPE))
        self._stop_requested = False
        self._writer: LogWriter | None = None
        if log_path is not None:
            self._writer = LogWriter(log_path, self._log_header())

    # -- public ---------------------------------------------------------------
    def request_stop(self) -> None:
        """Make ``serve()`` return soon (at once from another thread, within 0.25 s from a
        signal handler)."""
        self._stop_requested = True
        self.st[0]["stop"] = 1

    def warm_up(self) -> None:
        """Load (or compile) the compiled path now, so that the first message gets its answer."""
        r = self.st[0]
        # The kernels Python calls for a control message (_on_control) compile now too:
        # a host's first CONFIGURE must not wait for numba. None of these changes anything.
        core = self.core
        core_feed(core.mem, core.tx, 0, 0, 0)
        core_peek(core.mem, core.peek)
        core.prev[:] = core.peek
        after_feed(self.st, core, self.truth.ev, np.zeros(MIN_PAYLOAD, dtype=np.uint8))
        board_clock_us(self.st, False, 0)
        budget = r["budget_ns"]
        r["budget_ns"] = 0
        try:
            self._serve_once()
        finally:
            r["budget_ns"] = budget

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
            if self._running():
                self._log_events([self._stop_event("rig shut down")])
            self.close()

    def close(self) -> None:
        """Write what is queued to the ground-truth log and close it (the port stays open)."""
        if self._writer is not None:
            writer, self._writer = self._writer, None
            writer.close()

    def status(self) -> codec.Status:
        """The STATUS the board would send now."""
        return core_status(self.core.mem)

    # -- internals --------------------------------------------------------------
    def _apply_scheduling(self, realtime: bool) -> None:
        """Record whether SCHED_FIFO was granted and choose the wall clock's wake margin."""
        self.realtime = realtime
        r = self.st[0]
        r["realtime"] = 1 if realtime else 0
        wake_us = self.wake_us
        if wake_us is None:
            wake_us = WAKE_US if realtime else WAKE_US_ORDINARY
        r["wake_ns"] = wake_us * _NS_PER_US

    def _running(self) -> bool:
        return bool(self.core.peek[P_STATE] == STATE_RUNNING)

    def _new_cell(self, dt_ms: float) -> RigCell:
        cell = make_cell(self._cell_config(), dt_ms)
        return RigCell(cell.kind, cell.params, cell.state, cell.rng, self.conv)

    def _serve_once(self) -> None:
        reason = rig_serve(self.fd, self.st, self.core, self.port, self.cell, self.truth, self.link)
        self._drain()
        if reason == R_CONTROL:
            self._on_control(self.port.ctrl[: self.st[0]["ctrl_len"]].tobytes())

    def _send(self, wire: bytes) -> None:
        try:
            os.write(self.fd, wire)
        except OSError:  # buffer full (nobody reads): lost, as on a serial line
            self.st[0]["tx_failed"] += 1

    def _on_control(self, wire: bytes) -> None:
        """A frame that is not per-sample (HELLO, CONFIGURE, START, STOP, GET_STATUS,
        BOARD_RULES, BLOCK_TABLE, unknown types): the core answers, the rig logs."""
        core, r = self.core, self.st[0]
        payload = codec.decode_wire(wire)  # the kernel decoded it already
        msg_type = payload[0]
        was_running = self._running()
        stop = self._stop_event("STOP") if msg_type == MSG_STOP and was_running else None
        if msg_type == MSG_START and core.peek[P_STATE] == STATE_READY:
            # Build the run's cell before the core starts its watchdog (it may be slow).
            self._next_cell = self._new_cell(1000.0 / max(int(core.peek[P_RATE_HZ]), 1))
        buf = np.frombuffer(wire + b"\0", dtype=np.uint8).copy()
        core.prev[:] = core.peek
        now = time.monotonic_ns()
        core_feed(core.mem, buf, 0, buf.size, board_clock_us(self.st, was_running, now))
        core_peek(core.mem, core.peek)
        after_feed(self.st, core, self.truth.ev, np.frombuffer(payload, dtype=np.uint8))
        reply = core.tx[: core_take_tx(core.mem, core.tx)].tobytes()
        before, after = core.prev, core.peek
        events: list[dict[str, Any]] = []
        if after[P_UNKNOWN] != before[P_UNKNOWN]:
            events.append(self._event("unknown_message", type=msg_type))
        if msg_type == MSG_CONFIGURE and after[P_UNKNOWN] == before[P_UNKNOWN]:
            events.append(self._configure_event(payload, reply))
        if after[P_LAW_MODE] and not before[P_LAW_MODE]:
            events.append(self._event("law_mode", rules=payload[3:-2].hex()))
        if stop is not None and not self._running():
            events.append(stop)
        if after[P_STATE] == STATE_RUNNING and not was_running:
            events.append(self._on_start())
            r["base_ns"] = now  # sample 0 is due when the core started its watchdog
            r["wait_from_ns"] = now
        self._log_events(events)
        self._send(reply)

    def _configure_event(self, payload: bytes, reply: bytes) -> dict[str, Any]:
        _, cfg = codec.parse_payload(payload)
        assert isinstance(cfg, codec.Configure)
        _, status = codec.decode_message(reply[:-1])
        assert isinstance(status, codec.Status)
        return self._event(
            "configure",
            rate_hz=cfg.rate_hz,
            n_inputs=cfg.n_inputs,
            watchdog_us=cfg.watchdog_us,
            fault_counts=list(cfg.fault_counts),
            result=status.result,
        )

    def _on_start(self) -> dict[str, Any]:
        """The core has started a run: the new cell at rest, the rig's counters at 0."""
        r, peek = self.st[0], self.core.peek
        rate_hz = int(peek[P_RATE_HZ])
        r["rate_hz"] = rate_hz
        r["dt_ms"] = 1000.0 / rate_hz
        self.cell = self._next_cell
        for name in _RUN_COUNTERS:
            r[name] = 0
        r["run"] += 1
        fault = int(peek[P_FAULT_COUNTS])
        return self._event(
            "start",
            rate_hz=rate_hz,
            watchdog_us=int(peek[P_WATCHDOG_US]),
            fault_counts=[fault],
            fault_pA=float(counts_to_pA(self.conv, float(fault))),
            clock=self.clock,
            seed=self.seed,
            cell_seed=self._cell_config()["seed"],
            unix_time_s=time.time(),
        )

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
            "board": "C core (firmware_protocol/c/ccb_core.c)",
        }

    def _event(self, kind: str, **details: Any) -> dict[str, Any]:
        r = self.st[0]
        return {"event": kind, "run": int(r["run"]), "counter": int(r["k"]), **details}

    def _stop_event(self, why: str) -> dict[str, Any]:
        r, peek = self.st[0], self.core.peek
        fault = peek[P_HAVE_CMD] == 0 or peek[P_TRIPPED] != 0
        return self._event(
            "stop",
            why=why,
            # What the DAC held when the stop came: a command's count (and its seq) or the
            # fault value (cmd_seq -1).
            dac_counts=int(peek[P_FAULT_COUNTS] if fault else peek[P_DAC]),
            cmd_seq=-1 if fault else int(peek[P_CMD_SEQ]),
            samples=int(r["k"]),
            status=asdict(self.status()),
            behind=int(r["behind"]),
            tx_dropped=int(r["tx_dropped"]),
            tx_corrupted=int(r["tx_corrupted"]),
            tx_failed=int(r["tx_failed"]),
            rx_dropped=int(r["rx_dropped"]),
            rx_corrupted=int(r["rx_corrupted"]),
            events_lost=int(r["ev_lost"]),
        )

    def _log_events(self, events: list[dict[str, Any]]) -> None:
        if self._writer is not None and events:
            self._writer.events(events)

    def _drain(self) -> None:
        """Hand the kernel's records and events to the log writer; empty the buffers."""
        r = self.st[0]
        n_ev = int(r["ev_n"])
        if n_ev:
            events = []
            for kind, run, counter, a, b in self.truth.ev[:n_ev].tolist():
                name, a_name, b_name = _EVENT_NAMES[kind]
                event: dict[str, Any] = {"event": name, "run": run, "counter": counter, a_name: a}
                if b_name:
                    event[b_name] = b
                events.append(event)
            r["ev_n"] = 0
            self._log_events(events)
        n = int(r["log_n"])
        if n:
            if self._writer is not None:
                full, spares = self.truth.log, self._spare_logs
                self._writer.rows(full[:n], done=lambda: spares.put(full))
                # waits only if the disk is slower than the rig
                self.truth = self.truth._replace(log=spares.get())
            r["log_n"] = 0
