"""The simulated rig's ground-truth log: what the model cell really received, per sample.

A test that drives the rig through the serial line sees only what the board
reports; this log says what happened on the board side: the true membrane
potential, the current really applied, which command (sequence number and the
sample it answered) was in force, and whether the watchdog held the fault output.
Events (configure, start, stop, watchdog trips and recoveries, injected faults,
stalls) go in the same file.

File layout (all little-endian), append-only so that it stays readable after a
SIGKILL of either side (the rig writes each block with one ``write(2)`` on an
``O_APPEND`` descriptor, at least every 0.5 s; a block cut short is read up to
its last whole record or line):

- header: ``b"CCGT"``, u16 format version (1), u16 reserved, u32 length, then that
  many bytes of UTF-8 JSON describing the rig (identity, clock, seed, faults,
  the per-sample record layout);
- blocks: ``b"BLK"``, u8 kind (1: per-sample records of ``LOG_DTYPE``;
  2: JSON lines, one event each), u32 payload length, payload.

Every event is a JSON object with at least ``"event"`` (its kind) and ``"run"``
(0 before the first START, then 1, 2, ... per START); kernel events carry the
sample ``"counter"`` they happened at.

Public names: ``FORMAT_VERSION``, ``LOG_DTYPE``, ``LOG_WATCHDOG``, ``LOG_FAULT_OUTPUT``,
``LOG_BEHIND``, ``LOG_TX_DROPPED``, ``LOG_TX_CORRUPTED``, ``LOG_TX_FAILED``,
``NO_COMMAND``, ``LogWriter``, ``GroundTruth``, ``read_log``, ``LogFormatError``.
"""

from __future__ import annotations

import json
import os
import queue
import struct
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

FORMAT_VERSION = 1
_MAGIC = b"CCGT"
_HEADER = struct.Struct("<4sHHI")
_BLOCK = struct.Struct("<3sBI")
_BLOCK_MAGIC = b"BLK"
_KIND_ROWS = 1
_KIND_EVENTS = 2

# One record per sample taken (fields ordered by size so that each is aligned).
LOG_DTYPE = np.dtype(
    [
        ("counter", "<i8"),  # sample counter k
        ("cmd_answers", "<i8"),  # sample counter the applied command answered; NO_COMMAND if none
        ("v_true_mV", "<f8"),  # the model cell's true membrane potential at t_k
        ("i_applied_pA", "<f8"),  # current applied over (t_{k-1}, t_k] and while measuring k
        ("clock_us", "<u4"),  # the board clock sent in SAMPLE k
        ("cmd_seq", "<i4"),  # seq of the applied command; NO_COMMAND when the fault value is out
        ("lag_us", "<i4"),  # wall clock: how late tick k was taken (0 in lockstep)
        ("adc_counts", "<u2"),  # the ADC count sent in SAMPLE k
        ("dac_counts", "<u2"),  # the DAC count applied (command or fault value)
        ("status", "u1"),  # status bits sent in SAMPLE k
        ("flags", "u1"),  # LOG_* bits below
        ("_pad", "u1", (6,)),
    ]
)
NO_COMMAND = -1

# LOG_DTYPE["flags"] bits.
LOG_WATCHDOG = 0x01  # the watchdog had tripped: the fault value was applied
LOG_FAULT_OUTPUT = 0x02  # the fault value was applied (no command yet, or the watchdog)
LOG_BEHIND = 0x04  # the rig took this sample a period or more after its due time
LOG_TX_DROPPED = 0x08  # fault injection: SAMPLE not sent
LOG_TX_CORRUPTED = 0x10  # fault injection: SAMPLE sent with one byte changed
LOG_TX_FAILED = 0x20  # the write failed (nobody reads the port and its buffer is full)


class LogFormatError(ValueError):
    """A file that is not a ground-truth log (or not a version this reader knows)."""


