"""The C board core's law mode (PROTOCOL.md §10) against a reference board written here.

The C core (``firmware_protocol/c/``, through ctypes on the in-memory port) and a
reference board written here from PROTOCOL.md §5 and §10 (``ReferenceBoard``: plain
Python around the host's numba mirror of the per-sample arithmetic,
``boardlaw.board_set_law`` and ``board_eval``, and the host's encoders ``lawmsg`` and
``codec``) are fed the same frames, clock and ADC counts, and must send byte-identical
frames and write identical DAC counts. The simulated rig runs this same C core
(``simulated_rig.ccore``), so these checks cover the rig's board too. The board's
parameters come from the host's own ``clampcore.law.board_arrays`` for a real
experiment (limit, implausible-V guard, spike detection, threshold_reset, an Mg-blocked
synapse's table).
"""

from __future__ import annotations

import json
import math
import struct
from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import boardlaw as bl
from clampcore.firmware_protocol import codec, lawmsg
from clampcore.firmware_protocol.cbinding import CoreLibrary
from clampcore.firmware_protocol.cboard import (
    BUILD_VARIANTS,
    C_SOURCE_DIR,
    build_core_library,
)
from clampcore.firmware_protocol.fuzz import reference_deframe
from clampcore.simulated_rig.board import board_hello
from hypothesis import given, settings
from hypothesis import strategies as st

from clampcore.calibration import DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, conversion_array
from clampcore.experiment import load_experiment
from clampcore.law import LAW_MODE, board_arrays, law_scale, law_to_counts
from clampcore.program import build_program

HELLO = board_hello()  # the rig's own board: 16-bit ±10 V converters, one in, one out
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
CONV = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, load_experiment(EXPERIMENT).amplifier)
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


# ccb.h's defaults, which the rig's library is built with (simulated_rig.ccore).
LAW_QUEUE = 1024
BLOCK_POINTS = 1025
RULES_QUEUE = 4


