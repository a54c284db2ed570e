"""The host's per-sample path, compiled: bytes in -> sample -> step -> command -> bytes out.

``process_rx`` takes a chunk of bytes read from the board and, for every
SAMPLE frame in it: converts the ADC count to mV, applies pending live changes
at this sample boundary, runs ``step``, writes the ring row, and keeps the
command for the newest sample; it then encodes that one COMMAND (older samples
in the same chunk are superseded and counted as unanswered). ``fd_loop`` wraps
it with ``read``/``write`` on a file descriptor, waiting for input by spinning
for ``spin_us`` and then sleeping in ``poll``; it measures the host's turnaround
(input ready -> command written) and stops on a stop request, the duration, or
a port that closed or failed.

Real-time rules: everything here is a ``clampcore.jit.kernel`` (compiled, no GIL) over
preallocated arrays; no allocation, no Python objects, no locks, no I/O but the
one read and one write per pass. Policy (what to do on a fault, when to record,
how to show status) lives in ``clampcore.engine``.

Compiled functions take their arrays in bundles named after their owner: the link's
(``LinkArrays``, with its ``PortIo``), the program's (``clampcore.program.ProgramArrays``)
and the shared blocks' (``clampcore.shared.LoopShared``).

Public names: ``LinkArrays``, ``PortIo``, ``PortRun``, ``new_link``, ``new_port_io``,
``process_rx``, ``fd_loop``, ``next_input`` and ``write_all`` (the wait, read and write of
both loops), the ``EXIT_*`` codes, the ``LINK_STATE`` and ``WAIT_STATE`` records.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from clampcore.calibration import counts_to_mV, pA_to_counts
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.firmware_protocol.codec import (
    DEFRAMER_BAD,
    MAX_CHANNELS,
    MAX_PAYLOAD,
    MAX_WIRE,
    SAMPLE_CMD_SEQ,
    SAMPLE_COUNTER,
    SAMPLE_NFIELDS,
    SAMPLE_STATUS,
    STATUS_LATE,
    STATUS_RX_ERROR,
    STATUS_WATCHDOG,
    decode_sample,
    deframe_next,
    encode_command,
    new_deframer,
)
from clampcore.jit import kernel
from clampcore.program import ProgramArrays
from clampcore.shared import (
    APPLIED_SAMPLE,
    COL_COUNTER,
    COL_FLAGS,
    COL_I,
    COL_LATENCY,
    COL_STATUS,
    COL_TURNAROUND,
    COL_V,
    CTRL_FIRST_COUNTER,
    CTRL_HEARTBEAT,
    CTRL_MAIL_APPLIED,
    CTRL_MAIL_WRITTEN,
    CTRL_STOP,
    CTRL_WRITTEN,
    CTRL_ZERO,
    LAT_BINS,
    MAIL_TO_PARAMS,
    MAILBOX_SLOTS,
    N_FIXED_COLUMNS,
    ST_BAD_FRAMES,
    ST_COMMANDS,
    ST_FAULTS,
    ST_LAT_HIST,
    ST_LATE,
    ST_LIMITED,
    ST_MISSING,
    ST_OTHER_FRAMES,
    ST_RX_ERROR,
    ST_SAMPLES,
    ST_SPIKES,
    ST_TURN_HIST,
    ST_UNANSWERED,
    ST_WATCHDOG,
    ST_ZEROED,
    TURN_BIN_US,
    TURN_BINS,
    LoopShared,
)
from clampcore.step import (
    FAULT_BAD_V,
    FAULT_NONFINITE,
    FLAG_LIMITED,
    step,
)
from clampcore.sysio import fd_read, fd_write, monotonic_us, wait_readable

EXIT_RUNNING = 0
EXIT_STOP_REQUEST = 1
EXIT_DURATION = 2
EXIT_PORT_CLOSED = 3
EXIT_PORT_ERROR = 4
EXIT_BOARD_SILENT = 5
EXIT_MESSAGES = {
    EXIT_RUNNING: "running",
    EXIT_STOP_REQUEST: "stopped on request",
    EXIT_DURATION: "duration reached",
    EXIT_PORT_CLOSED: "the serial port closed or vanished",
    EXIT_PORT_ERROR: "a serial read or write failed",
    EXIT_BOARD_SILENT: "the board sent nothing for too long",
}

FLAG_ZEROED = 8  # ring flags bit: the zero-current control held the command at 0 pA

# The current-mode link's state: a record (``lk``, a structured array of length 1).
LINK_STATE = np.dtype(
    [
        ("next_seq", np.int64),  # sequence number of the next command (1..65535, 0 is never used)
        ("last_counter", np.int64),  # counter of the last sample (-1 before the first)
        ("first_counter", np.int64),
        ("samples", np.int64),  # samples processed
        ("pending", np.bool_),  # the newest sample still needs its command
        ("pending_counter", np.int64),
        ("pending_dac", np.int64),
        ("pending_row", np.int64),  # ring row of the pending sample (for its turnaround)
        ("zero_counts", np.int64),  # the DAC count that means 0 pA
    ]
)

_SEQ_SPACE = 65536  # u16 sequence numbers (PROTOCOL.md)
_POLL_SLICE_MS = 50  # a sleeping wait wakes this often to see a stop request
_POLLHUP_POLLERR_POLLNVAL = 0x10 | 0x08 | 0x20  # <poll.h> on Linux


# PortIo.wait: the state of waiting for input, one record.
WAIT_STATE = np.dtype(
    [
        ("idle_ms", np.int64),  # time without input since the last bytes came, ms
        ("ready_us", np.int64),  # monotonic time at which the last input was ready, µs
    ]
)


class PortIo(NamedTuple):
    """The buffers of one pass of read and write on a descriptor (both loop modes)."""

    rx: np.ndarray  # uint8: the bytes of one read
    tx: np.ndarray  # uint8: the bytes of one write
    timespec: np.ndarray  # int64[2]: scratch of clock_gettime and nanosleep
    pollfd: np.ndarray  # int32[2]: scratch of poll
    wait: np.ndarray  # WAIT_STATE (1,)


def new_port_io(tx_bytes: int) -> PortIo:
    """Read and write buffers of a loop that writes at most ``tx_bytes`` a pass."""
    return PortIo(
        rx=np.zeros(4096, dtype=np.uint8),  # a few dozen frames: more than one pass ever gets
        tx=np.zeros(tx_bytes, dtype=np.uint8),
        timespec=np.zeros(2, dtype=np.int64),
        pollfd=np.zeros(2, dtype=np.int32),
        wait=np.zeros(1, dtype=WAIT_STATE),
    )


class PortRun(NamedTuple):
    """How a loop serves its descriptor (both loop modes)."""

    fd: int  # the port's file descriptor (blocking)
    spin_us: float  # spin this long for input before sleeping in poll()
    silent_ms: int  # stop when the board sent nothing for this long (0: never)
    max_samples: int  # stop after this many samples (0: never)


class LinkArrays(NamedTuple):
    """Every buffer of the current-mode link, allocated once per run."""

    lk: np.ndarray  # LINK_STATE (1,): the link's state, one record
    answered: np.ndarray  # sample counter each command seq answered (-1: none)
    dstate: np.ndarray
    dbuf: np.ndarray
    frame: np.ndarray
    adc: np.ndarray
    fields: np.ndarray
    dac: np.ndarray
    conv: np.ndarray  # the board's converters and the amplifier (clampcore.calibration)
    io: PortIo


def new_link(conv: np.ndarray) -> LinkArrays:
    """Buffers of a current-mode run on a board with converters ``conv``."""
    dstate, dbuf = new_deframer()
    lk = np.zeros(1, dtype=LINK_STATE)
    lk[0]["next_seq"] = 1
    lk[0]["last_counter"] = -1
    lk[0]["first_counter"] = -1
    lk[0]["zero_counts"] = pA_to_counts(conv, 0.0)
    return LinkArrays(
        lk=lk,
        answered=np.full(_SEQ_SPACE, -1, dtype=np.int64),
        dstate=dstate,
        dbuf=dbuf,
        frame=np.zeros(MAX_PAYLOAD, dtype=np.uint8),
        adc=np.zeros(MAX_CHANNELS, dtype=np.int64),
        fields=np.zeros(SAMPLE_NFIELDS, dtype=np.int64),
        dac=np.zeros(1, dtype=np.int64),
        conv=conv,
        io=new_port_io(MAX_WIRE),
    )


@kernel
def _apply_mail(
    ctrl: np.ndarray,
    mailbox: np.ndarray,
    applied: np.ndarray,
    params: np.ndarray,
    loop_p: np.ndarray,
    sample: int,
) -> None:
    while ctrl[CTRL_MAIL_APPLIED] < ctrl[CTRL_MAIL_WRITTEN]:
        k = ctrl[CTRL_MAIL_APPLIED]
        slot = k % MAILBOX_SLOTS
        row = int(mailbox[slot, 1])
        col = int(mailbox[slot, 2])
        if mailbox[slot, 0] == MAIL_TO_PARAMS:
            if 0 <= row < params.shape[0] and 0 <= col < params.shape[1]:
                params[row, col] = mailbox[slot, 3]
        elif 0 <= col < loop_p.shape[0]:
            loop_p[col] = mailbox[slot, 3]
        for j in range(4):
            applied[slot, j] = mailbox[slot, j]
        applied[slot, APPLIED_SAMPLE] = sample
        ctrl[CTRL_MAIL_APPLIED] = k + 1


@kernel
def process_rx(nbytes: int, link: LinkArrays, pa: ProgramArrays, sh: LoopShared) -> int:
    """Handle ``rx[:nbytes]``; return the length of the COMMAND frame left in ``tx`` (or 0)."""
    lk, answered, dstate, dbuf, frame, adc, fields, dac, conv, io = link
    rx, tx = io.rx, io.tx
    kind, params, state, g_out, i_out = pa.kind, pa.params, pa.state, pa.g_out, pa.i_out
    loop_p, loop_s = pa.loop_p, pa.loop_s
    ctrl, ring, mailbox, applied, stats, neuron_rows = sh
    n_el = kind.shape[0]
    rows = ring.shape[0]
    while True:
        m = deframe_next(dstate, dbuf, rx, nbytes, frame)
        if m <= 0:
            break
        k = decode_sample(frame, m, adc, fields)
        if k < 1:
            stats[ST_OTHER_FRAMES] += 1.0
            continue
        counter = fields[SAMPLE_COUNTER]
        last = lk[0]["last_counter"]
        if last < 0:
            lk[0]["first_counter"] = counter
            ctrl[CTRL_FIRST_COUNTER] = counter
        elif counter <= last:
            stats[ST_OTHER_FRAMES] += 1.0  # a stale or repeated sample: ignored
            continue
        else:
            stats[ST_MISSING] += counter - last - 1
        lk[0]["last_counter"] = counter
        if lk[0]["pending"]:
            stats[ST_UNANSWERED] += 1.0
        n = counter - lk[0]["first_counter"]
        _apply_mail(ctrl, mailbox, applied, params, loop_p, n)
        v_mV = counts_to_mV(conv, adc[0])
        i_pA = step(v_mV, n, pa)
        flags = loop_s[0]["flags"]
        if ctrl[CTRL_ZERO] != 0:
            i_pA = 0.0
            flags |= FLAG_ZEROED
            stats[ST_ZEROED] += 1.0
        status = fields[SAMPLE_STATUS]
        answered_counter = answered[fields[SAMPLE_CMD_SEQ]]
        latency = counter - answered_counter if answered_counter >= 0 else -1
        # ring row
        row = lk[0]["samples"] % rows
        ring[row, COL_COUNTER] = counter
        ring[row, COL_V] = v_mV
        ring[row, COL_I] = i_pA
        ring[row, COL_FLAGS] = flags
        ring[row, COL_STATUS] = status
        ring[row, COL_LATENCY] = latency if latency >= 0 else math.nan
        ring[row, COL_TURNAROUND] = math.nan
        base = N_FIXED_COLUMNS
        for r in range(n_el):
            ring[row, base + r] = g_out[r]
            ring[row, base + n_el + r] = i_out[r]
        spk = base + 2 * n_el
        ring[row, spk] = loop_s[0]["cell_spiked"]
        for j in range(neuron_rows.shape[0]):
            ring[row, spk + 1 + j] = state[neuron_rows[j], NEURON_S_SPIKED]
        lk[0]["samples"] += 1
        ctrl[CTRL_WRITTEN] = lk[0]["samples"]
        # statistics
        stats[ST_SAMPLES] += 1.0
        if latency >= 0:
            stats[ST_LAT_HIST + min(latency, LAT_BINS - 1)] += 1.0
        if status & STATUS_LATE:
            stats[ST_LATE] += 1.0
        if status & STATUS_WATCHDOG:
            stats[ST_WATCHDOG] += 1.0
        if status & STATUS_RX_ERROR:
            stats[ST_RX_ERROR] += 1.0
        if flags & (FAULT_BAD_V | FAULT_NONFINITE):
            stats[ST_FAULTS] += 1.0
        if flags & FLAG_LIMITED:
            stats[ST_LIMITED] += 1.0
        if loop_s[0]["cell_spiked"]:
            stats[ST_SPIKES] += 1.0
        lk[0]["pending"] = True
        lk[0]["pending_counter"] = counter
        lk[0]["pending_dac"] = pA_to_counts(conv, i_pA)
        lk[0]["pending_row"] = row
    stats[ST_BAD_FRAMES] = dstate[DEFRAMER_BAD]
    if not lk[0]["pending"]:
        return 0
    return encode_pending(lk, answered, dac, tx, stats)


@kernel
def encode_pending(
    lk: np.ndarray, answered: np.ndarray, dac: np.ndarray, tx: np.ndarray, stats: np.ndarray
) -> int:
    """Encode the command for the pending sample into ``tx``; return its length."""
    seq = lk[0]["next_seq"]
    dac[0] = lk[0]["pending_dac"]
    length = encode_command(seq, lk[0]["pending_counter"], dac, tx)
    answered[seq] = lk[0]["pending_counter"]
    lk[0]["next_seq"] = seq + 1 if seq + 1 < _SEQ_SPACE else 1
    lk[0]["pending"] = False
    stats[ST_COMMANDS] += 1.0
    return length


@kernel
def record_turnaround(
    lk: np.ndarray, ring: np.ndarray, stats: np.ndarray, turnaround_us: float
) -> None:
    """Store the host turnaround of the command just written (ring row and histogram)."""
    ring[lk[0]["pending_row"], COL_TURNAROUND] = turnaround_us
    stats[ST_TURN_HIST + min(int(turnaround_us / TURN_BIN_US), TURN_BINS - 1)] += 1.0


@kernel
def next_input(port: PortRun, samples: int, io: PortIo, ctrl: np.ndarray) -> int:
    """One wait for the board, shared by both loops: the bytes read into ``io.rx`` (> 0),
    0 when a wait slice passed without input, or ``-EXIT_*`` when the loop must stop
    (stop request, ``max_samples`` reached, port closed or failed, board silent)."""
    fd, spin_us, silent_ms, max_samples = port
    ctrl[CTRL_HEARTBEAT] += 1
    if ctrl[CTRL_STOP] != 0:
        return -EXIT_STOP_REQUEST
    if max_samples > 0 and samples >= max_samples:
        return -EXIT_DURATION
    ready = wait_readable(fd, spin_us, _POLL_SLICE_MS, io.timespec, io.pollfd)
    if ready < 0:
        return -EXIT_PORT_ERROR
    if ready == 0:
        io.wait[0]["idle_ms"] += _POLL_SLICE_MS
        if silent_ms > 0 and io.wait[0]["idle_ms"] >= silent_ms:
            return -EXIT_BOARD_SILENT
        return 0
    revents = io.pollfd[1] >> 16
    if (revents & 0x01) == 0 and (revents & _POLLHUP_POLLERR_POLLNVAL) != 0:
        return -EXIT_PORT_CLOSED
    io.wait[0]["idle_ms"] = 0
    io.wait[0]["ready_us"] = monotonic_us(io.timespec)
    got = fd_read(fd, io.rx, 0, io.rx.shape[0])
    if got == 0:
        return -EXIT_PORT_CLOSED
    if got < 0:
        return -EXIT_PORT_ERROR
    return got


@kernel
def write_all(fd: int, io: PortIo, length: int) -> bool:
    """Write ``io.tx[:length]`` to ``fd``; False when a write failed."""
    done = 0
    while done < length:
        w = fd_write(fd, io.tx, done, length - done)
        if w <= 0:
            return False
        done += w
    return True


@kernel
def fd_loop(port: PortRun, link: LinkArrays, pa: ProgramArrays, sh: LoopShared) -> int:
    """Serve the board on ``port`` until a stop condition; returns an ``EXIT_*`` code."""
    while True:
        got = next_input(port, link.lk[0]["samples"], link.io, sh.ctrl)
        if got < 0:
            return -got
        length = process_rx(got, link, pa, sh) if got > 0 else 0
        if length > 0:
            if not write_all(port.fd, link.io, length):
                return EXIT_PORT_ERROR
            turnaround_us = monotonic_us(link.io.timespec) - link.io.wait[0]["ready_us"]
            record_turnaround(link.lk, sh.ring, sh.stats, turnaround_us)