class LogWriter:
    """Append blocks to a ground-truth log from a background thread.

    ``rows(records, done)`` and ``events(list_of_dicts)`` queue a block and return
    at once; a thread writes each block with one ``writev(2)`` straight from the
    caller's array (no copy) and then calls ``done()``, after which the caller may
    reuse the array.  ``close()`` writes what is queued and closes the file.
    """

    def __init__(self, path: str | Path, header: dict[str, Any]) -> None:
        self.path = Path(path)
        head = dict(header)
        head["format"] = "clampcore simulated-rig ground truth"
        head["dtype"] = [[name, LOG_DTYPE.fields[name][0].str] for name in LOG_DTYPE.names]
        text = json.dumps(head, sort_keys=True).encode()
        flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_APPEND
        self._fd = os.open(self.path, flags, 0o644)
        os.write(self._fd, _HEADER.pack(_MAGIC, FORMAT_VERSION, 0, len(text)) + text)
        self._queue: queue.Queue[tuple[bytes, Any, Callable[[], None] | None] | None]
        self._queue = queue.Queue()
        self._error: OSError | None = None
        self._thread = threading.Thread(target=self._work, name="ground-truth log", daemon=True)
        self._thread.start()

    def rows(self, records: np.ndarray, done: Callable[[], None] | None = None) -> None:
        """Queue per-sample records (a contiguous ``LOG_DTYPE`` array, not to be changed
        until ``done()`` is called from the writer thread)."""
        if records.dtype != LOG_DTYPE or not records.flags.c_contiguous:
            raise ValueError("rows() takes a contiguous array of LOG_DTYPE records")
        payload = records.view(np.uint8).reshape(-1)
        self._queue.put((_BLOCK.pack(_BLOCK_MAGIC, _KIND_ROWS, payload.size), payload, done))

    def events(self, events: list[dict[str, Any]]) -> None:
        """Queue events (JSON-serialisable dicts)."""
        if events:
            text = "".join(json.dumps(e, sort_keys=True) + "\n" for e in events).encode()
            self._queue.put((_BLOCK.pack(_BLOCK_MAGIC, _KIND_EVENTS, len(text)), text, None))

    def _work(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            head, payload, done = item
            try:
                views = [memoryview(head), memoryview(payload)]
                while views:
                    n = os.writev(self._fd, views)
                    while views and n >= len(views[0]):
                        n -= len(views[0])
                        views.pop(0)
                    if views and n:
                        views[0] = views[0][n:]
            except OSError as exc:  # disk full...: keep serving, report at close
                self._error = exc
            if done is not None:
                done()

    def close(self) -> None:
        """Write everything queued, close the file; raise the first write error, if any."""
        if self._fd < 0:
            return
        self._queue.put(None)
        self._thread.join()
        os.close(self._fd)
        self._fd = -1
        if self._error is not None:
            raise OSError(f"ground-truth log {self.path}: {self._error}") from self._error


@dataclass
class GroundTruth:
    """A ground-truth log read back: per-sample arrays (all runs, in order) and events."""

    header: dict[str, Any]
    records: np.ndarray  # LOG_DTYPE
    run: np.ndarray  # int64 per record: which START it belongs to (1, 2, ...)
    events: list[dict[str, Any]] = field(default_factory=list)

    def __len__(self) -> int:
        return int(self.records.size)

    def __getattr__(self, name: str) -> np.ndarray:
        # counter, cmd_answers, v_true_mV, i_applied_pA, clock_us, cmd_seq, lag_us,
        # adc_counts, dac_counts, status, flags: one array each.
        records = self.__dict__.get("records")
        if records is not None and name in LOG_DTYPE.names and not name.startswith("_"):
            return records[name]
        raise AttributeError(name)

    @property
    def watchdog(self) -> np.ndarray:
        """True where the watchdog held the fault output."""
        return (self.records["flags"] & LOG_WATCHDOG) != 0

    @property
    def fault_output(self) -> np.ndarray:
        """True where the fault value was applied (no command yet, or the watchdog)."""
        return (self.records["flags"] & LOG_FAULT_OUTPUT) != 0

    def for_run(self, run: int) -> GroundTruth:
        """Only the records and events of one run (1 = the first START)."""
        keep = self.run == run
        return GroundTruth(
            self.header,
            self.records[keep],
            self.run[keep],
            [e for e in self.events if e.get("run") == run],
        )

    def events_of(self, kind: str) -> list[dict[str, Any]]:
        """Events whose ``"event"`` is ``kind``, in the order they happened."""
        return [e for e in self.events if e.get("event") == kind]


def read_log(path: str | Path) -> GroundTruth:
    """Read a ground-truth log, also one cut short by a crash (whole records only)."""
    data = Path(path).read_bytes()
    if len(data) < _HEADER.size:
        raise LogFormatError(f"{path}: {len(data)} bytes, too short for a ground-truth log")
    magic, version, _, head_len = _HEADER.unpack_from(data)
    if magic != _MAGIC:
        raise LogFormatError(f"{path}: not a simulated-rig ground-truth log (magic {magic!r})")
    if version != FORMAT_VERSION:
        raise LogFormatError(f"{path}: format version {version}, this reader knows 1")
    pos = _HEADER.size + head_len
    try:
        header = json.loads(data[_HEADER.size : pos])
    except ValueError as exc:
        raise LogFormatError(f"{path}: header is not JSON ({exc})") from exc
    chunks: list[np.ndarray] = []
    runs: list[np.ndarray] = []
    events: list[dict[str, Any]] = []
    run = 0
    while pos + _BLOCK.size <= len(data):
        magic, kind, n = _BLOCK.unpack_from(data, pos)
        if magic != _BLOCK_MAGIC:
            raise LogFormatError(f"{path}: damaged block at byte {pos}")
        start = pos + _BLOCK.size
        payload = data[start : start + n]  # shorter than n only for a block cut short
        pos = start + n
        if kind == _KIND_ROWS:
            whole = len(payload) // LOG_DTYPE.itemsize * LOG_DTYPE.itemsize
            rec = np.frombuffer(payload[:whole], dtype=LOG_DTYPE)
            chunks.append(rec)
            runs.append(np.full(rec.size, run, dtype=np.int64))
        elif kind == _KIND_EVENTS:
            for line in payload.split(b"\n"):
                if not line:
                    continue
                try:
                    event = json.loads(line)
                except ValueError:
                    break  # the last line of a block cut short
                events.append(event)
                if event.get("event") == "start":
                    run = int(event["run"])
        else:
            raise LogFormatError(f"{path}: unknown block kind {kind} at byte {pos}")
    records = np.concatenate(chunks) if chunks else np.zeros(0, dtype=LOG_DTYPE)
    run_of = np.concatenate(runs) if runs else np.zeros(0, dtype=np.int64)
    return GroundTruth(header, records, run_of, events)
