"""The C board core's law mode (PROTOCOL.md §10) against the simulated rig's board.

The C core (``firmware_protocol/c/``, through ctypes on the in-memory port) and a model
of the simulated rig's law-mode board are fed the same frames, clock and ADC counts,
and must send byte-identical frames and write identical DAC counts. The model
(``RigLaw`` below) is built from the rig's own compiled functions
(``simulated_rig.board._on_laws``, ``_sticky``, ``encode_status``, ``new_law_board``)
and the kernels the rig's ``_tick`` calls (``boardlaw.board_set_law``,
``boardlaw.board_eval``, ``lawmsg.encode_samples``); the few state changes that live
in the rig's Python handlers (``Board._on_configure``, ``_on_law_setup``, ``_on_start``)
and the law branch of its ``_tick`` are restated there line for line, with the cell
replaced by the given ADC counts. The board's parameters come from the host's own
``clampcore.law.board_arrays`` for a real experiment (limit, implausible-V guard, spike
detection, threshold_reset, an Mg-blocked synapse's table).
"""

from __future__ import annotations

import math
import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampcore.calibration import DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, conversion_array
from clampcore.experiment import load_experiment
from clampcore.law import LAW_MODE, board_arrays, law_scale, law_to_counts
from clampcore.program import build_program
from firmware_protocol import boardlaw as bl
from firmware_protocol import codec, lawmsg
from firmware_protocol.cbinding import CoreLibrary, MemoryRig
from firmware_protocol.cboard import build_core_library, find_c_compiler
from firmware_protocol.fuzz import reference_deframe
from simulated_rig import board as rb

NO_CC = "no C compiler found (install cc/gcc/clang or set $CC): C core tests skipped"
HELLO = rb.board_hello()  # the rig's own board: 16-bit ±10 V converters, one in, one out
RATE_HZ = 10_000
WATCHDOG_US = 5_000
PERIOD_US = 1_000_000 // RATE_HZ
LIFETIME = 3  # samples a law may stay in force past its own sample

EXPERIMENT = {
    "loop": {"rate_hz": RATE_HZ, "max_current_pA": 400.0, "spike_threshold_mV": -50.0},
    "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},
    "element": [
        {"kind": "leak", "name": "leak", "g_nS": 5.0, "e_mV": -70.0},
        {"kind": "synapse", "name": "nmda", "g_max_nS": 1.0, "e_mV": 0.0, "tau_decay_ms": 50.0,
         "mg_mM": 1.0, "source": "poisson", "rate_hz": 50.0, "seed": 2},
        {"kind": "threshold_reset", "name": "tr", "threshold_mV": -40.0, "reset_mV": -65.0,
         "refractory_ms": 0.5, "g_nS": 60.0},
    ],
}  # fmt: skip
CONV = conversion_array(
    DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, load_experiment(EXPERIMENT).amplifier
)
SCALE = law_scale(CONV)
BF, BI, _, _, TABLE = board_arrays(build_program(load_experiment(EXPERIMENT)), CONV, LAW_MODE, 3)
RULES = lawmsg.rules_body(BF, BI)
TABLES = lawmsg.table_bodies(TABLE)
FAULT = int(BI[bl.BI_FAULT_COUNTS])


def adc_at(v_mV: float) -> int:
    """ADC count of a membrane potential (PROTOCOL.md §6, 100 mV/V, ±10 V, 16 bits)."""
    return int(np.clip(round((v_mV / 100.0 + 10.0) / 20.0 * 65535), 0, 65535))


def law_bits(a_pA: float, g_nS: float, ab_pA: float = 0.0, gb_nS: float = 0.0) -> np.ndarray:
    """The host's law in counts (clampcore.law.law_to_counts) as float32 bits."""
    out = np.zeros(4, dtype=np.float64)
    law_to_counts(SCALE, a_pA, g_nS, ab_pA, gb_nS, out)
    return out.astype(np.float32).view(np.uint32)


