"""Operating-system settings for real-time work, each applied only where permitted.

Standard Linux practice for low-latency acquisition (common practice, not project
findings; their effect here is measured in README, Benchmarks):

- ``fifo_scheduling``: SCHED_FIFO for the calling thread, so that ordinary
  processes (the recorder, a window, the desktop) cannot hold it off the CPU;
- ``fine_timer_slack``: timer slack of 1 ns for the calling thread, so that a
  timed sleep ends when asked and not up to 50 µs later (Linux's default slack);
- ``hold_cpu_dma_latency_zero``: keep ``/dev/cpu_dma_latency`` at 0 µs, which keeps
  idle cores out of deep sleep states, so that waking a sleeping reader is quick.

Each returns (or yields) whether it took effect; none raises when not permitted.

Public names: ``fifo_scheduling``, ``fine_timer_slack``, ``hold_cpu_dma_latency_zero``,
``LOOP_FIFO_PRIORITY``, ``RIG_FIFO_PRIORITY``.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import os
import struct
from collections.abc import Iterator

_PR_SET_TIMERSLACK = 29  # <linux/prctl.h>

# SCHED_FIFO priorities (1-99) to ask for when real-time scheduling is wanted (it is off by
# default: see RunOptions.realtime_priority): the host loop in the middle of the range, the
# simulated rig above it, since it stands in for hardware with its own clock.
LOOP_FIFO_PRIORITY = 50
RIG_FIFO_PRIORITY = 60


def fifo_scheduling(priority: int) -> bool:
    """SCHED_FIFO at ``priority`` (1-99) for the calling thread; 0 asks for nothing."""
    if priority <= 0:
        return False
    try:
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(priority))
    except (OSError, AttributeError):
        return False
    return True


def fine_timer_slack() -> bool:
    """Timer slack of 1 ns for the calling thread (Linux only)."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c"), use_errno=True)
        return libc.prctl(_PR_SET_TIMERSLACK, 1, 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


@contextlib.contextmanager
def hold_cpu_dma_latency_zero(enabled: bool) -> Iterator[bool]:
    """Hold /dev/cpu_dma_latency at 0 µs while inside; yields whether it is held.

    The kernel keeps the request only while the file stays open (PM QoS interface).
    """
    if not enabled:
        yield False
        return
    try:
        fd = os.open("/dev/cpu_dma_latency", os.O_WRONLY)
    except OSError:
        yield False
        return
    try:
        os.write(fd, struct.pack("i", 0))
        yield True
    finally:
        os.close(fd)
