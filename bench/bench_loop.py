"""Benchmark of the real-time loop over a pseudo-terminal against the simulated rig.

1. Host turnaround (a sample frame ready to read -> its command written) of the
   clampcore loop, beside a minimal echo measured the same way on the same
   pseudo-terminal with the same rig in the same run: the echo reads whatever
   came and writes back a constant KEEPALIVE frame, no decoding, no step. That
   is the transport's own floor; the target is a median within 1.5x of it.
   Both against the rig in lockstep (it sends the next sample as soon as it has
   an answer), so each figure is a pure request-response chain.
2. Wall clock: the rig samples on its own clock like hardware. For each rate,
   two runs of ``--seconds`` (60 by default): a minimal host (answers the newest
   sample of each read with a constant COMMAND: no step, no ring, no recorder,
   the same wait) as the baseline, then clampcore. Each reports the share of
   samples taken under a late command (the board's own count), the loop latency
   as a distribution (share of samples taken under a command that answered the
   sample 1, 2, 3, ... before) and the share of samples the rig itself took a
   period or more late, both from the rig's ground-truth log. Also the highest
   rate at which clampcore had under 0.1% late commands. With clampcore's
   defaults and, with ``--settings``, also with SCHED_FIFO for loop and rig
   (``realtime``) or with no real-time setting at all (``ordinary``).
0. Machine floor: the stalls a lone thread spinning on the clock sees on each
   core (the virtual machine's own preemptions), which no loop can avoid.

Machines here are shared and noisy: figures are medians and percentiles, and
each comparison is measured in the same run.

    .venv/bin/python bench/bench_loop.py [--seconds 60] [--rates 5000,10000,20000]
        [--settings defaults,realtime,ordinary]

Public names: ``main``.
"""

from __future__ import annotations

import argparse
import os
import re
import tempfile
import threading
from pathlib import Path

import numpy as np
from clampcore.firmware_protocol import codec
from clampcore.firmware_protocol.codec import (
    SAMPLE_COUNTER,
    decode_sample,
    deframe_next,
    encode_command,
)
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import LOG_BEHIND, NO_COMMAND, read_log

from clampcore.board_link import BoardLink, board_converters
from clampcore.calibration import conversion_array, pA_to_counts
from clampcore.engine import SPIN_SHARE, Engine, RunOptions
from clampcore.experiment import load_experiment
from clampcore.jit import kernel
from clampcore.nwb import read_nwb_summary
from clampcore.realtime import (
    LOOP_FIFO_PRIORITY,
    RIG_FIFO_PRIORITY,
    fifo_scheduling,
    hold_cpu_dma_latency_zero,
)
from clampcore.sysio import fd_read, fd_write, monotonic_ns, monotonic_us, wait_readable

ROOT = Path(__file__).resolve().parent.parent
EXPERIMENT = ROOT / "examples" / "imposed_lif.toml"
TRIPS = 20_000  # round trips per turnaround measurement (DEVELOPERS.md, Figures)
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
        if wait_readable(fd, spin_us, 1000, timespec, pollfd) <= 0:
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
        # The same real-time settings as the engine's loop process gets by default.
        fifo = fifo_scheduling(RunOptions().realtime_priority)
        try:
            with hold_cpu_dma_latency_zero(RunOptions().low_latency):
                n = _echo_loop(
                    fd, SPIN_US, reply, reply.size, np.zeros(4096, np.uint8), turn,
                    np.zeros(2, np.int64), np.zeros(2, np.int32),
                )  # fmt: skip
        finally:
            if fifo:
                os.sched_setscheduler(0, os.SCHED_OTHER, os.sched_param(0))
        link.stop()
        return turn[:n]
    finally:
        link.close()


def _engine_run(port: str, seconds: float, out: Path) -> tuple:
    engine = Engine(EXPERIMENT, port, RunOptions())
    engine.start(duration_s=seconds, out=out)
    engine.wait()
    result = engine.finish()
    if result.error:
        raise RuntimeError(result.error)
    return result, read_nwb_summary(result.nwb_path)["columns"]


def _pct(x: np.ndarray, q: float) -> float:
    return float(np.percentile(x, q)) if x.size else float("nan")


def turnaround(tmp: Path) -> None:
    rate = round(load_experiment(EXPERIMENT).loop["rate_hz"])  # the engine run's length
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


