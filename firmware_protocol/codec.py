"""Host-side codec for the clampcore wire protocol, version 2 (see PROTOCOL.md).

Two layers:

* Compiled per-sample path (``@njit(cache=True, nogil=True)``, no allocation per
  call, runs as plain Python under ``NUMBA_DISABLE_JIT=1``).  Every buffer is a
  preallocated numpy array owned by the caller.

  - ``new_deframer() -> (dstate, dbuf)``: state of a streaming deframer
    (int64[DEFRAMER_STATE_SIZE] and uint8[MAX_PAYLOAD]); ``deframer_reset(dstate)``
    forgets a partial frame.
  - ``deframe_next(dstate, dbuf, chunk, n, frame_out) -> int``: scans ``chunk[:n]``
    (raw bytes as read from the serial port) from where the previous call stopped
    and returns the length of the next complete, COBS-decoded, CRC-checked payload,
    copied to ``frame_out`` (size >= MAX_PAYLOAD); 0 when ``chunk[:n]`` is used up
    (read the next chunk then); -1 when a buffer is too small.  Bad frames are
    dropped and counted in ``dstate[DEFRAMER_BAD]`` (per reason e in
    ``dstate[DEFRAMER_BAD_BY_REASON + e]``, the last reason in
    ``dstate[DEFRAMER_LAST_ERROR]``), good ones in ``dstate[DEFRAMER_GOOD]``;
    decoding resynchronises at the next 0x00.
  - ``decode_sample(frame, n, adc_out, fields_out) -> int``: a SAMPLE payload into
    ``fields_out[SAMPLE_SEQ, SAMPLE_COUNTER, SAMPLE_CLOCK_US, SAMPLE_CMD_SEQ,
    SAMPLE_STATUS]`` (int64[SAMPLE_NFIELDS]) and ``adc_out[:k]``; returns k, the
    number of input channels, or ERR_NOT_THIS_TYPE / ERR_BAD_LENGTH.
  - ``encode_command(seq, answers_counter, dac_counts, out) -> int``: a whole COMMAND
    frame on the wire (COBS, trailing 0x00) into ``out`` (size >= MAX_WIRE); returns
    its byte count or ERR_BAD_ARGUMENT.
  - ``encode_keepalive(seq, out) -> int``: likewise for KEEPALIVE.
  - ``encode_sample(seq, counter, clock_us, cmd_seq, status, adc_counts, out) -> int``
    and ``decode_command(frame, n, dac_out, fields_out) -> int`` (fields
    ``COMMAND_SEQ``, ``COMMAND_ANSWERS``): the board's side, for board emulators.
  - ``encode_frame(msg_type, seq, body, body_len, out) -> int``: any frame.
  - Building blocks: ``crc16(data, start, stop) -> int`` (CRC-16/CCITT-FALSE),
    ``cobs_encode(src, n, dst) -> int``, ``cobs_decode(src, n, dst) -> int``.

* Plain Python for the rare messages: dataclasses ``Hello``, ``Sample``, ``Status``,
  ``GetHello``, ``Configure``, ``Start``, ``Stop``, ``Command``, ``KeepAlive``,
  ``GetStatus`` (each with ``to_body()`` and ``from_body(body)``), and
  ``encode_message(message, seq) -> bytes`` (wire bytes with the delimiter),
  ``decode_wire(wire) -> bytes`` (payload), ``parse_payload(payload) -> (seq, message)``,
  ``decode_message(wire) -> (seq, message)``.  Bad input raises ``FrameError``.

Constants: ``PROTOCOL_VERSION``, ``MAX_PAYLOAD``, ``MAX_WIRE``, ``MIN_PAYLOAD``,
``MAX_CHANNELS``, ``IDENTITY_BYTES``, message types ``MSG_*``, status bits
``STATUS_*``, board states ``STATE_*``, reply results ``RESULT_*``, deframer error
reasons ``FRAME_ERR_*``, return codes ``ERR_*``, ``DEFRAMER_*`` state indices and
the field indices above.
"""

from __future__ import annotations

import struct
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, ClassVar, TypeVar

import numpy as np
from numba import njit

# ---------------------------------------------------------------------------
# Protocol constants (PROTOCOL.md is the normative text; keep both in step).
# ---------------------------------------------------------------------------
PROTOCOL_VERSION = 2
MAX_PAYLOAD = 254  # PROTOCOL.md §2: at most 254 bytes, so COBS adds exactly one byte
MAX_WIRE = MAX_PAYLOAD + 2  # one COBS code byte + one 0x00 delimiter
MIN_PAYLOAD = 5  # type (1) + seq (2) + CRC (2)
MAX_CHANNELS = 16  # PROTOCOL.md §3: at most 16 input and 16 output channels
IDENTITY_BYTES = 16  # HELLO: board identity, ASCII, NUL padded

# Message types: host -> board have the high bit clear, board -> host set.
MSG_GET_HELLO = 0x01
MSG_CONFIGURE = 0x02
MSG_START = 0x03
MSG_STOP = 0x04
MSG_COMMAND = 0x05
MSG_KEEPALIVE = 0x06
MSG_GET_STATUS = 0x07
MSG_HELLO = 0x81
MSG_SAMPLE = 0x82
MSG_STATUS = 0x83