class ReferenceBoard:
    """A law-mode board written from PROTOCOL.md §5 and §10 in plain Python: the per-sample
    arithmetic is the host's numba mirror (``boardlaw.board_set_law``, ``board_eval``), the
    messages are the host's codec (``lawmsg``, ``codec``); the cell is replaced by given
    ADC counts. It knows the messages a law-mode run uses."""

    def __init__(self) -> None:
        self.bf, self.bi, self.bs, self.law, _ = bl.new_board_arrays()
        self.table = np.zeros(BLOCK_POINTS, dtype=np.float32)
        self.queue: dict[int, tuple[int, np.ndarray]] = {}  # slot -> (sample, law)
        # RULES_AT held until their sample, in arrival order: (sample, bf, bi)
        self.rules_at: list[tuple[int, np.ndarray, np.ndarray]] = []
        self.state = codec.STATE_UNCONFIGURED
        self.rate_hz = self.n_inputs = self.watchdog_us = self.fault = 0
        self.have_cmd = self.tripped = self.flags = self.law_mode = 0
        self.counter = self.tx_seq = 0
        self.unknown = self.rejected = self.trips = self.applied = 0
        self.laws_late = self.laws_ahead = 0
        self.out = bytearray()
        self.last_rx_us = 0
        self.dac = -1

    def _sticky(self) -> int:
        s = 0
        if self.state != codec.STATE_UNCONFIGURED and (not self.have_cmd or self.tripped):
            s |= codec.STATUS_FAULT_OUTPUT
        if self.tripped:
            s |= codec.STATUS_WATCHDOG
        return s

    def _status(self, ack: int, result: int) -> None:
        status = codec.Status(
            state=self.state, status=self._sticky(), ack_seq=ack, result=result,
            counter=self.counter, bad_frames=0, unknown_messages=self.unknown,
            rejected=self.rejected, late_commands=0, missing_commands=0,
            watchdog_trips=self.trips, commands_applied=self.applied, rate_hz=self.rate_hz,
            n_inputs=self.n_inputs, watchdog_us=self.watchdog_us,
        )  # fmt: skip
        self.out += codec.encode_message(status, self.tx_seq)
        self.tx_seq = (self.tx_seq + 1) & 0xFFFF

    def _reply(self, ack: int, result: int) -> None:
        if result != codec.RESULT_OK:
            self.rejected += 1
            self.flags |= codec.STATUS_RX_ERROR
        self._status(ack, result)

    def _unknown(self) -> None:
        self.unknown += 1
        self.flags |= codec.STATUS_RX_ERROR

    def _on_laws(self, payload: bytes, now_us: int) -> None:
        """§10.4: each law to its sample's slot; late and too-early ones counted."""
        frame = np.frombuffer(payload, dtype=np.uint8).copy()
        fields = np.zeros(lawmsg.N_FIELDS, dtype=np.int64)
        count = lawmsg.decode_laws(frame, frame.size, fields)
        if count < 0 or self.state == codec.STATE_UNCONFIGURED:
            self._unknown()
            return
        blocked = bool(fields[lawmsg.LAWS_BLOCKED])
        running = self.state == codec.STATE_RUNNING
        taken = self.counter if running else 0
        for i in range(count):
            sample = int(fields[lawmsg.LAWS_FIRST]) + i
            if sample < taken:
                self.laws_late += 1
                self.flags |= codec.STATUS_LATE
            elif sample - taken >= LAW_QUEUE:
                self.laws_ahead += 1
                self.flags |= codec.STATUS_RX_ERROR
            else:
                words = [lawmsg.law_word(frame, blocked, i, j) for j in range(4 if blocked else 2)]
                law = np.array(words + [0] * (4 - len(words)), dtype=np.uint32).view(np.float32)
                self.queue[sample % LAW_QUEUE] = (sample, law)
        self.applied += count
        if running:
            self.last_rx_us = now_us  # restarts the watchdog and lifts a trip
            self.tripped = 0

    def _on_rules_at(self, body: bytes) -> None:
        """§10.4 RULES_AT: the sample (u32), then a BOARD_RULES body; held until that
        sample's tick. Malformed (length, block_shift outside -1..16): unknown. Not running
        in law mode, another block_shift than the table's, or RULES_QUEUE held: rejected.
        For a sample already taken: late (counted with the late laws), applied next tick."""
        bf, bi = self.bf.copy(), self.bi.copy()  # DAC top and fault count are not sent
        try:
            lawmsg.parse_rules(body[4:], bf, bi)
        except ValueError:
            self._unknown()
            return
        shift = int(bi[bl.BI_BLOCK_SHIFT])
        if len(body) != lawmsg.RULES_AT_BODY or not -1 <= shift <= 16:
            self._unknown()
            return
        if (
            self.state != codec.STATE_RUNNING
            or not self.law_mode
            or shift != self.bi[bl.BI_BLOCK_SHIFT]
            or len(self.rules_at) >= RULES_QUEUE
        ):
            self.rejected += 1
            self.flags |= codec.STATUS_RX_ERROR
            return
        (at,) = struct.unpack_from("<I", body)
        if at < self.counter:
            self.laws_late += 1
            self.flags |= codec.STATUS_LATE
        self.rules_at.append((at, bf, bi))

    def feed(self, payload: bytes, now_us: int) -> None:
        typ, seq = payload[0], payload[1] | payload[2] << 8
        body = payload[3:-2]
        running = self.state == codec.STATE_RUNNING
        if typ == lawmsg.MSG_LAWS:
            self._on_laws(payload, now_us)
        elif typ == lawmsg.MSG_ZERO and len(body) == 1:
            self.bs[bl.BS_HOLD_ZERO] = 1 if body[0] != 0 else 0  # on arrival
        elif typ == lawmsg.MSG_RULES_AT:
            self._on_rules_at(body)
        elif typ in (lawmsg.MSG_BOARD_RULES, lawmsg.MSG_BLOCK_TABLE):  # READY only
            if self.state != codec.STATE_READY:
                self._reply(seq, codec.RESULT_BAD_STATE)
                return
            try:
                if typ == lawmsg.MSG_BOARD_RULES:
                    lawmsg.parse_rules(body, self.bf, self.bi)
                    self.bi[bl.BI_DAC_TOP] = (1 << HELLO.dac_bits) - 1
                    self.bi[bl.BI_FAULT_COUNTS] = self.fault
                    self.law_mode = 1
                else:
                    lawmsg.parse_table(body, self.table)
            except ValueError:
                self._unknown()
                return
            self._reply(seq, codec.RESULT_OK)
        elif typ == codec.MSG_CONFIGURE:  # a valid CONFIGURE in READY (all this test sends)
            _, cfg = codec.parse_payload(payload)
            self.rate_hz, self.n_inputs = cfg.rate_hz, cfg.n_inputs
            self.watchdog_us, self.fault = cfg.watchdog_us, cfg.fault_counts[0]
            self.state = codec.STATE_READY
            self.have_cmd = self.tripped = self.law_mode = 0
            self.queue.clear()
            self.rules_at.clear()
            self._reply(seq, codec.RESULT_OK)
        elif typ == codec.MSG_START:  # counters cover one run; laws queued in READY stay
            self.unknown = self.rejected = self.trips = self.applied = 0
            self.counter = self.have_cmd = self.tripped = self.flags = 0
            self.laws_late = self.laws_ahead = 0
            self.bs[:] = bl.new_board_arrays()[2]
            self.rules_at.clear()  # a change of the last run never acts in this one
            self.state = codec.STATE_RUNNING
            self._reply(seq, codec.RESULT_OK)
            self.last_rx_us = now_us
        elif typ == codec.MSG_KEEPALIVE:  # restarts the watchdog, lifts no trip (§5.3)
            if running:
                self.last_rx_us = now_us
        elif typ == codec.MSG_GET_STATUS:
            self._status(seq, codec.RESULT_OK)
        else:
            raise AssertionError(f"the model does not know message 0x{typ:02X}")

    def tick(self, adc: int, now_us: int) -> None:
        """One sample: the watchdog (§5.3), the law queued for it, the law at this count."""
        k = self.counter
        if not self.tripped and now_us - self.last_rx_us >= self.watchdog_us:
            self.tripped = 1
            self.trips += 1
            self._status(0, codec.RESULT_REPORT)
        while self.rules_at and self.rules_at[0][0] <= k:  # changes due at or before k
            _, self.bf, self.bi = self.rules_at.pop(0)
        due, law = self.queue.get(k % LAW_QUEUE, (-1, None))
        if due == k:
            bl.board_set_law(self.bs, self.law, law, k)
            del self.queue[k % LAW_QUEUE]
        packed = bl.board_eval(adc, k, self.bf, self.bi, self.bs, self.law, self.table)
        out_flags = packed >> 16
        if self.tripped:  # the link watchdog overrides every law
            out_flags |= bl.BF_FLAG_FAULT
        self.have_cmd = 0 if out_flags & bl.BF_FLAG_FAULT else 1
        self.dac = int(self.fault if self.tripped else packed & 0xFFFF)
        status = self._sticky() | self.flags
        self.flags = 0
        one = np.array([adc, self.dac, out_flags], dtype=np.int64)
        tx = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
        n = lawmsg.encode_samples(self.tx_seq, k, now_us, status, one[0:1], one[1:2],
                                  one[2:3], tx)  # fmt: skip
        self.tx_seq = (self.tx_seq + 1) & 0xFFFF
        self.out += tx[:n].tobytes()
        self.counter = k + 1

    def take(self) -> bytes:
        data, self.out = bytes(self.out), bytearray()
        return data


