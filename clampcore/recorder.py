"""Recording: drain the loop's ring into the crash-safe journal, then write NWB.

The ``Recorder`` runs in the main process, beside the loop process. Every
``flush_interval_s`` it copies the new ring rows and the applied parameter
changes into the journal and flushes it to the operating system, so a crash
loses at most that interval. At stop the journal is converted to NWB.

``write_recording_nwb`` writes an offline ``Recording`` in the same format.

Public names: ``Recorder``, ``RecordingError``, ``recording_meta``, ``write_recording_nwb``,
``timing_summary``, ``zero_hold_events``, ``bytes_per_second``, ``check_free_space``.

A recorder that cannot write (a full disk, a file-size limit, a vanished drive) never
dies quietly: it asks the loop for 0 pA and a stop, says why in ``error`` (the live
status and the end of the run show it), and leaves whatever reached the disk as a
journal that ``clampcore recover`` converts. Before a run, ``check_free_space`` refuses
one that will not fit; while it runs the recorder re-checks the free space and stops the
run while there is still room for the NWB file of what it recorded.
"""

from __future__ import annotations

import datetime as dt
import shutil
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

from clampcore.experiment import Experiment
from clampcore.journal import Journal, JournalData, JournalError, read_journal
from clampcore.nwb import NwbError, compact_bytes_per_row, convert_journal, write_nwb
from clampcore.nwb_spool import Spool
from clampcore.program import Program, build_program
from clampcore.shared import CTRL_STOP, CTRL_ZERO, MAIL_TO_LOOP, RingLayout, SharedRun

FLUSH_INTERVAL_S = 0.25  # the issue asks for at least two flushes a second
OPEN_ENDED_S = 600.0  # a run without --duration must have room for ten minutes (issue #11)
SPACE_CHECK_S = 2.0  # how often a running recorder re-checks the free space
# Stop while this many seconds more (journal and NWB) would still fit: what two more
# checks' worth of recording take, so a check never comes too late.
SPACE_MARGIN_S = 2 * SPACE_CHECK_S
# A failing recorder has the loop command 0 pA this long before it asks for the stop:
# many times the command latency (1-2 samples on hardware, up to ~15 on a loaded machine:
# README, Benchmarks), so the board applies 0 pA from the loop itself.
ZERO_BEFORE_STOP_S = 0.05
_JOURNAL_ITEM_BYTES = 8  # one float64 per column and sample (journal.py, samples.f64)


class RecordingError(RuntimeError):
    """A recording that cannot be made (no room, no write access); says where and why."""


def bytes_per_second(experiment: Experiment) -> float:
    """Disk bytes one second of a run of ``experiment`` needs, at most.

    The journal stores one float64 per ring column (``RingLayout``: the fixed columns, g
    and i of every element, a spike flag per spike source) and sample; the spool
    (``clampcore.nwb_spool``) the compact columns while recording, and at stop the NWB
    file copies them (each ``clampcore.nwb.compact_bytes_per_row``, an upper bound
    before compression); all three exist on disk until the NWB file is checked. Events
    (parameter changes) are a few hundred bytes each and left out. Adjust here when the
    recording's layout changes.
    """
    names = RingLayout.for_program(build_program(experiment)).names
    row_bytes = len(names) * _JOURNAL_ITEM_BYTES + 2 * compact_bytes_per_row(names)
    return row_bytes * float(experiment.loop["rate_hz"])


def _mb(n_bytes: float) -> str:
    return f"{n_bytes / 1e6:,.1f} MB"


