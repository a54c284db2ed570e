"""Protocol version 2's messages for the current law (PROTOCOL.md §10.4).

Compiled, per sample (``clampcore.jit.kernel``; no allocation, runnable under
``NUMBA_DISABLE_JIT=1``):

* ``encode_laws(seq, seen, first, count, blocked, lawbits, out, at) -> int``: one LAWS
  frame onto ``out[at:]``, laws ``first .. first+count-1`` read from ``lawbits``, a
  uint32 view of a float32 ring of laws (row = sample & (rows - 1)); returns bytes.
* ``decode_laws(frame, n, fields) -> int``: a LAWS payload's header into ``fields``
  (``LAWS_SEEN``, ``LAWS_FIRST``, ``LAWS_COUNT``, ``LAWS_BLOCKED``); returns count or
  an ``ERR_*``; ``law_word(frame, i, j)`` is word j of law i as float32 bits.
* ``encode_samples(seq, first, clock_us, status, adc, dac, flags, out) -> int``
  and ``decode_samples(frame, n, fields, adc, dac, flags) -> int`` (``SAMPLES_*``).

* ``encode_rules_at(seq, at, bfbits, bi, body, out) -> int``: one RULES_AT frame (board
  rules ``bf`` as uint32 bits and ``bi``, in force from sample ``at``) onto ``out``;
  ``decode_rules_at(frame, n, rbits, ri) -> int``: its sample (or ``ERR_*``), the rules'
  float bits into ``rbits`` and integers into ``ri`` (``bi`` columns; the board's DAC top
  and fault count are not sent and left as they are).

Plain Python for the rare ones: ``frame_bytes(msg_type, seq, body)`` (any frame),
``rules_body(bf, bi)`` / ``parse_rules(body)`` (BOARD_RULES), ``table_bodies(table)`` /
``parse_table(body)`` (BLOCK_TABLE), ``ZERO_ON`` / ``ZERO_OFF`` bodies.

Public names: the above, ``MSG_LAWS``, ``MSG_BOARD_RULES``, ``MSG_BLOCK_TABLE``,
``MSG_ZERO``, ``MSG_RULES_AT``, ``MSG_SAMPLES``, ``MAX_LAWS``, ``MAX_LAWS_BLOCKED``,
``MAX_TABLE_POINTS``, ``RULES_INTS``, ``RULES_BODY``, ``RULES_AT_BODY``.
"""

from __future__ import annotations

import struct

import numpy as np
from clampcore.firmware_protocol import boardlaw as bl
from clampcore.firmware_protocol.codec import (
    ERR_BAD_ARGUMENT,
    ERR_BAD_LENGTH,
    ERR_NOT_THIS_TYPE,
    MAX_PAYLOAD,
    MIN_PAYLOAD,
    _finish_frame,
    _le16,
    _le32,
    _put_u32,
    encode_frame,
)

from clampcore.jit import kernel

MSG_LAWS = 0x08
MSG_BOARD_RULES = 0x09
MSG_BLOCK_TABLE = 0x0A
MSG_ZERO = 0x0B
MSG_RULES_AT = 0x0C  # new board rules from a named sample on (PROTOCOL.md §10.4)
MSG_SAMPLES = 0x84

_HEADER = 3  # type + seq
_LAWS_FIXED = 10  # seen u32, first u32, count u8, blocked u8
_SAMPLES_FIXED = 9  # first u32, clock u32, status u8 ... count u8 below
_PER_SAMPLE = 5  # adc u16, dac u16, flags u8
# Laws per frame: the body may hold 254 - 5 - 10 = 239 bytes.
MAX_LAWS = (MAX_PAYLOAD - MIN_PAYLOAD - _LAWS_FIXED) // 8  # 29
MAX_LAWS_BLOCKED = (MAX_PAYLOAD - MIN_PAYLOAD - _LAWS_FIXED) // 16  # 14
MAX_SAMPLES = (MAX_PAYLOAD - MIN_PAYLOAD - _SAMPLES_FIXED - 1) // _PER_SAMPLE  # 47
MAX_TABLE_POINTS = 60  # BLOCK_TABLE: first u16, count u8, 60 float32 = 243 bytes

LAWS_SEEN, LAWS_FIRST, LAWS_COUNT, LAWS_BLOCKED = 0, 1, 2, 3
SAMPLES_SEQ, SAMPLES_FIRST, SAMPLES_CLOCK_US, SAMPLES_STATUS, SAMPLES_COUNT = 0, 1, 2, 3, 4
N_FIELDS = 5

ZERO_ON = b"\x01"
ZERO_OFF = b"\x00"