class Pair:
    """The C core and the reference board, fed the same frames, clock and ADC counts."""

    def __init__(self, core: CoreLibrary) -> None:
        self.c = core.rig(HELLO)
        self.ref = ReferenceBoard()
        self.seq = 0
        self.now_us = 0

    def send(self, msg_type: int, body: bytes) -> bytes:
        """One frame to both; returns what the C core sent (checked equal to the reference's)."""
        self.seq += 1
        return self.send_wire(lawmsg.frame_bytes(msg_type, self.seq, body))

    def send_laws(self, first: int, laws: list[np.ndarray], blocked: bool) -> bytes:
        """LAWS frames for samples first.., as many laws to a frame as fit."""
        most = lawmsg.MAX_LAWS_BLOCKED if blocked else lawmsg.MAX_LAWS
        sent = b""
        for i in range(0, len(laws), most):
            sent += self.send(lawmsg.MSG_LAWS, laws_body(first + i, laws[i : i + most], blocked))
        return sent

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
            self.send_laws(0, laws_in_ready, blocked)
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


def test_a_law_mode_run_gives_the_reference_bytes_and_dac_counts(core: CoreLibrary) -> None:
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
    st.tuples(st.floats(-3000, 3000), st.floats(0, 60), st.floats(-500, 500), st.floats(0, 10)).map(
        lambda t: law_bits(*t)
    ),
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
            st.tuples(
                # late, due soon, near the queue's end and beyond it (1024 samples)
                st.one_of(st.integers(-6, -1), st.integers(0, 30), st.integers(1018, 1030)),
                st.lists(_law_values, min_size=1, max_size=14),
                st.booleans(),
            ),
        ),
        st.tuples(st.just("zero"), st.booleans()),
        st.tuples(st.just("wait"), st.integers(0, 2 * WATCHDOG_US)),
        # a live rule change: late, due, ahead (held, or refused when 4 are held)
        st.tuples(st.just("rules_rel"), st.tuples(st.integers(-4, 12), st.sampled_from([0, 1]))),
    ),
    min_size=20,
    max_size=80,
)


@settings(derandomize=True, deadline=None, max_examples=120)
@given(events=_events)
def test_any_run_gives_the_reference_bytes_and_dac_counts(core: CoreLibrary, events: list) -> None:
    """Arbitrary laws (late, queued, beyond the queue, non-finite), counts, zero requests
    and silences long enough to trip the watchdog: the C core sends what the reference sends."""
    pair = Pair(core)
    pair.setup([law_bits(0.0, 5.0)] * 3)
    for kind, arg in events:
        if kind == "laws_rel":
            offset, laws, blocked = arg
            first = max(0, pair.ref.counter + offset)
            pair.send(lawmsg.MSG_LAWS, laws_body(first, laws, blocked))
        elif kind == "rules_rel":
            offset, which = arg
            at = max(0, pair.ref.counter + offset)
            pair.send(lawmsg.MSG_RULES_AT, struct.pack("<I", at) + _RULE_CHANGES[which])
        else:
            _play_one(pair, kind, arg)
    assert pair.c.law_counts() == (pair.ref.laws_late, pair.ref.laws_ahead)


def _play_one(pair: Pair, kind: str, arg: object) -> bytes:
    if kind == "tick":
        return pair.tick(int(arg))
    if kind == "zero":
        return pair.send(lawmsg.MSG_ZERO, lawmsg.ZERO_ON if arg else lawmsg.ZERO_OFF)
    pair.wait(int(arg))
    return b""


def _rules_at(at: int, **loop: object) -> bytes:
    """RULES_AT body: the sample, then the host's board rules for EXPERIMENT with ``loop``
    fields changed (``clampcore.law.board_arrays``, as the host's live change makes them)."""
    exp = load_experiment(EXPERIMENT)
    exp.loop.update(loop)
    bf, bi, *_ = board_arrays(build_program(exp), CONV, LAW_MODE, LIFETIME)
    return struct.pack("<I", at) + lawmsg.rules_body(bf, bi)


def _dac_for(i_pA: float) -> int:
    """PROTOCOL.md §6: the DAC count of a current through 400 pA/V and a ±10 V, 16-bit DAC,
    floor(x + 1/2) of x = (V + 10 V)/20 V · 65535."""
    return math.floor((i_pA / 400.0 + 10.0) / 20.0 * 65535 + 0.5)