def laws_body(first: int, laws: list[np.ndarray], blocked: bool, seen: int = 0) -> bytes:
    """LAWS body (lawmsg.decode_laws's layout): seen, first, count, blocked, the words."""
    words = 4 if blocked else 2
    body = struct.pack("<IIBB", seen, first & 0xFFFFFFFF, len(laws), int(blocked))
    return body + b"".join(struct.pack(f"<{words}I", *w[:words]) for w in laws)


class RigLaw:
    """The simulated rig's law-mode board with the cell replaced by given ADC counts."""

    def __init__(self) -> None:
        self.st = np.zeros(rb.N_ST, dtype=np.int64)
        self.st[rb.S_DAC_MAX] = (1 << HELLO.dac_bits) - 1
        self.lb = rb.new_law_board()
        self.ts = np.zeros(2, dtype=np.int64)
        self.body = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
        self.tx = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
        self.out = bytearray()
        self.last_rx_us = 0
        self.dac = -1

    def _status(self, ack: int, result: int) -> None:
        n = rb.encode_status(self.st, ack, result, self.body, self.tx)
        self.out += self.tx[:n].tobytes()

    def _reply(self, ack: int, result: int) -> None:  # Board._reply
        if result != codec.RESULT_OK:
            self.st[rb.S_REJECTED] += 1
            self.st[rb.S_FLAGS] |= codec.STATUS_RX_ERROR
        self._status(ack, result)

    def _unknown(self) -> None:
        self.st[rb.S_UNKNOWN] += 1
        self.st[rb.S_FLAGS] |= codec.STATUS_RX_ERROR

    def feed(self, payload: bytes, now_us: int) -> None:
        st, lb = self.st, self.lb
        typ, seq = payload[0], payload[1] | payload[2] << 8
        body = payload[3:-2]
        if typ == lawmsg.MSG_LAWS:
            frame = np.frombuffer(payload, dtype=np.uint8).copy()
            unknown = st[rb.S_UNKNOWN]
            rb._on_laws(frame, frame.size, st, lb, self.ts)
            if st[rb.S_UNKNOWN] == unknown and st[rb.S_STATE] == codec.STATE_RUNNING:
                self.last_rx_us = now_us  # the rig restarts the watchdog on its own clock
        elif typ == lawmsg.MSG_ZERO and len(body) == 1:
            lb.bs[bl.BS_HOLD_ZERO] = 1 if body[0] != 0 else 0
        elif typ in (lawmsg.MSG_BOARD_RULES, lawmsg.MSG_BLOCK_TABLE):  # Board._on_law_setup
            if st[rb.S_STATE] != codec.STATE_READY:
                self._reply(seq, codec.RESULT_BAD_STATE)
                return
            try:
                if typ == lawmsg.MSG_BOARD_RULES:
                    lawmsg.parse_rules(body, lb.bf, lb.bi)
                    lb.bi[bl.BI_DAC_TOP] = st[rb.S_DAC_MAX]
                    lb.bi[bl.BI_FAULT_COUNTS] = st[rb.S_FAULT_COUNTS]
                    st[rb.S_LAW_MODE] = 1
                else:
                    lawmsg.parse_table(body, lb.table)
            except ValueError:
                self._unknown()
                return
            self._reply(seq, codec.RESULT_OK)
        elif typ == codec.MSG_CONFIGURE:  # Board._on_configure, a valid CONFIGURE in READY
            _, cfg = codec.parse_payload(payload)
            st[rb.S_RATE_HZ] = cfg.rate_hz
            st[rb.S_N_INPUTS] = cfg.n_inputs
            st[rb.S_WATCHDOG_US] = cfg.watchdog_us
            st[rb.S_FAULT_COUNTS] = cfg.fault_counts[0]
            st[rb.S_STATE] = codec.STATE_READY
            st[rb.S_HAVE_CMD] = 0
            st[rb.S_TRIPPED] = 0
            st[rb.S_LAW_MODE] = 0
            lb.qdue[:] = -1
            self._reply(seq, codec.RESULT_OK)
        elif typ == codec.MSG_START:  # Board._on_start
            for i in (rb.S_UNKNOWN, rb.S_REJECTED, rb.S_TRIPS, rb.S_APPLIED, rb.S_COUNTER,
                      rb.S_HAVE_CMD, rb.S_TRIPPED, rb.S_FLAGS, rb.S_LAWS_LATE, rb.S_LAWS_AHEAD):
                st[i] = 0  # fmt: skip
            lb.bs[:] = bl.new_board_arrays()[2]
            st[rb.S_CMD_COUNTS] = st[rb.S_FAULT_COUNTS]
            st[rb.S_STATE] = codec.STATE_RUNNING
            self._reply(seq, codec.RESULT_OK)
            self.last_rx_us = now_us
        elif typ == codec.MSG_GET_STATUS:
            self._status(seq, codec.RESULT_OK)
        else:
            raise AssertionError(f"the model does not know message 0x{typ:02X}")

    def tick(self, adc: int, now_us: int) -> None:
        """simulated_rig.board._tick: the watchdog, then its law-mode branch."""
        st, lb = self.st, self.lb
        k = st[rb.S_COUNTER]
        if st[rb.S_TRIPPED] == 0 and now_us - self.last_rx_us >= st[rb.S_WATCHDOG_US]:
            st[rb.S_TRIPPED] = 1
            st[rb.S_TRIPS] += 1
            self._status(0, codec.RESULT_REPORT)
        slot = k & (rb.LAW_QUEUE - 1)
        if lb.qdue[slot] == k:
            bl.board_set_law(lb.bs, lb.law, lb.qlaw[slot], k)
            lb.qdue[slot] = -1
        packed = bl.board_eval(adc, k, lb.bf, lb.bi, lb.bs, lb.law, lb.table)
        out_flags = packed >> 16
        if st[rb.S_TRIPPED] != 0:
            out_flags |= bl.BF_FLAG_FAULT
        st[rb.S_CMD_COUNTS] = packed & 0xFFFF
        st[rb.S_HAVE_CMD] = 0 if out_flags & bl.BF_FLAG_FAULT else 1
        self.dac = int(st[rb.S_FAULT_COUNTS] if st[rb.S_TRIPPED] != 0 else st[rb.S_CMD_COUNTS])
        status = rb._sticky(st) | st[rb.S_FLAGS]
        st[rb.S_FLAGS] = 0
        one = np.array([adc, self.dac, out_flags], dtype=np.int64)
        n = lawmsg.encode_samples(
            st[rb.S_TX_SEQ], k, now_us, status, 1, one[0:1], one[1:2], one[2:3], self.tx
        )
        st[rb.S_TX_SEQ] = (st[rb.S_TX_SEQ] + 1) & 0xFFFF
        self.out += self.tx[:n].tobytes()
        st[rb.S_COUNTER] = k + 1

    def take(self) -> bytes:
        data, self.out = bytes(self.out), bytearray()
        return data


