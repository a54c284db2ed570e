"""The host's per-sample path in law mode (protocol v2, PROTOCOL.md §10), compiled.

The host no longer answers samples: it keeps the board supplied with the current
law of every sample ``lead`` samples ahead of the newest sample it has seen.
``process_rx_law`` takes a chunk of bytes from the board and, for every sample of
every SAMPLES frame in it: records the board's spike flag (cell-driven synapses
hear it ``delay`` samples later), computes each element's current at the V the
cell had from the conductances kept since that sample's law was made, and writes
the ring row with the current the board actually applied (its DAC count). It then
makes the laws up to newest + lead (``clampcore.step.element_conductances``, live
changes applied at the sample they take effect), and encodes them as LAWS frames,
at least one per pass (a frame with no law still tells the board how far the host
has got, which a lockstep rig waits for). A change of the zero-current control is
sent as ZERO, which the board applies on arrival, ahead of any queued law. A live change
of a rule the board applies itself (current limit, spike detection, threshold_reset) is
sent as RULES_AT, naming the sample it took effect at on the host (``_rules_frame``).
``law_fd_loop`` wraps it with read/write on a descriptor, like ``hostloop.fd_loop``.

Real-time rules as in ``clampcore.hostloop``: compiled, preallocated, no I/O but one
read and one write per pass.

Public names: ``LawLinkArrays``, ``new_law_link``, ``top_up_laws``, ``process_rx_law``,
``law_fd_loop``, ``host_flags``, ``host_flags_of``, ``board_reset_current``, the ``LW_*``
indices, ``FLAG_STALE``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from clampcore.calibration import counts_to_mV, counts_to_pA
from clampcore.elements import KIND_THRESHOLD_RESET
from clampcore.elements import threshold_reset as _tr
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.hostloop import (
    _POLL_SLICE_MS,
    _POLLHUP_POLLERR_POLLNVAL,
    EXIT_BOARD_SILENT,
    EXIT_DURATION,
    EXIT_PORT_CLOSED,
    EXIT_PORT_ERROR,
    EXIT_STOP_REQUEST,
    FLAG_ZEROED,
    _apply_mail,
)
from clampcore.jit import kernel
from clampcore.law import live_board_rules, make_law
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
    ST_SAMPLES,
    ST_SPIKES,
    ST_WATCHDOG,
    ST_ZEROED,
)
from clampcore.step import (
    FAULT_BAD_V,
    FAULT_NONFINITE,
    FLAG_LIMITED,
    LP_MAX_CURRENT_PA,
    LP_SPIKE_HYSTERESIS_MV,
    LP_SPIKE_THRESHOLD_MV,
    cell_currents,
    hist_record_cell_spike,
)
from clampcore.sysio import fd_read, fd_write, wait_readable
from firmware_protocol import boardlaw as bl
from firmware_protocol import lawmsg
from firmware_protocol.codec import (
    DEFRAMER_BAD,
    MAX_PAYLOAD,
    MAX_WIRE,
    STATUS_LATE,
    STATUS_WATCHDOG,
    deframe_next,
    encode_frame,
    new_deframer,
)

LW_NEXT_SEQ = 0  # sequence number of the next frame the loop sends
LW_SEEN = 1  # the newest sample (run index) seen; -1 before the first
LW_FIRST_COUNTER = 2  # the board's counter of the first sample (normally 0)
LW_HI = 3  # laws exist for samples 0 .. LW_HI
LW_SAMPLES = 4  # samples processed (ring rows written)
LW_LEAD = 5  # look-ahead, samples
LW_BLOCKED = 6  # 1: laws carry the Mg-blocked part
LW_ZERO_SENT = 7  # the zero-current state last sent to the board
LW_MAIL_SEEN = 8  # live changes checked for board rules so far (ctrl[CTRL_MAIL_APPLIED])
N_LW = 9

FLAG_STALE = 16  # ring flags bit: the board had no law young enough and output 0 pA

_TX_BYTES = 8192  # LAWS frames of one pass: a 1 ms burst of samples at 50 kHz and more


@dataclass
class LawLinkArrays:
    """Every buffer of the law-mode link, allocated once per run."""

    lw: np.ndarray
    dstate: np.ndarray
    dbuf: np.ndarray
    frame: np.ndarray
    fields: np.ndarray
    s_adc: np.ndarray
    s_dac: np.ndarray
    s_flags: np.ndarray
    rx: np.ndarray
    tx: np.ndarray
    laws: np.ndarray  # float32 (R, 4): law ring, row = sample & (R - 1)
    lawbits: np.ndarray  # uint32 view of laws
    ghist: np.ndarray  # float64 (R, 2 n_el + n_neurons): g, direct i, neuron spikes
    body: np.ndarray
    timespec: np.ndarray
    pollfd: np.ndarray
    # The board's rules as last sent (boardlaw bf, its uint32 bits, bi): RULES_AT's source.
    rules_bf: np.ndarray
    rules_bits: np.ndarray
    rules_bi: np.ndarray

    def rules(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The arrays ``process_rx_law`` and ``law_fd_loop`` take last."""
        return self.rules_bf, self.rules_bits, self.rules_bi

    def arrays(self) -> tuple[np.ndarray, ...]:
        return (
            self.lw,
            self.dstate,
            self.dbuf,
            self.frame,
            self.fields,
            self.s_adc,
            self.s_dac,
            self.s_flags,
            self.rx,
            self.tx,
            self.laws,
            self.lawbits,
            self.ghist,
            self.body,
            self.timespec,
            self.pollfd,
        )


