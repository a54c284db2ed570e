"""ctypes binding of the C board core plus its in-memory port (tests and benchmarks).

Build the library with ``firmware_protocol.cboard.build_core_library(tmpdir)``, then:

* ``CoreLibrary(path)`` - the core's lower layers as Python methods:
  ``crc16(data) -> int``, ``cobs_encode(data) -> bytes``, ``cobs_decode(data) -> bytes``
  (raises ``FrameError``), ``frame_encode(msg_type, seq, body) -> bytes``,
  ``deframe_stream(data, chunk) -> StreamResult``, ``encode_hello(seq, hello) -> bytes``,
  ``encode_status(seq, status) -> bytes``, ``encode_sample(seq, sample) -> bytes``,
  ``encode_samples(seq, first, clock_us, status, adc, dac, flags) -> bytes`` (SAMPLES),
  ``parse_configure(payload) -> Configure``, ``parse_command(payload) -> (seq, Command)``
  (both raise ``FrameError``), ``rig(hello) -> MemoryRig``.
* ``MemoryRig`` - one board on the in-memory port: ``feed(data)``, ``tick()``,
  ``set_clock(now_us)``, ``set_adc(channel, counts)``, ``dac(channel) -> int``,
  ``dac_writes() -> int``, ``take_tx() -> bytes``, ``status() -> Status``,
  ``state() -> int``, ``rate_hz() -> int``, ``law_mode() -> bool``,
  ``law_counts() -> (late, ahead)`` (laws not queued, PROTOCOL.md §10).
* ``StreamResult`` - payloads, good and bad counts, bad counts per reason, digest.
* ``board_info(hello)`` - ``ccb_board_info`` for ``ccb_init``; ``status_of(call) -> Status``
  - the STATUS a ``ccb_get_status``-like function fills (both also for ``simulated_rig.ccore``).
* ``fnv1a_digest(payloads) -> int`` - the same digest the C stream helper computes.
"""

from __future__ import annotations

import ctypes
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from clampcore.firmware_protocol.codec import (
    IDENTITY_BYTES,
    MAX_CHANNELS,
    MAX_WIRE,
    Command,
    Configure,
    FrameError,
    Hello,
    Sample,
    Status,
)

_u8 = ctypes.c_uint8
_u16 = ctypes.c_uint16
_u32 = ctypes.c_uint32
_i32 = ctypes.c_int32
_size = ctypes.c_size_t
_p = ctypes.c_void_p

_CCB_OK = 0
_CCB_E_VERSION = 6


class _Result(ctypes.Structure):
    _fields_ = (("len", _size), ("status", _u8))


class _BoardInfo(ctypes.Structure):
    _fields_ = (
        ("identity", ctypes.c_char * IDENTITY_BYTES),
        ("adc_bits", _u8),
        ("dac_bits", _u8),
        ("n_inputs", _u8),
        ("n_outputs", _u8),
        ("adc_min_uV", _i32),
        ("adc_max_uV", _i32),
        ("dac_min_uV", _i32),
        ("dac_max_uV", _i32),
        ("max_rate_hz", _u32),
        ("watchdog_min_us", _u32),
        ("watchdog_max_us", _u32),
        ("capabilities", _u8),
        ("law_queue", _u32),
        ("mg_groups", _u8),
        ("max_samples", _u8),
    )


class _Status(ctypes.Structure):
    _fields_ = (
        ("state", _u8),
        ("status", _u8),
        ("result", _u8),
        ("ack_seq", _u16),
        ("counter", _u32),
        ("bad_frames", _u32),
        ("unknown_messages", _u32),
        ("rejected", _u32),
        ("late_commands", _u32),
        ("missing_commands", _u32),
        ("watchdog_trips", _u32),
        ("commands_applied", _u32),
        ("rate_hz", _u32),
        ("n_inputs", _u8),
        ("watchdog_us", _u32),
    )