class Pair:
    """The C core and the rig's model, fed the same frames, clock and ADC counts."""

    def __init__(self, core: CoreLibrary) -> None:
        self.c = core.rig(HELLO)
        self.ref = RigLaw()
        self.seq = 0
        self.now_us = 0

    def send(self, msg_type: int, body: bytes) -> bytes:
        """One frame to both; returns what the C core sent (checked equal to the rig's)."""
        self.seq += 1
        return self.send_wire(lawmsg.frame_bytes(msg_type, self.seq, body))

    def send_message(self, message: codec.Message) -> bytes:
        self.seq += 1
        return self.send_wire(codec.encode_message(message, self.seq))

    def send_wire(self, wire: bytes) -> bytes:
        self.c.set_clock(self.now_us)
        self.c.feed(wire)
        self.ref.feed(codec.decode_wire(wire[:-1]), self.now_us)
        return self._same()

    def tick(self, adc: int) -> bytes:
        self.now_us += PERIOD_US
        self.c.set_clock(self.now_us)
        self.c.set_adc(0, adc)
        writes = self.c.dac_writes()
        self.c.tick()
        self.ref.tick(adc, self.now_us)
        out = self._same()
        assert self.c.dac_writes() == writes + 1  # one DAC write per tick, in the tick
        assert self.c.dac(0) == self.ref.dac
        return out

    def wait(self, us: int) -> None:
        self.now_us += us

    def _same(self) -> bytes:
        c_out, ref_out = self.c.take_tx(), self.ref.take()
        assert c_out == ref_out
        return c_out

    def setup(self, laws_in_ready: list[np.ndarray] | None = None, blocked: bool = True) -> None:
        self.send_message(codec.Configure(RATE_HZ, 1, WATCHDOG_US, (FAULT,)))
        self.send(lawmsg.MSG_BOARD_RULES, RULES)
        for body in TABLES:
            self.send(lawmsg.MSG_BLOCK_TABLE, body)
        if laws_in_ready:
            self.send(lawmsg.MSG_LAWS, laws_body(0, laws_in_ready, blocked))
        self.send_message(codec.Start())
        assert self.c.law_mode()