def new_law_link(
    lead: int,
    blocked: bool,
    n_elements: int,
    n_neurons: int,
    bf: np.ndarray | None = None,
    bi: np.ndarray | None = None,
) -> LawLinkArrays:
    """Buffers for a run with look-ahead ``lead`` samples; ``bf``, ``bi``: the board's rules
    as sent with BOARD_RULES (``clampcore.law.board_arrays``)."""
    rules_bf, rules_bi = bl.new_board_arrays()[:2]
    if bf is not None and bi is not None:
        rules_bf[:] = bf
        rules_bi[:] = bi
    dstate, dbuf = new_deframer()
    rows = 1 << (2 * lead + 64).bit_length()  # the laws in flight and the samples to come
    lw = np.zeros(N_LW, dtype=np.int64)
    lw[LW_NEXT_SEQ] = 1
    lw[LW_SEEN] = -1
    lw[LW_FIRST_COUNTER] = -1
    lw[LW_HI] = -1
    lw[LW_LEAD] = lead
    lw[LW_BLOCKED] = 1 if blocked else 0
    laws = np.zeros((rows, 4), dtype=np.float32)
    return LawLinkArrays(
        lw=lw,
        dstate=dstate,
        dbuf=dbuf,
        frame=np.zeros(MAX_PAYLOAD, dtype=np.uint8),
        fields=np.zeros(lawmsg.N_FIELDS, dtype=np.int64),
        s_adc=np.zeros(lawmsg.MAX_SAMPLES, dtype=np.int64),
        s_dac=np.zeros(lawmsg.MAX_SAMPLES, dtype=np.int64),
        s_flags=np.zeros(lawmsg.MAX_SAMPLES, dtype=np.int64),
        rx=np.zeros(4096, dtype=np.uint8),
        tx=np.zeros(_TX_BYTES, dtype=np.uint8),
        laws=laws,
        lawbits=laws.view(np.uint32),
        ghist=np.zeros((rows, 2 * n_elements + n_neurons)),
        body=np.zeros(MAX_PAYLOAD, dtype=np.uint8),
        timespec=np.zeros(2, dtype=np.int64),
        pollfd=np.zeros(2, dtype=np.int32),
        rules_bf=rules_bf,
        rules_bits=rules_bf.view(np.uint32),
        rules_bi=rules_bi,
    )


