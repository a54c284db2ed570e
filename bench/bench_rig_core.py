"""What running the C board core costs the simulated rig per sample.

    .venv/bin/python bench/bench_rig_core.py [--repeats 21] [--ticks 200000]

Inside one compiled loop, per iteration, the calls the rig's ``_tick`` makes into the C
core (``simulated_rig.ccore``): the watchdog check, a peek at the board's state, the
tick (ADC in, SAMPLE out: encode, CRC, COBS), a second peek and taking the bytes it
sent; and between ticks one COMMAND frame fed to it (deframe, CRC, apply), as a host in
current mode sends. Baseline measured in the same run: the host's numba codec doing the
same frame work (``codec.encode_sample`` of the same SAMPLE, ``codec.deframe_next`` and
``codec.decode_command`` of the same COMMAND). Medians of repeats, in ns per sample, and
the share of a 20 kHz sample period (50 µs).

Public names: ``main() -> None``.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
from clampcore.firmware_protocol import codec
from clampcore.simulated_rig import ccore
from clampcore.simulated_rig.board import board_hello

from clampcore.jit import kernel

_PERIOD_20KHZ_NS = 50_000  # 1 / 20 kHz


@kernel
def _core_loop(mem: np.ndarray, cmd: np.ndarray, tx: np.ndarray, peek: np.ndarray, n: int) -> int:
    sent = 0
    for k in range(n):
        clock_us = k * 50
        ccore.core_watchdog(mem, clock_us)
        ccore.core_peek(mem, peek)
        ccore.core_tick(mem, 30000 + (k & 255), clock_us)
        ccore.core_peek(mem, peek)
        sent += ccore.core_take_tx(mem, tx)
        ccore.core_feed(mem, cmd, 0, cmd.shape[0], clock_us)
    return sent


@kernel
def _codec_loop(
    cmd: np.ndarray,
    tx: np.ndarray,
    adc: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    frame: np.ndarray,
    dac: np.ndarray,
    fields: np.ndarray,
    n: int,
) -> int:
    sent = 0
    for k in range(n):
        adc[0] = 30000 + (k & 255)
        sent += codec.encode_sample(k & 0xFFFF, k, k * 50, 0, 0, adc, tx)
        m = codec.deframe_next(dstate, dbuf, cmd, cmd.shape[0], frame)
        codec.deframe_next(dstate, dbuf, cmd, cmd.shape[0], frame)
        sent += codec.decode_command(frame, m, dac, fields)
    return sent


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=21)
    parser.add_argument("--ticks", type=int, default=200_000)
    args = parser.parse_args()

    mem = ccore.new_core(board_hello())
    setup = codec.encode_message(codec.Configure(20_000, 1, 60_000_000, (32768,)), 1)
    setup += codec.encode_message(codec.Start(), 2)
    buf = np.frombuffer(setup, dtype=np.uint8).copy()
    ccore.core_feed(mem, buf, 0, buf.size, 0)
    tx = np.zeros(4096, dtype=np.uint8)
    ccore.core_take_tx(mem, tx)
    # One COMMAND fed again each sample: the board applies it once and then counts it as
    # not newer; either way the full deframe, CRC and checks run.
    cmd = np.frombuffer(codec.encode_message(codec.Command(0, (33000,)), 3), dtype=np.uint8)
    cmd = cmd.copy()
    peek = np.zeros(ccore.N_PEEK, dtype=np.int64)
    dstate, dbuf = codec.new_deframer()
    frame = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
    adc = np.zeros(1, dtype=np.int64)
    dac = np.zeros(codec.MAX_CHANNELS, dtype=np.int64)
    fields = np.zeros(codec.COMMAND_NFIELDS, dtype=np.int64)

    _core_loop(mem, cmd, tx, peek, 10)  # compile / load
    _codec_loop(cmd, tx, adc, dstate, dbuf, frame, dac, fields, 10)
    core_ns, codec_ns = [], []
    for _ in range(args.repeats):
        t0 = time.perf_counter_ns()
        _core_loop(mem, cmd, tx, peek, args.ticks)
        core_ns.append((time.perf_counter_ns() - t0) / args.ticks)
        t0 = time.perf_counter_ns()
        _codec_loop(cmd, tx, adc, dstate, dbuf, frame, dac, fields, args.ticks)
        codec_ns.append((time.perf_counter_ns() - t0) / args.ticks)
    core, base = statistics.median(core_ns), statistics.median(codec_ns)
    print(f"per sample, medians of {args.repeats} x {args.ticks} samples:")
    print(f"  C core through the rig's calls : {core:7.0f} ns  "
          f"({100 * core / _PERIOD_20KHZ_NS:.2f}% of a 20 kHz period)")  # fmt: skip
    print(f"  numba codec, same frame work   : {base:7.0f} ns  (baseline)")
    print(f"  ratio                          : {core / base:7.2f}")


if __name__ == "__main__":
    main()
