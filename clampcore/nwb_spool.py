"""The compact columns, encoded and compressed while a run records (the stop only copies them).

Converting a whole journal at stop costs about 1.4 s of CPU per minute recorded
(``bench/bench_recording.py``): encoding every column and compressing it. The recorder
therefore feeds each block it journals to a ``Spool`` too, which encodes the rows as
:mod:`clampcore.nwb_series` would at stop and compresses them into HDF5 chunks: whole
chunks of ``nwb_series.CHUNK_ROWS`` rows, byte-shuffled and deflated exactly as HDF5's
shuffle and gzip filters store them (HDF5 documentation, "Filters": shuffle, then
deflate in the zlib format), appended with plain ``os.write`` to one file per column in
``spool/`` inside the journal directory. At stop :func:`clampcore.nwb.write_nwb` gives
those columns empty datasets of the same chunks and filters and writes the stored chunks
into them as they are (``write_direct_chunk``): nothing is compressed twice. Only the
columns the spool could not keep are converted from the journal. No HDF5 file is open
while recording, so a full disk fails a plain write, never the HDF5 library's state.

The journal stays the crash-safe copy: ``recover`` never reads the spool, and the NWB
file is still checked against the journal before the journal is removed. A column whose
data stop fitting the encoding the spool chose from its first chunk (V off the ADC's
grid, a current no longer ``-g (V - E)``, an integer above 254, a counter running
backwards) is dropped from the spool and converted from the journal at stop; so is every
column when the spool fails (a full disk), when its calibration is not the final one, or
when its row count is not the journal's.

Encodings (those of :mod:`clampcore.nwb_series`): ``adc_counts`` and ``dac_counts``,
``float32``, ``derived_current`` (nothing stored), ``uint`` (uint8 only, 255 for NaN),
``counter_gaps`` (kept in memory). Spike flags are not spooled: their tables are
built from the journal at stop (one pass over one column).

Public names: ``Spool``, ``SpooledChunks``, ``SPOOL_DIR``.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import zlib
from pathlib import Path
from typing import Any

import numpy as np

from clampcore import nwb_series as ns
from clampcore.nwb_metadata import SIMULATED_SOURCES, text

SPOOL_DIR = "spool"
_UINT8_TOP = 255  # uint8's largest value: NaN ("unknown") in a spooled integer column


class _Column:
    """One column's state in the spool: its encoding, its chunks, what it has seen."""

    def __init__(self, name: str, kind: str, element: str) -> None:
        self.name, self.kind, self.element = name, kind, element
        self.encoding: str | None = None  # decided on the first block
        self.stored: SpooledChunks | None = None
        self.has_nan = False
        self.top = 0.0
        self.rows: list[np.ndarray] = []  # counter gaps: rows and missing counts
        self.missing: list[np.ndarray] = []
        self.first: int | None = None
        self.last = 0.0


class SpooledChunks:
    """One column's compressed chunks in a plain file: ``sizes`` bytes each, in order."""

    def __init__(self, path: Path, dtype: np.dtype) -> None:
        self.path, self.dtype = path, np.dtype(dtype)
        self.sizes: list[int] = []
        self.rows = 0
        self._fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)

    def append(self, values: np.ndarray) -> None:
        """Compress ``values`` (whole chunks; the last may be short: padded with zeros)."""
        step = ns.CHUNK_ROWS
        for start in range(0, values.shape[0], step):
            part = values[start : start + step]
            chunk = np.zeros(step, dtype=self.dtype)
            chunk[: part.shape[0]] = part
            level = ns.COMPRESSION[1]
            # HDF5's shuffle filter: byte k of every element, for k = 0 .. itemsize - 1.
            shuffled = chunk.view(np.uint8).reshape(step, self.dtype.itemsize).T.tobytes()
            raw = zlib.compress(shuffled, level)  # HDF5's deflate filter: zlib format
            done = 0
            while done < len(raw):
                done += os.write(self._fd, raw[done:])
            self.sizes.append(len(raw))
            self.rows += part.shape[0]

    def close(self) -> None:
        with contextlib.suppress(OSError):
            os.close(self._fd)

    def placeholder(self) -> Any:
        """An empty dataset of the NWB file with these chunks' shape, type and filters."""
        from hdmf.backends.hdf5.h5_utils import H5DataIO

        name, level = ns.COMPRESSION
        return H5DataIO(
            data=None,
            shape=(self.rows,),
            maxshape=(None,),  # HDF5 allows a chunk longer than a short run only so
            dtype=self.dtype,
            chunks=(ns.CHUNK_ROWS,),
            shuffle=True,
            compression=name,
            compression_opts=level,
        )

    def chunks(self) -> Any:
        """``(first row, compressed bytes)`` of every chunk, read back from the file."""
        with open(self.path, "rb") as handle:
            for k, size in enumerate(self.sizes):
                yield k * ns.CHUNK_ROWS, handle.read(size)

    def fill(self, dataset: Any) -> None:
        """Write the chunks into ``dataset`` (made from :meth:`placeholder`) as stored."""
        for first, raw in self.chunks():
            dataset.id.write_direct_chunk((first,), raw)

    def read(self) -> np.ndarray:
        """The values back (decompressed, unshuffled)."""
        item = self.dtype.itemsize
        parts = [
            np.frombuffer(zlib.decompress(raw), np.uint8)
            .reshape(item, -1)
            .T.copy()
            .view(self.dtype)
            for _, raw in self.chunks()
        ]
        values = np.concatenate(parts) if parts else np.zeros(0, self.dtype)
        return values.reshape(-1)[: self.rows]