@kernel
def encode_laws(
    seq: int,
    seen: int,
    first: int,
    count: int,
    blocked: bool,
    lawbits: np.ndarray,
    out: np.ndarray,
    at: int,
) -> int:
    """One LAWS frame at ``out[at:]`` (see the module docstring); returns its wire length."""
    words = 4 if blocked else 2
    payload_len = _HEADER + _LAWS_FIXED + 4 * words * count + 2
    if payload_len > MAX_PAYLOAD or out.shape[0] - at < payload_len + 2 or count < 0:
        return ERR_BAD_ARGUMENT
    p = out[at:]
    p[1] = MSG_LAWS
    p[2] = seq & 0xFF
    p[3] = (seq >> 8) & 0xFF
    _put_u32(p, 4, seen & 0xFFFFFFFF)
    _put_u32(p, 8, first & 0xFFFFFFFF)
    p[12] = count
    p[13] = 1 if blocked else 0
    mask = lawbits.shape[0] - 1
    i = 14
    for s in range(first, first + count):
        row = s & mask
        for j in range(words):
            _put_u32(p, i, np.int64(lawbits[row, j]))
            i += 4
    return _finish_frame(p, payload_len)


@kernel
def decode_laws(frame: np.ndarray, n: int, fields: np.ndarray) -> int:
    """A LAWS payload's header into ``fields``; returns the count of laws or ``ERR_*``."""
    if n < MIN_PAYLOAD + _LAWS_FIXED:
        return ERR_BAD_LENGTH
    if frame[0] != MSG_LAWS:
        return ERR_NOT_THIS_TYPE
    count = np.int64(frame[11])
    blocked = frame[12] != 0
    if n != MIN_PAYLOAD + _LAWS_FIXED + count * (16 if blocked else 8):
        return ERR_BAD_LENGTH
    fields[LAWS_SEEN] = _le32(frame[3], frame[4], frame[5], frame[6])
    fields[LAWS_FIRST] = _le32(frame[7], frame[8], frame[9], frame[10])
    fields[LAWS_COUNT] = count
    fields[LAWS_BLOCKED] = 1 if blocked else 0
    return count


@kernel
def law_word(frame: np.ndarray, blocked: bool, i: int, j: int) -> int:
    """Word ``j`` (alpha, beta, alpha_b, beta_b) of law ``i`` of a LAWS payload, as bits."""
    at = _HEADER + _LAWS_FIXED + 4 * ((4 if blocked else 2) * i + j)
    return _le32(frame[at], frame[at + 1], frame[at + 2], frame[at + 3])


@kernel
def encode_samples(
    seq: int,
    first: int,
    clock_us: int,
    status: int,
    adc: np.ndarray,
    dac: np.ndarray,
    flags: np.ndarray,
    out: np.ndarray,
) -> int:
    """One SAMPLES frame (board side) of the samples in ``adc``/``dac``/``flags`` (as many
    as ``adc`` holds) from ``first``; wire length."""
    count = adc.shape[0]
    payload_len = _HEADER + _SAMPLES_FIXED + 1 + _PER_SAMPLE * count + 2
    if payload_len > MAX_PAYLOAD or out.shape[0] < payload_len + 2 or count < 1:
        return ERR_BAD_ARGUMENT
    out[1] = MSG_SAMPLES
    out[2] = seq & 0xFF
    out[3] = (seq >> 8) & 0xFF
    _put_u32(out, 4, first & 0xFFFFFFFF)
    _put_u32(out, 8, clock_us & 0xFFFFFFFF)
    out[12] = status & 0xFF
    out[13] = count
    for i in range(count):
        at = 14 + _PER_SAMPLE * i
        a = np.int64(adc[i])
        d = np.int64(dac[i])
        out[at] = a & 0xFF
        out[at + 1] = (a >> 8) & 0xFF
        out[at + 2] = d & 0xFF
        out[at + 3] = (d >> 8) & 0xFF
        out[at + 4] = np.int64(flags[i]) & 0xFF
    return _finish_frame(out, payload_len)


@kernel
def decode_samples(
    frame: np.ndarray,
    n: int,
    fields: np.ndarray,
    adc: np.ndarray,
    dac: np.ndarray,
    flags: np.ndarray,
) -> int:
    """A SAMPLES payload into ``fields`` and the per-sample arrays; returns the count."""
    if n < MIN_PAYLOAD + _SAMPLES_FIXED + 1:
        return ERR_BAD_LENGTH
    if frame[0] != MSG_SAMPLES:
        return ERR_NOT_THIS_TYPE
    count = np.int64(frame[12])
    if n != MIN_PAYLOAD + _SAMPLES_FIXED + 1 + _PER_SAMPLE * count or count > adc.shape[0]:
        return ERR_BAD_LENGTH
    fields[SAMPLES_SEQ] = _le16(frame[1], frame[2])
    fields[SAMPLES_FIRST] = _le32(frame[3], frame[4], frame[5], frame[6])
    fields[SAMPLES_CLOCK_US] = _le32(frame[7], frame[8], frame[9], frame[10])
    fields[SAMPLES_STATUS] = frame[11]
    fields[SAMPLES_COUNT] = count
    for i in range(count):
        at = 13 + _PER_SAMPLE * i
        adc[i] = _le16(frame[at], frame[at + 1])
        dac[i] = _le16(frame[at + 2], frame[at + 3])
        flags[i] = frame[at + 4]
    return count