def check_free_space(
    folder: Path, experiment: Experiment, duration_s: float | None
) -> tuple[float, float]:
    """Refuse (``RecordingError``) a run whose recording will not fit in ``folder``.

    An open-ended run (``duration_s`` None) needs room for ``OPEN_ENDED_S``. Returns
    (bytes needed, bytes free).
    """
    seconds = OPEN_ENDED_S if duration_s is None else float(duration_s)
    needed = bytes_per_second(experiment) * seconds
    folder = Path(folder).absolute()
    while not folder.exists() and folder != folder.parent:  # the journal creates it later
        folder = folder.parent
    try:
        free = float(shutil.disk_usage(folder).free)
    except OSError as exc:
        raise RecordingError(f"cannot check the free space in {folder}: {exc}") from exc
    if free < needed:
        span = "ten minutes (a run without --duration)" if duration_s is None else f"{seconds:g} s"
        raise RecordingError(
            f"refusing to start: {folder} has {_mb(free)} free, the recording of {span} needs "
            f"about {_mb(needed)} ({_mb(bytes_per_second(experiment) * 60)} per minute, "
            "journal and NWB); free space, record elsewhere (--out) or shorten --duration"
        )
    return needed, free


def recording_meta(experiment: Experiment, source: str, **extra: Any) -> dict[str, Any]:
    """The journal/NWB metadata of a run of ``experiment``."""
    meta = {
        "rate_hz": float(experiment.loop["rate_hz"]),
        "session_start": dt.datetime.now(dt.UTC).astimezone().isoformat(),
        "source": source,
        "experiment_text": experiment.text or experiment.to_toml(),
        "experiment": experiment.to_dict(),
        "first_sample": 0,
    }
    meta["experiment"]["amplifier"] = dict(experiment.amplifier)
    for key in ("session", "subject", "electrode"):
        meta["experiment"][key] = dict(getattr(experiment, key))
    meta.update(extra)
    return meta


def write_recording_nwb(recording: Any, path: Path, overwrite: bool = False) -> Path:
    """Write an offline ``clampcore.simulate.Recording`` as NWB."""
    meta = recording_meta(
        recording.experiment, recording.source, seed=recording.seed, **recording.extra
    )
    meta["summary"] = recording.summary()
    data = JournalData(meta=meta, columns=recording.columns(), events=[], complete=True)
    write_nwb(Path(path), data, overwrite=overwrite)
    return Path(path)


def timing_summary(
    columns: dict[str, np.ndarray], n_samples: int | None = None
) -> dict[str, float]:
    """Loop-timing figures of a run from its per-sample columns (``n_samples``: the run's
    length when ``columns`` lacks ``v_mV``)."""
    n = len(columns.get("v_mV", [])) if n_samples is None else n_samples
    out: dict[str, float] = {"samples": float(n)}
    lat = columns.get("latency_samples")
    if lat is not None:
        lat = lat[np.isfinite(lat)]
        if lat.size:
            out["latency_p50_samples"] = float(np.percentile(lat, 50))
            out["latency_p99_samples"] = float(np.percentile(lat, 99))
            out["latency_max_samples"] = float(lat.max())
            for k in (1, 2, 3):
                out[f"share_within_{k}_samples"] = float(np.mean(lat <= k))
    turn = columns.get("turnaround_us")
    if turn is not None:
        turn = turn[np.isfinite(turn)]
        if turn.size:
            quantiles = (50, 99, 99.9)
            for q, value in zip(quantiles, np.percentile(turn, quantiles), strict=True):
                out[f"turnaround_p{q:g}_us"] = float(value)
            out["turnaround_max_us"] = float(turn.max())
    return out


def zero_hold_events(columns: dict[str, np.ndarray], rate_hz: float) -> list[dict[str, Any]]:
    """One event per period the zero-current control held 0 pA (``FLAG_ZEROED`` rows).

    ``sample`` is the first held row, ``end_sample`` the first row after the hold.
    """
    from clampcore.hostloop import FLAG_ZEROED

    flags = columns.get("flags")
    if flags is None or flags.size == 0:
        return []
    held = (flags.astype(np.int64) & FLAG_ZEROED) != 0
    edges = np.diff(np.concatenate([[0], held.astype(np.int8), [0]]))
    starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    return [
        {
            "sample": int(a),
            "kind": "zero_hold",
            "end_sample": int(b),
            "duration_s": (int(b) - int(a)) / rate_hz,
        }
        for a, b in zip(starts, ends, strict=True)
    ]


