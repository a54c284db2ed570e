"""The Python codec passes the shared vectors (firmware_protocol/vectors/protocol_v2.json).

The vector file is built from struct, binascii.crc_hqx and the `cobs` package only
(firmware_protocol/vectors/generate.py), so it is an outside reference for the codec;
tests/test_c_core.py runs the C core over the same file.
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import codec
from cobs import cobs

VECTOR_DIR = Path(codec.__file__).resolve().parent / "vectors"
VECTORS = json.loads((VECTOR_DIR / "protocol_v2.json").read_text())
_REASONS = {
    "cobs": codec.FRAME_ERR_COBS,
    "short": codec.FRAME_ERR_SHORT,
    "long": codec.FRAME_ERR_LONG,
    "crc": codec.FRAME_ERR_CRC,
}


def _arr(data: bytes) -> np.ndarray:
    return np.frombuffer(bytearray(data), dtype=np.uint8)


def _message(v: dict) -> codec.Message:
    cls = getattr(codec, v["message"])
    return cls(**v["fields"])


def test_vector_file_is_what_the_generator_makes() -> None:
    spec = importlib.util.spec_from_file_location("_vector_gen", VECTOR_DIR / "generate.py")
    assert spec is not None and spec.loader is not None
    gen = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(gen)
    assert gen.build_vectors() == VECTORS


def test_vectors_cover_every_message_type_and_every_drop_reason() -> None:
    types = {v["type"] for v in VECTORS["messages"]}
    assert types == {
        codec.MSG_GET_HELLO,
        codec.MSG_CONFIGURE,
        codec.MSG_START,
        codec.MSG_STOP,
        codec.MSG_COMMAND,
        codec.MSG_KEEPALIVE,
        codec.MSG_GET_STATUS,
        codec.MSG_HELLO,
        codec.MSG_SAMPLE,
        codec.MSG_STATUS,
    }
    for reason in _REASONS:
        assert any(s["bad_by_reason"][reason] for s in VECTORS["streams"]), reason


@pytest.mark.parametrize("v", VECTORS["crc16_ccitt_false"], ids=lambda v: v["data"][:12])
def test_crc_vectors(v: dict) -> None:
    data = bytes.fromhex(v["data"])
    assert codec.crc16(_arr(data), 0, len(data)) == v["crc"]


@pytest.mark.parametrize("v", VECTORS["cobs"], ids=lambda v: v["decoded"][:12] or "empty")
def test_cobs_vectors(v: dict) -> None:
    decoded, encoded = bytes.fromhex(v["decoded"]), bytes.fromhex(v["encoded"])
    assert cobs.encode(decoded) == encoded  # the vector agrees with the `cobs` package
    dst = np.zeros(len(encoded) + 1, dtype=np.uint8)
    n = codec.cobs_encode(_arr(decoded), len(decoded), dst)
    assert dst[:n].tobytes() == encoded
    back = np.zeros(max(len(decoded), 1), dtype=np.uint8)
    m = codec.cobs_decode(_arr(encoded), len(encoded), back)
    assert back[:m].tobytes() == decoded


@pytest.mark.parametrize("v", VECTORS["messages"], ids=lambda v: v["name"])
def test_message_vectors(v: dict) -> None:
    wire = bytes.fromhex(v["wire"])
    message = _message(v)
    assert codec.encode_message(message, v["seq"]) == wire
    assert codec.decode_message(wire) == (v["seq"], message)
    assert codec.decode_wire(wire).hex() == v["payload"]
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    if v["message"] == "Command":
        f = v["fields"]
        n = codec.encode_command(v["seq"], f["answers_counter"], np.array(f["dac_counts"]), out)
        assert out[:n].tobytes() == wire
    if v["message"] == "KeepAlive":
        assert out[: codec.encode_keepalive(v["seq"], out)].tobytes() == wire
    if v["message"] == "Sample":
        f = v["fields"]
        payload = bytes.fromhex(v["payload"])
        adc = np.zeros(codec.MAX_CHANNELS, dtype=np.int64)
        got = np.zeros(codec.SAMPLE_NFIELDS, dtype=np.int64)
        k = codec.decode_sample(_arr(payload), len(payload), adc, got)
        assert list(adc[:k]) == f["adc_counts"]
        assert got[codec.SAMPLE_SEQ] == v["seq"]
        assert got[codec.SAMPLE_COUNTER] == f["counter"]
        assert got[codec.SAMPLE_CLOCK_US] == f["clock_us"]
        assert got[codec.SAMPLE_CMD_SEQ] == f["cmd_seq"]
        assert got[codec.SAMPLE_STATUS] == f["status"]


@pytest.mark.parametrize("chunk", [1, 3, 64, 4096])
@pytest.mark.parametrize("v", VECTORS["streams"], ids=lambda v: v["name"])
def test_stream_vectors(v: dict, chunk: int) -> None:
    data = bytes.fromhex(v["wire"])
    dstate, dbuf = codec.new_deframer()
    frame = np.zeros(codec.MAX_PAYLOAD, dtype=np.uint8)
    got = []
    for i in range(0, len(data), chunk):
        piece = _arr(data[i : i + chunk])
        while (n := codec.deframe_next(dstate, dbuf, piece, piece.shape[0], frame)) > 0:
            got.append(frame[:n].tobytes().hex())
    assert got == v["payloads"]
    assert dstate[codec.DEFRAMER_BAD] == v["bad"]
    for name, e in _REASONS.items():
        assert dstate[codec.DEFRAMER_BAD_BY_REASON + e] == v["bad_by_reason"][name], name


@pytest.mark.parametrize("v", VECTORS["board_ignores"], ids=lambda v: v["name"])
def test_board_ignores_are_good_frames(v: dict) -> None:
    """Frames a board must ignore still pass framing; the rule is the board's (C tests)."""
    payload = codec.decode_wire(bytes.fromhex(v["wire"]))
    assert payload.hex() == v["payload"]
    if v["name"] in ("configure_version_2", "command_odd_length", "unknown_type_0x7f"):
        with pytest.raises(codec.FrameError):
            codec.parse_payload(payload)