# Status bits (SAMPLE.status, STATUS.status).
STATUS_FAULT_OUTPUT = 0x01  # the DAC holds the fault value, not a command
STATUS_WATCHDOG = 0x02  # the watchdog tripped and no COMMAND has come since
STATUS_LATE = 0x04  # a late COMMAND arrived since the previous sample
STATUS_RX_ERROR = 0x08  # a bad frame / unknown message / rejected command since then

# Board states.
STATE_UNCONFIGURED = 0
STATE_READY = 1
STATE_RUNNING = 2

# STATUS.result.
RESULT_OK = 0
RESULT_BAD_STATE = 1
RESULT_BAD_RATE = 2
RESULT_BAD_INPUTS = 3
RESULT_BAD_WATCHDOG = 4
RESULT_BAD_FAULT_VALUE = 5
RESULT_REPORT = 0x80  # unsolicited report (watchdog trip); ack_seq is 0

# Why the deframer dropped its last bad frame (dstate[DEFRAMER_LAST_ERROR]).
FRAME_ERR_NONE = 0
FRAME_ERR_COBS = 1  # a COBS block runs past the delimiter
FRAME_ERR_SHORT = 2  # payload shorter than MIN_PAYLOAD
FRAME_ERR_LONG = 3  # payload longer than MAX_PAYLOAD
FRAME_ERR_CRC = 4  # CRC mismatch

# Return codes of the compiled functions (negative: nothing was written).
ERR_BAD_ARGUMENT = -1
ERR_NOT_THIS_TYPE = -2
ERR_BAD_LENGTH = -3

# Deframer state layout (int64 array).
_D_POS = 0  # position reached in the current chunk
_D_FILL = 1  # payload bytes decoded so far in the current frame
_D_LEFT = 2  # data bytes left in the current COBS block (0: next byte is a code)
_D_ZERO = 3  # 1: a zero goes in before the next block (previous code was < 0xFF)
_D_IN_FRAME = 4  # 1: non-delimiter bytes have been seen since the last 0x00
_D_DROP = 5  # reason (FRAME_ERR_*) the current frame is being dropped, else 0
DEFRAMER_GOOD = 6  # frames accepted
DEFRAMER_BAD = 7  # frames dropped
DEFRAMER_LAST_ERROR = 8  # FRAME_ERR_* of the last dropped frame
DEFRAMER_BAD_BY_REASON = 8  # dstate[DEFRAMER_BAD_BY_REASON + e]: dropped for reason e = 1..4
DEFRAMER_STATE_SIZE = 13

# decode_sample / decode_command field indices (int64 arrays).
SAMPLE_SEQ = 0
SAMPLE_COUNTER = 1
SAMPLE_CLOCK_US = 2
SAMPLE_CMD_SEQ = 3
SAMPLE_STATUS = 4
SAMPLE_NFIELDS = 5
COMMAND_SEQ = 0
COMMAND_ANSWERS = 1
COMMAND_NFIELDS = 2

F = TypeVar("F", bound=Callable[..., Any])

_HEADER = 3  # type + seq
_SAMPLE_FIXED = 11  # counter u32, clock u32, cmd_seq u16, status u8
_COMMAND_FIXED = 4  # answers_counter u32
_CONFIGURE_FIXED = 10  # version u8, rate u32, inputs u8, watchdog u32


def _kernel(fn: F) -> F:
    """``numba.njit(cache=True, nogil=True)`` without reference counting (``_nrt=False``).

    None of the compiled functions here allocates.  With numba's reference counting
    every array argument costs an atomic increment and decrement per call: measured
    here, a SAMPLE deframe + decode + COMMAND encode took about 150 ns with it,
    most of it those atomics.  ``_nrt`` is an option of numba's CPU target (0.60 -
    0.68, as in ``clampcore.jit``); a function that allocated would fail to compile.
    Under NUMBA_DISABLE_JIT=1 the functions stay plain Python.
    """
    return njit(cache=True, nogil=True, _nrt=False)(fn)  # type: ignore[return-value]


def _crc_table() -> np.ndarray:
    """CRC-16/CCITT-FALSE byte table: polynomial 0x1021, MSB first (not reflected)."""
    table = np.zeros(256, dtype=np.uint16)
    for i in range(256):
        c = i << 8
        for _ in range(8):
            c = ((c << 1) ^ 0x1021) if c & 0x8000 else (c << 1)
        table[i] = c & 0xFFFF
    return table


_CRC_TABLE = _crc_table()  # constant; numba freezes it into the compiled code


# ---------------------------------------------------------------------------
# Compiled building blocks
# ---------------------------------------------------------------------------
@_kernel
def crc16(data: np.ndarray, start: int, stop: int) -> int:
    """CRC-16/CCITT-FALSE (init 0xFFFF, no reflection, xorout 0) of data[start:stop]."""
    c = 0xFFFF
    for i in range(start, stop):
        c = ((c << 8) & 0xFFFF) ^ _CRC_TABLE[((c >> 8) ^ data[i]) & 0xFF]
    return c


