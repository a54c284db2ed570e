"""The real-time settings (clampcore.realtime) and the timed sleep (clampcore.sysio).

Behaviour only: whether a setting took effect and what the kernel reports back,
never how fast anything ran (timing lives in bench/).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import struct
import time

import numpy as np
import pytest

from clampcore.realtime import fifo_scheduling, fine_timer_slack, hold_cpu_dma_latency_zero
from clampcore.sysio import monotonic_ns, sleep_until_ns

_PR_SET_TIMERSLACK = 29  # <linux/prctl.h>
_PR_GET_TIMERSLACK = 30


def test_sleep_until_never_returns_before_the_deadline() -> None:
    ts = np.zeros(2, dtype=np.int64)
    for step_ns in (0, 1, 50_000, 2_000_000):
        deadline = monotonic_ns(ts) + step_ns
        sleep_until_ns(deadline, ts)
        assert monotonic_ns(ts) >= deadline


def test_monotonic_ns_is_the_system_monotonic_clock() -> None:
    ts = np.zeros(2, dtype=np.int64)
    before = time.monotonic_ns()
    ours = monotonic_ns(ts)
    after = time.monotonic_ns()
    assert before <= ours <= after  # same clock (CLOCK_MONOTONIC), read in between


@pytest.mark.skipif(not hasattr(os, "sched_getscheduler"), reason="Linux scheduling calls")
def test_fifo_scheduling_zero_asks_for_nothing_and_a_grant_is_real(in_thread) -> None:
    def probe(priority: int) -> tuple[bool, int]:
        granted = fifo_scheduling(priority)
        return granted, os.sched_getscheduler(0)

    granted, policy = in_thread(lambda: probe(0))
    assert not granted and policy == os.SCHED_OTHER
    granted, policy = in_thread(lambda: probe(10))
    # Where permitted the kernel reports SCHED_FIFO for that thread; where not, nothing
    # changed and the call said so.
    assert policy == (os.SCHED_FIFO if granted else os.SCHED_OTHER)


def test_fine_timer_slack_is_what_the_kernel_reports(in_thread) -> None:
    libc = ctypes.CDLL(ctypes.util.find_library("c"))

    def probe() -> tuple[bool, int, int]:
        # Start from Linux's default slack, 50 µs (prctl(2) man page), whatever this
        # thread inherited.
        libc.prctl(_PR_SET_TIMERSLACK, 50_000, 0, 0, 0)
        before = libc.prctl(_PR_GET_TIMERSLACK, 0, 0, 0, 0)
        ok = fine_timer_slack()
        return ok, before, libc.prctl(_PR_GET_TIMERSLACK, 0, 0, 0, 0)

    ok, before, after = in_thread(probe)
    assert ok
    assert before == 50_000
    assert after == 1


def test_cpu_dma_latency_is_held_only_inside_and_only_when_asked() -> None:
    path = "/dev/cpu_dma_latency"

    def current_us() -> int:
        with open(path, "rb") as f:  # the PM QoS file reads back the value in force
            return struct.unpack("i", f.read(4))[0]

    with hold_cpu_dma_latency_zero(False) as held:
        assert held is False
    try:
        outside = current_us()
    except OSError:
        pytest.skip(f"{path} cannot be read here")
    with hold_cpu_dma_latency_zero(True) as held:
        if not held:
            pytest.skip(f"{path} cannot be written here")
        assert current_us() == 0
    assert current_us() == outside