# Two rule changes for the random runs: a lower limit with spike detection moved, and the
# threshold_reset at another threshold and conductance.
_RULE_CHANGES = [
    _rules_at(0, max_current_pA=150.0, spike_threshold_mV=-60.0)[4:],
    lawmsg.rules_body(*board_arrays(build_program({**EXPERIMENT, "element": [
        *EXPERIMENT["element"][:2],
        {**EXPERIMENT["element"][2], "threshold_mV": -55.0, "g_nS": 30.0},
    ]}), CONV, LAW_MODE, LIFETIME)[:2]),
]  # fmt: skip


def test_a_rule_change_acts_from_its_sample(core: CoreLibrary) -> None:
    """PROTOCOL.md §10.4 RULES_AT: a lower current limit named for sample 5 clips from
    sample 5 on, not before; the C core and the reference board send the same bytes."""
    pair = Pair(core)
    pair.setup([law_bits(1000.0, 0.0)] * 12, blocked=False)  # 1000 pA: beyond either limit
    rest = adc_at(-70.0)
    sent = pair.tick(rest)
    sent += pair.send(lawmsg.MSG_RULES_AT, _rules_at(5, max_current_pA=200.0))
    assert sent.count(b"\x00") == 1  # RULES_AT has no reply
    for _ in range(9):
        sent += pair.tick(rest)
    dacs = [s[3] for s in _samples(sent)]
    assert dacs == [_dac_for(400.0)] * 5 + [_dac_for(200.0)] * 5  # 36044, then 34406
    assert all(s[4] & bl.BF_FLAG_LIMITED for s in _samples(sent))


def test_late_full_and_misplaced_rule_changes(core: CoreLibrary) -> None:
    """A change for a sample already taken acts at the next tick, counted with the late laws
    and flagged LATE; beyond the board's holding queue, in READY, or with another block
    table shift it is rejected; a wrong length is unknown (PROTOCOL.md §10.4, §5.5)."""
    pair = Pair(core)
    pair.setup([law_bits(1000.0, 0.0)] * 20, blocked=False)
    rest = adc_at(-70.0)
    for _ in range(3):
        pair.tick(rest)
    pair.send(lawmsg.MSG_RULES_AT, _rules_at(1, max_current_pA=300.0))
    (_, status, _, dac, _) = _samples(pair.tick(rest))[0]
    assert dac == _dac_for(300.0) and status & codec.STATUS_LATE
    assert pair.c.law_counts()[0] == 1
    for at in range(10, 16):  # a queue of 4 (ccb.h CCB_RULES_QUEUE): the last two refused
        pair.send(lawmsg.MSG_RULES_AT, _rules_at(at, max_current_pA=250.0))
    status_of = pair.send_message(codec.GetStatus())
    (_, reply), *_ = [codec.parse_payload(p) for p in reference_deframe(status_of)[0]]
    assert reply.rejected == 2
    pair.send(lawmsg.MSG_RULES_AT, _rules_at(30)[:-1])  # one byte short
    bad_shift = bytearray(_rules_at(30))
    bad_shift[4 + 44 : 4 + 48] = struct.pack("<i", -1)  # block_shift: no table
    pair.send(lawmsg.MSG_RULES_AT, bytes(bad_shift))
    c = pair.c  # STOP and READY on the C core alone (the reference board runs one run)
    c.feed(codec.encode_message(codec.Stop(), 90))
    c.feed(lawmsg.frame_bytes(lawmsg.MSG_RULES_AT, 91, _rules_at(30)))  # READY: rejected
    c.take_tx()
    c.feed(codec.encode_message(codec.GetStatus(), 92))
    ((_, reply),) = [codec.parse_payload(p) for p in reference_deframe(c.take_tx())[0]]
    assert (reply.unknown_messages, reply.rejected) == (1, 4)