@_kernel
def cobs_encode(src: np.ndarray, n: int, dst: np.ndarray) -> int:
    """COBS-encode src[:n] into dst (no delimiter); returns the length or ERR_BAD_ARGUMENT."""
    need = n + n // 254 + 1
    if n < 0 or n > src.shape[0] or dst.shape[0] < need:
        return ERR_BAD_ARGUMENT
    code_at = 0
    out = 1
    code = 1
    for i in range(n):
        b = src[i]
        if b == 0:
            dst[code_at] = code
            code_at = out
            out += 1
            code = 1
        else:
            dst[out] = b
            out += 1
            code += 1
            if code == 0xFF:
                dst[code_at] = code
                code_at = out
                out += 1
                code = 1
    dst[code_at] = code
    # A block of 254 data bytes that ends the input needs no trailing 0x01 block
    # (Cheshire & Baker 1999; same output as the `cobs` package).
    if code == 1 and n > 0 and src[n - 1] != 0 and code_at == out - 1:
        out -= 1
    return out


@_kernel
def cobs_decode(src: np.ndarray, n: int, dst: np.ndarray) -> int:
    """Decode the COBS block sequence src[:n] (no delimiter) into dst.

    Returns the decoded length, ERR_BAD_LENGTH if a block runs past the end or a
    0x00 appears inside, ERR_BAD_ARGUMENT if dst is too small.
    """
    if n < 0 or n > src.shape[0]:
        return ERR_BAD_ARGUMENT
    out = 0
    i = 0
    zero = 0
    while i < n:
        code = np.int64(src[i])  # int64, also as plain Python (uint8 sums would wrap)
        if code == 0:
            return ERR_BAD_LENGTH
        i += 1
        if zero:
            if out >= dst.shape[0]:
                return ERR_BAD_ARGUMENT
            dst[out] = 0
            out += 1
        if i + code - 1 > n:
            return ERR_BAD_LENGTH
        for _ in range(code - 1):
            b = src[i]
            if b == 0:
                return ERR_BAD_LENGTH
            if out >= dst.shape[0]:
                return ERR_BAD_ARGUMENT
            dst[out] = b
            out += 1
            i += 1
        zero = 1 if code != 0xFF else 0
    return out


@_kernel
def _finish_frame(out: np.ndarray, payload_len: int) -> int:
    """Append the CRC to the payload at out[1:], COBS-encode in place, add the delimiter.

    out[1:payload_len-1] holds type, seq and body; the CRC goes in the last two
    payload bytes.  Valid for payload_len <= 254 (one COBS block boundary at most
    at the very end), which the callers guarantee.
    """
    end = 1 + payload_len
    c = crc16(out, 1, end - 2)
    out[end - 2] = c & 0xFF
    out[end - 1] = c >> 8
    last = 0
    for i in range(1, end):
        if out[i] == 0:
            out[last] = i - last
            last = i
    out[last] = end - last
    out[end] = 0
    return end + 1


@_kernel
def encode_frame(msg_type: int, seq: int, body: np.ndarray, body_len: int, out: np.ndarray) -> int:
    """Encode [type][seq][body[:body_len]][crc] as wire bytes (COBS + 0x00) into out."""
    payload_len = _HEADER + body_len + 2
    nbytes = ERR_BAD_ARGUMENT
    if (
        0 <= body_len <= body.shape[0]
        and payload_len <= MAX_PAYLOAD
        and out.shape[0] >= payload_len + 2
        and 0 <= msg_type <= 0xFF
    ):
        out[1] = msg_type
        out[2] = seq & 0xFF
        out[3] = (seq >> 8) & 0xFF
        for i in range(body_len):
            out[4 + i] = body[i]
        nbytes = _finish_frame(out, payload_len)
    return nbytes


# ---------------------------------------------------------------------------
# Streaming deframer
# ---------------------------------------------------------------------------
def new_deframer() -> tuple[np.ndarray, np.ndarray]:
    """Allocate a deframer: (dstate int64[DEFRAMER_STATE_SIZE], dbuf uint8[MAX_PAYLOAD])."""
    return np.zeros(DEFRAMER_STATE_SIZE, dtype=np.int64), np.zeros(MAX_PAYLOAD, dtype=np.uint8)


@_kernel
def deframer_reset(dstate: np.ndarray) -> None:
    """Forget any partial frame and the chunk position (counters are kept)."""
    dstate[_D_POS] = 0
    dstate[_D_FILL] = 0
    dstate[_D_LEFT] = 0
    dstate[_D_ZERO] = 0
    dstate[_D_IN_FRAME] = 0
    dstate[_D_DROP] = 0


