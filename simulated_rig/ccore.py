"""The C board core inside the simulated rig (``firmware_protocol/c/ports/rig_port.c``).

The rig does not re-implement the board: every frame it receives goes to the C core
(``ccb_core.c``, on the in-memory port), every sample is the core's tick, and every byte
it sends is what the core wrote. The rig keeps what a board has around it: the model
cell behind the converters, the clocks, the link, the fault injection, the ground truth.

The library is built from the repository's C files on first use, into a cache directory
(``$CLAMPCORE_CACHE_DIR``, else ``$XDG_CACHE_HOME/clampcore``, else ``~/.cache/clampcore``)
under a name that hashes the sources, the flags and the compiler, so that an edit rebuilds
it; without a C compiler ``load()`` raises ``CompilerMissingError`` naming what it tried.
Its entry points are bound with ``numba.types.ExternalFunction``, as ``clampcore.sysio``
binds libc, so the rig's compiled path calls them directly and numba can cache it; the
library must be loaded (``load()``) before the first compiled call.

Public names: ``load``, ``library_path``, ``new_core``, ``core_status``, ``core_feed``,
``core_watchdog``, ``core_tick``, ``core_take_tx``, ``core_peek``, the fields of
``core_peek`` (``P_*``, ``N_PEEK``), ``CompilerMissingError``.
"""

from __future__ import annotations

import ctypes
import hashlib
import os
import tempfile
from pathlib import Path

import numpy as np
from clampcore.firmware_protocol.cbinding import board_info, status_of
from clampcore.firmware_protocol.cboard import (
    RIG_FLAGS,
    CompilerMissingError,
    build_rig_library,
    find_c_compiler,
    rig_library_sources,
)
from clampcore.firmware_protocol.codec import Hello, Status
from llvmlite import binding as llvm
from numba import config as numba_config
from numba import types

from clampcore.jit import kernel

__all__ = ["CompilerMissingError"]

# core_peek's fields: rig_port.h's CCB_RIG_* in the same order.
P_STATE = 0
P_COUNTER = 1
P_RATE_HZ = 2
P_WATCHDOG_US = 3
P_FAULT_COUNTS = 4
P_HAVE_CMD = 5
P_TRIPPED = 6
P_CMD_SEQ = 7
P_CMD_ANSWERS = 8
P_LAST_RX_US = 9
P_DAC = 10
P_LAW_MODE = 11
P_BAD_FRAMES = 12
P_UNKNOWN = 13
P_APPLIED = 14
P_TRIPS = 15
P_TX_LOST = 16
N_PEEK = 17

_M32 = 0xFFFFFFFF
_lib: ctypes.CDLL | None = None

_feed = types.ExternalFunction(
    "ccb_rig_feed", types.void(types.uintp, types.uintp, types.uintp, types.uint32)
)
_watchdog = types.ExternalFunction("ccb_rig_watchdog", types.void(types.uintp, types.uint32))
_tick = types.ExternalFunction("ccb_rig_tick", types.void(types.uintp, types.uint16, types.uint32))
_take_tx = types.ExternalFunction(
    "ccb_rig_take_tx", types.uintp(types.uintp, types.uintp, types.uintp)
)
_peek = types.ExternalFunction("ccb_rig_peek", types.void(types.uintp, types.uintp))


def _cache_dir() -> Path:
    env = os.environ.get("CLAMPCORE_CACHE_DIR")
    if env:
        return Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    return (Path(xdg) if xdg else Path.home() / ".cache") / "clampcore"


def library_path() -> Path:
    """Where the rig's library for the current sources lives (built there if missing)."""
    cc = find_c_compiler()
    if cc is None:
        raise CompilerMissingError(
            "the simulated rig runs the C board core and building it needs a C compiler: "
            "none found (tried $CC, cc, gcc, clang: install one, e.g. gcc, or set CC)"
        )
    h = hashlib.sha256()
    for part in (cc, *RIG_FLAGS):
        h.update(part.encode() + b"\0")
    for src in rig_library_sources():
        h.update(src.name.encode() + b"\0" + src.read_bytes())
    name = f"libccb_rig-{h.hexdigest()[:16]}.so"
    for folder in (_cache_dir(), Path(tempfile.gettempdir()) / f"clampcore-{os.getuid()}"):
        path = folder / name
        if path.exists():
            return path
        try:
            folder.mkdir(parents=True, exist_ok=True)
            tmp = Path(tempfile.mkstemp(dir=folder, suffix=".so.tmp")[1])
        except OSError:
            continue  # not writable: the next place
        try:
            build_rig_library(tmp)
            os.replace(tmp, path)  # atomic: another process may build the same at once
        finally:
            tmp.unlink(missing_ok=True)
        return path
    raise OSError(f"no writable cache directory for the rig's library (tried {_cache_dir()})")


