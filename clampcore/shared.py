"""Shared memory between the loop process and its readers (recorder, window, status).

One ``SharedRun`` is a set of named shared-memory blocks viewed as numpy arrays:

- ``ctrl`` (int64): requests to the loop (stop, zero current) and its progress
  (state, samples written, exit reason). See the ``CTRL_*`` indices.
- ``ring`` (float64, rows x columns): one row per sample, written by the loop at
  row ``n % rows``; ``ctrl[CTRL_WRITTEN]`` counts rows written so far. Readers
  copy what is new and never block the loop (single writer, many readers).
- ``mailbox`` (float64, MAILBOX_SLOTS x 4): live parameter changes
  ``(array, row, col, value)``; a writer fills a slot, then advances
  ``ctrl[CTRL_MAIL_WRITTEN]``. The loop applies new slots at a sample boundary
  and logs each one in ``applied`` with that sample's index. One writer at a
  time (the window, or the command line).
- ``stats`` (float64): counters and histograms of the loop's timing (``ST_*``).
- ``board`` (bytes): the board's description (its HELLO) as JSON, published once by
  the loop process after the handshake and before the board starts, for the recorder
  to store in the journal's header.

The layout of the ring's columns is ``RingLayout``; it is rebuilt from the
experiment in every process, so only the block names cross process borders.

Public names: ``SharedRun``, ``LoopShared``, ``RingLayout``, the ``CTRL_*``, ``ST_*``,
``MAIL_*``, ``COL_*`` and ``STATE_*`` constants.
"""

from __future__ import annotations

import contextlib
import json
import secrets
from dataclasses import dataclass
from multiprocessing import shared_memory
from typing import Any, NamedTuple

import numpy as np

from clampcore.program import Program

# ctrl indices
CTRL_STOP = 0  # set to 1 to ask the loop to stop
CTRL_ZERO = 1  # 1: command 0 pA whatever the elements compute (the recording goes on)
CTRL_STATE = 2  # STATE_*
CTRL_WRITTEN = 3  # rows written to the ring so far
CTRL_MAIL_WRITTEN = 4  # mailbox slots written by the writer so far
CTRL_MAIL_APPLIED = 5  # mailbox slots applied by the loop so far
CTRL_EXIT = 6  # why the loop stopped (EXIT_* in clampcore.hostloop)
CTRL_FIRST_COUNTER = 7  # board sample counter of the first sample
CTRL_HEARTBEAT = 8  # incremented by the loop on every pass, also when idle
# What board and amplifier can command, pA, published by the loop process after the
# handshake (float64 bits in these int64 words; both 0 until then).
CTRL_RANGE_LO_PA = 9
CTRL_RANGE_HI_PA = 10
N_CTRL = 16

STATE_STARTING, STATE_RUNNING, STATE_STOPPING, STATE_STOPPED, STATE_FAILED = 0, 1, 2, 3, 4

# stats indices
ST_SAMPLES = 0  # samples received
ST_MISSING = 1  # sample counters skipped (frames lost on the way to the host)
ST_LATE = 2  # samples the board flagged as taken after a late command
ST_UNANSWERED = 3  # samples the host did not answer (it answered a newer one)
ST_BAD_FRAMES = 4  # frames dropped by the host's decoder (COBS/CRC/length)
ST_OTHER_FRAMES = 5  # good frames that were not samples
ST_WATCHDOG = 6  # samples the board flagged with its watchdog
ST_FAULTS = 7  # samples that injected 0 pA because of a fault
ST_LIMITED = 8  # samples clipped to the current limit
ST_SPIKES = 9  # spikes of the recorded cell
ST_ZEROED = 10  # samples commanded to 0 pA by the zero-current control
ST_COMMANDS = 11  # commands sent
ST_RX_ERROR = 12  # samples the board flagged RX_ERROR (a bad frame or rejected command)
# Law mode: cell spikes a cell-driven synapse heard after the law of its delivery sample
# had been made; each is delivered at the first sample whose law is still to be made.
ST_LATE_SPIKES = 13
ST_LAT_HIST = 16  # latency histogram in samples: bins 0..LAT_BINS-1 (last bin: that many or more)
LAT_BINS = 16
ST_TURN_HIST = ST_LAT_HIST + LAT_BINS  # turnaround histogram, TURN_BIN_US wide bins
TURN_BINS = 200
TURN_BIN_US = 5.0  # 5 µs bins up to 1 ms: the pty round trip is 5-100 µs (DEVELOPERS.md, Figures)
N_STATS = ST_TURN_HIST + TURN_BINS