@_kernel
def deframe_next(
    dstate: np.ndarray, dbuf: np.ndarray, chunk: np.ndarray, n: int, frame_out: np.ndarray
) -> int:
    """Return the length of the next good payload found in chunk[:n], or 0 at its end.

    Call repeatedly with the same chunk until it returns 0, then read the next chunk.
    The payload (type, seq, body, CRC) is copied to frame_out.  Streaming COBS
    decoder: a zero is inserted lazily before each block that follows a block with
    code < 0xFF, so a frame is decoded once its delimiter arrives.
    """
    length = 0
    if dbuf.shape[0] < MAX_PAYLOAD or frame_out.shape[0] < MAX_PAYLOAD or n > chunk.shape[0]:
        length = ERR_BAD_ARGUMENT
        n = 0
    pos = dstate[_D_POS]
    fill = dstate[_D_FILL]
    left = dstate[_D_LEFT]
    zero = dstate[_D_ZERO]
    in_frame = dstate[_D_IN_FRAME]
    drop = dstate[_D_DROP]
    while pos < n and length == 0:
        b = chunk[pos]
        pos += 1
        if b == 0:
            if in_frame == 0:
                continue  # empty frame (repeated delimiter): ignored, not counted
            err = drop
            if err == 0:
                if left != 0:
                    err = FRAME_ERR_COBS
                elif fill < MIN_PAYLOAD:
                    err = FRAME_ERR_SHORT
                else:
                    c = crc16(dbuf, 0, fill - 2)
                    if (c & 0xFF) != dbuf[fill - 2] or (c >> 8) != dbuf[fill - 1]:
                        err = FRAME_ERR_CRC
            if err != 0:
                dstate[DEFRAMER_BAD] += 1
                dstate[DEFRAMER_LAST_ERROR] = err
                dstate[DEFRAMER_BAD_BY_REASON + err] += 1
            else:
                dstate[DEFRAMER_GOOD] += 1
                for i in range(fill):
                    frame_out[i] = dbuf[i]
                length = fill
            fill = 0
            left = 0
            zero = 0
            in_frame = 0
            drop = 0
            continue
        in_frame = 1
        if drop != 0:
            continue
        if left == 0:  # a code byte starts the next block
            if zero:
                if fill >= MAX_PAYLOAD:
                    drop = FRAME_ERR_LONG
                    continue
                dbuf[fill] = 0
                fill += 1
            left = b - 1
            zero = 1 if b != 0xFF else 0
        else:
            if fill >= MAX_PAYLOAD:
                drop = FRAME_ERR_LONG
                continue
            dbuf[fill] = b
            fill += 1
            left -= 1
    # At the chunk's end the next call starts afresh.
    dstate[_D_POS] = 0 if length == 0 else pos
    dstate[_D_FILL] = fill
    dstate[_D_LEFT] = left
    dstate[_D_ZERO] = zero
    dstate[_D_IN_FRAME] = in_frame
    dstate[_D_DROP] = drop
    return length


# ---------------------------------------------------------------------------
# Per-sample messages
# ---------------------------------------------------------------------------
@_kernel
def _le16(b0: int, b1: int) -> int:
    return np.int64(b0) | (np.int64(b1) << 8)


@_kernel
def _le32(b0: int, b1: int, b2: int, b3: int) -> int:
    return np.int64(b0) | (np.int64(b1) << 8) | (np.int64(b2) << 16) | (np.int64(b3) << 24)


@_kernel
def _put_u32(p: np.ndarray, i: int, v: int) -> None:
    p[i] = v & 0xFF
    p[i + 1] = (v >> 8) & 0xFF
    p[i + 2] = (v >> 16) & 0xFF
    p[i + 3] = (v >> 24) & 0xFF


@_kernel
def decode_sample(frame: np.ndarray, n: int, adc_out: np.ndarray, fields_out: np.ndarray) -> int:
    """Decode a SAMPLE payload frame[:n] (as given by deframe_next).

    Writes fields_out[SAMPLE_SEQ, SAMPLE_COUNTER, SAMPLE_CLOCK_US, SAMPLE_CMD_SEQ,
    SAMPLE_STATUS] and adc_out[:k]; returns k (input channels), ERR_NOT_THIS_TYPE
    for another message type, ERR_BAD_LENGTH for a malformed body or too many
    channels for adc_out, ERR_BAD_ARGUMENT if fields_out is too short.
    """
    extra = n - MIN_PAYLOAD - _SAMPLE_FIXED
    k = extra // 2
    if n < MIN_PAYLOAD or n > frame.shape[0] or fields_out.shape[0] < SAMPLE_NFIELDS:
        k = ERR_BAD_ARGUMENT
    elif frame[0] != MSG_SAMPLE:
        k = ERR_NOT_THIS_TYPE
    elif extra < 2 or extra % 2 != 0 or k > MAX_CHANNELS or k > adc_out.shape[0]:
        k = ERR_BAD_LENGTH
    else:
        fields_out[SAMPLE_SEQ] = _le16(frame[1], frame[2])
        fields_out[SAMPLE_COUNTER] = _le32(frame[3], frame[4], frame[5], frame[6])
        fields_out[SAMPLE_CLOCK_US] = _le32(frame[7], frame[8], frame[9], frame[10])
        fields_out[SAMPLE_CMD_SEQ] = _le16(frame[11], frame[12])
        fields_out[SAMPLE_STATUS] = frame[13]
        for i in range(k):
            adc_out[i] = _le16(frame[14 + 2 * i], frame[15 + 2 * i])
    return k


@_kernel
def _counts_ok(counts: np.ndarray) -> bool:
    ok = 1 <= counts.shape[0] <= MAX_CHANNELS
    for i in range(counts.shape[0]):
        ok = ok and 0 <= counts[i] <= 0xFFFF
    return ok