@kernel
def host_flags(bflags: int) -> int:
    """The host's per-sample flags (as recorded) for the board's flags of a sample."""
    flags = 0
    if bflags & bl.BF_FLAG_BAD_V:
        flags |= FAULT_BAD_V
    if bflags & bl.BF_FLAG_NONFINITE:
        flags |= FAULT_NONFINITE
    if bflags & bl.BF_FLAG_STALE:
        flags |= FLAG_STALE
    if bflags & bl.BF_FLAG_LIMITED:
        flags |= FLAG_LIMITED
    if bflags & bl.BF_FLAG_ZERO:
        flags |= FLAG_ZEROED
    return flags


@kernel
def host_flags_of(bflags: np.ndarray, out: np.ndarray) -> None:
    """``host_flags`` of every sample."""
    for k in range(bflags.shape[0]):
        out[k] = host_flags(bflags[k])


@kernel
def board_reset_current(
    v_mV: float,
    on: bool,
    kind: np.ndarray,
    params: np.ndarray,
    g_out: np.ndarray,
    i_out: np.ndarray,
) -> None:
    """The threshold_reset element's conductance and current, which the board applied."""
    for r in range(kind.shape[0]):
        if kind[r] != KIND_THRESHOLD_RESET:
            continue
        g = params[r, _tr.P_G] if on else 0.0
        g_out[r] = g
        i_out[r] = -g * (v_mV - params[r, _tr.P_RESET])


@kernel
def _next_seq(lw: np.ndarray) -> int:
    seq = lw[LW_NEXT_SEQ]
    lw[LW_NEXT_SEQ] = seq + 1 if seq < 0xFFFF else 1
    return seq


@kernel
def top_up_laws(
    lw: np.ndarray,
    laws: np.ndarray,
    lawbits: np.ndarray,
    ghist: np.ndarray,
    tx: np.ndarray,
    at: int,
    scale: np.ndarray,
    kind: np.ndarray,
    params: np.ndarray,
    state: np.ndarray,
    rng: np.ndarray,
    trains: np.ndarray,
    g_out: np.ndarray,
    i_out: np.ndarray,
    loop_p: np.ndarray,
    loop_s: np.ndarray,
    neuron_rows: np.ndarray,
    ctrl: np.ndarray,
    mailbox: np.ndarray,
    applied: np.ndarray,
    stats: np.ndarray,
) -> int:
    """Make the laws up to newest seen + lead and encode them at ``tx[at:]``; new end of tx."""
    n_el = kind.shape[0]
    mask = laws.shape[0] - 1
    blocked = lw[LW_BLOCKED] != 0
    per_frame = lawmsg.MAX_LAWS_BLOCKED if blocked else lawmsg.MAX_LAWS
    first = lw[LW_HI] + 1
    target = lw[LW_SEEN] + lw[LW_LEAD]
    for s in range(first, target + 1):
        _apply_mail(ctrl, mailbox, applied, params, loop_p, s)
        make_law(
            s, scale, kind, params, state, rng, trains, g_out, i_out, loop_p, loop_s, laws[s & mask]
        )
        h = s & mask
        for r in range(n_el):
            ghist[h, r] = g_out[r]
            ghist[h, n_el + r] = i_out[r]
        for j in range(neuron_rows.shape[0]):
            ghist[h, 2 * n_el + j] = state[neuron_rows[j], NEURON_S_SPIKED]
        lw[LW_HI] = s
    s = first
    while True:  # at least one frame: it says how far the host has got
        count = min(per_frame, target + 1 - s) if target >= s else 0
        if at + MAX_WIRE > tx.shape[0]:
            break
        nb = lawmsg.encode_laws(_next_seq(lw), lw[LW_SEEN], s, count, blocked, lawbits, tx, at)
        at += nb
        stats[ST_COMMANDS] += 1.0
        s += count
        if s > target:
            break
    return at