def _samples(data: bytes) -> list[tuple[int, int, int, int, int]]:
    """(first, status, adc, dac, flags) of every SAMPLES frame, by the reference deframer."""
    payloads, bad = reference_deframe(data)
    assert bad == 0
    out = []
    fields = np.zeros(lawmsg.N_FIELDS, dtype=np.int64)
    adc, dac, flags = (np.zeros(lawmsg.MAX_SAMPLES, dtype=np.int64) for _ in range(3))
    for p in payloads:
        frame = np.frombuffer(p, dtype=np.uint8)
        if lawmsg.decode_samples(frame, frame.size, fields, adc, dac, flags) == 1:
            first, status = int(fields[lawmsg.SAMPLES_FIRST]), int(fields[lawmsg.SAMPLES_STATUS])
            out.append((first, status, int(adc[0]), int(dac[0]), int(flags[0])))
    return out


@pytest.fixture(scope="module")
def core(tmp_path_factory: pytest.TempPathFactory) -> CoreLibrary:
    if find_c_compiler() is None:
        pytest.skip(NO_CC)
    return CoreLibrary(build_core_library(tmp_path_factory.mktemp("ccb_law")))


# ------------------------------------------------------------------ the same bytes ---
def _sweep() -> list[tuple[str, object]]:
    """A hand-made run: every rule of PROTOCOL.md §10.3 is exercised at least once."""
    rest, thr = adc_at(-70.0), adc_at(-45.0)  # -45 mV: above spike detection (-50 mV)
    events: list[tuple[str, object]] = []
    laws = [law_bits(0.0, 5.0, 20.0, 1.0) for _ in range(10)]  # leak to 0 mV plus NMDA
    events += [("tick", rest), ("tick", adc_at(-60.0)), ("tick", thr), ("tick", adc_at(-55.0))]
    events += [("tick", adc_at(-62.0))]  # re-armed below -60 mV (hysteresis 10 mV)
    events += [("tick", adc_at(-35.0))]  # threshold_reset (-40 mV): reset law for 5 samples
    events += [("tick", adc_at(-30.0)), ("tick", rest), ("tick", rest), ("tick", rest)]
    # Laws 10..19: a huge current (limited), a non-finite one, and a plain current.
    laws2 = [law_bits(5000.0, 0.0), law_bits(-5000.0, 0.0), law_bits(math.inf, 0.0)]
    laws2 += [law_bits(100.0 * i, 0.0) for i in range(7)]
    events += [("laws", (10, laws2, False))]
    events += [("tick", rest) for _ in range(4)]
    events += [("tick", adc_at(250.0)), ("tick", adc_at(-250.0))]  # implausible V
    events += [("zero", True), ("tick", rest), ("zero", False), ("tick", rest)]
    events += [("tick", rest) for _ in range(9)]  # 18..26: no law after 19; lifetime 3
    return [("ready_laws", laws), *events]


