"""Mutated-frame fuzzing of both decoders (the numba codec and the C core).

Used by tests/test_protocol_fuzz.py (marked slow) and bench/bench_protocol.py.

Public names:

* ``make_fuzz_stream(n_frames, seed) -> FuzzStream`` - valid frames of every message
  type (and unknown types, over-long payloads), about two thirds of them mutated
  (bit flips, overwritten / inserted / deleted bytes, truncation, lost delimiter,
  an inserted 0x00, replacement by junk), concatenated into one byte stream.
* ``FuzzStream`` - the stream and, per frame, its original payload's hash and whether
  it must come out (untouched, after an intact delimiter).
* ``numba_deframe_bulk(stream, n, chunk, orig_hash, must, counts) -> None`` - the
  compiled deframer over the whole stream in ``chunk``-byte reads; every accepted
  frame is matched in order against the originals (``FUZZ_MISSED``, ``FUZZ_FORGED``),
  re-checked with a bit-by-bit CRC and decoded with ``decode_sample`` /
  ``decode_command`` when of that type.  ``counts`` is int64[FUZZ_NCOUNTS].
* ``run_numba(fuzz_stream, chunk) -> dict`` and ``run_c(binary, stream, chunk, tmpdir) -> dict``
  - the two decoders over the same stream, with the same keys where they overlap.
* ``reference_deframe(data) -> (payloads, bad)`` - an independent deframer built
  from the general-purpose ``cobs`` package (test extra) and ``binascii.crc_hqx``.
"""

from __future__ import annotations

import binascii
import json
import os
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from clampcore.firmware_protocol.codec import (
    COMMAND_NFIELDS,
    DEFRAMER_BAD,
    DEFRAMER_BAD_BY_REASON,
    DEFRAMER_GOOD,
    DEFRAMER_STATE_SIZE,
    FRAME_ERR_COBS,
    FRAME_ERR_CRC,
    MAX_CHANNELS,
    MAX_PAYLOAD,
    MAX_WIRE,
    MIN_PAYLOAD,
    MSG_COMMAND,
    MSG_CONFIGURE,
    MSG_GET_HELLO,
    MSG_GET_STATUS,
    MSG_HELLO,
    MSG_KEEPALIVE,
    MSG_SAMPLE,
    MSG_START,
    MSG_STATUS,
    MSG_STOP,
    SAMPLE_NFIELDS,
    cobs_decode,
    decode_command,
    decode_sample,
    deframe_next,
    encode_frame,
)
from numba import njit

FUZZ_GOOD = 0
FUZZ_BAD = 1
FUZZ_ERR_COBS = 2
FUZZ_ERR_SHORT = 3
FUZZ_ERR_LONG = 4
FUZZ_ERR_CRC = 5
FUZZ_DIGEST = 6
FUZZ_ACCEPTED_CRC_FAIL = 7
FUZZ_SAMPLES = 8
FUZZ_COMMANDS = 9
FUZZ_MISSED = 10
FUZZ_FORGED = 11
FUZZ_NCOUNTS = 12

_FNV_OFFSET = 2166136261  # FNV-1a 32-bit offset basis (Fowler, Noll, Vo)
_FNV_PRIME = 16777619  # FNV 32-bit prime
_MAX_FRAME_BYTES = MAX_WIRE + 48  # longest frame after mutation (long payloads + junk)


@njit(cache=True, nogil=True)
def _rand(rng: np.ndarray) -> int:
    """xorshift32 (Marsaglia 2003, shifts 13/17/5); state in rng[0], never 0."""
    x = rng[0]
    x ^= (x << 13) & 0xFFFFFFFF
    x ^= x >> 17
    x ^= (x << 5) & 0xFFFFFFFF
    rng[0] = x
    return x


@njit(cache=True, nogil=True)
def _below(rng: np.ndarray, n: int) -> int:
    return _rand(rng) % n