class _Configure(ctypes.Structure):
    _fields_ = (
        ("version", _u8),
        ("n_inputs", _u8),
        ("n_outputs", _u8),
        ("rate_hz", _u32),
        ("watchdog_us", _u32),
        ("fault_counts", _u16 * MAX_CHANNELS),
    )


class _Command(ctypes.Structure):
    _fields_ = (
        ("seq", _u16),
        ("n_outputs", _u8),
        ("answers_counter", _u32),
        ("dac_counts", _u16 * MAX_CHANNELS),
    )


_STATUS_FIELDS = [name for name, _ in _Status._fields_]


def _info_from(hello: Hello) -> _BoardInfo:
    """ctypes board description from a Hello (or any object with the same attributes)."""
    info = _BoardInfo()
    info.identity = hello.identity.encode("ascii")
    for name, _ in _BoardInfo._fields_[1:]:
        setattr(info, name, getattr(hello, name))
    return info


def board_info(hello: Hello) -> ctypes.Structure:
    """``ccb_board_info`` (ccb.h) filled from a Hello, for ``ccb_init`` and its ports."""
    return _info_from(hello)


def status_of(call: Callable[[ctypes.c_void_p], None]) -> Status:
    """The Status a ``ccb_get_status``-like C function writes through its one pointer."""
    st = _Status()
    call(ctypes.byref(st))  # type: ignore[arg-type]
    return Status(**{name: getattr(st, name) for name in _STATUS_FIELDS})


@dataclass(frozen=True)
class StreamResult:
    """What the C deframer made of a byte stream."""

    payloads: list[bytes]
    good: int
    bad: int
    bad_by_reason: dict[int, int]  # FRAME_ERR_* -> count
    digest: int


def fnv1a_digest(payloads: list[bytes]) -> int:
    """FNV-1a 32-bit over each payload's length byte and bytes (as ccb_mem_digest)."""
    h = 2166136261  # FNV-1a 32-bit offset basis (Fowler, Noll, Vo)
    for p in payloads:
        for b in (len(p) & 0xFF, *p):
            h = ((h ^ b) * 16777619) & 0xFFFFFFFF  # FNV 32-bit prime
    return h