def test_a_batched_board_sends_the_same_samples_in_fewer_frames(
    core: CoreLibrary, tmp_path_factory: pytest.TempPathFactory
) -> None:
    """CCB_SAMPLES_PER_FRAME=8 (PROTOCOL.md §10.4): the same samples, DAC counts and flags
    as one sample to a frame, 8 to a SAMPLES frame, the rest sent before STOP's reply;
    HELLO says 8."""
    batched = CoreLibrary(
        build_core_library(tmp_path_factory.mktemp("b8"), BUILD_VARIANTS["batched"])
    )
    sent = {}
    for name, lib in (("one", core), ("eight", batched)):
        rig = lib.rig(HELLO)
        rig.feed(codec.encode_message(codec.GetHello(), 1))
        hello = codec.parse_payload(reference_deframe(rig.take_tx())[0][0])[1]
        assert hello.max_samples == (8 if name == "eight" else 1)
        for wire in _setup_wires():
            rig.feed(wire)
        laws = [law_bits(100.0 * i, 5.0) for i in range(20)]
        rig.feed(lawmsg.frame_bytes(lawmsg.MSG_LAWS, 50, laws_body(0, laws, False)))
        rig.feed(codec.encode_message(codec.Start(), 51))
        rig.take_tx()
        for k in range(20):
            rig.set_clock(PERIOD_US * (k + 1))
            rig.set_adc(0, adc_at(-70.0 + 2.0 * k))  # crosses spike detection at -50 mV
            rig.tick()
        rig.feed(codec.encode_message(codec.Stop(), 52))
        sent[name] = reference_deframe(rig.take_tx())[0]
    fields = np.zeros(lawmsg.N_FIELDS, dtype=np.int64)
    adc, dac, flags = (np.zeros(lawmsg.MAX_SAMPLES, dtype=np.int64) for _ in range(3))

    def samples(payloads: list[bytes]) -> tuple[list[int], list[tuple[int, int, int, int]]]:
        counts, rows = [], []
        for p in payloads:
            frame = np.frombuffer(p, dtype=np.uint8)
            n = lawmsg.decode_samples(frame, frame.size, fields, adc, dac, flags)
            if n > 0:
                counts.append(n)
                first = int(fields[lawmsg.SAMPLES_FIRST])
                rows += [(first + i, int(adc[i]), int(dac[i]), int(flags[i])) for i in range(n)]
        return counts, rows

    one, eight = samples(sent["one"]), samples(sent["eight"])
    assert one[0] == [1] * 20 and eight[0] == [8, 8, 4]
    assert eight[1] == one[1] and [r[0] for r in one[1]] == list(range(20))
    assert any(r[3] & bl.BF_FLAG_SPIKE for r in one[1])  # the comparison covered a spike


# ------------------------------------------------------------------ rules, one by one ---
def test_the_watchdog_in_law_mode(core: CoreLibrary) -> None:
    """PROTOCOL.md §5.3 in law mode: silence for the watchdog's time gives the fault value
    at once (STATUS report, FAULT flag, WATCHDOG bit); LAWS restart it and lift the trip."""
    pair = Pair(core)
    pair.setup([law_bits(100.0, 0.0)] * 200)
    rest = adc_at(-70.0)
    first = _samples(pair.tick(rest))[0]
    assert first[3] != FAULT and first[4] == 0  # 100 pA in force
    pair.wait(WATCHDOG_US)
    sent = pair.tick(rest)
    reports = [codec.parse_payload(p)[1] for p in reference_deframe(sent)[0][:1]]
    assert reports[0].result == codec.RESULT_REPORT and reports[0].watchdog_trips == 1
    (_, status, _, dac, flags) = _samples(sent)[0]
    assert dac == FAULT and flags & bl.BF_FLAG_FAULT
    assert status & codec.STATUS_WATCHDOG and status & codec.STATUS_FAULT_OUTPUT
    assert pair.c.dac(0) == FAULT
    # KEEPALIVE restarts the watchdog but does not lift a trip (§5.3): still the fault value.
    pair.send_message(codec.KeepAlive())
    (_, status, _, dac, flags) = _samples(pair.tick(rest))[0]
    assert dac == FAULT and status & codec.STATUS_WATCHDOG
    # LAWS lift it: the queued law is back in force at the next sample.
    pair.send(lawmsg.MSG_LAWS, laws_body(200, [law_bits(100.0, 0.0)], False))
    (k, status, _, dac, flags) = _samples(pair.tick(rest))[0]
    assert k == 3 and dac == first[3] and flags == 0
    assert status & (codec.STATUS_WATCHDOG | codec.STATUS_FAULT_OUTPUT) == 0
    assert pair.c.status().watchdog_trips == 1


def test_late_laws_and_laws_beyond_the_queue_are_counted_and_dropped(core: CoreLibrary) -> None:
    """PROTOCOL.md §10.4: a law for a sample already taken is late (counted, STATUS LATE
    bit, not applied); one CCB_LAW_QUEUE (1024) or more samples ahead does not fit (counted,
    RX_ERROR bit)."""
    pair = Pair(core)
    pair.setup([law_bits(100.0, 0.0)] * 4)
    rest = adc_at(-70.0)
    for _ in range(4):
        pair.tick(rest)
    # Late: samples 2 and 3 are taken; 4 is the next one and is queued.
    pair.send(lawmsg.MSG_LAWS, laws_body(2, [law_bits(-100.0, 0.0)] * 3, False))
    (k, status, _, dac_4, flags) = _samples(pair.tick(rest))[0]
    assert (k, flags) == (4, 0) and status & codec.STATUS_LATE
    assert pair.c.law_counts() == (2, 0)
    # Beyond: the queue holds samples 5 .. 5 + 1023; 1028 fits, 1029 does not.
    pair.send(lawmsg.MSG_LAWS, laws_body(1028, [law_bits(-100.0, 0.0)] * 2, False))
    (_, status, _, dac_5, flags) = _samples(pair.tick(rest))[0]
    assert status & codec.STATUS_RX_ERROR and not status & codec.STATUS_LATE
    assert pair.c.law_counts() == (2, 1)
    assert dac_5 == dac_4 and flags == 0  # sample 4's law still in force (lifetime 3)
    # Counted by the reference alike; both count every law of a LAWS frame as applied.
    assert (pair.ref.laws_late, pair.ref.laws_ahead) == (2, 1)
    assert pair.c.status().commands_applied == 3 + 2  # this run's frames (START zeroes it)