@kernel
def _zero_frame(lw: np.ndarray, ctrl: np.ndarray, body: np.ndarray, tx: np.ndarray, at: int) -> int:
    """A ZERO frame at tx[at:] when the zero-current control changed; new end of tx."""
    want = 1 if ctrl[CTRL_ZERO] != 0 else 0
    if want == lw[LW_ZERO_SENT]:
        return at
    body[0] = want
    nb = encode_frame(lawmsg.MSG_ZERO, _next_seq(lw), body, 1, tx[at:])
    if nb > 0:
        lw[LW_ZERO_SENT] = want
        at += nb
    return at


@kernel
def _board_owned(kind: np.ndarray, target: float, row: int, col: int) -> bool:
    """Whether a live change (mailbox target, row, column) is a rule the board applies itself
    in law mode (``clampcore.engine.board_owns`` for names)."""
    if target == MAIL_TO_PARAMS:
        return 0 <= row < kind.shape[0] and kind[row] == KIND_THRESHOLD_RESET
    return col in (LP_MAX_CURRENT_PA, LP_SPIKE_THRESHOLD_MV, LP_SPIKE_HYSTERESIS_MV)


@kernel
def _rules_frame(
    lw: np.ndarray,
    ctrl: np.ndarray,
    applied: np.ndarray,
    conv: np.ndarray,
    scale: np.ndarray,
    kind: np.ndarray,
    params: np.ndarray,
    loop_p: np.ndarray,
    rules_bf: np.ndarray,
    rules_bits: np.ndarray,
    rules_bi: np.ndarray,
    body: np.ndarray,
    tx: np.ndarray,
    at: int,
) -> int:
    """A RULES_AT frame at tx[at:] when live changes applied since the last call touch a rule
    the board applies itself: the board's rules from the parameters now, in force from the
    sample the newest such change took effect at (the law front); new end of tx."""
    done = ctrl[CTRL_MAIL_APPLIED]
    first = max(lw[LW_MAIL_SEEN], done - MAILBOX_SLOTS)
    lw[LW_MAIL_SEEN] = done
    sample = -1
    for k in range(first, done):
        slot = k % MAILBOX_SLOTS
        if _board_owned(kind, applied[slot, 0], int(applied[slot, 1]), int(applied[slot, 2])):
            sample = max(sample, int(applied[slot, APPLIED_SAMPLE]))
    if sample < 0:
        return at
    live_board_rules(conv, scale, kind, params, loop_p, True, rules_bf, rules_bi)
    nb = lawmsg.encode_rules_at(_next_seq(lw), sample, rules_bits, rules_bi, body, tx[at:])
    return at + nb if nb > 0 else at