def _play(pair: Pair, events: list[tuple[str, object]]) -> bytes:
    sent = b""
    ready = [e for e in events if e[0] == "ready_laws"]
    pair.setup(ready[0][1] if ready else None)
    for kind, arg in events:
        if kind == "laws":
            first, laws, blocked = arg
            sent += pair.send(lawmsg.MSG_LAWS, laws_body(first, laws, blocked))
        elif kind != "ready_laws":
            sent += _play_one(pair, kind, arg)
    return sent


def test_a_law_mode_run_gives_the_rigs_bytes_and_dac_counts(core: CoreLibrary) -> None:
    pair = Pair(core)
    sent = _play(pair, _sweep())
    samples = _samples(sent)
    flags = [s[4] for s in samples]
    assert len(samples) == 27
    # Every flag of PROTOCOL.md §10.3 was raised at least once: the comparison covered it.
    for bit in (1 << b for b in range(8)):
        assert any(f & bit for f in flags), f"flag 0x{bit:02X} never raised"
    # The reset law is applied for tr_samples = 0.5 ms / 0.1 ms = 5 samples (5 .. 9).
    assert [i for i, f in enumerate(flags[:14]) if f & bl.BF_FLAG_RESET] == [5, 6, 7, 8, 9]
    # Without a law after sample 19: samples 20..22 keep it (lifetime 3), then STALE.
    assert [bool(f & bl.BF_FLAG_STALE) for f in flags[20:]] == [False] * 3 + [True] * 4


_law_values = st.one_of(
    st.tuples(
        st.floats(-3000, 3000), st.floats(0, 60), st.floats(-500, 500), st.floats(0, 10)
    ).map(lambda t: law_bits(*t)),
    # any float32 at all, NaN and infinities included: the guards must agree too
    st.lists(st.floats(width=32), min_size=4, max_size=4).map(
        lambda x: np.array(x, dtype=np.float32).view(np.uint32)
    ),
)
_adc = st.one_of(st.integers(0, 65535), st.integers(adc_at(-80.0), adc_at(-30.0)))
_events = st.lists(
    st.one_of(
        st.tuples(st.just("tick"), _adc),
        st.tuples(st.just("tick"), _adc),
        st.tuples(
            st.just("laws_rel"),
            st.tuples(st.integers(-6, 1030), st.lists(_law_values, min_size=1, max_size=14),
                      st.booleans()),
        ),  # fmt: skip
        st.tuples(st.just("zero"), st.booleans()),
        st.tuples(st.just("wait"), st.integers(0, 2 * WATCHDOG_US)),
    ),
    max_size=60,
)


@settings(derandomize=True, deadline=None, max_examples=120)
@given(events=_events)
def test_any_run_gives_the_rigs_bytes_and_dac_counts(core: CoreLibrary, events: list) -> None:
    """Arbitrary laws (late, queued, beyond the queue, non-finite), counts, zero requests
    and silences long enough to trip the watchdog: the C core sends what the rig sends."""
    pair = Pair(core)
    pair.setup([law_bits(0.0, 5.0)] * 3)
    for kind, arg in events:
        if kind == "laws_rel":
            offset, laws, blocked = arg
            first = max(0, int(pair.ref.st[rb.S_COUNTER]) + offset)
            pair.send(lawmsg.MSG_LAWS, laws_body(first, laws, blocked))
        else:
            _play_one(pair, kind, arg)
    assert pair.c.law_counts() == (pair.ref.st[rb.S_LAWS_LATE], pair.ref.st[rb.S_LAWS_AHEAD])


def _play_one(pair: Pair, kind: str, arg: object) -> bytes:
    if kind == "tick":
        return pair.tick(int(arg))
    if kind == "zero":
        return pair.send(lawmsg.MSG_ZERO, lawmsg.ZERO_ON if arg else lawmsg.ZERO_OFF)
    pair.wait(int(arg))
    return b""