def test_zero_acts_on_arrival_ahead_of_queued_laws_and_start_resets_it(
    core: CoreLibrary,
) -> None:
    pair = Pair(core)
    pair.setup([law_bits(100.0, 0.0)] * 10)
    rest = adc_at(-70.0)
    assert _samples(pair.tick(rest))[0][3] != FAULT
    pair.send(lawmsg.MSG_ZERO, lawmsg.ZERO_ON)
    (_, _, _, dac, flags) = _samples(pair.tick(rest))[0]
    assert dac == FAULT and flags == bl.BF_FLAG_FAULT | bl.BF_FLAG_ZERO
    # STOP, laws for the next run in READY, START: the zero request is off again and the
    # laws queued in READY for samples 0.. are in force.
    pair.c.feed(codec.encode_message(codec.Stop(), 90))
    pair.c.feed(lawmsg.frame_bytes(lawmsg.MSG_LAWS, 91, laws_body(0, [law_bits(50.0, 0.0)], False)))
    pair.c.feed(codec.encode_message(codec.Start(), 92))
    pair.c.set_adc(0, rest)
    pair.c.tick()
    (k, _, _, dac, flags) = _samples(pair.c.take_tx())[0]
    assert (k, flags) == (0, 0) and dac != FAULT


def test_stop_forgets_the_laws_of_the_run(core: CoreLibrary) -> None:
    """A law queued for a sample the run never reached must not act in the next run
    (PROTOCOL.md §10.6)."""
    rig = core.rig(HELLO)
    for wire in _setup_wires():
        rig.feed(wire)
    rig.feed(
        lawmsg.frame_bytes(lawmsg.MSG_LAWS, 50, laws_body(0, [law_bits(100.0, 0.0)] * 5, False))
    )
    rig.feed(codec.encode_message(codec.Start(), 51))
    rig.set_adc(0, adc_at(-70.0))
    rig.tick()
    rig.feed(codec.encode_message(codec.Stop(), 52))
    rig.feed(codec.encode_message(codec.Start(), 53))
    rig.take_tx()
    for _ in range(4):
        rig.tick()
    flags = [s[4] for s in _samples(rig.take_tx())]
    assert flags == [bl.BF_FLAG_FAULT | bl.BF_FLAG_STALE] * 4  # no law: 0 pA


def _setup_wires() -> list[bytes]:
    wires = [codec.encode_message(codec.Configure(RATE_HZ, 1, WATCHDOG_US, (FAULT,)), 1)]
    wires.append(lawmsg.frame_bytes(lawmsg.MSG_BOARD_RULES, 2, RULES))
    wires += [lawmsg.frame_bytes(lawmsg.MSG_BLOCK_TABLE, 3 + i, b) for i, b in enumerate(TABLES)]
    return wires


def _malformed() -> list[tuple[str, bytes]]:
    two_laws_one_sent = struct.pack("<IIBB", 0, 0, 2, 0) + b"\x00" * 8
    bad_shift = lawmsg.rules_body(BF, np.where(np.arange(bl.N_BI) == bl.BI_BLOCK_SHIFT, 17, BI))
    table_end = struct.pack("<HB", BLOCK_POINTS - 1, 2) + b"\x00" * 8
    return [
        ("rules_short", lawmsg.frame_bytes(lawmsg.MSG_BOARD_RULES, 7, RULES[:-1])),
        ("rules_block_shift_17", lawmsg.frame_bytes(lawmsg.MSG_BOARD_RULES, 7, bad_shift)),
        ("table_beyond_its_end", lawmsg.frame_bytes(lawmsg.MSG_BLOCK_TABLE, 7, table_end)),
        ("table_odd_length", lawmsg.frame_bytes(lawmsg.MSG_BLOCK_TABLE, 7, TABLES[0][:-1])),
        ("laws_odd_length", lawmsg.frame_bytes(lawmsg.MSG_LAWS, 7, laws_body(0, [], False)[:-1])),
        ("laws_count_too_high", lawmsg.frame_bytes(lawmsg.MSG_LAWS, 7, two_laws_one_sent)),
        ("zero_without_body", lawmsg.frame_bytes(lawmsg.MSG_ZERO, 7, b"")),
        ("zero_two_bytes", lawmsg.frame_bytes(lawmsg.MSG_ZERO, 7, b"\x01\x00")),
    ]  # fmt: skip


@pytest.mark.parametrize("name, wire", _malformed(), ids=[m[0] for m in _malformed()])
def test_malformed_law_messages_are_ignored_and_counted(
    core: CoreLibrary, name: str, wire: bytes
) -> None:
    """PROTOCOL.md §5.5: a body the board cannot use is an unknown message: ignored, counted,
    never acted on, no reply. (A block shift that would read beyond the board's table is
    one: the C core checks it.)"""
    rig = core.rig(HELLO)
    for w in _setup_wires()[:1]:
        rig.feed(w)
    rig.take_tx()
    writes = rig.dac_writes()
    rig.feed(wire)
    assert rig.take_tx() == b"" and rig.dac_writes() == writes
    st = rig.status()
    assert (st.unknown_messages, st.rejected, st.bad_frames) == (1, 0, 0)
    assert not rig.law_mode()