@kernel
def process_rx_law(
    nbytes: int,
    lw: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    frame: np.ndarray,
    fields: np.ndarray,
    s_adc: np.ndarray,
    s_dac: np.ndarray,
    s_flags: np.ndarray,
    rx: np.ndarray,
    tx: np.ndarray,
    laws: np.ndarray,
    lawbits: np.ndarray,
    ghist: np.ndarray,
    body: np.ndarray,
    conv: np.ndarray,
    scale: np.ndarray,
    kind: np.ndarray,
    params: np.ndarray,
    state: np.ndarray,
    rng: np.ndarray,
    trains: np.ndarray,
    g_out: np.ndarray,
    i_out: np.ndarray,
    loop_p: np.ndarray,
    loop_s: np.ndarray,
    neuron_rows: np.ndarray,
    ctrl: np.ndarray,
    ring: np.ndarray,
    mailbox: np.ndarray,
    applied: np.ndarray,
    stats: np.ndarray,
    rules_bf: np.ndarray,
    rules_bits: np.ndarray,
    rules_bi: np.ndarray,
) -> int:
    """Handle ``rx[:nbytes]``; return the length of the frames left in ``tx`` (or 0)."""
    n_el = kind.shape[0]
    rows = ring.shape[0]
    mask = laws.shape[0] - 1
    got_samples = False
    while True:
        m = deframe_next(dstate, dbuf, rx, nbytes, frame)
        if m <= 0:
            break
        count = lawmsg.decode_samples(frame, m, fields, s_adc, s_dac, s_flags)
        if count < 1:
            stats[ST_OTHER_FRAMES] += 1.0
            continue
        status = fields[lawmsg.SAMPLES_STATUS]
        for i in range(count):
            counter = fields[lawmsg.SAMPLES_FIRST] + i
            if lw[LW_FIRST_COUNTER] < 0:
                lw[LW_FIRST_COUNTER] = counter
                ctrl[CTRL_FIRST_COUNTER] = counter
            n = counter - lw[LW_FIRST_COUNTER]
            if n <= lw[LW_SEEN]:
                stats[ST_OTHER_FRAMES] += 1.0  # a stale or repeated sample: ignored
                continue
            stats[ST_MISSING] += n - lw[LW_SEEN] - 1
            if n > lw[LW_HI]:  # samples lost on the way: catch the model up to this one
                lw[LW_SEEN] = n - lw[LW_LEAD]
                top_up_laws(
                    lw, laws, lawbits, ghist, tx, tx.shape[0], scale, kind, params, state,
                    rng, trains, g_out, i_out, loop_p, loop_s, neuron_rows, ctrl, mailbox,
                    applied, stats,
                )  # fmt: skip
            lw[LW_SEEN] = n
            got_samples = True
            bflags = s_flags[i]
            spiked = (bflags & bl.BF_FLAG_SPIKE) != 0
            hist_record_cell_spike(n, spiked, loop_p, loop_s)
            v_mV = counts_to_mV(conv, float(s_adc[i]))
            h = n & mask
            for r in range(n_el):
                g_out[r] = ghist[h, r]
                i_out[r] = ghist[h, n_el + r]
            cell_currents(v_mV, kind, params, g_out, i_out)
            board_reset_current(v_mV, (bflags & bl.BF_FLAG_RESET) != 0, kind, params, g_out, i_out)
            flags = host_flags(bflags)
            row = lw[LW_SAMPLES] % rows
            ring[row, COL_COUNTER] = counter
            ring[row, COL_V] = v_mV
            ring[row, COL_I] = counts_to_pA(conv, float(s_dac[i]))
            ring[row, COL_FLAGS] = flags
            ring[row, COL_STATUS] = status
            # The current of sample n was computed from V_n at the board and drives the
            # cell from sample n + 1 on: latency 1 in the sense of PROTOCOL.md §5.3.
            fault = (bflags & bl.BF_FLAG_FAULT) != 0
            ring[row, COL_LATENCY] = math.nan if fault else 1.0
            ring[row, COL_TURNAROUND] = math.nan
            base = N_FIXED_COLUMNS
            for r in range(n_el):
                ring[row, base + r] = g_out[r]
                ring[row, base + n_el + r] = i_out[r]
            spk = base + 2 * n_el
            ring[row, spk] = 1.0 if spiked else 0.0
            for j in range(neuron_rows.shape[0]):
                ring[row, spk + 1 + j] = ghist[h, 2 * n_el + j]
            lw[LW_SAMPLES] += 1
            ctrl[CTRL_WRITTEN] = lw[LW_SAMPLES]
            stats[ST_SAMPLES] += 1.0
            if not fault:
                stats[ST_LAT_HIST + min(1, LAT_BINS - 1)] += 1.0
            if status & STATUS_LATE:
                stats[ST_LATE] += 1.0
            if status & STATUS_WATCHDOG:
                stats[ST_WATCHDOG] += 1.0
            if flags & (FAULT_BAD_V | FAULT_NONFINITE | FLAG_STALE):
                stats[ST_FAULTS] += 1.0
            if flags & FLAG_LIMITED:
                stats[ST_LIMITED] += 1.0
            if flags & FLAG_ZEROED:
                stats[ST_ZEROED] += 1.0
            if spiked:
                stats[ST_SPIKES] += 1.0
    stats[ST_BAD_FRAMES] = dstate[DEFRAMER_BAD]
    at = _zero_frame(lw, ctrl, body, tx, 0)
    if not got_samples:
        return at
    # The laws leave room for a RULES_AT frame after them.
    at = top_up_laws(
        lw, laws, lawbits, ghist, tx[: tx.shape[0] - MAX_WIRE], at, scale, kind, params, state,
        rng, trains, g_out, i_out, loop_p, loop_s, neuron_rows, ctrl, mailbox, applied, stats,
    )  # fmt: skip
    return _rules_frame(
        lw, ctrl, applied, conv, scale, kind, params, loop_p, rules_bf, rules_bits, rules_bi,
        body, tx, at,
    )  # fmt: skip


