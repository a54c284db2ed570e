"""Python codec of the wire protocol: CRC, COBS, deframer, messages (firmware_protocol/codec.py).

Outside references, named beside each check: the CRC catalogue's check value,
``binascii.crc_hqx`` and ``crcmod``'s predefined "crc-ccitt-false" for the CRC; the
general-purpose ``cobs`` package for COBS; a reference deframer built from those two
(``firmware_protocol.fuzz.reference_deframe``) for the streaming decoder.
"""

from __future__ import annotations

import binascii
import json
import os
import subprocess
import sys
from pathlib import Path

import crcmod.predefined
import numpy as np
import pytest
from clampcore.firmware_protocol import codec
from clampcore.firmware_protocol.fuzz import reference_deframe
from cobs import cobs
from hypothesis import example, given, settings
from hypothesis import strategies as st

ROOT = Path(__file__).resolve().parents[1]
_SETTINGS = settings(derandomize=True, deadline=None, max_examples=150)
_crcmod_ccitt_false = crcmod.predefined.mkPredefinedCrcFun("crc-ccitt-false")


def _arr(data: bytes) -> np.ndarray:
    """Writable uint8 array (one numba specialisation for every call)."""
    return np.frombuffer(bytearray(data), dtype=np.uint8)


def _numba_deframe(data: bytes, chunk: int) -> tuple[list[bytes], np.ndarray]:
    dstate, dbuf = codec.new_deframer()
    frame = np.zeros(codec.MAX_PAYLOAD, dtype=np.uint8)
    out = []
    for i in range(0, len(data), chunk):
        piece = _arr(data[i : i + chunk])
        while (n := codec.deframe_next(dstate, dbuf, piece, piece.shape[0], frame)) > 0:
            out.append(frame[:n].tobytes())
        assert n == 0
    return out, dstate


# ---------------------------------------------------------------- CRC -------
def test_crc_check_value_from_the_catalogue() -> None:
    # CRC RevEng catalogue, CRC-16/IBM-3740 (alias CRC-16/CCITT-FALSE): check = 0x29B1.
    assert codec.crc16(_arr(b"123456789"), 0, 9) == 0x29B1


@_SETTINGS
@given(st.binary(max_size=300))
def test_crc_matches_binascii_and_crcmod(data: bytes) -> None:
    got = codec.crc16(_arr(data), 0, len(data))
    # binascii.crc_hqx with start value 0xFFFF is CRC-16/CCITT-FALSE (Python docs, binascii).
    assert got == binascii.crc_hqx(data, 0xFFFF)
    # crcmod's predefined "crc-ccitt-false": poly 0x11021, init 0xFFFF, not reflected.
    assert got == _crcmod_ccitt_false(data)