def test_law_setup_outside_ready_is_refused_and_laws_need_a_configured_board(
    core: CoreLibrary,
) -> None:
    rig = core.rig(HELLO)
    rig.feed(lawmsg.frame_bytes(lawmsg.MSG_LAWS, 1, laws_body(0, [law_bits(1.0, 0.0)], False)))
    assert rig.take_tx() == b"" and rig.status().unknown_messages == 1  # UNCONFIGURED
    rig.feed(lawmsg.frame_bytes(lawmsg.MSG_BOARD_RULES, 2, RULES))
    for wire in (codec.encode_message(codec.Configure(RATE_HZ, 1, WATCHDOG_US, (FAULT,)), 3),
                 codec.encode_message(codec.Start(), 4),
                 lawmsg.frame_bytes(lawmsg.MSG_BOARD_RULES, 5, RULES),
                 lawmsg.frame_bytes(lawmsg.MSG_BLOCK_TABLE, 6, TABLES[0])):  # fmt: skip
        rig.feed(wire)
    replies = [codec.parse_payload(p)[1] for p in reference_deframe(rig.take_tx())[0]]
    results = [(r.ack_seq, r.result) for r in replies if isinstance(r, codec.Status)]
    bad = codec.RESULT_BAD_STATE
    assert results == [(2, bad), (3, codec.RESULT_OK), (4, codec.RESULT_OK), (5, bad), (6, bad)]
    assert not rig.law_mode()


def test_without_board_rules_the_board_is_a_version_1_board(core: CoreLibrary) -> None:
    """No BOARD_RULES, or a CONFIGURE after them: SAMPLE messages and COMMANDs (§4, §5)."""
    rig = core.rig(HELLO)
    for wire in _setup_wires():
        rig.feed(wire)
    assert rig.law_mode()
    rig.feed(codec.encode_message(codec.Configure(RATE_HZ, 1, WATCHDOG_US, (FAULT,)), 10))
    assert not rig.law_mode()  # CONFIGURE leaves law mode until BOARD_RULES come again
    rig.feed(codec.encode_message(codec.Start(), 11))
    rig.set_adc(0, 1234)
    rig.tick()
    rig.feed(codec.encode_message(codec.Command(0, (40000,)), 12))
    rig.tick()
    msgs = [codec.parse_payload(p)[1] for p in reference_deframe(rig.take_tx())[0]]
    samples = [m for m in msgs if isinstance(m, codec.Sample)]
    assert [(s.counter, s.adc_counts, s.cmd_seq) for s in samples] == [(0, (1234,), 0),
                                                                      (1, (1234,), 12)]  # fmt: skip
    assert rig.dac(0) == 40000  # the COMMAND acted on arrival, as in version 1