@kernel
def _minimal_host_loop(
    fd: int,
    seconds: float,
    spin_us: float,
    counts: np.ndarray,
    rx: np.ndarray,
    frame: np.ndarray,
    dstate: np.ndarray,
    dbuf: np.ndarray,
    adc: np.ndarray,
    fields: np.ndarray,
    tx: np.ndarray,
    ts: np.ndarray,
    pollfd: np.ndarray,
) -> int:
    """Answer the newest sample of every read with a constant COMMAND: no step, no ring,
    no recorder. The same wait (spin, then poll) as the host loop. Returns commands sent."""
    end = monotonic_ns(ts) + int(seconds * 1e9)
    seq = 1
    sent = 0
    while monotonic_ns(ts) < end:
        ready = wait_readable(fd, spin_us, 100, ts, pollfd)
        if ready < 0:
            return -1
        if ready == 0:
            continue
        n = fd_read(fd, rx, 0, rx.shape[0])
        if n <= 0:
            return -1
        newest = -1
        while True:
            m = deframe_next(dstate, dbuf, rx, n, frame)
            if m <= 0:
                break
            if decode_sample(frame, m, adc, fields) > 0:
                newest = fields[SAMPLE_COUNTER]
        if newest >= 0:
            w = encode_command(seq, newest, counts, tx)
            if fd_write(fd, tx, 0, w) != w:
                return -1
            sent += 1
            seq = seq + 1 if seq < 0xFFFF else 1  # 0 means "no command" in a SAMPLE
    return sent


def _minimal_host_run(
    port: str, exp_path: Path, seconds: float, options: RunOptions
) -> codec.Status:
    """Run the minimal host against a board for ``seconds``; the board's final status."""
    exp = load_experiment(exp_path)
    link = BoardLink(port)
    try:
        hello = link.handshake()
        conv = conversion_array(*board_converters(hello), exp.amplifier)
        zero = pA_to_counts(conv, 0.0)
        watchdog_us = int(np.clip(options.watchdog_ms * 1000, hello.watchdog_min_us,
                                  hello.watchdog_max_us))  # fmt: skip
        rate = round(exp.loop["rate_hz"])
        link.configure(rate, watchdog_us, zero)
        fifo = fifo_scheduling(options.realtime_priority)  # as the engine's loop would
        try:
            with hold_cpu_dma_latency_zero(options.low_latency):
                link.start()
                link.take_unread()
                dstate, dbuf = codec.new_deframer()
                sent = _minimal_host_loop(
                    link.blocking_fd(), seconds, min(options.spin_us, SPIN_SHARE * 1e6 / rate),
                    np.array([zero], dtype=np.int64),
                    np.zeros(4096, np.uint8), np.zeros(codec.MAX_PAYLOAD, np.uint8), dstate,
                    dbuf, np.zeros(codec.MAX_CHANNELS, np.int64),
                    np.zeros(codec.SAMPLE_NFIELDS, np.int64), np.zeros(codec.MAX_WIRE, np.uint8),
                    np.zeros(2, np.int64), np.zeros(2, np.int32),
                )  # fmt: skip
        finally:
            if fifo:
                os.sched_setscheduler(0, os.SCHED_OTHER, os.sched_param(0))
        if sent < 0:
            raise RuntimeError("minimal host: the port failed")
        status = link.stop()
        if status is None:
            raise RuntimeError("minimal host: the board did not answer STOP")
        return status
    finally:
        link.close()


@kernel
def _stall_census(seconds: float, limits_ns: np.ndarray, counts: np.ndarray, ts: np.ndarray) -> int:
    """Spin on the clock for ``seconds``; count gaps between readings >= each limit."""
    start = monotonic_ns(ts)
    end = start + int(seconds * 1e9)
    prev = start
    lost = 0
    while prev < end:
        now = monotonic_ns(ts)
        gap = now - prev
        prev = now
        for i in range(limits_ns.shape[0]):
            if gap >= limits_ns[i]:
                counts[i] += 1
        if gap >= limits_ns[0]:
            lost += gap
    return lost


def _census_on(cpu: int, seconds: float, limits_us: tuple[int, ...], out: dict) -> None:
    """Pin the calling thread to ``cpu`` and count its stalls (the kernel releases the GIL)."""
    os.sched_setaffinity(0, {cpu})  # 0: the calling thread, on Linux
    counts = np.zeros(len(limits_us), dtype=np.int64)
    limits = np.array(limits_us, dtype=np.int64) * 1000
    lost = _stall_census(seconds, limits, counts, np.zeros(2, np.int64))
    out[cpu] = (counts, lost)


def machine_floor(seconds: float) -> None:
    """What threads spinning on the clock see of the machine: stalls they did not cause.

    On a shared virtual machine the hypervisor takes cores away now and then; no host loop
    can answer a sample while its core is away, nor the rig take one, so these stalls set
    a floor under the late-command figures below. Measured with one core busy at a time,
    then with every core busy at once, as during a wall-clock run (the rig keeps one core
    busy, the loop, the recorder and the kernel's pty work the other).
    """
    limits_us = (100, 200, 1000)
    print(f"\n## Machine floor: stalls seen by threads spinning on the clock, {seconds:g} s\n")
    print("| cores busy | core | stalls >= 100 µs per s | >= 200 µs per s | >= 1 ms per s "
          "| time lost |")  # fmt: skip
    print("|---|---|---|---|---|---|")
    cpus = sorted(os.sched_getaffinity(0))
    for together in (False, True):
        results: dict = {}
        if together:
            threads = [
                threading.Thread(target=_census_on, args=(cpu, seconds, limits_us, results))
                for cpu in cpus
            ]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
        else:
            for cpu in cpus:
                t = threading.Thread(target=_census_on, args=(cpu, seconds, limits_us, results))
                t.start()
                t.join()
        for cpu in cpus:
            counts, lost = results[cpu]
            rates = " | ".join(f"{c / seconds:.1f}" for c in counts)
            busy = "all" if together else "one"
            print(f"| {busy} | {cpu} | {rates} | {lost / (seconds * 1e9):.2%} |")