@njit(cache=True, nogil=True)
def _build_body(rng: np.ndarray, body: np.ndarray) -> tuple[int, int]:
    """A plausible random message: returns (type, body length)."""
    r = _below(rng, 100)
    if r < 45:  # COMMAND, 1 or 2 outputs, answering roughly the board's counter
        k = 1 + _below(rng, 2)
        # small counters, so that a fuzzed board (restarted often by START) applies some
        a = _below(rng, 32) if _below(rng, 8) else _rand(rng)
        for j in range(4):
            body[j] = (a >> (8 * j)) & 0xFF
        for j in range(2 * k):
            body[4 + j] = _below(rng, 256)
        return MSG_COMMAND, 4 + 2 * k
    if r < 55:
        return MSG_KEEPALIVE, 0
    if r < 60:  # CONFIGURE: mostly version 1 and sensible values
        body[0] = 1 if _below(rng, 10) else _below(rng, 256)
        rate = 500 + _below(rng, 2000)
        wd = 1000 + _below(rng, 100000)
        for j in range(4):
            body[1 + j] = (rate >> (8 * j)) & 0xFF
            body[6 + j] = (wd >> (8 * j)) & 0xFF
        body[5] = _below(rng, 4)
        k = 1 + _below(rng, 2)
        for j in range(2 * k):
            body[10 + j] = _below(rng, 256)
        return MSG_CONFIGURE, 10 + 2 * k
    if r < 70:
        kinds = (MSG_START, MSG_STOP, MSG_GET_STATUS, MSG_GET_HELLO)
        return kinds[_below(rng, 4)], 0
    if r < 85:  # SAMPLE with 1..4 inputs
        k = 1 + _below(rng, 4)
        for j in range(11 + 2 * k):
            body[j] = _below(rng, 256)
        return MSG_SAMPLE, 11 + 2 * k
    if r < 90:  # HELLO / STATUS sized bodies
        if _below(rng, 2):
            n = 49
            t = MSG_HELLO
        else:
            n = 46
            t = MSG_STATUS
        for j in range(n):
            body[j] = _below(rng, 256)
        return t, n
    if r < 99:  # unknown type, short random body
        n = _below(rng, 12)
        for j in range(n):
            body[j] = _below(rng, 256)
        return 0x10 + _below(rng, 0x60), n
    # body as long as a frame may be (payload 254) or a little more (encoded by hand below)
    n = MAX_PAYLOAD - MIN_PAYLOAD + _below(rng, 8)
    for j in range(n):
        body[j] = _below(rng, 256)
    return MSG_SAMPLE, n


@njit(cache=True, nogil=True)
def _encode_any(msg_type: int, seq: int, body: np.ndarray, n: int, out: np.ndarray) -> int:
    """Like encode_frame, but also for payloads over MAX_PAYLOAD (general COBS)."""
    if MIN_PAYLOAD + n <= MAX_PAYLOAD:
        return encode_frame(msg_type, seq, body, n, out)
    payload = np.empty(MIN_PAYLOAD + n, dtype=np.uint8)
    payload[0] = msg_type
    payload[1] = seq & 0xFF
    payload[2] = (seq >> 8) & 0xFF
    payload[3 : 3 + n] = body[:n]
    c = _crc_bitwise(payload, 3 + n)
    payload[3 + n] = c & 0xFF
    payload[4 + n] = c >> 8
    # general COBS (Cheshire & Baker 1999)
    code_at = 0
    o = 1
    code = 1
    for b in payload:
        if b == 0:
            out[code_at] = code
            code_at = o
            o += 1
            code = 1
        else:
            out[o] = b
            o += 1
            code += 1
            if code == 0xFF:
                out[code_at] = code
                code_at = o
                o += 1
                code = 1
    out[code_at] = code
    out[o] = 0
    return o + 1


@njit(cache=True, nogil=True)
def _crc_bitwise(p: np.ndarray, n: int) -> int:
    """CRC-16/CCITT-FALSE bit by bit (independent of the codec's table)."""
    c = 0xFFFF
    for i in range(n):
        c ^= np.int64(p[i]) << 8
        for _ in range(8):
            c = ((c << 1) ^ 0x1021) & 0xFFFF if c & 0x8000 else (c << 1) & 0xFFFF
    return c