class Recorder:
    """Copies a run's ring into a ``Journal`` on a background thread."""

    def __init__(
        self,
        shared: SharedRun,
        program: Program,
        journal_path: Path,
        meta: dict[str, Any],
        duration_s: float | None = None,
    ) -> None:
        self.shared = shared
        self.program = program
        self.layout: RingLayout = shared.layout
        self.journal = Journal(Path(journal_path), self.layout.names, meta)
        # The compact columns, encoded while recording (made with the first rows, once the
        # board's description is in the journal); None: not yet, or given up.
        self.spool: Spool | None = None
        self._spool_tried = False
        self.path = Path(journal_path)
        self._rows_done = 0
        self._changes_done = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="clampcore-recorder", daemon=True)
        self.lost_rows = 0
        self.final_meta: dict[str, Any] = {}
        self._slot_names = program.slot_names()
        # Why the recording failed (None while it works): the loop was told 0 pA and stop.
        self.error: str | None = None
        self._bytes_per_s = bytes_per_second(program.experiment)
        self._nwb_row_bytes = compact_bytes_per_row(self.layout.names)
        self._rate_hz = float(program.experiment.loop["rate_hz"])
        self._next_space_check = 0.0
        self._duration_s = duration_s  # None: open-ended
        # Said once, while the run goes on: the disk will not hold the rest of the run.
        self.warning: str | None = None

    def start(self) -> None:
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(FLUSH_INTERVAL_S):
            try:
                self.drain()
                self._check_space()
            except (JournalError, OSError) as exc:
                self.fail(str(exc))
                return

    def fail(self, why: str) -> None:
        """Record why the recording failed and ask the loop for 0 pA and a stop."""
        if self.error is None:
            t_s = self.journal.rows_written / self._rate_hz
            self.error = (
                f"the recording failed after {t_s:.2f} s ({why}); the loop was told to command "
                "0 pA and stop"
            )
        self.shared.ctrl[CTRL_ZERO] = 1
        time.sleep(ZERO_BEFORE_STOP_S)  # 0 pA from the loop first, then the stop
        self.shared.ctrl[CTRL_STOP] = 1

    def _check_space(self) -> None:
        """Stop the run while the free space still holds its NWB file and a margin."""
        now = time.monotonic()
        if now < self._next_space_check:
            return
        self._next_space_check = now + SPACE_CHECK_S
        free = shutil.disk_usage(self.path).free
        # The NWB file of what is recorded so far, and a margin of journal and NWB.
        needed = (
            self.journal.rows_written * self._nwb_row_bytes + SPACE_MARGIN_S * self._bytes_per_s
        )
        if free < needed:
            self.fail(
                f"the disk of {self.path} is almost full: {_mb(free)} free, "
                f"{_mb(needed)} kept for the NWB file and a margin"
            )
            return
        elapsed_s = self.journal.rows_written / self._rate_hz
        rest_s = OPEN_ENDED_S if self._duration_s is None else self._duration_s - elapsed_s
        if self.warning is None and free < needed + max(rest_s, 0.0) * self._bytes_per_s:
            span = "ten more minutes" if self._duration_s is None else "the rest of the run"
            self.warning = (
                f"warning: the disk of {self.path} has {_mb(free)} free, not enough for {span}; "
                "the run will be stopped (0 pA first) while its NWB file still fits"
            )

    def drain(self) -> None:
        """Copy what is new since the last call and flush it."""
        written = self.shared.written()
        start = self._rows_done
        if written - start > self.layout.rows:  # the ring lapped the recorder
            self.lost_rows += written - self.layout.rows - start
            start = written - self.layout.rows
        if self.journal.meta.get("board") is None and (board := self.shared.board()):
            self.journal.describe_board(board)  # before the rows: they are its counts
        rows = self.shared.read_rows(start, written) if written > start else None
        if rows is not None:
            self.journal.append(rows)
        self._rows_done = written
        for change in self.shared.applied_changes(self._changes_done):
            self.journal.event(self._describe(change))
            self._changes_done = change["number"] + 1
        self.journal.flush()
        if rows is not None:
            self._spool(rows)

    def _spool(self, rows: np.ndarray) -> None:
        """Encode and compress the rows for the NWB file now, not at stop (after the
        journal has them: the journal is the crash-safe copy, the spool only saves time)."""
        if not self._spool_tried:
            self._spool_tried = True
            try:
                self.spool = Spool(self.path, self.layout.names, self.journal.meta)
            except Exception:  # no spool: the stop converts from the journal
                self.spool = None
        if self.spool is not None:
            self.spool.append(rows)

    def _timing_columns(self) -> tuple[dict[str, np.ndarray], int]:
        """The columns the run's timing figures and zero holds need, and the run's length:
        from the spool (a few small columns) when it has every row, else from the journal."""
        names = ("latency_samples", "turnaround_us", "flags")
        spool = self.spool
        if spool is not None and spool.failed is None and not self.error:
            columns = {name: spool.read(name) for name in names if name in self.layout.names}
            if all(values is not None for values in columns.values()):
                return columns, spool.n_rows  # type: ignore[return-value]
        columns = read_journal(self.path).columns
        return columns, len(columns.get("v_mV", []))

    def note(self, kind: str, **fields: Any) -> None:
        """Log an event (fault, message) at the current sample."""
        self.journal.event({"sample": self.shared.written(), "kind": kind, **fields})

    def _describe(self, change: dict[str, Any]) -> dict[str, Any]:
        key = (
            "loop" if change["array"] == MAIL_TO_LOOP else "params",
            change["row"],
            change["col"],
        )
        element, field = self._slot_names.get(key, ("?", f"{key}"))
        return {
            "sample": change["sample"],
            "kind": "param",
            "element": element,
            "field": field,
            "new": change["value"],
        }

    def stop(
        self,
        final_meta: dict[str, Any] | None = None,
        nwb_path: Path | None = None,
        keep_journal: bool = False,
    ) -> Path | None:
        """Drain the rest, close the journal, convert it to NWB; returns the NWB path.

        The journal is removed once the NWB file has been read back and checked against
        it, unless ``keep_journal``; a conversion that fails (a full disk, a failed check)
        keeps the journal, says so and how to recover in ``error``, and returns None.
        A run that recorded no sample (it never started) leaves no files: returns None.
        """
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()
        try:
            self.drain()
        except (JournalError, OSError) as exc:
            self.fail(str(exc))
        final = dict(final_meta or {})
        columns, n_rows = self._timing_columns()
        for event in zero_hold_events(columns, float(self.program.experiment.loop["rate_hz"])):
            self.journal.event(event)  # NWB: events/zero_hold_events, one row per hold
        final["timing"] = timing_summary(columns, n_rows)
        final["lost_rows"] = self.lost_rows
        if self.error:
            final["recording_error"] = self.error
        self.final_meta = final
        try:
            self.journal.close(final)
        except (JournalError, OSError) as exc:
            self.fail(str(exc))
        if self.journal.rows_written == 0 and not self.journal.events_written and not self.error:
            shutil.rmtree(self.path, ignore_errors=True)
            return None
        out = Path(nwb_path or self.path.with_suffix(".nwb"))
        try:
            path, _ = convert_journal(self.path, out, keep_journal=keep_journal, spool=self.spool)
            return path
        except (NwbError, OSError, RuntimeError) as exc:  # h5py reports a full disk so
            kept = self.journal.rows_written
            self.error = (
                (self.error + "; " if self.error else "")
                + f"no NWB file written ({exc}). The journal {self.path} keeps {kept} samples "
                f"({kept / self._rate_hz:.2f} s): `clampcore recover {self.path} --out {out}` "
                "converts it (on a full disk, once there is room)"
            )
            return None