MAILBOX_SLOTS = 1024
MAIL_ARRAY, MAIL_ROW, MAIL_COL, MAIL_VALUE = 0, 1, 2, 3
MAIL_TO_PARAMS, MAIL_TO_LOOP = 0.0, 1.0
APPLIED_SAMPLE = 4  # column of ``applied``: sample index at which the change took effect

BOARD_BYTES = 4096  # room for the board's description as JSON (a HELLO is ~300 bytes)
_BOARD_LENGTH = 8  # the description's length (int64) precedes it, written last

RING_SECONDS = 20.0  # ring length: long enough for a 10 s display window twice over


# Fixed ring columns (then g of each element, i of each element, spike flags).
COL_COUNTER = 0
COL_V = 1
COL_I = 2
COL_FLAGS = 3
COL_STATUS = 4
COL_LATENCY = 5
COL_TURNAROUND = 6
N_FIXED_COLUMNS = 7


class LoopShared(NamedTuple):
    """What the compiled loop shares with its readers, as one argument (``SharedRun.loop``)."""

    ctrl: np.ndarray  # int64 (N_CTRL,): CTRL_* words
    ring: np.ndarray  # float64 (rows, columns): one row per sample (RingLayout)
    mailbox: np.ndarray  # float64 (MAILBOX_SLOTS, 4): live changes posted
    applied: np.ndarray  # float64 (MAILBOX_SLOTS, 5): live changes applied, with their sample
    stats: np.ndarray  # float64 (N_STATS,): ST_* counters and histograms
    neuron_rows: np.ndarray  # int64: program rows of the virtual neurons, in the ring's order


@dataclass(frozen=True)
class RingLayout:
    """Which ring column holds what."""

    names: list[str]  # column names, in order (journal names)
    rows: int

    @classmethod
    def for_program(cls, program: Program) -> RingLayout:
        names = [
            "sample_counter",
            "v_mV",
            "i_pA",
            "flags",
            "board_status",
            "latency_samples",
            "turnaround_us",
        ]
        names += [f"g_nS/{n}" for n in program.names]
        names += [f"i_pA/{n}" for n in program.names]
        names += [f"spike/{n}" for n in program.spike_sources()]
        rate = float(program.experiment.loop["rate_hz"])
        return cls(names=names, rows=int(rate * RING_SECONDS))

    @property
    def columns(self) -> int:
        return len(self.names)

    def index(self, name: str) -> int:
        return self.names.index(name)