@_kernel
def encode_command(seq: int, answers_counter: int, dac_counts: np.ndarray, out: np.ndarray) -> int:
    """Encode a COMMAND frame (wire bytes incl. 0x00) into out; returns its length.

    seq is taken modulo 2**16 and answers_counter modulo 2**32.  One DAC count
    per board output (len(dac_counts), 1..MAX_CHANNELS), each 0..65535; else
    ERR_BAD_ARGUMENT and out is untouched.
    """
    k = dac_counts.shape[0]
    payload_len = _HEADER + _COMMAND_FIXED + 2 * k + 2
    nbytes = ERR_BAD_ARGUMENT
    if _counts_ok(dac_counts) and out.shape[0] >= payload_len + 2:
        out[1] = MSG_COMMAND
        out[2] = seq & 0xFF
        out[3] = (seq >> 8) & 0xFF
        _put_u32(out, 4, answers_counter)
        for i in range(k):
            c = np.int64(dac_counts[i])
            out[8 + 2 * i] = c & 0xFF
            out[9 + 2 * i] = c >> 8
        nbytes = _finish_frame(out, payload_len)
    return nbytes


@_kernel
def encode_keepalive(seq: int, out: np.ndarray) -> int:
    """Encode a KEEPALIVE frame (wire bytes incl. 0x00) into out; returns its length."""
    nbytes = ERR_BAD_ARGUMENT
    if out.shape[0] >= MIN_PAYLOAD + 2:
        out[1] = MSG_KEEPALIVE
        out[2] = seq & 0xFF
        out[3] = (seq >> 8) & 0xFF
        nbytes = _finish_frame(out, MIN_PAYLOAD)
    return nbytes


@_kernel
def encode_sample(
    seq: int,
    counter: int,
    clock_us: int,
    cmd_seq: int,
    status: int,
    adc_counts: np.ndarray,
    out: np.ndarray,
) -> int:
    """Encode a SAMPLE frame (board side, for emulators); returns its wire length."""
    k = adc_counts.shape[0]
    payload_len = _HEADER + _SAMPLE_FIXED + 2 * k + 2
    nbytes = ERR_BAD_ARGUMENT
    if _counts_ok(adc_counts) and out.shape[0] >= payload_len + 2:
        out[1] = MSG_SAMPLE
        out[2] = seq & 0xFF
        out[3] = (seq >> 8) & 0xFF
        _put_u32(out, 4, counter)
        _put_u32(out, 8, clock_us)
        out[12] = cmd_seq & 0xFF
        out[13] = (cmd_seq >> 8) & 0xFF
        out[14] = status & 0xFF
        for i in range(k):
            c = np.int64(adc_counts[i])
            out[15 + 2 * i] = c & 0xFF
            out[16 + 2 * i] = c >> 8
        nbytes = _finish_frame(out, payload_len)
    return nbytes


@_kernel
def decode_command(frame: np.ndarray, n: int, dac_out: np.ndarray, fields_out: np.ndarray) -> int:
    """Decode a COMMAND payload (board side, for emulators) into fields_out and dac_out.

    fields_out[COMMAND_SEQ], fields_out[COMMAND_ANSWERS]; returns the number of DAC
    counts, or ERR_NOT_THIS_TYPE / ERR_BAD_LENGTH / ERR_BAD_ARGUMENT.
    """
    extra = n - MIN_PAYLOAD - _COMMAND_FIXED
    k = extra // 2
    if n < MIN_PAYLOAD or n > frame.shape[0] or fields_out.shape[0] < COMMAND_NFIELDS:
        k = ERR_BAD_ARGUMENT
    elif frame[0] != MSG_COMMAND:
        k = ERR_NOT_THIS_TYPE
    elif extra < 2 or extra % 2 != 0 or k > MAX_CHANNELS or k > dac_out.shape[0]:
        k = ERR_BAD_LENGTH
    else:
        fields_out[COMMAND_SEQ] = _le16(frame[1], frame[2])
        fields_out[COMMAND_ANSWERS] = _le32(frame[3], frame[4], frame[5], frame[6])
        for i in range(k):
            dac_out[i] = _le16(frame[7 + 2 * i], frame[8 + 2 * i])
    return k


# ---------------------------------------------------------------------------
# Plain Python helpers for the rare messages
# ---------------------------------------------------------------------------
class FrameError(ValueError):
    """Bad bytes or bad field values given to the plain Python helpers."""


class VersionError(FrameError):
    """A HELLO of a protocol version this host does not speak (PROTOCOL.md §9)."""