class Spool:
    """Compact columns of one run, appended block by block (see the module docstring).

    ``Spool(folder, columns, meta)`` creates ``folder/spool/``; ``append(block)``
    takes the same ``(n, len(columns))`` rows as the journal; :meth:`finish` says what
    the NWB writer may copy. Any error disables the spool (``None`` from
    :meth:`finish`): it never stops a recording.
    """

    def __init__(self, folder: Path, columns: list[str], meta: dict[str, Any]) -> None:
        self.path = Path(folder) / SPOOL_DIR
        self.path.mkdir()
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

    # ------------------------------------------------------------------ while recording
    def append(self, block: np.ndarray) -> None:
        """Take a block of rows; whole chunks of them are encoded and written at once. On any
        error the spool is given up."""
        if self.failed is not None:
            return
        block = np.array(block, dtype=np.float64)  # a copy: the caller reuses its array
        if block.ndim != 2 or block.shape[1] != len(self.names):
            self._give_up(f"a block of shape {block.shape} for {len(self.names)} columns")
            return
        self._pending.append(block)
        self._pending_rows += block.shape[0]
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
        self._pending = []
        self.close()

    def _store(self, column: _Column, values: np.ndarray) -> None:
        if column.stored is None:
            index = self.names.index(column.name)
            column.stored = SpooledChunks(self.path / f"{index}.chunks", values.dtype)
        column.stored.append(values)

    def _append_column(self, column: _Column, block: np.ndarray, j: int) -> None:
        values = block[:, j]
        kind = column.kind
        if kind == "spike" or values.size == 0:
            return
        encoded = self._encode(column, values, block)
        if encoded is None:  # this block does not fit the column's encoding
            column.encoding = "journal"
            if column.stored is not None:
                column.stored.close()
            column.stored = None
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
    def complete(self) -> None:
        """Encode and write the rows still waiting for a whole chunk (the run has ended)."""
        if self.failed is None and self._pending_rows:
            self._write(whole_chunks=False)

    def read(self, name: str) -> np.ndarray | None:
        """A spooled column back in the journal's units (None: not spooled), e.g. for the
        run's timing figures at stop without reading the journal; completes the spool."""
        self.complete()
        if self.failed is not None or name not in self.names:
            return None
        column = self.columns[self.names.index(name)]
        if column.stored is None or column.encoding not in ("float32", "uint"):
            return None
        data = column.stored.read()
        if column.encoding == "uint":
            return ns.from_uint(data, _UINT8_TOP if column.has_nan else None)
        return data.astype(np.float64)

    def finish(self, meta: dict[str, Any], n_rows: int, events: list[dict]) -> dict | None:
        """What the NWB writer may copy: ``{column: spec}``, each spec an encoding as in the
        file's document plus ``stored`` (a :class:`SpooledChunks`, or None when nothing is
        stored). None when the spool cannot be used: it failed, its calibration is not that
        of the final ``meta``, or it has not the journal's
        ``n_rows``. Call :meth:`close` once the NWB file is written."""
        self.complete()
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
        for column in self.columns:
            if column.stored is not None:
                column.stored.close()
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
        stored = column.stored
        if column.encoding not in ("derived_current", "counter_gaps") and (
            stored is None or stored.rows != self.n_rows
        ):
            return None
        spec: dict[str, Any] = {"encoding": column.encoding, "stored": stored}
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
        """Delete the spool (its chunks are in the NWB file, or unused)."""
        for column in self.columns:
            if column.stored is not None:
                column.stored.close()
        shutil.rmtree(self.path, ignore_errors=True)
