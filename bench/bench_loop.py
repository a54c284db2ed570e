"""Benchmark of the real-time loop over a pseudo-terminal against the simulated rig.

1. Host turnaround (a sample frame ready to read -> its command written) of the
   clampcore loop, beside a minimal echo measured the same way on the same
   pseudo-terminal with the same rig in the same run: the echo reads whatever
   came and writes back a constant KEEPALIVE frame, no decoding, no step. That
   is the transport's own floor; the target is a median within 1.5x of it.
   Both against the rig in lockstep (it sends the next sample as soon as it has
   an answer), so each figure is a pure request-response chain.
2. Wall clock: the rig samples on its own clock like hardware. For each rate,
   a run of ``--seconds`` (60 by default) reports the share of samples taken
   under a late command (the board's own count), commands the host never
   sent, and the loop latency as a distribution (share of commands in force
   1, 2, 3, ... samples after the sample they answer). Also the highest rate
   with under 0.1% late commands. Optionally with /dev/cpu_dma_latency held at 0.

Machines here are shared and noisy: figures are medians and percentiles, and
each comparison is measured in the same run.

    .venv/bin/python bench/bench_loop.py [--seconds 60] [--rates 5000,10000,20000]

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

from clampcore.board_link import BoardLink
from clampcore.engine import Engine, RunOptions
from clampcore.jit import kernel
from clampcore.nwb import read_nwb_summary
from clampcore.sysio import fd_read, fd_wait_readable, fd_write, monotonic_us
from firmware_protocol import codec
from simulated_rig import start_rig

ROOT = Path(__file__).resolve().parent.parent
EXPERIMENT = ROOT / "examples" / "imposed_lif.toml"
TRIPS = 20_000  # round trips per turnaround measurement (as in REALTIME-NOTES)
SPIN_US = RunOptions().spin_us  # the engine's default spin before sleeping in poll()


@kernel
def _echo_loop(
    fd: int,
    spin_us: float,
    reply: np.ndarray,
    reply_len: int,
    rx: np.ndarray,
    turnaround_us: np.ndarray,
    timespec: np.ndarray,
    pollfd: np.ndarray,
) -> int:
    """Answer every read with ``reply``; the same wait (spin, then poll) as the host loop."""
    n = 0
    while n < turnaround_us.shape[0]:
        ready = fd_wait_readable(fd, 0, pollfd)
        if ready == 0:
            t0 = monotonic_us(timespec)
            while ready == 0 and monotonic_us(timespec) - t0 < spin_us:
                ready = fd_wait_readable(fd, 0, pollfd)
        if ready == 0:
            ready = fd_wait_readable(fd, 1000, pollfd)
        if ready <= 0:
            return n
        t_ready = monotonic_us(timespec)
        if fd_read(fd, rx, 0, rx.shape[0]) <= 0:
            return n
        if fd_write(fd, reply, 0, reply_len) != reply_len:
            return n
        turnaround_us[n] = monotonic_us(timespec) - t_ready
        n += 1
    return n


def _echo_run(port: str, rate_hz: int) -> np.ndarray:
    link = BoardLink(port)
    try:
        link.handshake()
        link.configure(rate_hz, 1_000_000, 32768)
        link.start()
        fd = link.blocking_fd()
        reply = np.frombuffer(codec.encode_message(codec.KeepAlive(), 1), dtype=np.uint8).copy()
        turn = np.zeros(TRIPS)
        if link.take_unread():  # the first sample came with START's reply: answer it
            link.serial.write(reply.tobytes())
        n = _echo_loop(
            fd, SPIN_US, reply, reply.size, np.zeros(4096, np.uint8), turn,
            np.zeros(2, np.int64), np.zeros(2, np.int32),
        )  # fmt: skip
        link.stop()
        return turn[:n]
    finally:
        link.close()


def _engine_run(port: str, seconds: float, out: Path, low_latency: bool = False) -> tuple:
    engine = Engine(EXPERIMENT, port, RunOptions(spin_us=SPIN_US, low_latency=low_latency))
    engine.start(duration_s=seconds, out=out)
    engine.wait()
    result = engine.finish()
    if result.error:
        raise RuntimeError(result.error)
    return result, read_nwb_summary(result.nwb_path)["columns"]


def _pct(x: np.ndarray, q: float) -> float:
    return float(np.percentile(x, q)) if x.size else float("nan")


def turnaround(tmp: Path) -> None:
    rate = 20000
    with start_rig(EXPERIMENT, clock="lockstep") as rig:
        echo = _echo_run(rig.path, rate)
        _, cols = _engine_run(rig.path, TRIPS / rate, tmp / "lockstep.nwb")
    host = cols["turnaround_us"]
    host = host[np.isfinite(host)]
    print("\n## Host turnaround over a pseudo-terminal (lockstep rig, same run)\n")
    print("| path | trips | median µs | p99 µs | p99.9 µs | median vs echo |")
    print("|---|---|---|---|---|---|")
    e50 = _pct(echo, 50)
    for name, x in (("minimal echo (floor)", echo), ("clampcore loop", host)):
        print(
            f"| {name} | {x.size} | {_pct(x, 50):.1f} | {_pct(x, 99):.1f} | {_pct(x, 99.9):.1f} "
            f"| {_pct(x, 50) / e50:.2f}x |"
        )


def wall_clock(tmp: Path, rates: list[int], seconds: float, low_latency: bool) -> None:
    print(
        f"\n## Wall-clock rig, {seconds:g} s per rate"
        + (", cpu_dma_latency 0" if low_latency else "")
    )
    print(
        "\n| rate Hz | samples | late commands | unanswered | latency 1 | 2 | 3 | 4+ "
        "| p99.9 turnaround µs |"
    )
    print("|---|---|---|---|---|---|---|---|---|")
    best = None
    for rate in rates:
        text = EXPERIMENT.read_text().replace("rate_hz = 20000", f"rate_hz = {rate}")
        exp_path = tmp / f"exp_{rate}.toml"
        exp_path.write_text(text)
        with start_rig(exp_path, clock="wall") as rig:
            engine = Engine(
                exp_path, rig.path, RunOptions(spin_us=SPIN_US, low_latency=low_latency)
            )
            engine.start(duration_s=seconds, out=tmp / f"wall_{rate}_{int(low_latency)}.nwb")
            engine.wait()
            result = engine.finish()
        if result.error:
            print(f"| {rate} | run failed: {result.error} |")
            continue
        cols = read_nwb_summary(result.nwb_path)["columns"]
        lat = cols["latency_samples"]
        lat = lat[np.isfinite(lat)]
        n = max(result.samples, 1)
        late = (result.board_status or {}).get("late_commands", result.summary["late"]) / n
        turn = cols["turnaround_us"]
        shares = [np.mean(lat == k) for k in (1, 2, 3)] + [np.mean(lat >= 4)]
        print(
            f"| {rate} | {result.samples} | {late:.3%} | {result.summary['unanswered']} | "
            + " | ".join(f"{s:.2%}" for s in shares)
            + f" | {_pct(turn[np.isfinite(turn)], 99.9):.0f} |"
        )
        if late < 0.001:
            best = rate
    print(f"\nHighest rate with under 0.1% late commands: {best} Hz")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument("--rates", default="5000,10000,15000,20000,25000")
    parser.add_argument("--low-latency", action="store_true", help="also with cpu_dma_latency 0")
    args = parser.parse_args()
    rates = [int(r) for r in args.rates.split(",")]
    with tempfile.TemporaryDirectory() as tmp:
        turnaround(Path(tmp))
        wall_clock(Path(tmp), rates, args.seconds, False)
        if args.low_latency:
            wall_clock(Path(tmp), rates, args.seconds, True)


if __name__ == "__main__":
    main()