class SharedRun:
    """The shared blocks of one run. ``create`` in the owner, ``attach`` elsewhere."""

    def __init__(
        self, blocks: dict[str, shared_memory.SharedMemory], layout: RingLayout, owner: bool
    ):
        self._blocks = blocks
        self.layout = layout
        self.owner = owner
        self.ctrl = np.ndarray((N_CTRL,), np.int64, blocks["ctrl"].buf)
        self.ring = np.ndarray((layout.rows, layout.columns), np.float64, blocks["ring"].buf)
        self.mailbox = np.ndarray((MAILBOX_SLOTS, 4), np.float64, blocks["mailbox"].buf)
        self.applied = np.ndarray((MAILBOX_SLOTS, 5), np.float64, blocks["applied"].buf)
        self.stats = np.ndarray((N_STATS,), np.float64, blocks["stats"].buf)
        self._board = np.ndarray((BOARD_BYTES,), np.uint8, blocks["board"].buf)

    def loop(self, neuron_rows: np.ndarray) -> LoopShared:
        """The blocks as the compiled loop takes them; ``neuron_rows``: the program rows whose
        spike flags end each ring row (the layout's ``spike/<neuron>`` columns, in order)."""
        return LoopShared(self.ctrl, self.ring, self.mailbox, self.applied, self.stats, neuron_rows)

    @property
    def names(self) -> dict[str, str]:
        """Block names, to ``attach`` from another process."""
        return {k: b.name for k, b in self._blocks.items()}

    @classmethod
    def create(cls, layout: RingLayout) -> SharedRun:
        tag = secrets.token_hex(4)
        sizes = {
            "ctrl": N_CTRL * 8,
            "ring": layout.rows * layout.columns * 8,
            "mailbox": MAILBOX_SLOTS * 4 * 8,
            "applied": MAILBOX_SLOTS * 5 * 8,
            "stats": N_STATS * 8,
            "board": BOARD_BYTES,
        }
        blocks = {
            k: shared_memory.SharedMemory(name=f"clampcore-{tag}-{k}", create=True, size=size)
            for k, size in sizes.items()
        }
        run = cls(blocks, layout, owner=True)
        run.ctrl[:] = 0
        run.stats[:] = 0
        run.ring[:] = np.nan
        run._board[:] = 0
        return run

    @classmethod
    def attach(cls, names: dict[str, str], layout: RingLayout) -> SharedRun:
        blocks = {k: _attach(n) for k, n in names.items()}
        return cls(blocks, layout, owner=False)

    def close(self) -> None:
        """Drop the views; the owner also unlinks the blocks."""
        for attr in ("ctrl", "ring", "mailbox", "applied", "stats", "_board"):
            setattr(self, attr, None)
        for block in self._blocks.values():
            block.close()
            if self.owner:
                with contextlib.suppress(FileNotFoundError):
                    block.unlink()

    # ------------------------------------------------------------------ readers
    def written(self) -> int:
        return int(self.ctrl[CTRL_WRITTEN])

    def read_rows(self, start: int, stop: int) -> np.ndarray:
        """Copy rows ``start..stop-1`` (sample order); they must still be in the ring."""
        if stop - start > self.layout.rows:
            raise ValueError("rows already overwritten")
        return self.ring[np.arange(start, stop) % self.layout.rows]

    def current_range_pA(self) -> tuple[float, float] | None:
        """What board and amplifier can command (lo, hi) in pA; None before the handshake."""
        lo, hi = self.ctrl[CTRL_RANGE_LO_PA : CTRL_RANGE_HI_PA + 1].view(np.float64)
        return (float(lo), float(hi)) if hi > lo else None

    def board(self) -> dict[str, Any] | None:
        """The board's description published by the loop process (None until then)."""
        length = int(self._board[:_BOARD_LENGTH].view(np.int64)[0])
        if length <= 0:
            return None
        text = bytes(self._board[_BOARD_LENGTH : _BOARD_LENGTH + length]).decode("utf-8")
        return json.loads(text)

    # ------------------------------------------------------------------ writer
    def publish_board(self, board: dict[str, Any]) -> None:
        """Publish the board's description (the loop process, once, before the board starts):
        the text first, then its length, which readers take as the sign it is complete."""
        raw = json.dumps(board).encode("utf-8")
        if len(raw) > BOARD_BYTES - _BOARD_LENGTH:
            raise ValueError(f"the board's description takes {len(raw)} bytes, more than the room")
        self._board[_BOARD_LENGTH : _BOARD_LENGTH + len(raw)] = np.frombuffer(raw, np.uint8)
        self._board[:_BOARD_LENGTH].view(np.int64)[0] = len(raw)

    def publish_current_range(self, lo_pA: float, hi_pA: float) -> None:
        """Tell every reader what board and amplifier can command (the loop process)."""
        self.ctrl[CTRL_RANGE_LO_PA : CTRL_RANGE_HI_PA + 1].view(np.float64)[:] = (lo_pA, hi_pA)

    def post_change(self, array: float, row: int, col: int, value: float) -> int:
        """Queue a live change; returns its mailbox number. One writer process at a time."""
        written = int(self.ctrl[CTRL_MAIL_WRITTEN])
        if written - int(self.ctrl[CTRL_MAIL_APPLIED]) >= MAILBOX_SLOTS:
            raise RuntimeError("mailbox full: the loop is not applying changes")
        slot = written % MAILBOX_SLOTS
        self.mailbox[slot] = (array, row, col, value)
        self.ctrl[CTRL_MAIL_WRITTEN] = written + 1  # published after the slot is complete
        return written

    def applied_changes(self, start: int = 0) -> list[dict[str, Any]]:
        """Changes the loop applied, from number ``start`` on."""
        stop = int(self.ctrl[CTRL_MAIL_APPLIED])
        out = []
        for k in range(max(start, stop - MAILBOX_SLOTS), stop):
            a, r, c, v, s = self.applied[k % MAILBOX_SLOTS]
            out.append(
                {
                    "number": k,
                    "array": a,
                    "row": int(r),
                    "col": int(c),
                    "value": v,
                    "sample": int(s),
                }
            )
        return out


def _attach(name: str) -> shared_memory.SharedMemory:
    # Processes started by multiprocessing share the owner's resource tracker, so
    # attaching registers nothing new and the owner's unlink cleans up once.
    return shared_memory.SharedMemory(name=name, create=False)
