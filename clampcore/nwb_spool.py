"""The compact columns, encoded and compressed while a run records (the stop only copies them).

Converting a whole journal at stop costs about 1.4 s of CPU per minute recorded
(``bench/bench_recording.py``): encoding every column and compressing it. The recorder
therefore feeds each block it journals to a ``Spool`` too, which encodes the block as
:mod:`clampcore.nwb_series` would at stop and appends it to chunked, compressed HDF5
datasets in ``compact.h5`` inside the journal directory. At stop
:func:`clampcore.nwb.convert_journal` copies those datasets into the NWB file as they
are (HDF5 copies the compressed chunks, nothing is compressed twice) and converts from
the journal only the columns the spool could not keep.

Rows are buffered until they fill whole HDF5 chunks (``nwb_series.CHUNK_ROWS``), and
only whole chunks are written, without HDF5's chunk cache: each chunk is encoded and
compressed exactly once, as it would be at stop, and the rest at :meth:`Spool.finish`.
The journal stays the crash-safe copy: the spool is never flushed while recording
(after a crash ``compact.h5`` is unreadable and ignored), ``recover`` never reads it, and the
NWB file is still checked against the journal before the journal is removed. A column
whose data stop fitting the encoding the spool chose from its first block (V off the
ADC's grid, a current no longer ``-g (V - E)``, an integer above 254, a counter
running backwards) is dropped from the spool and converted from the journal at stop;
so is every column when the spool fails (a full disk), when its calibration is not
the final one, or when its row count is not the journal's.

Encodings (those of :mod:`clampcore.nwb_series`): ``adc_counts`` and ``dac_counts``,
``float32``, ``derived_current`` (nothing stored), ``uint`` (uint8 only, 255 for NaN),
``counter_gaps`` (kept in memory). Spike flags are not spooled: their tables are
built from the journal at stop (one pass over one column).

Public names: ``Spool``, ``SPOOL_FILE``.
"""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Any

import numpy as np

from clampcore import nwb_series as ns
from clampcore.nwb_metadata import SIMULATED_SOURCES, text

SPOOL_FILE = "compact.h5"
_UINT8_TOP = 255  # uint8's largest value: NaN ("unknown") in a spooled integer column


class _Column:
    """One column's state in the spool: its encoding, its dataset, what it has seen."""

    def __init__(self, name: str, kind: str, element: str) -> None:
        self.name, self.kind, self.element = name, kind, element
        self.encoding: str | None = None  # decided on the first block
        self.dataset: Any = None
        self.has_nan = False
        self.top = 0.0
        self.rows: list[np.ndarray] = []  # counter gaps: rows and missing counts
        self.missing: list[np.ndarray] = []
        self.first: int | None = None
        self.last = 0.0


