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
``law_fd_loop`` wraps it with read/write on a descriptor, with ``hostloop``'s
``next_input`` and ``write_all`` as ``hostloop.fd_loop`` does.

Real-time rules as in ``clampcore.hostloop``: compiled, preallocated, no I/O but one
read and one write per pass.

Public names: ``LawLinkArrays``, ``new_law_link``, ``top_up_laws``, ``process_rx_law``,
``law_fd_loop``, ``host_flags``, ``host_flags_of``, ``board_reset_current``, the
``LAW_LINK_STATE`` record, ``FLAG_STALE``.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from clampcore.calibration import counts_to_mV, counts_to_pA
from clampcore.elements import KIND_THRESHOLD_RESET
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.firmware_protocol import boardlaw as bl
from clampcore.firmware_protocol import lawmsg
from clampcore.firmware_protocol.codec import (
    DEFRAMER_BAD,
    MAX_PAYLOAD,
    MAX_WIRE,
    STATUS_LATE,
    STATUS_WATCHDOG,
    deframe_next,
    encode_frame,
    new_deframer,
)
from clampcore.hostloop import (
    EXIT_PORT_ERROR,
    FLAG_ZEROED,
    PortIo,
    PortRun,
    _apply_mail,
    new_port_io,
    next_input,
    write_all,
)
from clampcore.jit import kernel
from clampcore.law import law_scale, live_board_rules, make_law
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
    CTRL_MAIL_APPLIED,
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
    ST_LATE_SPIKES,
    ST_LIMITED,
    ST_MISSING,
    ST_OTHER_FRAMES,
    ST_SAMPLES,
    ST_SPIKES,
    ST_WATCHDOG,
    ST_ZEROED,
    LoopShared,
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
    queue_late_cell_spike,
)

# The law-mode link's state: a record (``lw``, a structured array of length 1).
LAW_LINK_STATE = np.dtype(
    [
        ("next_seq", np.int64),  # sequence number of the next frame the loop sends
        ("seen", np.int64),  # the newest sample (run index) seen; -1 before the first
        ("first_counter", np.int64),  # the board's counter of the first sample (normally 0)
        ("hi", np.int64),  # laws exist for samples 0 .. hi
        ("samples", np.int64),  # samples processed (ring rows written)
        ("lead", np.int64),  # look-ahead, samples
        ("blocked", np.bool_),  # laws carry the Mg-blocked part
        ("zero_sent", np.int64),  # the zero-current state last sent to the board (0 or 1)
        ("mail_seen", np.int64),  # live changes checked for board rules (ctrl[CTRL_MAIL_APPLIED])
    ]
)

FLAG_STALE = 16  # ring flags bit: the board had no law young enough and output 0 pA

_TX_BYTES = 8192  # LAWS frames of one pass: a 1 ms burst of samples at 50 kHz and more


class LawLinkArrays(NamedTuple):
    """Every buffer of the law-mode link, allocated once per run."""

    lw: np.ndarray  # LAW_LINK_STATE (1,): the law link's state, one record
    dstate: np.ndarray
    dbuf: np.ndarray
    frame: np.ndarray
    fields: np.ndarray
    s_adc: np.ndarray
    s_dac: np.ndarray
    s_flags: np.ndarray
    laws: np.ndarray  # float32 (R, 4): law ring, row = sample & (R - 1)
    lawbits: np.ndarray  # uint32 view of laws
    ghist: np.ndarray  # float64 (R, 3 n_el + n_neurons): g, direct i, E, neuron spikes
    body: np.ndarray
    conv: np.ndarray  # the board's converters and the amplifier (clampcore.calibration)
    scale: np.ndarray  # the law's units for conv (clampcore.law.law_scale)
    io: PortIo
    # The board's rules as last sent (boardlaw bf, its uint32 bits, bi): RULES_AT's source.
    rules_bf: np.ndarray
    rules_bits: np.ndarray
    rules_bi: np.ndarray