class CoreLibrary:
    """The compiled core (libccb_mem.so) loaded through ctypes."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        lib = ctypes.CDLL(str(path))
        sig = {
            "ccb_crc16": (_u16, [_p, _size]),
            "ccb_cobs_encode": (_Result, [_p, _size, _p, _size]),
            "ccb_cobs_decode": (_Result, [_p, _size, _p, _size]),
            "ccb_frame_encode": (_Result, [_u8, _u16, _p, _size, _p, _size]),
            "ccb_encode_hello": (_Result, [_u16, _p, _p, _size]),
            "ccb_encode_status": (_Result, [_u16, _p, _p, _size]),
            "ccb_encode_sample": (_Result, [_u16, _u32, _u32, _u16, _u8, _p, _u8, _p, _size]),
            "ccb_encode_samples": (_Result, [_u16, _u32, _u32, _u8, _u8, _p, _p, _p, _p, _size]),
            "ccb_parse_configure": (_u8, [_p, _size, _p]),
            "ccb_parse_command": (_u8, [_p, _size, _p]),
            "ccb_mem_deframe_stream": (_size, [_p, _size, _size, _p, _size, _p, _size, _p]),
            "ccb_mem_rig_size": (_size, []),
            "ccb_mem_rig_init": (_u8, [_p, _p]),
            "ccb_mem_rig_board": (_p, [_p]),
            "ccb_mem_set_adc": (None, [_p, _u8, _u16]),
            "ccb_mem_dac": (_u16, [_p, _u8]),
            "ccb_mem_dac_writes": (_u32, [_p]),
            "ccb_mem_set_clock": (None, [_p, _u32]),
            "ccb_mem_take_tx": (_size, [_p, _p, _size]),
            "ccb_feed": (None, [_p, _p, _size]),
            "ccb_tick": (None, [_p]),
            "ccb_state": (_u8, [_p]),
            "ccb_rate_hz": (_u32, [_p]),
            "ccb_get_status": (None, [_p, _p]),
            "ccb_law_mode": (_u8, [_p]),
            "ccb_law_counts": (None, [_p, _p, _p]),
        }
        for name, (restype, argtypes) in sig.items():
            fn = getattr(lib, name)
            fn.restype = restype
            fn.argtypes = argtypes
        self.lib = lib

    # -- lower layers ---------------------------------------------------
    def crc16(self, data: bytes) -> int:
        return self.lib.ccb_crc16(data, len(data))

    def cobs_encode(self, data: bytes) -> bytes:
        cap = len(data) + len(data) // 254 + 1
        out = ctypes.create_string_buffer(cap)
        r = self.lib.ccb_cobs_encode(data, len(data), out, cap)
        if r.status != _CCB_OK:
            raise FrameError(f"ccb_cobs_encode failed with status {r.status}")
        return out.raw[: r.len]

    def cobs_decode(self, data: bytes) -> bytes:
        cap = max(len(data), 1)
        out = ctypes.create_string_buffer(cap)
        r = self.lib.ccb_cobs_decode(data, len(data), out, cap)
        if r.status != _CCB_OK:
            raise FrameError(f"ccb_cobs_decode failed with status {r.status}")
        return out.raw[: r.len]

    def frame_encode(self, msg_type: int, seq: int, body: bytes) -> bytes:
        out = ctypes.create_string_buffer(MAX_WIRE)
        r = self.lib.ccb_frame_encode(msg_type, seq, body, len(body), out, MAX_WIRE)
        if r.status != _CCB_OK:
            raise FrameError(f"ccb_frame_encode failed with status {r.status}")
        return out.raw[: r.len]

    def deframe_stream(self, data: bytes, chunk: int = 64) -> StreamResult:
        max_frames = len(data) // 2 + 1
        out = ctypes.create_string_buffer(max(len(data), 1))
        lens = (_u16 * max_frames)()
        counts = (_u32 * 8)()
        n = self.lib.ccb_mem_deframe_stream(
            data, len(data), chunk, out, len(out), lens, max_frames, counts
        )
        payloads, at = [], 0
        for i in range(n):
            payloads.append(out.raw[at : at + lens[i]])
            at += lens[i]
        by_reason = {e: counts[1 + e] for e in range(1, 5)}
        return StreamResult(payloads, counts[0], counts[1], by_reason, counts[7])

    # -- messages -------------------------------------------------------
    def encode_hello(self, seq: int, hello: Hello) -> bytes:
        info = _info_from(hello)
        out = ctypes.create_string_buffer(MAX_WIRE)
        r = self.lib.ccb_encode_hello(seq, ctypes.byref(info), out, MAX_WIRE)
        return out.raw[: r.len]

    def encode_status(self, seq: int, status: Status) -> bytes:
        st = _Status(**{name: getattr(status, name) for name in _STATUS_FIELDS})
        out = ctypes.create_string_buffer(MAX_WIRE)
        r = self.lib.ccb_encode_status(seq, ctypes.byref(st), out, MAX_WIRE)
        return out.raw[: r.len]

    def encode_sample(self, seq: int, sample: Sample) -> bytes:
        k = len(sample.adc_counts)
        adc = (_u16 * k)(*sample.adc_counts)
        out = ctypes.create_string_buffer(MAX_WIRE)
        r = self.lib.ccb_encode_sample(
            seq,
            sample.counter,
            sample.clock_us,
            sample.cmd_seq,
            sample.status,
            adc,
            k,
            out,
            MAX_WIRE,
        )
        if r.status != _CCB_OK:
            raise FrameError(f"ccb_encode_sample failed with status {r.status}")
        return out.raw[: r.len]

    def encode_samples(
        self,
        seq: int,
        first: int,
        clock_us: int,
        status: int,
        adc: Sequence[int],
        dac: Sequence[int],
        flags: Sequence[int],
    ) -> bytes:
        """A SAMPLES frame (PROTOCOL.md §10.4) of ``len(adc)`` samples from ``first``."""
        k = len(adc)
        out = ctypes.create_string_buffer(MAX_WIRE)
        r = self.lib.ccb_encode_samples(
            seq, first, clock_us, status, k, (_u16 * k)(*adc), (_u16 * k)(*dac),
            (_u8 * k)(*flags), out, MAX_WIRE,
        )  # fmt: skip
        if r.status != _CCB_OK:
            raise FrameError(f"ccb_encode_samples failed with status {r.status}")
        return out.raw[: r.len]

    def parse_configure(self, payload: bytes) -> Configure:
        c = _Configure()
        rc = self.lib.ccb_parse_configure(payload, len(payload), ctypes.byref(c))
        if rc != _CCB_OK:
            raise FrameError(f"ccb_parse_configure: status {rc}")
        counts = tuple(c.fault_counts[: c.n_outputs])
        return Configure(c.rate_hz, c.n_inputs, c.watchdog_us, counts, c.version)

    def parse_command(self, payload: bytes) -> tuple[int, Command]:
        c = _Command()
        rc = self.lib.ccb_parse_command(payload, len(payload), ctypes.byref(c))
        if rc != _CCB_OK:
            raise FrameError(f"ccb_parse_command: status {rc}")
        return c.seq, Command(c.answers_counter, tuple(c.dac_counts[: c.n_outputs]))

    def rig(self, hello: Hello) -> MemoryRig:
        return MemoryRig(self, hello)


class MemoryRig:
    """One ccb board on the in-memory port."""

    def __init__(self, core: CoreLibrary, hello: Hello) -> None:
        """``hello`` describes the board; any object with Hello's attributes will do."""
        self._lib = core.lib
        self._buf = ctypes.create_string_buffer(self._lib.ccb_mem_rig_size())
        self._info = _info_from(hello)
        rc = self._lib.ccb_mem_rig_init(self._buf, ctypes.byref(self._info))
        if rc != _CCB_OK:
            raise FrameError(f"ccb_init refused the board description (status {rc})")
        self._board = self._lib.ccb_mem_rig_board(self._buf)

    def feed(self, data: bytes) -> None:
        self._lib.ccb_feed(self._board, data, len(data))

    def tick(self) -> None:
        self._lib.ccb_tick(self._board)

    def set_clock(self, now_us: int) -> None:
        self._lib.ccb_mem_set_clock(self._buf, now_us & 0xFFFFFFFF)

    def set_adc(self, channel: int, counts: int) -> None:
        self._lib.ccb_mem_set_adc(self._buf, channel, counts)

    def dac(self, channel: int) -> int:
        return self._lib.ccb_mem_dac(self._buf, channel)

    def dac_writes(self) -> int:
        return self._lib.ccb_mem_dac_writes(self._buf)

    def take_tx(self) -> bytes:
        out = ctypes.create_string_buffer(65536)
        n = self._lib.ccb_mem_take_tx(self._buf, out, len(out))
        return out.raw[:n]

    def state(self) -> int:
        return self._lib.ccb_state(self._board)

    def rate_hz(self) -> int:
        return self._lib.ccb_rate_hz(self._board)

    def law_mode(self) -> bool:
        return bool(self._lib.ccb_law_mode(self._board))

    def law_counts(self) -> tuple[int, int]:
        """Laws of this run not queued: (late, beyond the queue)."""
        late, ahead = _u32(), _u32()
        self._lib.ccb_law_counts(self._board, ctypes.byref(late), ctypes.byref(ahead))
        return late.value, ahead.value

    def status(self) -> Status:
        st = _Status()
        self._lib.ccb_get_status(self._board, ctypes.byref(st))
        return Status(**{name: getattr(st, name) for name in _STATUS_FIELDS})