class Spool:
    """Compact columns of one run, appended block by block (see the module docstring).

    ``Spool(folder, columns, meta)`` creates ``folder/compact.h5``; ``append(block)``
    takes the same ``(n, len(columns))`` rows as the journal; :meth:`finish` closes the
    file and says what the NWB writer may copy. Any error disables the spool (``None``
    from :meth:`finish`): it never stops a recording.
    """

    def __init__(self, folder: Path, columns: list[str], meta: dict[str, Any]) -> None:
        import h5py

        self.path = Path(folder) / SPOOL_FILE
        self.names = list(columns)
        source = text(meta.get("source")) or ""
        self.cal = ns.calibration_from_meta(dict(meta), source in SIMULATED_SOURCES)
        self.e_mV = {
            str(e.get("name")): e.get("e_mV")
            for e in (meta.get("experiment") or {}).get("element", [])
            if isinstance(e, dict)
        }
        self.columns = [_Column(name, *ns.column_kind(name)) for name in self.names]
        self.n_rows = 0  # rows encoded and written
        self.failed: str | None = None
        self._pending: list[np.ndarray] = []  # rows waiting for a whole chunk
        self._pending_rows = 0
        # No chunk cache: only whole chunks are written, each compressed once, at once.
        self._file = h5py.File(self.path, "w", rdcc_nbytes=0)

    # ------------------------------------------------------------------ while recording
    def append(self, block: np.ndarray) -> None:
        """Take a block of rows; whole chunks of them are encoded and written at once. On any
        error the spool is given up."""
        if self.failed is not None:
            return
        self._pending.append(np.array(block, dtype=np.float64))  # a copy: the caller reuses it
        self._pending_rows += self._pending[-1].shape[0]
        if self._pending_rows >= ns.CHUNK_ROWS:
            self._write(whole_chunks=True)

    def _write(self, whole_chunks: bool) -> None:
        """Encode and write the pending rows (``whole_chunks``: only whole chunks of them)."""
        rows = np.concatenate(self._pending) if len(self._pending) > 1 else self._pending[0]
        n = rows.shape[0] - rows.shape[0] % ns.CHUNK_ROWS if whole_chunks else rows.shape[0]
        self._pending = [rows[n:]]
        self._pending_rows = rows.shape[0] - n
        if n == 0:
            return
        try:
            block = rows[:n]
            for j, column in enumerate(self.columns):
                if column.encoding != "journal":
                    self._append_column(column, block, j)
            self.n_rows += n
        except Exception as exc:  # a spool problem must never stop a run
            self._give_up(f"{type(exc).__name__}: {exc}")

    def _give_up(self, why: str) -> None:
        self.failed = why
        with contextlib.suppress(Exception):
            self._file.close()
        with contextlib.suppress(OSError):
            self.path.unlink()

    def _store(self, column: _Column, values: np.ndarray) -> None:
        if column.dataset is None:
            name, level = ns.COMPRESSION
            column.dataset = self._file.create_dataset(
                column.name.replace("/", "|"),
                shape=(0,),
                maxshape=(None,),
                dtype=values.dtype,
                chunks=(ns.CHUNK_ROWS,),
                shuffle=True,
                compression=name,
                compression_opts=level,
            )
        start = column.dataset.shape[0]
        column.dataset.resize((start + values.shape[0],))
        column.dataset[start:] = values

    def _append_column(self, column: _Column, block: np.ndarray, j: int) -> None:
        values = block[:, j]
        kind = column.kind
        if kind == "spike" or values.size == 0:
            return
        encoded = self._encode(column, values, block)
        if encoded is None:  # this block does not fit the column's encoding
            column.encoding = "journal"
            column.dataset = None
        elif encoded is not True:
            self._store(column, encoded)

    def _encode(self, column: _Column, values: np.ndarray, block: np.ndarray) -> Any:
        """The block's stored values, True when nothing is stored, None when it does not fit."""
        kind, first_block = column.kind, column.encoding is None
        if kind == "v":
            counts = ns.mV_to_adc_exact(values, self.cal) if self.cal else None
            column.encoding = "adc_counts"
            return counts
        if kind == "i":
            column.encoding = "dac_counts"
            return ns.pA_to_dac(values, self.cal) if self.cal and self.cal.dac_known else None
        if kind in ("g", "turn"):
            column.encoding = "float32"
            return values.astype(np.float32)
        if kind == "ie":
            derivable = self._derivable(column, values, block)
            if first_block:
                column.encoding = "derived_current" if derivable else "float32"
            if column.encoding == "derived_current":
                return True if derivable else None
            return values.astype(np.float32)
        if kind == "counter":
            column.encoding = "counter_gaps"
            return self._counter(column, values)
        column.encoding = "uint"  # flags, board status, latency, anything else
        return self._uint8(column, values)

    def _derivable(self, column: _Column, values: np.ndarray, block: np.ndarray) -> bool:
        e = self.e_mV.get(column.element)
        g_name = f"g_nS/{column.element}"
        if not isinstance(e, int | float) or isinstance(e, bool) or g_name not in self.names:
            return False
        g32 = block[:, self.names.index(g_name)].astype(np.float32)
        v = block[:, self.names.index("v_mV")] if "v_mV" in self.names else None
        return v is not None and ns.current_is_derivable(values, g32, v, float(e))

    def _counter(self, column: _Column, values: np.ndarray) -> Any:
        if column.first is None:
            gaps = ns.counter_gaps(values)
            if gaps is None:
                return None
            column.first = gaps[0]
            rows, missing = gaps[1], gaps[2]
        else:
            gaps = ns.counter_gaps(np.concatenate(([column.last], values)))
            if gaps is None:
                return None
            # Row 1 of the joined block is this block's row 0, i.e. row n_rows of the run.
            rows, missing = gaps[1] - 1 + self.n_rows, gaps[2]
        column.rows.append(rows)
        column.missing.append(missing)
        column.last = float(values[-1])
        return True

    def _uint8(self, column: _Column, values: np.ndarray) -> Any:
        nan = np.isnan(values)
        known = values[~nan]
        if known.size and (
            known.min() < 0 or known.max() > _UINT8_TOP or np.any(known != np.floor(known))
        ):
            return None
        column.has_nan |= bool(nan.any())
        column.top = max(column.top, float(known.max()) if known.size else 0.0)
        if column.has_nan and column.top >= _UINT8_TOP:
            return None  # 255 would mean both a value and "unknown"
        return np.where(nan, _UINT8_TOP, values).astype(np.uint8)

    # ------------------------------------------------------------------ at stop
    def read(self, name: str) -> np.ndarray | None:
        """A spooled column back in the journal's units (None: not spooled), e.g. for the
        run's timing figures at stop without reading the journal; writes the pending rows."""
        if self.failed is None and self._pending_rows:
            self._write(whole_chunks=False)
        if self.failed is not None or name not in self.names:
            return None
        column = self.columns[self.names.index(name)]
        if column.dataset is None or column.encoding not in ("float32", "uint"):
            return None
        data = column.dataset[:]
        if column.encoding == "uint":
            return ns.from_uint(data, _UINT8_TOP if column.has_nan else None)
        return data.astype(np.float64)

    def finish(self, meta: dict[str, Any], n_rows: int, events: list[dict]) -> dict | None:
        """Close the file; what the NWB writer may copy: ``{column: spec}``, each spec an
        encoding as in the file's document plus ``dataset`` (an open h5py dataset, or None
        when nothing is stored). None when the spool cannot be used: it failed, its
        calibration is not that of the final ``meta``, or it has not the journal's
        ``n_rows``. Call :meth:`close` once the NWB file is written."""
        import h5py

        if self.failed is None and self._pending_rows:
            self._write(whole_chunks=False)
        if self.failed is not None:
            self.close()
            return None
        source = text(meta.get("source")) or ""
        cal = ns.calibration_from_meta(dict(meta), source in SIMULATED_SOURCES)
        same_cal = (cal is None) == (self.cal is None) and (
            cal is None or cal.to_dict() == self.cal.to_dict()
        )
        if not same_cal or n_rows != self.n_rows:
            self.close()
            return None
        self._file.close()
        self._file = h5py.File(self.path, "r")
        e_changed = {
            e.get("element")
            for e in events
            if e.get("kind") == "param" and e.get("field") == "e_mV"
        }
        out: dict[str, dict] = {}
        for column in self.columns:
            if column.encoding in (None, "journal") or column.kind == "spike":
                continue
            if column.encoding == "derived_current" and column.element in e_changed:
                continue  # E changed while running: the stop's conversion follows its changes
            spec = self._spec(column)
            if spec is not None:
                out[column.name] = spec
        return out

    def _spec(self, column: _Column) -> dict | None:
        dataset = None
        if column.encoding not in ("derived_current", "counter_gaps"):
            dataset = self._file[column.name.replace("/", "|")]
            if dataset.shape != (self.n_rows,):
                return None
        spec: dict[str, Any] = {"encoding": column.encoding, "dataset": dataset}
        if column.encoding == "uint":
            spec["unknown"] = _UINT8_TOP if column.has_nan else None
        elif column.encoding == "derived_current":
            spec.update(e_mV=float(self.e_mV[column.element]), e_changes=[])
        elif column.encoding == "counter_gaps":
            spec["first"] = column.first
            spec["rows"] = np.concatenate(column.rows) if column.rows else np.zeros(0, np.int64)
            spec["missing"] = (
                np.concatenate(column.missing) if column.missing else np.zeros(0, np.int64)
            )
        return spec

    def close(self) -> None:
        """Close and delete the spool file (its datasets are in the NWB file, or unused)."""
        with contextlib.suppress(Exception):
            self._file.close()
        with contextlib.suppress(OSError):
            self.path.unlink()
