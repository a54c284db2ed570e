"""One million mutated frames through both decoders (numba codec and C core), no crash.

The stream (firmware_protocol/fuzz.py) holds valid frames of every type, about two
thirds of them mutated: bit flips, overwritten/inserted/deleted bytes, truncation,
lost delimiters, inserted 0x00, junk.  The C side runs under AddressSanitizer and
UBSan where the compiler supports them.  Outside references: a deframer built from
the `cobs` package and binascii.crc_hqx on a prefix of the stream, and the original
payloads (each untouched frame after an intact delimiter must come out, nothing
else may, bar CRC collisions).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import fuzz
from clampcore.firmware_protocol.cbinding import fnv1a_digest
from clampcore.firmware_protocol.cboard import build_fuzz_binary

N_FRAMES = 1_000_000
SEED = 20261201  # fixed
CHUNK = 64  # bytes per read, about what a serial read returns at 20 kHz


@pytest.fixture(scope="module")
def stream() -> fuzz.FuzzStream:
    return fuzz.make_fuzz_stream(N_FRAMES, SEED)


@pytest.fixture(scope="module")
def numba_counts(stream: fuzz.FuzzStream) -> dict[str, int]:
    return fuzz.run_numba(stream, CHUNK)


@pytest.mark.slow
def test_numba_decoder_survives_a_million_mutated_frames(
    stream: fuzz.FuzzStream, numba_counts: dict[str, int]
) -> None:
    assert stream.n_frames == N_FRAMES
    assert stream.mutated > N_FRAMES // 2
    nb = numba_counts
    assert nb["accepted_crc_fail"] == 0  # no accepted frame fails a bit-by-bit CRC
    assert nb["missed"] == 0  # every untouched frame after a delimiter came out
    # A 16-bit check value lets a random corruption through with probability 2^-16
    # (about 1.5e-5 per corrupted frame); allow 1e-4 of the mutated frames.
    assert nb["forged"] <= stream.mutated // 10_000
    assert nb["good"] >= stream.must_count + nb["forged"]
    assert nb["bad"] == nb["err_cobs"] + nb["err_short"] + nb["err_long"] + nb["err_crc"]
    assert min(nb["err_cobs"], nb["err_short"], nb["err_long"], nb["err_crc"]) > 0
    assert nb["samples"] > 0 and nb["commands"] > 0


@pytest.mark.slow
def test_prefix_agrees_with_the_reference_deframer(stream: fuzz.FuzzStream) -> None:
    data = stream.data[:2_000_000].tobytes()
    data = data[: data.rindex(b"\x00") + 1]
    expected, bad = fuzz.reference_deframe(data)  # cobs package + binascii.crc_hqx
    counts = np.zeros(fuzz.FUZZ_NCOUNTS, dtype=np.int64)
    prefix = np.frombuffer(bytearray(data), dtype=np.uint8)
    fuzz.numba_deframe_bulk(prefix, prefix.shape[0], CHUNK, stream.orig_hash, stream.must, counts)
    assert counts[fuzz.FUZZ_GOOD] == len(expected) and counts[fuzz.FUZZ_BAD] == bad
    assert counts[fuzz.FUZZ_DIGEST] == fnv1a_digest(expected)
    assert len(expected) > 30_000


@pytest.mark.slow
def test_c_decoder_and_board_survive_the_same_frames(
    stream: fuzz.FuzzStream, numba_counts: dict[str, int], tmp_path: Path
) -> None:
    # Under AddressSanitizer and UBSan, which tests/conftest.py requires to work here.
    binary = build_fuzz_binary(tmp_path, sanitize=True)
    c = fuzz.run_c(binary, stream.data, CHUNK, tmp_path)
    assert c["exit_code"] == 0, c.get("stderr")  # no crash, no sanitizer report
    assert c["bytes"] == stream.data.shape[0]
    for key in ("good", "bad", "err_cobs", "err_short", "err_long", "err_crc", "digest"):
        assert c[key] == numba_counts[key], key  # byte-for-byte the same decisions
    assert c["accepted_crc_fail"] == 0
    # whatever the board was fed, everything it sent back is made of good frames
    assert c["board_out_bad"] == 0 and c["board_out_bad_crc"] == 0 and c["board_out_good"] > 0
    assert c["board_tx_dropped"] == 0
    # the law-mode pass ran in law mode, with late laws and laws beyond the queue
    assert c["law_ticks"] > len(stream.data) // CHUNK // 2
    assert c["laws_late"] > 0 and c["laws_ahead"] > 0