def _log_figures(log_path: Path) -> dict[str, float]:
    """Latency shares and the rig's own lateness, from the rig's ground-truth log (the
    same source for every host, so rows compare like with like)."""
    records = read_log(log_path).records
    rows = records[records["cmd_answers"] != NO_COMMAND]
    lat = rows["counter"] - rows["cmd_answers"]
    out = {f"lat{k}": float(np.mean(lat == k)) for k in (1, 2, 3)}
    out["lat4+"] = float(np.mean(lat >= 4))
    out["within2"] = float(np.mean(lat <= 2))
    out["rig_late"] = float(np.mean((records["flags"] & LOG_BEHIND) != 0))
    return out


def _set_rate(tmp: Path, rate: int) -> Path:
    text = re.sub(r"(?m)^rate_hz = \d+", f"rate_hz = {rate}", EXPERIMENT.read_text())
    if f"rate_hz = {rate}" not in text:
        raise RuntimeError(f"{EXPERIMENT} has no rate_hz line to set")
    path = tmp / f"exp_{rate}.toml"
    path.write_text(text)
    return path


SETTINGS = {
    # name: (description, engine options, rig priority or None for the rig's default)
    "defaults": ("clampcore's defaults: cpu_dma_latency 0 where permitted", RunOptions(), None),
    "realtime": (
        f"defaults + SCHED_FIFO {LOOP_FIFO_PRIORITY} for the loop, {RIG_FIFO_PRIORITY} for the rig",
        RunOptions(realtime_priority=LOOP_FIFO_PRIORITY),
        RIG_FIFO_PRIORITY,
    ),
    "ordinary": (
        "ordinary scheduling, cpu_dma_latency not held",
        RunOptions(low_latency=False, realtime_priority=0),
        0,
    ),
}


def wall_clock(tmp: Path, rates: list[int], seconds: float, settings: str) -> int | None:
    """Runs per rate, the minimal host beside clampcore; returns the highest rate at which
    clampcore had under 0.1% late commands."""
    setting, options, rig_priority = SETTINGS[settings]
    print(f"\n## Wall-clock rig, {seconds:g} s per run ({setting})")
    print(
        "\n| rate Hz | host | samples | late commands | latency 1 | 2 | 3 | 4+ "
        "| within 2 | rig itself late |"
    )
    print("|---|---|---|---|---|---|---|---|---|---|")
    best = None
    for rate in rates:
        exp_path = _set_rate(tmp, rate)
        for host in ("minimal", "clampcore"):
            log = tmp / f"rig_{rate}_{host}_{settings}.log"
            with start_rig(exp_path, clock="wall", log=log, realtime_priority=rig_priority) as rig:
                if host == "minimal":
                    status = _minimal_host_run(rig.path, exp_path, seconds, options)
                    # Samples of the run itself, not those the board took while STOP
                    # was on its way (unanswered, so they add no late command).
                    samples = min(status.counter, round(seconds * rate))
                    late = status.late_commands
                else:
                    engine = Engine(exp_path, rig.path, options)
                    engine.start(duration_s=seconds, out=tmp / f"wall_{rate}_{settings}.nwb")
                    engine.wait()
                    result = engine.finish()
                    if result.error:
                        print(f"| {rate} | {host} | run failed: {result.error} |")
                        continue
                    samples = result.samples
                    late = (result.board_status or {}).get("late_commands", result.summary["late"])
            f = _log_figures(log)
            late_share = late / max(samples, 1)
            print(
                f"| {rate} | {host} | {samples} | {late_share:.3%} | "
                + " | ".join(f"{f[k]:.2%}" for k in ("lat1", "lat2", "lat3", "lat4+", "within2"))
                + f" | {f['rig_late']:.2%} |"
            )
            if host == "clampcore" and late_share < 0.001:
                best = rate
    print(f"\nHighest rate with under 0.1% late commands (clampcore): {best or 'none tried'}")
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument("--rates", default="1000,2000,5000,10000,15000,20000")
    parser.add_argument("--floor-seconds", type=float, default=10.0, help="per core")
    parser.add_argument(
        "--settings",
        default="defaults",
        help=f"comma-separated, of {', '.join(SETTINGS)} (default: defaults)",
    )
    args = parser.parse_args()
    rates = [int(r) for r in args.rates.split(",")]
    settings = args.settings.split(",")
    for name in settings:
        if name not in SETTINGS:
            parser.error(f"--settings: unknown {name!r}")
    with tempfile.TemporaryDirectory() as tmp:
        turnaround(Path(tmp))
        machine_floor(args.floor_seconds)
        for name in settings:
            wall_clock(Path(tmp), rates, args.seconds, name)


if __name__ == "__main__":
    main()