def _check_int(name: str, value: int, lo: int, hi: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise FrameError(f"{name} must be an integer, got {value!r}")
    if not lo <= value <= hi:
        raise FrameError(f"{name} = {value} is outside {lo}..{hi}")


def _check_counts(name: str, counts: tuple[int, ...]) -> None:
    if not 1 <= len(counts) <= MAX_CHANNELS:
        raise FrameError(f"{name} needs 1..{MAX_CHANNELS} values, got {len(counts)}")
    for i, c in enumerate(counts):
        _check_int(f"{name}[{i}]", c, 0, 0xFFFF)


def _counts_from(body: bytes, start: int, name: str) -> tuple[int, ...]:
    rest = len(body) - start
    if rest < 2 or rest % 2 or rest // 2 > MAX_CHANNELS:
        raise FrameError(f"{name}: {rest} bytes of counts is not 1..{MAX_CHANNELS} u16 values")
    return struct.unpack_from(f"<{rest // 2}H", body, start)


def _expect_len(name: str, body: bytes, length: int) -> None:
    if len(body) != length:
        raise FrameError(f"{name} body must be {length} bytes, got {len(body)}")


@dataclass(frozen=True)
class _Empty:
    """A message without a body."""

    MSG_TYPE: ClassVar[int] = -1

    def to_body(self) -> bytes:
        return b""

    @classmethod
    def from_body(cls, body: bytes) -> _Empty:
        _expect_len(cls.__name__, body, 0)
        return cls()


@dataclass(frozen=True)
class GetHello(_Empty):
    """host -> board: ask for HELLO."""

    MSG_TYPE: ClassVar[int] = MSG_GET_HELLO


@dataclass(frozen=True)
class Start(_Empty):
    """host -> board: start sampling (board must be READY)."""

    MSG_TYPE: ClassVar[int] = MSG_START


@dataclass(frozen=True)
class Stop(_Empty):
    """host -> board: stop sampling, output the fault value."""

    MSG_TYPE: ClassVar[int] = MSG_STOP


@dataclass(frozen=True)
class KeepAlive(_Empty):
    """host -> board: reset the watchdog without changing the output."""

    MSG_TYPE: ClassVar[int] = MSG_KEEPALIVE


@dataclass(frozen=True)
class GetStatus(_Empty):
    """host -> board: ask for STATUS."""

    MSG_TYPE: ClassVar[int] = MSG_GET_STATUS


_HELLO_FMT = struct.Struct(f"<B{IDENTITY_BYTES}sBBBBiiiiIIIBIBB")
CAP_LAW = 0x01  # HELLO.capabilities: the board evaluates the current law (PROTOCOL.md §10)


@dataclass(frozen=True)
class Hello:
    """board -> host: capabilities (PROTOCOL.md §4.1).  Ranges in µV, counts unsigned."""

    MSG_TYPE: ClassVar[int] = MSG_HELLO
    identity: str
    adc_bits: int
    dac_bits: int
    n_inputs: int
    n_outputs: int
    adc_min_uV: int
    adc_max_uV: int
    dac_min_uV: int
    dac_max_uV: int
    max_rate_hz: int
    watchdog_min_us: int
    watchdog_max_us: int
    version: int = PROTOCOL_VERSION
    # What the board can do (§4.1); the defaults describe a board that only converts.
    capabilities: int = 0
    law_queue: int = 0  # laws held ahead (the longest look-ahead, in samples)
    mg_groups: int = 0  # Mg-blocked groups evaluated (distinct [Mg] values)
    max_samples: int = 0  # most samples per SAMPLES frame

    @property
    def evaluates_laws(self) -> bool:
        """Whether the board evaluates the current law (PROTOCOL.md §10)."""
        return bool(self.capabilities & CAP_LAW)

    def __post_init__(self) -> None:
        if not isinstance(self.identity, str):
            raise FrameError(f"identity must be a str, got {self.identity!r}")
        try:
            raw = self.identity.encode("ascii")
        except UnicodeEncodeError as exc:
            raise FrameError(f"identity {self.identity!r} is not ASCII") from exc
        if len(raw) > IDENTITY_BYTES or b"\x00" in raw:
            raise FrameError(f"identity {self.identity!r}: at most {IDENTITY_BYTES} chars, no NUL")
        _check_int("version", self.version, 0, 0xFF)
        _check_int("adc_bits", self.adc_bits, 1, 16)
        _check_int("dac_bits", self.dac_bits, 1, 16)
        _check_int("n_inputs", self.n_inputs, 1, MAX_CHANNELS)
        _check_int("n_outputs", self.n_outputs, 1, MAX_CHANNELS)
        for name in ("adc_min_uV", "adc_max_uV", "dac_min_uV", "dac_max_uV"):
            _check_int(name, getattr(self, name), -(2**31), 2**31 - 1)
        if self.adc_min_uV >= self.adc_max_uV or self.dac_min_uV >= self.dac_max_uV:
            raise FrameError("each range needs min < max")
        _check_int("max_rate_hz", self.max_rate_hz, 1, 2**32 - 1)
        _check_int("watchdog_min_us", self.watchdog_min_us, 1, 2**32 - 1)
        _check_int("watchdog_max_us", self.watchdog_max_us, self.watchdog_min_us, 2**32 - 1)
        _check_int("capabilities", self.capabilities, 0, 0xFF)
        _check_int("law_queue", self.law_queue, 0, 2**32 - 1)
        _check_int("mg_groups", self.mg_groups, 0, 0xFF)
        _check_int("max_samples", self.max_samples, 0, 0xFF)

    def to_body(self) -> bytes:
        return _HELLO_FMT.pack(
            self.version,
            self.identity.encode("ascii"),
            self.adc_bits,
            self.dac_bits,
            self.n_inputs,
            self.n_outputs,
            self.adc_min_uV,
            self.adc_max_uV,
            self.dac_min_uV,
            self.dac_max_uV,
            self.max_rate_hz,
            self.watchdog_min_us,
            self.watchdog_max_us,
            self.capabilities,
            self.law_queue,
            self.mg_groups,
            self.max_samples,
        )

    @classmethod
    def from_body(cls, body: bytes) -> Hello:
        # The version byte first: another version may have another length (§9).
        if body and body[0] != PROTOCOL_VERSION:
            raise VersionError(
                f"the board speaks protocol version {body[0]}; this host speaks only version "
                f"{PROTOCOL_VERSION} (update the board's firmware)"
            )
        _expect_len("HELLO", body, _HELLO_FMT.size)
        v = _HELLO_FMT.unpack(body)
        try:
            identity = v[1].rstrip(b"\x00").decode("ascii")
        except UnicodeDecodeError as exc:
            raise FrameError(f"HELLO identity {v[1]!r} is not ASCII") from exc
        return cls(identity, *v[2:13], v[0], *v[13:])


_SAMPLE_FMT = struct.Struct("<IIHB")


@dataclass(frozen=True)
class Sample:
    """board -> host: one sample (PROTOCOL.md §4.2)."""

    MSG_TYPE: ClassVar[int] = MSG_SAMPLE
    counter: int
    clock_us: int
    cmd_seq: int
    status: int
    adc_counts: tuple[int, ...]

    def __post_init__(self) -> None:
        object.__setattr__(self, "adc_counts", tuple(self.adc_counts))
        _check_int("counter", self.counter, 0, 2**32 - 1)
        _check_int("clock_us", self.clock_us, 0, 2**32 - 1)
        _check_int("cmd_seq", self.cmd_seq, 0, 0xFFFF)
        _check_int("status", self.status, 0, 0xFF)
        _check_counts("adc_counts", self.adc_counts)

    def to_body(self) -> bytes:
        fixed = _SAMPLE_FMT.pack(self.counter, self.clock_us, self.cmd_seq, self.status)
        return fixed + struct.pack(f"<{len(self.adc_counts)}H", *self.adc_counts)

    @classmethod
    def from_body(cls, body: bytes) -> Sample:
        if len(body) < _SAMPLE_FMT.size:
            raise FrameError(f"SAMPLE body of {len(body)} bytes is too short")
        v = _SAMPLE_FMT.unpack_from(body)
        return cls(*v, adc_counts=_counts_from(body, _SAMPLE_FMT.size, "SAMPLE"))


_STATUS_FMT = struct.Struct("<BBHBIIIIIIIIIBI")


@dataclass(frozen=True)
class Status:
    """board -> host: state, counters and active configuration (PROTOCOL.md §4.3)."""

    MSG_TYPE: ClassVar[int] = MSG_STATUS
    state: int
    status: int
    ack_seq: int
    result: int
    counter: int
    bad_frames: int
    unknown_messages: int
    rejected: int
    late_commands: int
    missing_commands: int
    watchdog_trips: int
    commands_applied: int
    rate_hz: int
    n_inputs: int
    watchdog_us: int

    def __post_init__(self) -> None:
        _check_int("state", self.state, 0, 2)
        _check_int("status", self.status, 0, 0xFF)
        _check_int("ack_seq", self.ack_seq, 0, 0xFFFF)
        _check_int("result", self.result, 0, 0xFF)
        _check_int("n_inputs", self.n_inputs, 0, MAX_CHANNELS)
        for name in (
            "counter",
            "bad_frames",
            "unknown_messages",
            "rejected",
            "late_commands",
            "missing_commands",
            "watchdog_trips",
            "commands_applied",
            "rate_hz",
            "watchdog_us",
        ):
            _check_int(name, getattr(self, name), 0, 2**32 - 1)

    def to_body(self) -> bytes:
        return _STATUS_FMT.pack(
            self.state,
            self.status,
            self.ack_seq,
            self.result,
            self.counter,
            self.bad_frames,
            self.unknown_messages,
            self.rejected,
            self.late_commands,
            self.missing_commands,
            self.watchdog_trips,
            self.commands_applied,
            self.rate_hz,
            self.n_inputs,
            self.watchdog_us,
        )

    @classmethod
    def from_body(cls, body: bytes) -> Status:
        _expect_len("STATUS", body, _STATUS_FMT.size)
        return cls(*_STATUS_FMT.unpack(body))


_CONFIGURE_FMT = struct.Struct("<BIBI")


@dataclass(frozen=True)
class Configure:
    """host -> board: sample rate, input channels, watchdog, fault output (§4.5)."""

    MSG_TYPE: ClassVar[int] = MSG_CONFIGURE
    rate_hz: int
    n_inputs: int
    watchdog_us: int
    fault_counts: tuple[int, ...]
    version: int = PROTOCOL_VERSION

    def __post_init__(self) -> None:
        object.__setattr__(self, "fault_counts", tuple(self.fault_counts))
        _check_int("version", self.version, 0, 0xFF)
        _check_int("rate_hz", self.rate_hz, 0, 2**32 - 1)
        _check_int("n_inputs", self.n_inputs, 0, 0xFF)
        _check_int("watchdog_us", self.watchdog_us, 0, 2**32 - 1)
        _check_counts("fault_counts", self.fault_counts)

    def to_body(self) -> bytes:
        fixed = _CONFIGURE_FMT.pack(self.version, self.rate_hz, self.n_inputs, self.watchdog_us)
        return fixed + struct.pack(f"<{len(self.fault_counts)}H", *self.fault_counts)

    @classmethod
    def from_body(cls, body: bytes) -> Configure:
        if len(body) < _CONFIGURE_FMT.size:
            raise FrameError(f"CONFIGURE body of {len(body)} bytes is too short")
        version, rate_hz, n_inputs, watchdog_us = _CONFIGURE_FMT.unpack_from(body)
        if version != PROTOCOL_VERSION:
            raise FrameError(f"CONFIGURE for protocol version {version}, not {PROTOCOL_VERSION}")
        counts = _counts_from(body, _CONFIGURE_FMT.size, "CONFIGURE")
        return cls(rate_hz, n_inputs, watchdog_us, counts, version)


@dataclass(frozen=True)
class Command:
    """host -> board: DAC counts answering sample `answers_counter` (§4.6)."""

    MSG_TYPE: ClassVar[int] = MSG_COMMAND
    answers_counter: int
    dac_counts: tuple[int, ...] = field(default=())

    def __post_init__(self) -> None:
        object.__setattr__(self, "dac_counts", tuple(self.dac_counts))
        _check_int("answers_counter", self.answers_counter, 0, 2**32 - 1)
        _check_counts("dac_counts", self.dac_counts)

    def to_body(self) -> bytes:
        k = len(self.dac_counts)
        return struct.pack(f"<I{k}H", self.answers_counter, *self.dac_counts)

    @classmethod
    def from_body(cls, body: bytes) -> Command:
        if len(body) < _COMMAND_FIXED:
            raise FrameError(f"COMMAND body of {len(body)} bytes is too short")
        (answers,) = struct.unpack_from("<I", body)
        return cls(answers, _counts_from(body, _COMMAND_FIXED, "COMMAND"))


Message = (
    Hello | Sample | Status | GetHello | Configure | Start | Stop | Command | KeepAlive | GetStatus
)

_BY_TYPE: dict[int, type] = {
    cls.MSG_TYPE: cls
    for cls in (
        Hello,
        Sample,
        Status,
        GetHello,
        Configure,
        Start,
        Stop,
        Command,
        KeepAlive,
        GetStatus,
    )
}


def encode_message(message: Message, seq: int) -> bytes:
    """Wire bytes (COBS-encoded payload and the 0x00 delimiter) of one message."""
    if type(message) not in _BY_TYPE.values():
        raise FrameError(f"not a protocol message: {message!r}")
    _check_int("seq", seq, 0, 0xFFFF)
    body = np.frombuffer(message.to_body(), dtype=np.uint8)
    out = np.zeros(MAX_WIRE, dtype=np.uint8)
    n = encode_frame(message.MSG_TYPE, seq, body, body.shape[0], out)
    if n < 0:
        raise FrameError(f"{type(message).__name__} body is too long for one frame")
    return out[:n].tobytes()


def decode_wire(wire: bytes) -> bytes:
    """Payload (type, seq, body, CRC) of exactly one frame; the trailing 0x00 is optional."""
    data = bytes(wire)
    if data.endswith(b"\x00"):
        data = data[:-1]
    if not data:
        raise FrameError("empty frame")
    if b"\x00" in data:
        raise FrameError("more than one frame: 0x00 inside the data")
    if len(data) > MAX_WIRE - 1:
        raise FrameError(f"frame of {len(data)} bytes is longer than {MAX_WIRE - 1}")
    src = np.frombuffer(data, dtype=np.uint8)
    dst = np.zeros(MAX_WIRE, dtype=np.uint8)
    n = cobs_decode(src, src.shape[0], dst)
    if n < 0:
        raise FrameError("COBS: a block runs past the end of the frame")
    if n < MIN_PAYLOAD:
        raise FrameError(f"payload of {n} bytes is shorter than {MIN_PAYLOAD}")
    if n > MAX_PAYLOAD:
        raise FrameError(f"payload of {n} bytes is longer than {MAX_PAYLOAD}")
    want = crc16(dst, 0, n - 2)
    got = int(dst[n - 2]) | (int(dst[n - 1]) << 8)
    if want != got:
        raise FrameError(f"CRC mismatch: frame says 0x{got:04X}, data gives 0x{want:04X}")
    return dst[:n].tobytes()


def parse_payload(payload: bytes | np.ndarray) -> tuple[int, Message]:
    """(seq, message) of a CRC-checked payload, e.g. frame_out[:n] from deframe_next."""
    data = bytes(payload)
    if len(data) < MIN_PAYLOAD:
        raise FrameError(f"payload of {len(data)} bytes is shorter than {MIN_PAYLOAD}")
    msg_type = data[0]
    seq = data[1] | (data[2] << 8)
    cls = _BY_TYPE.get(msg_type)
    if cls is None:
        raise FrameError(f"unknown message type 0x{msg_type:02X}")
    return seq, cls.from_body(data[_HEADER:-2])


def decode_message(wire: bytes) -> tuple[int, Message]:
    """(seq, message) of exactly one frame's wire bytes."""
    return parse_payload(decode_wire(wire))