def load() -> ctypes.CDLL:
    """Build (once) and load the library into this process; safe to call again."""
    global _lib
    if _lib is None:
        path = library_path()
        llvm.load_library_permanently(str(path))  # compiled code finds its symbols
        lib = ctypes.CDLL(str(path))
        lib.ccb_rig_size.restype = ctypes.c_size_t
        lib.ccb_rig_init.restype = ctypes.c_uint8
        lib.ccb_rig_init.argtypes = [ctypes.c_void_p, ctypes.c_void_p]
        lib.ccb_rig_status.restype = None
        lib.ccb_rig_status.argtypes = [ctypes.c_void_p, ctypes.c_void_p]
        for name, args, res in (
            ("ccb_rig_feed", [ctypes.c_void_p, ctypes.c_void_p, ctypes.c_size_t], None),
            ("ccb_rig_watchdog", [ctypes.c_void_p], None),
            ("ccb_rig_tick", [ctypes.c_void_p, ctypes.c_uint16], None),
            ("ccb_rig_take_tx", [ctypes.c_void_p, ctypes.c_void_p, ctypes.c_size_t], None),
            ("ccb_rig_peek", [ctypes.c_void_p, ctypes.c_void_p], None),
        ):
            fn = getattr(lib, name)
            if name in ("ccb_rig_feed", "ccb_rig_watchdog", "ccb_rig_tick"):
                args = [*args, ctypes.c_uint32]
            fn.argtypes = args
            fn.restype = ctypes.c_size_t if name == "ccb_rig_take_tx" else res
        _lib = lib
    return _lib


def new_core(hello: Hello) -> np.ndarray:
    """A board described by ``hello``, initialised, in a fresh byte array."""
    lib = load()
    mem = np.zeros(lib.ccb_rig_size(), dtype=np.uint8)
    if mem.ctypes.data % 16:  # numpy's allocator aligns far more; the board holds int64
        raise MemoryError("the board's memory is not 16-byte aligned")
    info = board_info(hello)
    rc = lib.ccb_rig_init(mem.ctypes.data, ctypes.byref(info))
    if rc != 0:
        raise ValueError(f"the board core refused the board description {hello!r} ({rc})")
    return mem


def core_status(mem: np.ndarray) -> Status:
    """The STATUS the board would send now."""
    lib = load()
    return status_of(lambda ptr: lib.ccb_rig_status(mem.ctypes.data, ptr))


@kernel
def core_feed(mem: np.ndarray, buf: np.ndarray, offset: int, n: int, now_us: int) -> None:
    """``buf[offset:offset+n]`` arrives on the board's serial line at board time ``now_us``."""
    _feed(mem.ctypes.data, buf.ctypes.data + offset, n, now_us & _M32)


@kernel
def core_watchdog(mem: np.ndarray, now_us: int) -> None:
    """The board checks its link watchdog at ``now_us`` (trips it when its time is up)."""
    _watchdog(mem.ctypes.data, now_us & _M32)


@kernel
def core_tick(mem: np.ndarray, adc: int, now_us: int) -> None:
    """One sample: the ADC reads ``adc`` at board time ``now_us``."""
    _tick(mem.ctypes.data, adc, now_us & _M32)


@kernel
def core_take_tx(mem: np.ndarray, out: np.ndarray) -> int:
    """Move what the board sent into ``out`` (uint8); returns the number of bytes."""
    return _take_tx(mem.ctypes.data, out.ctypes.data, out.shape[0])


@kernel
def core_peek(mem: np.ndarray, out: np.ndarray) -> None:
    """The board's state into ``out`` (int64[N_PEEK], ``P_*``)."""
    _peek(mem.ctypes.data, out.ctypes.data)


if numba_config.DISABLE_JIT:
    # Plain Python through ctypes, so that the rig runs (slowly) under NUMBA_DISABLE_JIT=1.

    def core_feed(mem: np.ndarray, buf: np.ndarray, offset: int, n: int, now_us: int) -> None:
        load().ccb_rig_feed(mem.ctypes.data, buf.ctypes.data + offset, n, now_us & _M32)

    def core_watchdog(mem: np.ndarray, now_us: int) -> None:
        load().ccb_rig_watchdog(mem.ctypes.data, now_us & _M32)

    def core_tick(mem: np.ndarray, adc: int, now_us: int) -> None:
        load().ccb_rig_tick(mem.ctypes.data, int(adc), now_us & _M32)

    def core_take_tx(mem: np.ndarray, out: np.ndarray) -> int:
        return int(load().ccb_rig_take_tx(mem.ctypes.data, out.ctypes.data, out.shape[0]))

    def core_peek(mem: np.ndarray, out: np.ndarray) -> None:
        load().ccb_rig_peek(mem.ctypes.data, out.ctypes.data)