@njit(cache=True, nogil=True)
def _mutate(rng: np.ndarray, f: np.ndarray, n: int) -> tuple[int, int, int]:
    """Mutate frame f[:n] (last byte is its delimiter) in place.

    Returns (new length, mutated?, delimiter kept?).
    """
    r = _below(rng, 100)
    body = n - 1  # encoded bytes before the delimiter
    if r < 35 or body < 1:
        return n, 0, 1
    if r < 55:  # flip 1..3 bits in the encoded bytes
        for _ in range(1 + _below(rng, 3)):
            j = _below(rng, body)
            f[j] ^= 1 << _below(rng, 8)
        return n, 1, 1
    if r < 63:  # overwrite one byte
        j = _below(rng, body)
        f[j] = _below(rng, 256)
        return n, 1, 1
    if r < 70:  # insert a random byte
        j = _below(rng, body + 1)
        for k in range(n, j, -1):
            f[k] = f[k - 1]
        f[j] = _below(rng, 256)
        return n + 1, 1, 1
    if r < 77:  # delete one byte
        j = _below(rng, body)
        for k in range(j, n - 1):
            f[k] = f[k + 1]
        return n - 1, 1, 1
    if r < 84:  # truncate, keep the delimiter
        keep = _below(rng, body)
        f[keep] = 0
        return keep + 1, 1, 1
    if r < 89:  # the delimiter is lost: runs into the next frame
        return n - 1, 1, 0
    if r < 94:  # a 0x00 appears inside: two broken pieces
        j = _below(rng, body)
        f[j] = 0
        return n, 1, 1
    # junk instead of the frame, no delimiter of its own
    m = 1 + _below(rng, 40)
    for k in range(m):
        f[k] = _below(rng, 256)
    return m, 1, 1 if f[m - 1] == 0 else 0  # junk ending in 0x00 delimits what follows


@njit(cache=True, nogil=True)
def _fnv(h: int, p: np.ndarray, m: int) -> int:
    """FNV-1a 32-bit over the length byte then the bytes of p[:m] (as ccb_mem_digest)."""
    h = ((h ^ (m & 0xFF)) * _FNV_PRIME) & 0xFFFFFFFF
    for j in range(m):
        h = ((h ^ p[j]) * _FNV_PRIME) & 0xFFFFFFFF
    return h


@njit(cache=True, nogil=True)
def _fill_stream(
    n_frames: int,
    seed: int,
    stream: np.ndarray,
    orig_hash: np.ndarray,
    must: np.ndarray,
    info: np.ndarray,
) -> int:
    rng = np.zeros(1, dtype=np.int64)
    rng[0] = seed & 0xFFFFFFFF
    if rng[0] == 0:
        rng[0] = 0x9E3779B9  # xorshift state must not be 0; any nonzero constant works
    body = np.zeros(MAX_WIRE + 16, dtype=np.uint8)
    frame = np.zeros(_MAX_FRAME_BYTES + 8, dtype=np.uint8)
    payload = np.zeros(_MAX_FRAME_BYTES + 8, dtype=np.uint8)
    pos = 0
    prev_delim = 1
    mutated = 0
    made = 0
    for i in range(n_frames):
        if pos + _MAX_FRAME_BYTES > stream.shape[0]:
            break
        t, blen = _build_body(rng, body)
        n = _encode_any(t, i & 0xFFFF, body, blen, frame)
        m = cobs_decode(frame, n - 1, payload)
        orig_hash[i] = _fnv(_FNV_OFFSET, payload, m)
        n, was_mutated, delim = _mutate(rng, frame, n)
        mutated += was_mutated
        must[i] = 1 if (was_mutated == 0 and prev_delim and m <= MAX_PAYLOAD) else 0
        prev_delim = delim
        stream[pos : pos + n] = frame[:n]
        pos += n
        made += 1
    stream[pos] = 0  # close the last frame
    pos += 1
    info[0] = made
    info[1] = mutated
    return pos


