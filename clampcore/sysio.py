"""Operating-system calls usable inside compiled (numba) code without the GIL.

libc's ``read``, ``write``, ``poll``, ``clock_gettime`` and ``clock_nanosleep`` are bound with
``numba.types.ExternalFunction``, which numba can cache (bindings through
ctypes or cffi pointers recompile in every process). Buffers are passed as
addresses (``array.ctypes.data``), which the C calling convention passes
exactly as a pointer on the platforms numba supports.

Public names: ``fd_read``, ``fd_write``, ``fd_wait_readable``, ``monotonic_us``,
``monotonic_ns``, ``sleep_until_ns``, ``wait_readable``.
"""

from __future__ import annotations

import ctypes
import ctypes.util

import numpy as np
from numba import config as numba_config
from numba import types

from clampcore.jit import kernel

# Load libc into the process so that numba's linker finds the symbols by name.
ctypes.CDLL(ctypes.util.find_library("c"), mode=ctypes.RTLD_GLOBAL)

_read = types.ExternalFunction("read", types.intp(types.intc, types.uintp, types.uintp))
_write = types.ExternalFunction("write", types.intp(types.intc, types.uintp, types.uintp))
_poll = types.ExternalFunction("poll", types.intc(types.uintp, types.uintp, types.intc))
_clock_gettime = types.ExternalFunction("clock_gettime", types.intc(types.intc, types.uintp))
_clock_nanosleep = types.ExternalFunction(
    "clock_nanosleep", types.intc(types.intc, types.intc, types.uintp, types.uintp)
)

_CLOCK_MONOTONIC = 1  # <time.h> on Linux
_POLLIN = 0x001  # <poll.h> on Linux
_TIMER_ABSTIME = 1  # <time.h> on Linux


@kernel
def fd_read(fd: int, buf: np.ndarray, offset: int, nbytes: int) -> int:
    """read(2) into ``buf[offset:offset+nbytes]`` (uint8); bytes read, 0 at EOF, -1 on error."""
    return _read(fd, buf.ctypes.data + offset, nbytes)


@kernel
def fd_write(fd: int, buf: np.ndarray, offset: int, nbytes: int) -> int:
    """write(2) of ``buf[offset:offset+nbytes]`` (uint8); bytes written or -1."""
    return _write(fd, buf.ctypes.data + offset, nbytes)


@kernel
def fd_wait_readable(fd: int, timeout_ms: int, pollfd: np.ndarray) -> int:
    """poll(2) one descriptor for input: >0 readable, 0 timed out, <0 error.

    ``pollfd`` is an int32 array of 2 used as ``struct pollfd`` (fd; events|revents).
    """
    pollfd[0] = fd
    pollfd[1] = _POLLIN
    return _poll(pollfd.ctypes.data, 1, timeout_ms)


@kernel
def monotonic_ns(timespec: np.ndarray) -> int:
    """CLOCK_MONOTONIC in ns; ``timespec`` is an int64 array of 2 used as scratch."""
    _clock_gettime(_CLOCK_MONOTONIC, timespec.ctypes.data)
    return timespec[0] * 1_000_000_000 + timespec[1]


@kernel
def monotonic_us(timespec: np.ndarray) -> float:
    """CLOCK_MONOTONIC in µs (float); ``timespec`` is an int64 array of 2 used as scratch."""
    return monotonic_ns(timespec) * 1e-3


@kernel
def wait_readable(
    fd: int, spin_us: float, timeout_ms: int, timespec: np.ndarray, pollfd: np.ndarray
) -> int:
    """Wait for input as the host loop does: spin up to ``spin_us`` (a sleeping reader wakes
    50-90 µs late on these machines; DEVELOPERS.md, Figures), then sleep in poll() for up to
    ``timeout_ms``. Returns as ``fd_wait_readable``."""
    ready = fd_wait_readable(fd, 0, pollfd)
    if ready == 0 and spin_us > 0:
        t0 = monotonic_us(timespec)
        while ready == 0 and monotonic_us(timespec) - t0 < spin_us:
            ready = fd_wait_readable(fd, 0, pollfd)
    if ready == 0:
        ready = fd_wait_readable(fd, timeout_ms, pollfd)
    return ready


@kernel
def sleep_until_ns(deadline_ns: int, timespec: np.ndarray) -> None:
    """Sleep until CLOCK_MONOTONIC reads ``deadline_ns`` (absolute, so no drift).

    A signal may end the sleep early; callers check the clock again.
    """
    timespec[0] = deadline_ns // 1_000_000_000
    timespec[1] = deadline_ns % 1_000_000_000
    _clock_nanosleep(_CLOCK_MONOTONIC, _TIMER_ABSTIME, timespec.ctypes.data, 0)


if numba_config.DISABLE_JIT:
    # Plain-Python equivalents, so the loop runs (slowly) under NUMBA_DISABLE_JIT=1.
    import os
    import select
    import time

    def fd_read(fd: int, buf: np.ndarray, offset: int, nbytes: int) -> int:
        try:
            data = os.read(fd, nbytes)
        except BlockingIOError:
            return -1
        except OSError:
            return -1
        buf[offset : offset + len(data)] = np.frombuffer(data, dtype=np.uint8)
        return len(data)

    def fd_write(fd: int, buf: np.ndarray, offset: int, nbytes: int) -> int:
        try:
            return os.write(fd, buf[offset : offset + nbytes].tobytes())
        except OSError:
            return -1

    def fd_wait_readable(fd: int, timeout_ms: int, pollfd: np.ndarray) -> int:
        poller = select.poll()
        poller.register(fd, select.POLLIN)
        try:
            return len(poller.poll(timeout_ms))
        except OSError:
            return -1

    def monotonic_ns(timespec: np.ndarray) -> int:
        return time.monotonic_ns()

    def monotonic_us(timespec: np.ndarray) -> float:
        return time.monotonic_ns() * 1e-3

    def sleep_until_ns(deadline_ns: int, timespec: np.ndarray) -> None:
        time.sleep(max(0, deadline_ns - time.monotonic_ns()) * 1e-9)