# BOARD_RULES body: the float parameters (f32) then the integer ones (i32), in the order
# of boardlaw's BF_* and BI_* columns, dac_top and the fault count excepted (the board
# knows its DAC; the fault value came with CONFIGURE).
_RULES_INTS = tuple(c for c in range(bl.N_BI) if c not in (bl.BI_DAC_TOP, bl.BI_FAULT_COUNTS))
_RULES = struct.Struct(f"<{bl.N_BF}f{len(_RULES_INTS)}i")


RULES_INTS = np.array(_RULES_INTS, dtype=np.int64)  # bi columns in BOARD_RULES order
RULES_BODY = _RULES.size  # 48 bytes
RULES_AT_BODY = 4 + RULES_BODY  # the sample it takes effect at, u32, then the rules


@kernel
def encode_rules_at(
    seq: int,
    at: int,
    bfbits: np.ndarray,
    bi: np.ndarray,
    body: np.ndarray,
    out: np.ndarray,
) -> int:
    """One RULES_AT frame onto ``out``: rules ``bf`` (as uint32 bits) and ``bi`` from sample
    ``at``; ``body`` is scratch of at least ``RULES_AT_BODY`` bytes. Returns bytes written."""
    _put_u32(body, 0, at & 0xFFFFFFFF)
    for j in range(bl.N_BF):
        _put_u32(body, 4 + 4 * j, np.int64(bfbits[j]))
    for j in range(RULES_INTS.shape[0]):
        _put_u32(body, 4 + 4 * bl.N_BF + 4 * j, np.int64(bi[RULES_INTS[j]]) & 0xFFFFFFFF)
    return encode_frame(MSG_RULES_AT, seq & 0xFFFF, body, RULES_AT_BODY, out)


@kernel
def decode_rules_at(frame: np.ndarray, n: int, rbits: np.ndarray, ri: np.ndarray) -> int:
    """A RULES_AT payload: returns its sample (u32) or ``ERR_*``; float bits into ``rbits``
    (uint32[N_BF]), the integer rules into their ``bi`` columns of ``ri`` (int64[N_BI])."""
    if frame[0] != MSG_RULES_AT:
        return ERR_NOT_THIS_TYPE
    if n != MIN_PAYLOAD + RULES_AT_BODY:
        return ERR_BAD_LENGTH
    at = _le32(frame[3], frame[4], frame[5], frame[6])
    for j in range(bl.N_BF):
        o = 7 + 4 * j
        rbits[j] = _le32(frame[o], frame[o + 1], frame[o + 2], frame[o + 3])
    for j in range(RULES_INTS.shape[0]):
        o = 7 + 4 * bl.N_BF + 4 * j
        v = _le32(frame[o], frame[o + 1], frame[o + 2], frame[o + 3])
        ri[RULES_INTS[j]] = v - (1 << 32) if v >= (1 << 31) else v  # i32
    return at


def rules_body(bf: np.ndarray, bi: np.ndarray) -> bytes:
    """BOARD_RULES body for the board's parameter arrays."""
    return _RULES.pack(*(float(x) for x in bf), *(int(bi[c]) for c in _RULES_INTS))


def parse_rules(body: bytes, bf: np.ndarray, bi: np.ndarray) -> None:
    """Write a BOARD_RULES body into ``bf`` and ``bi`` (raises ``ValueError`` if malformed)."""
    if len(body) != _RULES.size:
        raise ValueError(f"BOARD_RULES body is {len(body)} bytes, not {_RULES.size}")
    values = _RULES.unpack(body)
    bf[:] = np.asarray(values[: bl.N_BF], dtype=np.float32)
    for c, v in zip(_RULES_INTS, values[bl.N_BF :], strict=True):
        bi[c] = v


def frame_bytes(msg_type: int, seq: int, body: bytes) -> bytes:
    """Wire bytes of one frame of ``msg_type`` (COBS and the 0x00 delimiter)."""
    raw = np.frombuffer(body, dtype=np.uint8)
    out = np.zeros(MAX_PAYLOAD + 2, dtype=np.uint8)
    n = encode_frame(msg_type, seq & 0xFFFF, raw, raw.shape[0], out)
    if n < 0:
        raise ValueError(f"message 0x{msg_type:02X}: body of {len(body)} bytes is too long")
    return out[:n].tobytes()


def table_bodies(table: np.ndarray) -> list[bytes]:
    """BLOCK_TABLE bodies carrying ``table`` (float32), ``MAX_TABLE_POINTS`` at a time."""
    out = []
    for first in range(0, table.size, MAX_TABLE_POINTS):
        part = np.asarray(table[first : first + MAX_TABLE_POINTS], dtype="<f4")
        out.append(struct.pack("<HB", first, part.size) + part.tobytes())
    return out


def parse_table(body: bytes, table: np.ndarray) -> None:
    """Write one BLOCK_TABLE body into ``table`` (raises ``ValueError`` if malformed)."""
    if len(body) < 3:
        raise ValueError("BLOCK_TABLE body too short")
    first, count = struct.unpack_from("<HB", body)
    if len(body) != 3 + 4 * count or first + count > table.size:
        raise ValueError(f"BLOCK_TABLE points {first}..{first + count - 1} do not fit")
    table[first : first + count] = np.frombuffer(body, dtype="<f4", offset=3)