@dataclass(frozen=True)
class FuzzStream:
    """A mutated stream and, per frame made, its original payload's FNV-1a hash and
    whether it must come out (untouched, after an intact delimiter, not over-long)."""

    data: np.ndarray
    orig_hash: np.ndarray
    must: np.ndarray
    mutated: int

    @property
    def n_frames(self) -> int:
        return int(self.orig_hash.shape[0])

    @property
    def must_count(self) -> int:
        return int(self.must.sum())


def make_fuzz_stream(n_frames: int, seed: int) -> FuzzStream:
    """n_frames frames (about 2/3 mutated) as one uint8 stream; fixed by seed."""
    if n_frames < 1:
        raise ValueError(f"n_frames must be >= 1, got {n_frames}")
    size = n_frames * 40 + _MAX_FRAME_BYTES * 64  # ~25 bytes per frame on average
    orig_hash = np.zeros(n_frames, dtype=np.int64)
    must = np.zeros(n_frames, dtype=np.uint8)
    info = np.zeros(2, dtype=np.int64)
    while True:
        stream = np.zeros(size, dtype=np.uint8)
        n = _fill_stream(n_frames, seed, stream, orig_hash, must, info)
        if info[0] == n_frames:
            return FuzzStream(stream[:n].copy(), orig_hash, must, int(info[1]))
        size *= 2


@njit(cache=True, nogil=True)
def numba_deframe_bulk(
    stream: np.ndarray,
    n: int,
    chunk: int,
    orig_hash: np.ndarray,
    must: np.ndarray,
    counts: np.ndarray,
) -> None:
    """The compiled deframer over stream[:n] in chunk-byte reads; fills counts (FUZZ_*).

    Accepted payloads are matched, in order, against the original payloads' hashes:
    an unmatched one is FORGED (a mutated frame whose CRC happened to match); an
    original with must=1 that was skipped is MISSED.
    """
    dstate = np.zeros(DEFRAMER_STATE_SIZE, dtype=np.int64)
    dbuf = np.zeros(MAX_PAYLOAD, dtype=np.uint8)
    frame = np.zeros(MAX_PAYLOAD, dtype=np.uint8)
    adc = np.zeros(MAX_CHANNELS, dtype=np.int64)
    sfields = np.zeros(SAMPLE_NFIELDS, dtype=np.int64)
    cfields = np.zeros(COMMAND_NFIELDS, dtype=np.int64)
    for i in range(FUZZ_NCOUNTS):
        counts[i] = 0
    n_orig = orig_hash.shape[0]
    cursor = 0
    digest = _FNV_OFFSET
    pos = 0
    while pos < n:
        end = min(pos + chunk, n)
        view = stream[pos:end]
        while True:
            m = deframe_next(dstate, dbuf, view, end - pos, frame)
            if m <= 0:
                break
            h = _fnv(_FNV_OFFSET, frame, m)
            digest = _fnv(digest, frame, m)
            j = cursor
            while j < n_orig and orig_hash[j] != h:
                j += 1
            if j == n_orig:
                counts[FUZZ_FORGED] += 1
            else:
                for k in range(cursor, j):
                    counts[FUZZ_MISSED] += must[k]
                cursor = j + 1
            c = _crc_bitwise(frame, m - 2)
            if (c & 0xFF) != frame[m - 2] or (c >> 8) != frame[m - 1]:
                counts[FUZZ_ACCEPTED_CRC_FAIL] += 1
            if frame[0] == MSG_SAMPLE and decode_sample(frame, m, adc, sfields) >= 0:
                counts[FUZZ_SAMPLES] += 1
            if frame[0] == MSG_COMMAND and decode_command(frame, m, adc, cfields) >= 0:
                counts[FUZZ_COMMANDS] += 1
        pos = end
    for k in range(cursor, n_orig):
        counts[FUZZ_MISSED] += must[k]
    for e in range(FRAME_ERR_COBS, FRAME_ERR_CRC + 1):
        counts[FUZZ_ERR_COBS + e - FRAME_ERR_COBS] = dstate[DEFRAMER_BAD_BY_REASON + e]
    counts[FUZZ_GOOD] = dstate[DEFRAMER_GOOD]
    counts[FUZZ_BAD] = dstate[DEFRAMER_BAD]
    counts[FUZZ_DIGEST] = digest