def new_law_link(
    lead: int,
    blocked: bool,
    n_elements: int,
    n_neurons: int,
    conv: np.ndarray,
    bf: np.ndarray | None = None,
    bi: np.ndarray | None = None,
) -> LawLinkArrays:
    """Buffers for a run with look-ahead ``lead`` samples on a board with converters ``conv``;
    ``bf``, ``bi``: the board's rules as sent with BOARD_RULES (``clampcore.law.board_arrays``)."""
    rules_bf, rules_bi = bl.new_board_arrays()[:2]
    if bf is not None and bi is not None:
        rules_bf[:] = bf
        rules_bi[:] = bi
    dstate, dbuf = new_deframer()
    rows = 1 << (2 * lead + 64).bit_length()  # the laws in flight and the samples to come
    lw = np.zeros(1, dtype=LAW_LINK_STATE)
    lw[0]["next_seq"] = 1
    lw[0]["seen"] = -1
    lw[0]["first_counter"] = -1
    lw[0]["hi"] = -1
    lw[0]["lead"] = lead
    lw[0]["blocked"] = blocked
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
        laws=laws,
        lawbits=laws.view(np.uint32),
        ghist=np.zeros((rows, 3 * n_elements + n_neurons)),
        body=np.zeros(MAX_PAYLOAD, dtype=np.uint8),
        conv=conv,
        scale=law_scale(conv),
        io=new_port_io(_TX_BYTES),
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
    g_out: np.ndarray,
    i_out: np.ndarray,
    e_out: np.ndarray,
) -> None:
    """The threshold_reset element's conductance and current, which the board applied
    (``on``: it clamped at this sample) with the rule its law was made with (``make_law``:
    the conductance in ``g_out``, the reset potential in ``e_out``)."""
    for r in range(kind.shape[0]):
        if kind[r] != KIND_THRESHOLD_RESET:
            continue
        g = g_out[r] if on else 0.0
        g_out[r] = g
        i_out[r] = -g * (v_mV - e_out[r])


@kernel
def _next_seq(lw: np.ndarray) -> int:
    seq = lw[0]["next_seq"]
    lw[0]["next_seq"] = seq + 1 if seq < 0xFFFF else 1
    return seq


@kernel
def top_up_laws(ll: LawLinkArrays, at: int, pa: ProgramArrays, sh: LoopShared) -> int:
    """Make the laws up to newest seen + lead and encode them at ``tx[at:]``; new end of tx."""
    lw, laws, lawbits, ghist, tx = ll.lw, ll.laws, ll.lawbits, ll.ghist, ll.io.tx
    kind, params, state, g_out, i_out = pa.kind, pa.params, pa.state, pa.g_out, pa.i_out
    ctrl, stats, neuron_rows = sh.ctrl, sh.stats, sh.neuron_rows
    n_el = kind.shape[0]
    mask = laws.shape[0] - 1
    blocked = lw[0]["blocked"]
    per_frame = lawmsg.MAX_LAWS_BLOCKED if blocked else lawmsg.MAX_LAWS
    first = lw[0]["hi"] + 1
    target = lw[0]["seen"] + lw[0]["lead"]
    for s in range(first, target + 1):
        _apply_mail(ctrl, sh.mailbox, sh.applied, params, pa.loop_p, s)
        make_law(s, ll.scale, pa, laws[s & mask])
        h = s & mask
        for r in range(n_el):
            ghist[h, r] = g_out[r]
            ghist[h, n_el + r] = i_out[r]
            ghist[h, 2 * n_el + r] = pa.e_out[r]
        for j in range(neuron_rows.shape[0]):
            ghist[h, 3 * n_el + j] = state[neuron_rows[j], NEURON_S_SPIKED]
        lw[0]["hi"] = s
    s = first
    while True:  # at least one frame: it says how far the host has got
        count = min(per_frame, target + 1 - s) if target >= s else 0
        if at + 2 * MAX_WIRE > tx.shape[0]:  # room left for a RULES_AT frame after them
            break
        nb = lawmsg.encode_laws(_next_seq(lw), lw[0]["seen"], s, count, blocked, lawbits, tx, at)
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
    if want == lw[0]["zero_sent"]:
        return at
    body[0] = want
    nb = encode_frame(lawmsg.MSG_ZERO, _next_seq(lw), body, 1, tx[at:])
    if nb > 0:
        lw[0]["zero_sent"] = want
        at += nb
    return at


@kernel
def _board_owned(kind: np.ndarray, target: float, row: int, col: int) -> bool:
    """Whether a live change (mailbox target, row, column) is a rule the board applies itself
    in law mode (the current limit, spike detection, threshold_reset)."""
    if target == MAIL_TO_PARAMS:
        return 0 <= row < kind.shape[0] and kind[row] == KIND_THRESHOLD_RESET
    return col in (LP_MAX_CURRENT_PA, LP_SPIKE_THRESHOLD_MV, LP_SPIKE_HYSTERESIS_MV)