@kernel
def law_fd_loop(
    fd: int,
    spin_us: float,
    silent_ms: int,
    max_samples: int,
    lw: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    frame: np.ndarray,
    fields: np.ndarray,
    s_adc: np.ndarray,
    s_dac: np.ndarray,
    s_flags: np.ndarray,
    rx: np.ndarray,
    tx: np.ndarray,
    laws: np.ndarray,
    lawbits: np.ndarray,
    ghist: np.ndarray,
    body: np.ndarray,
    timespec: np.ndarray,
    pollfd: np.ndarray,
    conv: np.ndarray,
    scale: np.ndarray,
    kind: np.ndarray,
    params: np.ndarray,
    state: np.ndarray,
    rng: np.ndarray,
    trains: np.ndarray,
    g_out: np.ndarray,
    i_out: np.ndarray,
    loop_p: np.ndarray,
    loop_s: np.ndarray,
    neuron_rows: np.ndarray,
    ctrl: np.ndarray,
    ring: np.ndarray,
    mailbox: np.ndarray,
    applied: np.ndarray,
    stats: np.ndarray,
    rules_bf: np.ndarray,
    rules_bits: np.ndarray,
    rules_bi: np.ndarray,
) -> int:
    """Serve a law-evaluating board on ``fd`` until a stop condition; an ``EXIT_*`` code."""
    idle_ms = 0
    while True:
        ctrl[CTRL_HEARTBEAT] += 1
        if ctrl[CTRL_STOP] != 0:
            return EXIT_STOP_REQUEST
        if max_samples > 0 and lw[LW_SAMPLES] >= max_samples:
            return EXIT_DURATION
        ready = wait_readable(fd, spin_us, _POLL_SLICE_MS, timespec, pollfd)
        if ready < 0:
            return EXIT_PORT_ERROR
        length = 0
        if ready == 0:
            idle_ms += _POLL_SLICE_MS
            if silent_ms > 0 and idle_ms >= silent_ms:
                return EXIT_BOARD_SILENT
            length = _zero_frame(lw, ctrl, body, tx, 0)  # the zero request cannot wait
        else:
            revents = pollfd[1] >> 16
            if (revents & 0x01) == 0 and (revents & _POLLHUP_POLLERR_POLLNVAL) != 0:
                return EXIT_PORT_CLOSED
            idle_ms = 0
            got = fd_read(fd, rx, 0, rx.shape[0])
            if got == 0:
                return EXIT_PORT_CLOSED
            if got < 0:
                return EXIT_PORT_ERROR
            length = process_rx_law(
                got, lw, dstate, dbuf, frame, fields, s_adc, s_dac, s_flags, rx, tx, laws,
                lawbits, ghist, body, conv, scale, kind, params, state, rng, trains, g_out,
                i_out, loop_p, loop_s, neuron_rows, ctrl, ring, mailbox, applied, stats,
                rules_bf, rules_bits, rules_bi,
            )  # fmt: skip
        done = 0
        while done < length:
            w = fd_write(fd, tx, done, length - done)
            if w <= 0:
                return EXIT_PORT_ERROR
            done += w