def test_a_board_built_without_law_mode_ignores_the_law_messages(
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    """CCB_LAW_QUEUE=0: a version-1 board, which counts every law message as unknown and
    answers none (§5.5); the host then runs it in current mode."""
    lib = CoreLibrary(build_core_library(tmp_path_factory.mktemp("v1"), BUILD_VARIANTS["no-law"]))
    rig = lib.rig(HELLO)
    wires = _setup_wires()
    for wire in wires:
        rig.feed(wire)
    rig.feed(lawmsg.frame_bytes(lawmsg.MSG_ZERO, 9, lawmsg.ZERO_ON))
    replies = reference_deframe(rig.take_tx())[0]
    assert len(replies) == 1  # CONFIGURE's only
    assert rig.status().unknown_messages == len(wires) - 1 + 1
    assert not rig.law_mode()


def test_a_smaller_queue_holds_fewer_laws(tmp_path_factory: pytest.TempPathFactory) -> None:
    lib = CoreLibrary(build_core_library(tmp_path_factory.mktemp("q8"), ("-DCCB_LAW_QUEUE=8",)))
    rig = lib.rig(HELLO)
    for wire in _setup_wires():
        rig.feed(wire)
    rig.feed(lawmsg.frame_bytes(lawmsg.MSG_LAWS, 9, laws_body(0, [law_bits(0, 0)] * 10, True)))
    assert rig.law_counts() == (0, 2)  # samples 8 and 9 are 8 or more ahead of sample 0


@pytest.mark.parametrize("count", [1, 2, 5, lawmsg.MAX_SAMPLES])
def test_samples_encoder_equals_the_hosts(core: CoreLibrary, count: int) -> None:
    rng = np.random.default_rng(count)
    adc, dac = (rng.integers(0, 65536, count) for _ in range(2))
    flags = rng.integers(0, 256, count)
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    n = lawmsg.encode_samples(0xBEEF, 2**32 - 2, 123456789, 0x0F, adc, dac, flags, out)
    c = core.encode_samples(0xBEEF, 2**32 - 2, 123456789, 0x0F, adc, dac, flags)
    assert c == out[:n].tobytes()


# ------------------------------------------------------------------ shared vectors ---
LAW_VECTORS = json.loads((C_SOURCE_DIR.parent / "vectors" / "law_v2.json").read_text())
_RULE_FLOATS = ("limit_lo", "limit_hi", "tr_alpha", "tr_beta")
_RULE_INTS = ("adc_ok_lo", "adc_ok_hi", "spike_adc", "rearm_adc", "tr_adc", "tr_samples",
              "lifetime", "block_shift")  # fmt: skip


def _f32(hexbits: str) -> int:
    return int(hexbits, 16)


@pytest.mark.parametrize("case", LAW_VECTORS["cases"], ids=lambda c: c["name"])
def test_the_whole_core_reproduces_the_shared_vectors(core: CoreLibrary, case: dict) -> None:
    """vectors/law_v2.json through the messages: BOARD_RULES and BLOCK_TABLE from the
    case, each step's law queued by LAWS for its sample, ZERO when the request changes,
    one tick per step; every SAMPLES frame carries the vector's counts and flags, and the
    DAC holds them."""
    p = case["params"]
    assert p["dac_top"] == (1 << HELLO.dac_bits) - 1
    rules = struct.pack(
        "<4I8i", *(_f32(p[n]["f32"]) for n in _RULE_FLOATS), *(p[n] for n in _RULE_INTS)
    )
    rig = core.rig(HELLO)
    rig.feed(codec.encode_message(codec.Configure(RATE_HZ, 1, 60_000_000, (p["fault_counts"],)), 1))
    rig.feed(lawmsg.frame_bytes(lawmsg.MSG_BOARD_RULES, 2, rules))
    table = np.array([_f32(h) for h in case["table"]], dtype=np.uint32).view(np.float32)
    for i, body in enumerate(lawmsg.table_bodies(table)):
        rig.feed(lawmsg.frame_bytes(lawmsg.MSG_BLOCK_TABLE, 3 + i, body))
    for step in case["steps"]:
        if step.get("law"):
            words = [_f32(step["law"][n]["f32"]) for n in ("alpha", "beta", "alpha_b", "beta_b")]
            rig.feed(lawmsg.frame_bytes(lawmsg.MSG_LAWS, 100, laws_body(step["k"], [words], True)))
    rig.feed(codec.encode_message(codec.Start(), 101))
    replies = [codec.parse_payload(x)[1] for x in reference_deframe(rig.take_tx())[0]]
    assert {r.result for r in replies} == {codec.RESULT_OK}
    zero = False
    for step in case["steps"]:
        if step["zero"] != zero:
            zero = step["zero"]
            rig.feed(lawmsg.frame_bytes(lawmsg.MSG_ZERO, 102, b"\x01" if zero else b"\x00"))
        rig.set_adc(0, step["adc"])
        rig.tick()
        ((k, _, adc, dac, flags),) = _samples(rig.take_tx())
        assert (k, adc, dac, flags) == (step["k"], step["adc"], step["counts"], step["flags"])
        assert rig.dac(0) == step["counts"]


# ------------------------------------------------------------------ end to end ---
def test_the_host_runs_the_c_board_in_law_mode(tmp_path: Path) -> None:
    """Engine -> pseudo-terminal -> the C core (ports/pty_board.c, its passive cell C 100 pF,
    g_L 5 nS, E_L -70 mV): law mode, recorded, a valid NWB file (pynwb's validator)."""
    from clampcore.firmware_protocol.cboard import build_pty_board, start_pty_board

    from clampcore.engine import Engine, RunOptions
    from clampcore.nwb import read_nwb_summary, validate_nwb

    exp = {
        "loop": {"rate_hz": 10_000, "max_current_pA": 400.0, "mode": "law"},
        "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},  # pty_board's own
        "element": [{"kind": "leak", "name": "shunt", "g_nS": 5.0, "e_mV": 0.0}],
    }
    with start_pty_board(build_pty_board(tmp_path)) as board:
        engine = Engine(exp, board.slave_path, RunOptions(watchdog_ms=200))
        engine.start(duration_s=1.0, out=tmp_path / "law.nwb")
        assert engine.wait(120.0), "the run did not end"
        result = engine.finish()
    assert result.error is None, result.error
    assert result.mode == "law" and result.notice is None
    assert validate_nwb(result.nwb_path) == []  # pynwb's validator: a list of problems
    rec = read_nwb_summary(result.nwb_path)
    assert rec["n_samples"] >= 9000
    v, i_pA = rec["v_mV"], rec["i_pA"]
    flags = rec["columns"]["flags"].astype(np.int64)
    ok = flags == 0  # the board evaluated a law in force (not stale, no fault)
    # How often a young law is in force is a timing figure (bench/bench_fidelity.py); on a
    # loaded machine the host falls behind for a while, so ask only for most samples here.
    assert ok.mean() > 0.5, f"only {ok.mean():.1%} of the samples had a law in force"
    # Each sample's current is the law at that sample's own V: I = -g (V - E), E = 0 mV
    # (Ohm's law for a conductance); within the converters' steps (DAC 0.06 pA, ADC
    # 0.03 mV = 0.15 pA at 5 nS: PROTOCOL.md §6, 16 bits over ±10 V).
    np.testing.assert_allclose(i_pA[ok], -5.0 * v[ok], atol=0.2)
    # The cell under the two conductances settles at (g_L E_L + g E) / (g_L + g) = -35 mV
    # (membrane RC theory), tau = C / (g_L + g) = 10 ms: look where the law has been in
    # force for 10 tau (1000 samples) without a break (a stalled host gives 0 pA).
    since_break = np.arange(v.size) - np.maximum.accumulate(np.where(ok, -1, np.arange(v.size)))
    settled = since_break > 1000
    assert settled.sum() > 1000
    assert np.mean(v[settled]) == pytest.approx(-35.0, abs=0.3)