@kernel
def _rules_frame(ll: LawLinkArrays, pa: ProgramArrays, sh: LoopShared, at: int) -> int:
    """A RULES_AT frame at tx[at:] when live changes applied since the last call touch a rule
    the board applies itself: the board's rules from the parameters now, in force from the
    sample the newest such change took effect at (the law front); new end of tx."""
    lw, applied, kind = ll.lw, sh.applied, pa.kind
    done = sh.ctrl[CTRL_MAIL_APPLIED]
    first = max(lw[0]["mail_seen"], done - MAILBOX_SLOTS)
    lw[0]["mail_seen"] = done
    sample = -1
    for k in range(first, done):
        slot = k % MAILBOX_SLOTS
        if _board_owned(kind, applied[slot, 0], int(applied[slot, 1]), int(applied[slot, 2])):
            sample = max(sample, int(applied[slot, APPLIED_SAMPLE]))
    if sample < 0:
        return at
    live_board_rules(ll.conv, ll.scale, kind, pa.params, pa.loop_p, True, ll.rules_bf, ll.rules_bi)
    nb = lawmsg.encode_rules_at(
        _next_seq(lw), sample, ll.rules_bits, ll.rules_bi, ll.body, ll.io.tx[at:]
    )
    return at + nb if nb > 0 else at


@kernel
def process_rx_law(nbytes: int, ll: LawLinkArrays, pa: ProgramArrays, sh: LoopShared) -> int:
    """Handle ``rx[:nbytes]``; return the length of the frames left in ``tx`` (or 0)."""
    lw, dstate, dbuf, frame, fields = ll.lw, ll.dstate, ll.dbuf, ll.frame, ll.fields
    s_adc, s_dac, s_flags, laws, ghist = ll.s_adc, ll.s_dac, ll.s_flags, ll.laws, ll.ghist
    body, conv, rx, tx = ll.body, ll.conv, ll.io.rx, ll.io.tx
    kind, params, g_out, i_out, e_out = pa.kind, pa.params, pa.g_out, pa.i_out, pa.e_out
    ctrl, ring, stats, neuron_rows = sh.ctrl, sh.ring, sh.stats, sh.neuron_rows
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
            if lw[0]["first_counter"] < 0:
                lw[0]["first_counter"] = counter
                ctrl[CTRL_FIRST_COUNTER] = counter
            n = counter - lw[0]["first_counter"]
            if n <= lw[0]["seen"]:
                stats[ST_OTHER_FRAMES] += 1.0  # a stale or repeated sample: ignored
                continue
            stats[ST_MISSING] += n - lw[0]["seen"] - 1
            if n > lw[0]["hi"]:  # samples lost on the way: catch the model up to this one
                lw[0]["seen"] = n - lw[0]["lead"]
                top_up_laws(ll, tx.shape[0], pa, sh)  # makes laws, encodes none
            lw[0]["seen"] = n
            got_samples = True
            bflags = s_flags[i]
            spiked = (bflags & bl.BF_FLAG_SPIKE) != 0
            hist_record_cell_spike(n, spiked, pa.spike_ring)
            if spiked:  # a synapse that hears it too late gets it at the next law made
                stats[ST_LATE_SPIKES] += queue_late_cell_spike(n, lw[0]["hi"], pa)
            v_mV = counts_to_mV(conv, float(s_adc[i]))
            h = n & mask
            # Each element as the law of sample n was made (a live change since then acts
            # from a later sample): g, direct current and reversal potential.
            for r in range(n_el):
                g_out[r] = ghist[h, r]
                i_out[r] = ghist[h, n_el + r]
                e_out[r] = ghist[h, 2 * n_el + r]
            cell_currents(v_mV, kind, params, g_out, i_out, e_out)
            board_reset_current(v_mV, (bflags & bl.BF_FLAG_RESET) != 0, kind, g_out, i_out, e_out)
            flags = host_flags(bflags)
            row = lw[0]["samples"] % rows
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
                ring[row, spk + 1 + j] = ghist[h, 3 * n_el + j]
            lw[0]["samples"] += 1
            ctrl[CTRL_WRITTEN] = lw[0]["samples"]
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
    return _rules_frame(ll, pa, sh, top_up_laws(ll, at, pa, sh))


@kernel
def law_fd_loop(port: PortRun, ll: LawLinkArrays, pa: ProgramArrays, sh: LoopShared) -> int:
    """Serve a law-evaluating board on ``port`` until a stop condition; an ``EXIT_*`` code."""
    while True:
        got = next_input(port, ll.lw[0]["samples"], ll.io, sh.ctrl)
        if got < 0:
            return -got
        if got > 0:
            length = process_rx_law(got, ll, pa, sh)
        else:  # the zero request cannot wait for the board
            length = _zero_frame(ll.lw, sh.ctrl, ll.body, ll.io.tx, 0)
        if not write_all(port.fd, ll.io, length):
            return EXIT_PORT_ERROR
            return EXIT_PORT_ERROR