# ---------------------------------------------------------------- COBS ------
@_SETTINGS
@given(st.one_of(st.binary(max_size=700), st.lists(st.sampled_from([0, 1, 255]), max_size=600)))
# Runs of non-zero bytes around the 254-byte block edge (Cheshire & Baker 1999: a 0xFF code
# is 254 data bytes and no implied zero), which random bytes rarely produce.
@example(b"\x01" * 253)
@example(b"\x01" * 254)
@example(b"\x01" * 255 + b"\x00" + b"\x02" * 254)
@example(bytes(range(1, 256)) * 2)
def test_cobs_matches_the_cobs_package(data: bytes | list[int]) -> None:
    data = bytes(data)
    dst = np.zeros(len(data) + len(data) // 254 + 1, dtype=np.uint8)
    n = codec.cobs_encode(_arr(data), len(data), dst)
    # Reference: the general-purpose `cobs` package (Cheshire & Baker 1999 algorithm).
    assert dst[:n].tobytes() == cobs.encode(data)
    back = np.zeros(max(len(data), 1), dtype=np.uint8)
    m = codec.cobs_decode(dst, n, back)
    assert back[:m].tobytes() == data


@_SETTINGS
@given(st.binary(min_size=1, max_size=300))
def test_cobs_decode_agrees_with_the_package_on_any_input(data: bytes) -> None:
    dst = np.zeros(len(data) + 1, dtype=np.uint8)
    n = codec.cobs_decode(_arr(data), len(data), dst)
    try:
        expected = cobs.decode(data)  # reference: `cobs` package
    except cobs.DecodeError:
        assert n == codec.ERR_BAD_LENGTH
    else:
        assert dst[:n].tobytes() == expected


def test_cobs_encode_refuses_a_small_buffer() -> None:
    assert codec.cobs_encode(_arr(b"\x01" * 300), 300, np.zeros(300, np.uint8)) == -1


# ---------------------------------------------------------------- messages --
_u8 = st.integers(0, 0xFF)
_u16 = st.integers(0, 0xFFFF)
_u32 = st.integers(0, 2**32 - 1)
_i32 = st.integers(-(2**31), 2**31 - 1)
_counts = st.lists(_u16, min_size=1, max_size=codec.MAX_CHANNELS).map(tuple)


@st.composite
def _hello(draw: st.DrawFn) -> codec.Hello:
    lo_a, hi_a = sorted(draw(st.lists(_i32, min_size=2, max_size=2, unique=True)))
    lo_d, hi_d = sorted(draw(st.lists(_i32, min_size=2, max_size=2, unique=True)))
    wd = sorted(draw(st.lists(st.integers(1, 2**32 - 1), min_size=2, max_size=2)))
    ident = draw(st.text(st.characters(min_codepoint=1, max_codepoint=127), max_size=16))
    return codec.Hello(
        ident,
        draw(st.integers(1, 16)),
        draw(st.integers(1, 16)),
        draw(st.integers(1, 16)),
        draw(st.integers(1, 16)),
        lo_a,
        hi_a,
        lo_d,
        hi_d,
        draw(st.integers(1, 2**32 - 1)),
        wd[0],
        wd[1],
    )


_messages = st.one_of(
    _hello(),
    st.builds(codec.Sample, _u32, _u32, _u16, _u8, _counts),
    st.builds(
        codec.Status,
        st.integers(0, 2),
        _u8,
        _u16,
        _u8,
        *([_u32] * 9),
        st.integers(0, 16),
        _u32,
    ),
    st.builds(codec.Configure, _u32, _u8, _u32, _counts),
    st.builds(codec.Command, _u32, _counts),
    st.sampled_from(
        [codec.GetHello(), codec.Start(), codec.Stop(), codec.KeepAlive(), codec.GetStatus()]
    ),
)


@_SETTINGS
@given(_messages, _u16)
def test_every_message_round_trips(message: codec.Message, seq: int) -> None:
    wire = codec.encode_message(message, seq)
    assert wire.endswith(b"\x00") and b"\x00" not in wire[:-1]
    # Reference framing: cobs package + binascii CRC over type..body, little-endian.
    payload = cobs.decode(wire[:-1])
    assert payload[0] == type(message).MSG_TYPE
    assert int.from_bytes(payload[1:3], "little") == seq
    assert int.from_bytes(payload[-2:], "little") == binascii.crc_hqx(payload[:-2], 0xFFFF)
    assert payload[3:-2] == message.to_body()
    assert codec.decode_message(wire) == (seq, message)


@_SETTINGS
@given(_u16, _u32, _counts)
def test_compiled_command_encoder_equals_the_plain_one(seq: int, answers: int, counts) -> None:
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    n = codec.encode_command(seq, answers, np.array(counts, dtype=np.int64), out)
    assert out[:n].tobytes() == codec.encode_message(codec.Command(answers, counts), seq)
    fields = np.zeros(codec.COMMAND_NFIELDS, dtype=np.int64)
    dac = np.zeros(codec.MAX_CHANNELS, dtype=np.int64)
    payload = cobs.decode(out[: n - 1].tobytes())  # reference decoder: `cobs` package
    k = codec.decode_command(_arr(payload), len(payload), dac, fields)
    assert k == len(counts) and tuple(dac[:k]) == counts
    assert (fields[codec.COMMAND_SEQ], fields[codec.COMMAND_ANSWERS]) == (seq, answers)


@_SETTINGS
@given(_u16, st.builds(codec.Sample, _u32, _u32, _u16, _u8, _counts))
def test_compiled_sample_codec_equals_the_plain_one(seq: int, sample: codec.Sample) -> None:
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    adc_in = np.array(sample.adc_counts, dtype=np.int64)
    n = codec.encode_sample(
        seq, sample.counter, sample.clock_us, sample.cmd_seq, sample.status, adc_in, out
    )
    assert out[:n].tobytes() == codec.encode_message(sample, seq)
    payloads, _ = _numba_deframe(out[:n].tobytes(), 7)
    assert len(payloads) == 1
    adc = np.zeros(codec.MAX_CHANNELS, dtype=np.int64)
    f = np.zeros(codec.SAMPLE_NFIELDS, dtype=np.int64)
    k = codec.decode_sample(_arr(payloads[0]), len(payloads[0]), adc, f)
    assert k == len(sample.adc_counts) and tuple(adc[:k]) == sample.adc_counts
    got = (f[codec.SAMPLE_SEQ], f[codec.SAMPLE_COUNTER], f[codec.SAMPLE_CLOCK_US])
    assert got == (seq, sample.counter, sample.clock_us)
    assert (f[codec.SAMPLE_CMD_SEQ], f[codec.SAMPLE_STATUS]) == (sample.cmd_seq, sample.status)


def test_keepalive_frame() -> None:
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    n = codec.encode_keepalive(0x1234, out)
    assert out[:n].tobytes() == codec.encode_message(codec.KeepAlive(), 0x1234)
    assert n == 7  # payload 5 bytes + COBS code byte + delimiter (PROTOCOL.md §2)


def test_compiled_functions_report_bad_arguments() -> None:
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    assert codec.encode_command(1, 2, np.array([70000]), out) == codec.ERR_BAD_ARGUMENT
    assert codec.encode_command(1, 2, np.array([-1]), out) == codec.ERR_BAD_ARGUMENT
    assert codec.encode_command(1, 2, np.zeros(0, np.int64), out) == codec.ERR_BAD_ARGUMENT
    assert codec.encode_command(1, 2, np.zeros(17, np.int64), out) == codec.ERR_BAD_ARGUMENT
    assert codec.encode_command(1, 2, np.zeros(1, np.int64), out[:10]) == codec.ERR_BAD_ARGUMENT
    assert codec.encode_keepalive(1, out[:6]) == codec.ERR_BAD_ARGUMENT
    adc = np.zeros(4, np.int64)
    f = np.zeros(codec.SAMPLE_NFIELDS, np.int64)
    cmd = cobs.decode(codec.encode_message(codec.Command(1, (5,)), 1)[:-1])
    assert codec.decode_sample(_arr(cmd), len(cmd), adc, f) == codec.ERR_NOT_THIS_TYPE
    smp = cobs.decode(codec.encode_message(codec.Sample(1, 2, 3, 0, (1,) * 5), 1)[:-1])
    assert codec.decode_sample(_arr(smp), len(smp), adc, f) == codec.ERR_BAD_LENGTH  # 5 > 4
    odd = bytes([codec.MSG_SAMPLE]) + bytes(14)  # 14 body bytes: 11 fixed + 3 (odd)
    assert codec.decode_sample(_arr(odd), len(odd), adc, f) == codec.ERR_BAD_LENGTH
    assert codec.decode_sample(_arr(smp), len(smp), adc, f[:2]) == codec.ERR_BAD_ARGUMENT


def test_worked_example_of_the_specification() -> None:
    # PROTOCOL.md §7 gives these bytes; the reference is the cobs package + binascii.
    wire = codec.encode_message(codec.Command(answers_counter=1000, dac_counts=(2048,)), 1)
    assert wire.hex(" ").upper() == "03 05 01 03 E8 03 01 01 04 08 CD C1 00"
    assert binascii.crc_hqx(bytes.fromhex("05 0100 E8030000 0008"), 0xFFFF) == 0xC1CD
    text = (ROOT / "firmware_protocol" / "PROTOCOL.md").read_text()
    assert "03 05 01 03 E8 03 01 01 04 08 CD C1 00" in text


def test_calibration_worked_numbers_of_the_specification() -> None:
    """PROTOCOL.md §6 quotes numbers for a 16-bit ±10 V board, 100 mV/V, 400 pA/V."""
    lo_uV, hi_uV, full = -10_000_000, 10_000_000, 2**16 - 1

    def to_volts(c: int) -> float:  # v = min + c*(max - min)/(2^N - 1)
        return (lo_uV + c * (hi_uV - lo_uV) / full) * 1e-6

    def to_count(v: float) -> int:  # floor(x + 1/2), clipped
        return min(max(int(np.floor((v * 1e6 - lo_uV) / (hi_uV - lo_uV) * full + 0.5)), 0), full)

    assert round(100 * to_volts(29_491), 2) == -99.99
    assert to_count(0.0 / 400) == 32_768
    assert to_count(100.0 / 400) == 33_587
    assert round(400 * to_volts(33_587), 2) == 100.04
    text = (ROOT / "firmware_protocol" / "PROTOCOL.md").read_text()
    for quoted in ("−99.99 mV", "**32 768**", "**33 587**", "100.04 pA"):
        assert quoted in text


# ---------------------------------------------------------------- plain helpers
@pytest.mark.parametrize(
    ("wire", "why"),
    [
        (b"", "empty"),
        (b"\x00", "empty"),
        (b"\x05\x01\x02\x00", "COBS"),
        (b"\x03\x01\x02\x00", "shorter"),
        (cobs.encode(bytes(300)) + b"\x00", "longer"),
        (codec.encode_message(codec.Start(), 1)[:-2] + b"\x55\x00", "CRC"),
        (codec.encode_message(codec.Start(), 1) * 2, "more than one"),
    ],
)
def test_decode_wire_names_the_problem(wire: bytes, why: str) -> None:
    with pytest.raises(codec.FrameError, match=why):
        codec.decode_wire(wire)


def _payload(msg_type: int, body: bytes, seq: int = 1) -> bytes:
    head = bytes([msg_type, seq & 0xFF, seq >> 8]) + body
    return head + binascii.crc_hqx(head, 0xFFFF).to_bytes(2, "little")


@pytest.mark.parametrize(
    ("payload", "why"),
    [
        (_payload(0x7F, b""), "unknown message type 0x7F"),
        (_payload(codec.MSG_START, b"\x01"), "body must be 0 bytes"),
        (_payload(codec.MSG_COMMAND, b"\x01\x00\x00\x00\x05"), "counts"),
        (_payload(codec.MSG_CONFIGURE, bytes([1]) + bytes(11)), "version 1"),
        (_payload(codec.MSG_HELLO, bytes(49)), "version 0"),
        (_payload(codec.MSG_STATUS, bytes(45)), "46 bytes"),
        (_payload(codec.MSG_STATUS, bytes([7]) + bytes(45)), "state = 7"),
        (b"\x01\x02", "shorter"),
    ],
)
def test_parse_payload_names_the_problem(payload: bytes, why: str) -> None:
    with pytest.raises(codec.FrameError, match=why):
        codec.parse_payload(payload)


@pytest.mark.parametrize(
    "make",
    [
        lambda: codec.Command(-1, (1,)),
        lambda: codec.Command(1, ()),
        lambda: codec.Command(1, (70000,)),
        lambda: codec.Command(1, (1.5,)),
        lambda: codec.Sample(0, 0, 0, 256, (1,)),
        lambda: codec.Configure(1000, 1, 1000, (1,) * 17),
        lambda: codec.Hello("é", 16, 16, 1, 1, 0, 1, 0, 1, 1, 1, 1),
        lambda: codec.Hello("x" * 17, 16, 16, 1, 1, 0, 1, 0, 1, 1, 1, 1),
        lambda: codec.Hello("x", 16, 16, 1, 1, 5, 5, 0, 1, 1, 1, 1),
        lambda: codec.Hello("x", 17, 16, 1, 1, 0, 1, 0, 1, 1, 1, 1),
        lambda: codec.encode_message(codec.Start(), 70000),
        lambda: codec.encode_message("start", 1),  # type: ignore[arg-type]
    ],
)
def test_bad_fields_raise_frame_error(make) -> None:
    with pytest.raises(codec.FrameError):
        make()


# ---------------------------------------------------------------- deframer ---
def _segments() -> st.SearchStrategy[bytes]:
    valid = st.builds(lambda m, s: codec.encode_message(m, s), _messages, _u16)

    def truncate(w: bytes, k: int) -> bytes:
        return w[: k % len(w)] + b"\x00"

    def flip(w: bytes, i: int, bit: int) -> bytes:
        b = bytearray(w)
        b[i % (len(b) - 1)] ^= 1 << bit
        return bytes(b)

    return st.one_of(
        valid,
        st.builds(truncate, valid, st.integers(0, 300)),
        st.builds(flip, valid, st.integers(0, 300), st.integers(0, 7)),
        st.builds(lambda w: w[:-1], valid),  # delimiter lost: concatenated with the next
        st.binary(max_size=40),
        st.just(b"\x00"),
    )


@_SETTINGS
@given(st.lists(_segments(), max_size=12).map(b"".join), st.integers(1, 64))
def test_deframer_equals_the_reference_on_any_stream(data: bytes, chunk: int) -> None:
    got, dstate = _numba_deframe(data, chunk)
    # Reference: cobs package + binascii.crc_hqx on every 0x00-delimited piece.
    expected, bad = reference_deframe(data)
    assert got == expected
    assert dstate[codec.DEFRAMER_BAD] == bad
    assert dstate[codec.DEFRAMER_GOOD] == len(expected)
    for p in got:  # never a frame whose CRC failed
        assert binascii.crc_hqx(p[:-2], 0xFFFF) == int.from_bytes(p[-2:], "little")
    reasons = dstate[codec.DEFRAMER_BAD_BY_REASON + 1 : codec.DEFRAMER_BAD_BY_REASON + 5]
    assert reasons.sum() == bad


@_SETTINGS
@given(st.binary(max_size=400), _messages, _u16, st.integers(1, 50))
def test_deframer_resynchronises_at_the_next_delimiter(
    junk: bytes, message: codec.Message, seq: int, chunk: int
) -> None:
    wire = codec.encode_message(message, seq)
    got, _ = _numba_deframe(junk + b"\x00" + wire, chunk)
    assert got[-1] == codec.decode_wire(wire)
    assert codec.parse_payload(got[-1]) == (seq, message)


def test_deframer_keeps_a_partial_frame_between_chunks_and_resets() -> None:
    wire = codec.encode_message(codec.Command(5, (1, 2, 3)), 9)
    dstate, dbuf = codec.new_deframer()
    frame = np.zeros(codec.MAX_PAYLOAD, dtype=np.uint8)
    first = _arr(wire[:6])
    assert codec.deframe_next(dstate, dbuf, first, 6, frame) == 0
    rest = _arr(wire[6:])
    n = codec.deframe_next(dstate, dbuf, rest, rest.shape[0], frame)
    assert codec.parse_payload(frame[:n]) == (9, codec.Command(5, (1, 2, 3)))
    # after a reset the partial frame is forgotten: its tail alone is one bad frame
    assert codec.deframe_next(dstate, dbuf, first, 6, frame) == 0
    codec.deframer_reset(dstate)
    assert codec.deframe_next(dstate, dbuf, rest, rest.shape[0], frame) == 0
    assert dstate[codec.DEFRAMER_BAD] == 1
    assert codec.deframe_next(dstate, dbuf, rest, rest.shape[0], np.zeros(10, np.uint8)) == -1


def test_the_codec_runs_without_the_jit() -> None:
    """The same functions as plain Python (NUMBA_DISABLE_JIT=1) pass the shared vectors."""
    script = r"""
import json, sys
import numpy as np
from clampcore.firmware_protocol import codec
v = json.load(open(sys.argv[1]))
assert codec.crc16(np.frombuffer(b"123456789", np.uint8), 0, 9) == 0x29B1
for m in v["messages"]:
    wire = bytes.fromhex(m["wire"])
    seq, msg = codec.decode_message(wire)
    assert codec.encode_message(msg, seq) == wire, m["name"]
    dstate, dbuf = codec.new_deframer()
    frame = np.zeros(codec.MAX_PAYLOAD, np.uint8)
    chunk = np.frombuffer(bytearray(wire), np.uint8)
    n = codec.deframe_next(dstate, dbuf, chunk, len(chunk), frame)
    assert frame[:n].tobytes().hex() == m["payload"], m["name"]
    if m["message"] == "Command":
        out = np.zeros(codec.MAX_WIRE, np.uint8)
        k = codec.encode_command(m["seq"], m["fields"]["answers_counter"],
                                 np.array(m["fields"]["dac_counts"]), out)
        assert out[:k].tobytes() == wire
    if m["message"] == "Sample":
        adc = np.zeros(16, np.int64); f = np.zeros(codec.SAMPLE_NFIELDS, np.int64)
        k = codec.decode_sample(frame, n, adc, f)
        assert list(adc[:k]) == m["fields"]["adc_counts"]
        assert f[codec.SAMPLE_COUNTER] == m["fields"]["counter"]
for s in v["streams"]:
    good = []
    for piece in bytes.fromhex(s["wire"]).split(b"\x00")[:-1]:
        if not piece:
            continue  # an empty frame: ignored, not counted (PROTOCOL.md §2.4)
        try:
            good.append(codec.decode_wire(piece).hex())
        except codec.FrameError:
            pass
    assert good == s["payloads"], s["name"]  # the vectors' good frames, and only those
junk = bytes([0xFF]) + bytes(range(1, 255)) + bytes([0xC8]) + bytes(range(1, 60))
refused = 0
for cut in range(1, len(junk)):
    try:
        codec.decode_wire(junk[:cut])
    except codec.FrameError:
        refused += 1
assert refused == len(junk) - 1  # no cut of it is a frame (its CRC never matches)
print("ok", codec.crc16.__class__.__name__)
"""
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    vectors = ROOT / "firmware_protocol" / "vectors" / "protocol_v2.json"
    proc = subprocess.run(
        [sys.executable, "-c", script, str(vectors)],
        capture_output=True,
        text=True,
        env=env,
        cwd=ROOT,
        check=False,
    )
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == ["ok", "function"]  # plain functions, not dispatchers
    assert json.loads((vectors).read_text())["protocol_version"] == codec.PROTOCOL_VERSION


def test_a_hello_of_another_version_is_refused_by_name() -> None:
    """PROTOCOL.md §4.1 and §9: the host reads the version byte first and says which
    version the board speaks; a version-1 HELLO (49 bytes, no capabilities) is one."""
    v1_body = bytes([1]) + bytes(48)
    with pytest.raises(codec.VersionError, match=r"speaks protocol version 1; .* only version 2"):
        codec.Hello.from_body(v1_body)