def run_numba(fs: FuzzStream, chunk: int) -> dict[str, int]:
    """Counts from numba_deframe_bulk, keyed like the C driver's output."""
    counts = np.zeros(FUZZ_NCOUNTS, dtype=np.int64)
    numba_deframe_bulk(fs.data, fs.data.shape[0], chunk, fs.orig_hash, fs.must, counts)
    return {
        "good": int(counts[FUZZ_GOOD]),
        "bad": int(counts[FUZZ_BAD]),
        "err_cobs": int(counts[FUZZ_ERR_COBS]),
        "err_short": int(counts[FUZZ_ERR_SHORT]),
        "err_long": int(counts[FUZZ_ERR_LONG]),
        "err_crc": int(counts[FUZZ_ERR_CRC]),
        "digest": int(counts[FUZZ_DIGEST]),
        "accepted_crc_fail": int(counts[FUZZ_ACCEPTED_CRC_FAIL]),
        "samples": int(counts[FUZZ_SAMPLES]),
        "commands": int(counts[FUZZ_COMMANDS]),
        "missed": int(counts[FUZZ_MISSED]),
        "forged": int(counts[FUZZ_FORGED]),
    }


def run_c(
    binary: str | os.PathLike[str], stream: np.ndarray, chunk: int, tmpdir: str | os.PathLike[str]
) -> dict[str, int]:
    """Run the C fuzz driver (cboard.build_fuzz_binary) over the stream; its JSON counts.

    Adds ``exit_code``: 0 when the driver's own checks passed, 2 when not, anything
    else (a signal, a sanitizer report) is a crash.
    """
    path = Path(tmpdir) / "fuzz_stream.bin"
    path.write_bytes(stream.tobytes())
    env = dict(os.environ, ASAN_OPTIONS="detect_leaks=0:abort_on_error=0")
    proc = subprocess.run(
        [str(binary), str(path), str(chunk)], capture_output=True, text=True, env=env, check=False
    )
    out: dict[str, int] = {"exit_code": proc.returncode}
    if proc.stdout.strip():
        out.update(json.loads(proc.stdout))
    if proc.returncode not in (0, 2):
        out["stderr"] = proc.stderr[-2000:]  # type: ignore[assignment]
    return out


def reference_deframe(data: bytes) -> tuple[list[bytes], int]:
    """Good payloads and bad-frame count, from the `cobs` package and binascii.

    Independent of this project's code: split at 0x00, ignore empty pieces and the
    unfinished tail, COBS-decode with ``cobs.cobs.decode``, accept 5..254 bytes whose
    last two (little-endian) equal ``binascii.crc_hqx(rest, 0xFFFF)``, which is
    CRC-16/CCITT-FALSE (Python docs: "CRC-CCITT", polynomial x^16+x^12+x^5+1).
    """
    from cobs import cobs  # test extra; imported here so the package does not need it

    good: list[bytes] = []
    bad = 0
    for piece in data.split(b"\x00")[:-1]:
        if not piece:
            continue
        try:
            payload = cobs.decode(piece)
        except cobs.DecodeError:
            bad += 1
            continue
        if not MIN_PAYLOAD <= len(payload) <= MAX_PAYLOAD:
            bad += 1
            continue
        if binascii.crc_hqx(payload[:-2], 0xFFFF) != int.from_bytes(payload[-2:], "little"):
            bad += 1
            continue
        good.append(payload)
    return good, bad
