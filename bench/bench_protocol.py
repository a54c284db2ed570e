"""Benchmarks of the wire protocol: per-sample codec cost and the million-frame fuzz.

    .venv/bin/python bench/bench_protocol.py [--repeats 21] [--fuzz-frames 1000000]

1. Inside one numba loop, per iteration: deframe a SAMPLE frame from raw bytes (COBS
   + CRC), decode it, encode a COMMAND frame (CRC + COBS).  Target: < 300 ns together.
   Baseline measured in the same run: the same loop that only copies the same bytes
   (the sample frame in, the command frame out).  Medians of repeats and the ratio.
2. The fuzz: N mutated frames through the numba deframer (bulk, in 64-byte reads)
   and through the C deframer and a running C board (C loops, plain -O2 build),
   with frames per second and the counts (zero crashes expected).

Public names: ``main() -> None``.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time

import numpy as np
from clampcore.firmware_protocol import codec, fuzz
from clampcore.firmware_protocol.cboard import build_fuzz_binary, find_c_compiler
from numba import njit


@njit(cache=True, nogil=True)
def _codec_loop(
    wire: np.ndarray,
    n_wire: int,
    reps: int,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    frame: np.ndarray,
    adc: np.ndarray,
    fields: np.ndarray,
    dac: np.ndarray,
    out: np.ndarray,
) -> int:
    check = 0
    for i in range(reps):
        m = codec.deframe_next(dstate, dbuf, wire, n_wire, frame)
        codec.deframe_next(dstate, dbuf, wire, n_wire, frame)  # drains the read: returns 0
        k = codec.decode_sample(frame, m, adc, fields)
        dac[0] = (adc[0] + i) & 0xFFF
        n = codec.encode_command(i, fields[codec.SAMPLE_COUNTER], dac, out)
        check += n + k + out[5]
    return check


@njit(cache=True, nogil=True)
def _copy_loop(
    wire: np.ndarray, n_wire: int, reps: int, frame: np.ndarray, out: np.ndarray, n_out: int
) -> int:
    check = 0
    for i in range(reps):
        for j in range(n_wire):
            frame[j] = wire[j]
        frame[0] = i & 0xFF
        for j in range(n_out):
            out[j] = frame[j]
        check += out[0] + out[n_out - 1]
    return check


def _median_ns(fn, reps: int, repeats: int) -> float:  # type: ignore[no-untyped-def]
    fn(reps)  # compile / warm up
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter_ns()
        fn(reps)
        times.append((time.perf_counter_ns() - t0) / reps)
    return statistics.median(times)


def bench_codec(repeats: int, reps: int = 200_000) -> None:
    wire = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    n_wire = codec.encode_sample(41, 123_456, 7_000_000, 9, 0, np.array([26_214]), wire)
    dstate, dbuf = codec.new_deframer()
    frame = np.zeros(codec.MAX_PAYLOAD, dtype=np.uint8)
    adc = np.zeros(codec.MAX_CHANNELS, dtype=np.int64)
    fields = np.zeros(codec.SAMPLE_NFIELDS, dtype=np.int64)
    dac = np.zeros(1, dtype=np.int64)
    out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    n_cmd = codec.encode_command(1, 1, dac, out)

    def work(r: int) -> int:
        return _codec_loop(wire, n_wire, r, dstate, dbuf, frame, adc, fields, dac, out)

    def base(r: int) -> int:
        return _copy_loop(wire, n_wire, r, frame, out, n_cmd)

    assert work(3) > 0 and dstate[codec.DEFRAMER_BAD] == 0
    t_work = _median_ns(work, reps, repeats)
    t_base = _median_ns(base, reps, repeats)
    print(f"per-sample codec, 1 input / 1 output ({n_wire}-byte sample, {n_cmd}-byte command)")
    print(f"  deframe+decode sample + encode command : {t_work:7.1f} ns   (target < 300 ns)")
    print(f"  baseline: copy the same bytes          : {t_base:7.1f} ns")
    print(f"  ratio                                  : {t_work / t_base:7.1f} x")
    print(f"  (median of {repeats} repeats of {reps} iterations in one numba loop)")


def bench_fuzz(n_frames: int) -> None:
    t0 = time.perf_counter()
    fs = fuzz.make_fuzz_stream(n_frames, seed=20261201)
    t_gen = time.perf_counter() - t0
    fuzz.run_numba(fuzz.make_fuzz_stream(1000, seed=1), 64)  # compile outside the timing
    t0 = time.perf_counter()
    nb = fuzz.run_numba(fs, 64)
    t_nb = time.perf_counter() - t0
    mb = fs.data.shape[0] / 1e6
    print(f"fuzz: {fs.n_frames} frames ({fs.mutated} mutated), {mb:.1f} MB, made in {t_gen:.2f} s")
    print(
        f"  numba deframer : {t_nb:6.2f} s  {fs.n_frames / t_nb / 1e6:5.2f} M frames/s  "
        f"good {nb['good']}  bad {nb['bad']}  (cobs {nb['err_cobs']}, short {nb['err_short']}, "
        f"long {nb['err_long']}, crc {nb['err_crc']})"
    )
    print(
        f"                   untouched frames missed {nb['missed']}, forged by CRC collision "
        f"{nb['forged']}, accepted with bad CRC {nb['accepted_crc_fail']}, crashes 0"
    )
    if find_c_compiler() is None:
        print("  C decoder      : skipped (no C compiler)")
        return
    with tempfile.TemporaryDirectory() as tmp:
        binary = build_fuzz_binary(tmp, sanitize=False)
        t0 = time.perf_counter()
        c = fuzz.run_c(binary, fs.data, 64, tmp)
        t_c = time.perf_counter() - t0
    same = all(c.get(k) == nb[k] for k in ("good", "bad", "digest"))
    crashed = c["exit_code"] not in (0,)
    print(
        f"  C deframer+board: {t_c:5.2f} s (process incl. file read)  good {c.get('good')}  "
        f"bad {c.get('bad')}  same decisions as numba: {same}  crashes {int(crashed)}"
    )
    print(
        f"                   board sent {c.get('board_out_good')} frames, "
        f"{c.get('board_out_bad')} malformed"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=21)
    parser.add_argument("--fuzz-frames", type=int, default=1_000_000)
    args = parser.parse_args()
    if args.repeats < 1 or args.fuzz_frames < 1:
        sys.exit("--repeats and --fuzz-frames must be >= 1")
    bench_codec(args.repeats)
    print()
    bench_fuzz(args.fuzz_frames)


if __name__ == "__main__":
    main()
