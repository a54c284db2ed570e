"""Write a clampcore recording as NWB (Neurodata Without Borders) and read it back.

A run is journalled while it goes on (:mod:`clampcore.journal`); at stop, or
later through ``clampcore recover``, :func:`convert_journal` converts the journal
into one NWB file, reads it back, checks it against the journal and then removes
the journal (unless asked to keep it). Time of sample ``n`` is ``n / rate_hz`` s
after ``session_start``; row ``k`` is sample ``first_sample + k``.

=====================  ==================================================================
journal column          NWB object (how it is stored: :mod:`clampcore.nwb_series`)
=====================  ==================================================================
``v_mV``               ``acquisition/membrane_potential``, CurrentClampSeries: the ADC
                       counts, volts = data x conversion + offset (lossless)
``i_pA``               ``stimulus/command_current``, CurrentClampStimulusSeries: the DAC
                       counts sent, amperes = data x conversion + offset; both linked in
                       the intracellular-recordings table
``g_nS/<element>``     ``processing/virtual_conductances/conductance_<element>``, float32 nS
``i_pA/<element>``     ``-g (V - E)`` on reading when that reproduces it to float32
                       precision (not stored); otherwise ``current_<element>``, float32 pA
``spike/<name>``       ``events/spikes_<name>``, an EventsTable of the spiking samples
``sample_counter``     not stored: first value + row, plus
                       ``processing/loop_timing/sample_counter_gaps`` when there are gaps
``flags``,             ``processing/loop_timing/<name>``: smallest unsigned integers,
``board_status``,      unknown values as the type's largest value (said in the
``latency_samples``    description)
``turnaround_us``      ``processing/loop_timing/host_turnaround``, float32 µs
anything else          ``processing/loop_timing/<name>``: integers as above, else float64
=====================  ==================================================================

Every per-sample dataset is chunked along time with HDF5's shuffle and the
compression of ``nwb_series.COMPRESSION``. ``data_collection`` holds a JSON
document with the run's metadata (source, rate, calibration, board, timing
statistics, summary, journal state) and, per journal column, where and how it is
stored, which :func:`read_nwb_summary` uses; it also reads files of the first,
all-float64 layout (format version 1). Numeric timing statistics are also a table
``processing/loop_timing/timing_statistics``. Metadata: :mod:`clampcore.nwb_metadata`;
tables: :mod:`clampcore.nwb_tables`.

Public names: ``write_nwb``, ``journal_to_nwb``, ``convert_journal``, ``check_against_journal``,
``read_nwb_summary``, ``validate_nwb``, ``compact_bytes_per_row``, ``NwbError``,
``SIMULATED_SOURCES``.
"""

from __future__ import annotations

import json
import math
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np

from clampcore import nwb_series as ns
from clampcore.journal import JournalData, JournalError, check_meta, read_journal
from clampcore.nwb_metadata import (
    SIMULATED_SOURCES,
    dumps,
    new_nwbfile,
    nwb_name,
    read_metadata,
    text,
    unique,
)
from clampcore.nwb_metadata import version as _version
from clampcore.nwb_tables import (
    add_counter_gaps,
    add_event_tables,
    add_spike_tables,
    add_timing_statistics,
    read_events,
    read_spike_samples,
)

__all__ = [
    "SIMULATED_SOURCES",
    "NwbError",
    "check_against_journal",
    "compact_bytes_per_row",
    "convert_journal",
    "journal_to_nwb",
    "read_nwb_summary",
    "validate_nwb",
    "write_nwb",
]

_FORMAT_KEY = "clampcore_recording"  # marks our JSON document in data_collection
_FORMAT_VERSION = 2  # 1: every series float64, uncompressed; 2: the compact layout above
_READABLE_VERSIONS = (1, 2)

# Scale of each journal unit in SI (exact decimal prefixes).
_MV_IN_V = 1e-3
_PA_IN_A = 1e-12
_NS_IN_S = 1e-9
_US_IN_S = 1e-6

_VC_MODULE = (
    "virtual_conductances",
    "Conductance and current of each virtual element (current I = -g (V - E); positive "
    "current depolarises). An element current with no series here is derived on reading: "
    "I = -g (V - E) from its conductance, the membrane potential and its reversal potential "
    "(see data_collection, 'columns').",
)
_TIMING_MODULE = "loop_timing"
_V_SERIES, _I_SERIES = "membrane_potential", "command_current"
# Per clamp series: description, journal unit, its size in SI, how counts are stored.
_CLAMP_TEXT = {
    "v": (
        "Membrane potential measured by the amplifier, one value per loop sample (after "
        "clampcore's calibration and liquid-junction correction). ",
        "mV",
        _MV_IN_V,
        "Stored as the board's ADC counts, lossless: volts = data x conversion + offset",
    ),
    "i": (
        "Total command current computed from each sample (positive depolarises); in force "
        "from the next sample on (plus any extra delay). ",
        "pA",
        _PA_IN_A,
        "Stored as the DAC counts sent to the board: amperes = data x conversion + offset, "
        "the current commanded (the value the step computed, rounded to the nearest count)",
    ),
}


class NwbError(ValueError):
    """An NWB file cannot be written or read; the message says which and why."""


def _timing_description(first_counter: int | None) -> str:
    text_ = "Per-sample timing of the dynamic-clamp loop."
    if first_counter is not None:
        text_ += (
            f" The board's sample counter is not stored as a series: row k has counter "
            f"{first_counter} + k, plus the gaps in sample_counter_gaps (no such table: none)."
        )
    return text_


def _check_data(data: JournalData) -> tuple[float, int, int]:
    if not isinstance(data, JournalData):
        raise NwbError(f"write_nwb needs a JournalData, got {type(data).__name__}")
    try:
        check_meta(data.meta)
    except JournalError as exc:
        raise NwbError(f"cannot write NWB: {exc}") from exc
    lengths = {name: np.shape(values) for name, values in data.columns.items()}
    shapes = set(lengths.values())
    if len(shapes) > 1 or any(len(shape) != 1 for shape in shapes):
        raise NwbError(f"every column must be a 1-D array of one common length, got {lengths}")
    n_samples = next(iter(shapes))[0] if shapes else 0
    return float(data.meta["rate_hz"]), int(data.meta.get("first_sample", 0)), n_samples


# --------------------------------------------------------------------------- writing


def _elements(meta: dict) -> dict[str, dict]:
    experiment = meta.get("experiment")
    elements = experiment.get("element") if isinstance(experiment, dict) else None
    if not isinstance(elements, list):
        return {}
    return {str(e.get("name")): e for e in elements if isinstance(e, dict)}


def _e_changes(data: JournalData, element: str, n_rows: int) -> list[tuple[int, float]]:
    """``(row, e_mV)`` of every logged change of ``element``'s reversal potential."""
    wanted = [
        e
        for e in data.events
        if e.get("kind") == "param" and e.get("element") == element and e.get("field") == "e_mV"
    ]
    if not wanted:
        return []
    counter = data.columns.get("sample_counter")
    first = int(data.meta.get("first_sample", 0))
    if counter is not None and len(counter) and np.all(np.isfinite(counter)):
        n_of_row = np.asarray(counter, dtype=np.float64) - float(counter[0])
    else:
        n_of_row = np.arange(n_rows, dtype=np.float64)
    return [
        (int(np.searchsorted(n_of_row, float(e["sample"]) - first, side="left")), float(e["new"]))
        for e in wanted
    ]


class _Writer:
    """Builds the NWB objects of one recording (``compact=False``: the float64 layout)."""

    def __init__(
        self, data: JournalData, compact: bool, compression: Any, spooled: dict | None = None
    ) -> None:
        from pynwb import TimeSeries

        self.TimeSeries = TimeSeries
        self.data = data
        self.compact = compact
        self.compression = compression if compact else None
        self.rate_hz, self.first_sample, self.n_samples = _check_data(data)
        self.meta = data.meta
        source = text(self.meta.get("source")) or ""
        self.cal = (
            ns.calibration_from_meta(dict(self.meta), source in SIMULATED_SOURCES)
            if compact
            else None
        )
        self.placeholders: list[str] = []
        self.nwbfile, self.electrode = new_nwbfile(self.meta, data.complete, self.placeholders)
        self.common = {"rate": self.rate_hz, "starting_time": self.first_sample / self.rate_hz}
        self.columns: dict[str, Any] = {}
        self.modules: dict[str, Any] = {}
        self.taken: dict[str, set[str]] = {}
        self.first_counter: int | None = None
        self.calibration_used = False
        # Columns the recorder already encoded and compressed (clampcore.nwb_spool).
        self.spooled = spooled if compact and spooled else {}
        self.fills: dict[str, Any] = {}  # column -> its spooled chunks, written after the file

    def _spooled(self, name: str, encoding: str) -> dict | None:
        spec = self.spooled.get(name)
        return spec if spec is not None and spec["encoding"] == encoding else None

    def _placeholder(self, name: str, spec: dict) -> Any:
        """The empty dataset a spooled column's chunks go into (:func:`write_nwb`)."""
        self.fills[name] = spec["stored"]
        return spec["stored"].placeholder()

    def _f32(self, name: str, values: np.ndarray) -> Any:
        """A float32 column: the spooled dataset, else the journal's values as float32."""
        spec = self._spooled(name, "float32")
        if spec is not None:
            return self._placeholder(name, spec)
        return values.astype(np.float32 if self.compact else np.float64)

    def module(self, name: str, description: str) -> Any:
        if name not in self.modules:
            self.modules[name] = self.nwbfile.create_processing_module(
                name=name, description=description
            )
            self.taken[name] = {"timing_statistics", "sample_counter_gaps"}
        return self.modules[name]

    def _series(self, module: tuple[str, str], base: str, values: np.ndarray, **kw: Any) -> str:
        mod = self.module(*module)
        name = unique(base, self.taken[mod.name])
        mod.add(self.TimeSeries(name=name, data=ns.dataset(values, self.compression), **kw))
        return f"processing/{mod.name}/{name}"

    def _small_ints(self, name: str, values: np.ndarray) -> tuple[Any, dict[str, Any], str]:
        """``(data, encoding, description suffix)``: unsigned integers if they fit, else float64."""
        spec = self._spooled(name, "uint")
        if spec is not None:
            unknown = spec["unknown"]
            note = "" if unknown is None else f" {unknown} means unknown (NaN in the journal)."
            return self._placeholder(name, spec), {"encoding": "uint", "unknown": unknown}, note
        if self.compact:
            packed = ns.smallest_uint(values)
            if packed is not None:
                array, unknown = packed
                note = "" if unknown is None else f" {unknown} means unknown (NaN in the journal)."
                return array, {"encoding": "uint", "unknown": unknown}, note
        return np.asarray(values, dtype=np.float64), {"encoding": "float64"}, ""

    def _clamp(self, kind: str, column: str, values: np.ndarray) -> Any:
        """The membrane potential (``kind`` "v") or the command ("i") as a current-clamp
        series on the electrode: converter counts when the calibration allows, else float64."""
        from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries

        v = kind == "v"
        scale = ns.adc_nwb_scale if v else ns.dac_nwb_scale
        cls = CurrentClampSeries if v else CurrentClampStimulusSeries
        group, name = ("acquisition", _V_SERIES) if v else ("stimulus", _I_SERIES)
        spooled = self._spooled(column, "adc_counts" if v else "dac_counts")
        if spooled is not None:
            counts = self._placeholder(column, spooled)
        elif v:
            counts = ns.mV_to_adc_exact(values, self.cal) if self.cal else None
        else:
            known = self.cal is not None and self.cal.dac_known
            counts = ns.pA_to_dac(values, self.cal) if known else None
        what, unit, unit_in_si, counts_text = _CLAMP_TEXT[kind]
        if counts is not None:
            conversion, offset = scale(self.cal)
            # resolution: one count
            kw = {"data": counts, "conversion": conversion, "offset": offset}
            kw["resolution"] = conversion
            how = f"{counts_text} (converters: {self.cal.origin})."
            encoding = "adc_counts" if kind == "v" else "dac_counts"
            self.calibration_used = True
        else:
            kw = {"data": values, "conversion": unit_in_si}
            how, encoding = f"Stored in {unit} (float64).", "float64"
        kw["data"] = ns.dataset(kw["data"], self.compression)
        self.columns[column] = {"path": f"{group}/{name}", "encoding": encoding}
        return cls(
            name=name,
            electrode=self.electrode,
            description=what + how,
            comments=f"clampcore journal column '{column}'",
            stimulus_description="dynamic clamp (see stimulus_notes)",
            **kw,
            **self.common,
        )

    def add_column(self, name: str, values: np.ndarray) -> None:
        """Store one journal column (spikes excepted) by its kind."""
        kind, element = ns.column_kind(name)
        values = np.asarray(values, dtype=np.float64)  # the journal's columns: no copy
        if kind == "v":
            self.response = self._clamp(kind, name, values)
        elif kind == "i":
            self.stimulus = self._clamp(kind, name, values)
        elif kind in ("g", "ie"):
            self._add_element(name, kind, element, values)
        elif kind == "counter" and self.compact and (gaps := self._counter_gaps(name, values)):
            first, rows, missing = gaps
            self.first_counter = first
            mod = self.module(_TIMING_MODULE, _timing_description(first))
            if rows.size:
                add_counter_gaps(mod, first, rows, missing)
            self.columns[name] = {"path": None, "encoding": "counter_gaps", "first": first}
        else:
            self._add_timing(name, kind, values)

    def _add_element(self, name: str, kind: str, element: str, values: np.ndarray) -> None:
        """An element's conductance (``kind`` "g") or current ("ie", derived when it can be)."""
        derived = self._derivable(element, values) if kind == "ie" else None
        if derived is not None:
            self.columns[name] = derived
            return
        f32 = "float32" if self.compact else "float64"
        stem, unit, unit_in_si, short = (
            ("conductance", "siemens", _NS_IN_S, "nS")
            if kind == "g"
            else ("current", "amperes", _PA_IN_A, "pA")
        )
        path = self._series(
            _VC_MODULE,
            f"{stem}_{nwb_name(element)}",
            self._f32(name, values),
            unit=unit,
            conversion=unit_in_si,  # data in the journal's nS or pA
            description=f"{stem.capitalize()} of virtual element '{element}' ({f32} {short}).",
            comments=f"clampcore journal column '{name}'",
            **self.common,
        )
        self.columns[name] = {"path": path, "encoding": f32}

    def _add_timing(self, name: str, kind: str, values: np.ndarray) -> None:
        """A loop-timing column: the turnaround in float32 µs, the rest as small integers."""
        module = (_TIMING_MODULE, _timing_description(None))
        comment = f"clampcore journal column '{name}'"
        if kind == "turn":
            f32 = "float32" if self.compact else "float64"
            path = self._series(
                module,
                "host_turnaround",
                self._f32(name, values),
                unit="seconds",
                conversion=_US_IN_S,  # data in µs
                description="Host turnaround from frame arrival to command written "
                f"({f32} µs; NaN where unknown).",
                comments=comment,
                **self.common,
            )
            self.columns[name] = {"path": path, "encoding": f32}
            return
        array, spec, note = self._small_ints(name, values)
        if kind == "latency":
            base, unit = "latency_samples", "samples"
            what = (
                "Loop latency: samples between a sample and the one from which its command "
                "was in force, as reported by the board."
            )
        else:
            base, unit, what = nwb_name(name), "n/a", f"Per-sample loop value '{name}'."
        path = self._series(
            module, base, array, unit=unit, description=what + note, comments=comment,
            **self.common,
        )  # fmt: skip
        self.columns[name] = {"path": path, **spec}

    def _counter_gaps(self, name: str, values: np.ndarray) -> tuple | None:
        spec = self._spooled(name, "counter_gaps")
        if spec is not None:
            return spec["first"], spec["rows"], spec["missing"]
        return ns.counter_gaps(values)

    def _derivable(self, element: str, values: np.ndarray) -> dict | None:
        """The derivation spec when ``-g (V - E)`` reproduces this current, else None."""
        if not self.compact or self._spooled(f"i_pA/{element}", "float32") is not None:
            return None
        spec = self._spooled(f"i_pA/{element}", "derived_current")
        if spec is not None:
            return {
                "path": None,
                "encoding": "derived_current",
                "conductance": f"g_nS/{element}",
                "e_mV": spec["e_mV"],
                "e_changes": [],
            }
        g = self.data.columns.get(f"g_nS/{element}")
        v = self.data.columns.get("v_mV")
        e0 = _elements(self.meta).get(element, {}).get("e_mV")
        if g is None or v is None or not isinstance(e0, int | float) or isinstance(e0, bool):
            return None
        changes = _e_changes(self.data, element, len(values))
        e = ns.e_schedule(float(e0), changes, len(values))
        g32 = np.asarray(g, dtype=np.float32)
        if not ns.current_is_derivable(values, g32, np.asarray(v), e):
            return None
        return {
            "path": None,
            "encoding": "derived_current",
            "conductance": f"g_nS/{element}",
            "e_mV": float(e0),
            "e_changes": [[row, value] for row, value in changes],
        }

    def build(self) -> Any:
        self.response = self.stimulus = None
        spikes = {}
        # The counter first: the timing module's description says how to rebuild it.
        order = sorted(self.data.columns.items(), key=lambda kv: kv[0] != "sample_counter")
        for name, values in order:
            if ns.column_kind(name)[0] == "spike":
                spikes[name] = values
            else:
                self.add_column(name, values)
        nwbfile = self.nwbfile
        if self.response is not None:
            nwbfile.add_acquisition(self.response)
        if self.stimulus is not None:
            nwbfile.add_stimulus(self.stimulus)
        if self.n_samples and (self.response is not None or self.stimulus is not None):
            nwbfile.add_intracellular_recording(
                electrode=self.electrode, stimulus=self.stimulus, response=self.response
            )
        table_names: set[str] = set()
        spike_map = add_spike_tables(nwbfile, spikes, self.first_sample, self.rate_hz, table_names)
        for name, where in spike_map.items():
            self.columns[name] = {"path": where, "encoding": "spikes"}
        event_map = add_event_tables(nwbfile, list(self.data.events), self.rate_hz, table_names)
        if self.meta.get("timing"):
            mod = self.module(_TIMING_MODULE, _timing_description(self.first_counter))
            add_timing_statistics(mod, self.meta.get("timing"))
        document = {
            _FORMAT_KEY: _FORMAT_VERSION,
            "written_by": f"clampcore {_version()}",
            "journal_complete": bool(self.data.complete),
            "journal_problems": list(self.data.problems),
            "n_samples": self.n_samples,
            "columns": {name: self.columns[name] for name in self.data.columns},
            "calibration": self.cal.to_dict() if self.calibration_used else None,
            "event_tables": event_map,
            "placeholders": self.placeholders,
            "meta": {k: v for k, v in self.meta.items() if k != "experiment_text"},
        }
        nwbfile.data_collection = dumps(document, indent=1)
        return nwbfile


def write_nwb(
    path: Path,
    data: JournalData,
    *,
    overwrite: bool = False,
    compact: bool = True,
    compression: tuple[str, int | None] | None = ns.COMPRESSION,
    spooled: dict[str, dict] | None = None,
) -> None:
    """Write ``data`` (from :func:`~clampcore.journal.read_journal`) as an NWB file at ``path``.

    The file is written to ``<stem>.partial.nwb`` beside it and renamed when complete, so
    ``path`` is never left half-written. An existing ``path`` is an error unless
    ``overwrite``. ``compact=False`` writes the first layout (every series float64,
    uncompressed), kept for comparison (``bench/bench_recording.py``); ``compression``
    is ``(filter, level)`` for HDF5 (``("gzip", 1)``, ``("lzf", None)``) or None.
    ``spooled`` are columns encoded while recording (``Spool.finish``), copied as stored.
    """
    from pynwb import NWBHDF5IO

    path = Path(path)
    if path.exists() and not overwrite:
        raise NwbError(f"{path} exists: choose another name or pass overwrite=True")
    if path.is_dir():
        raise NwbError(f"{path} is a directory")
    writer = _Writer(data, compact, compression, spooled)
    nwbfile = writer.build()
    tmp = path.with_name(f"{path.stem}.partial{path.suffix or '.nwb'}")
    try:
        if tmp.exists():
            tmp.unlink()
        with NWBHDF5IO(str(tmp), mode="w") as io:
            io.write(nwbfile)
        if writer.fills:
            _fill_spooled(tmp, writer)
        os.replace(tmp, path)
    except OSError as exc:
        raise NwbError(f"cannot write {path}: {exc}") from exc
    finally:
        if tmp.exists():
            tmp.unlink()


def _fill_spooled(path: Path, writer: _Writer) -> None:
    """Write the spooled columns' compressed chunks into their empty datasets, as stored."""
    import h5py

    with h5py.File(path, "r+") as f:
        for name, stored in writer.fills.items():
            where = writer.columns[name]["path"]
            if where.startswith("stimulus/"):  # NWB keeps stimuli in /stimulus/presentation
                where = "stimulus/presentation/" + where.partition("/")[2]
            stored.fill(f[f"{where}/data"])


def journal_to_nwb(journal: Path, out: Path, *, overwrite: bool = False) -> Path:
    """Convert a journal directory (complete or left by a crash) into the NWB file ``out``."""
    try:
        data = read_journal(Path(journal))
    except JournalError as exc:
        raise NwbError(f"cannot convert {journal}: {exc}") from exc
    write_nwb(Path(out), data, overwrite=overwrite)
    return Path(out)


def convert_journal(
    journal: Path, out: Path, *, keep_journal: bool = False, spool: Any = None
) -> tuple[Path, bool]:
    """Journal -> NWB, read back and checked against the journal; then the journal is removed
    unless ``keep_journal``. Returns ``(out, journal_removed)``. A failed check raises
    :class:`NwbError` and keeps both files. ``spool`` (a :class:`clampcore.nwb_spool.Spool`
    fed while recording) gives the columns it encoded; the rest come from the journal."""
    journal, out = Path(journal), Path(out)
    try:
        data = read_journal(journal)
    except JournalError as exc:
        if spool is not None:
            spool.close()
        raise NwbError(f"cannot convert {journal}: {exc}") from exc
    try:
        spooled = spool.finish(data.meta, data.n_samples, data.events) if spool else None
        problems = _write_and_check(out, data, spooled)
        if problems and spooled:
            # Whatever went wrong with the spooled chunks, the journal has every column.
            problems = _write_and_check(out, data, None)
    finally:
        if spool is not None:
            spool.close()
    if problems:
        raise NwbError(
            f"{out} does not match its journal ({'; '.join(problems[:3])}): kept both {out} "
            f"and {journal}"
        )
    if keep_journal:
        return out, False
    shutil.rmtree(journal, ignore_errors=True)
    return out, not journal.exists()


def _write_and_check(out: Path, data: JournalData, spooled: dict | None) -> list[str]:
    """Write ``out`` and read it back; the problems found (with the spool's chunks, a failure
    to write or read is one too, so that the caller can write again from the journal)."""
    try:
        write_nwb(out, data, overwrite=True, spooled=spooled)
        return check_against_journal(out, data)
    except Exception as exc:
        if not spooled:
            raise
        return [f"the spooled columns failed: {type(exc).__name__}: {exc}"]


def check_against_journal(path: Path, data: JournalData) -> list[str]:
    """Problems found reading ``path`` back against the journal it came from (empty: none).

    Opens the file with pynwb; every stored per-sample series must have the journal's
    number of samples, every spike and event must be there, and the lossless columns
    must equal the journal: the membrane potential bit for bit, the command's DAC
    counts those of the journal's current, the sample counter rebuilt from its gaps.
    (Float32 columns are checked by length: their rounding is the format's.)
    """
    from pynwb import NWBHDF5IO

    try:
        io = NWBHDF5IO(str(path), mode="r")
        nwbfile = io.read()
        document = _document(nwbfile, path)
    except Exception as exc:  # not readable as our NWB: that is the problem found
        return [f"cannot read {path} back: {type(exc).__name__}: {exc}"]
    problems: list[str] = []
    with io:
        n = len(next(iter(data.columns.values()))) if data.columns else 0
        if document.get("n_samples") != n:
            problems.append(f"{document.get('n_samples')} samples in the file, {n} in the journal")
        cal_doc = document.get("calibration")
        cal = ns.Calibration.from_dict(cal_doc) if cal_doc else None
        first_sample = int(data.meta.get("first_sample", 0))
        for name, spec in _storage(document).items():
            values = data.columns.get(name)
            encoding, where = spec["encoding"], spec.get("path")
            if values is None:
                problems.append(f"column {name} is not in the journal")
            elif encoding == "spikes":
                got = read_spike_samples(nwbfile, where)
                want = first_sample + np.flatnonzero(np.asarray(values) > 0.5)
                if not np.array_equal(got, want):
                    problems.append(f"column {name}: {got.size} spikes, not {want.size}")
            elif encoding == "counter_gaps":
                first, rows, missing = ns.counter_gaps(values) or (None, None, None)
                if first != spec["first"] or not np.array_equal(
                    ns.rebuild_counter(first, n, rows, missing), values
                ):
                    problems.append(f"column {name}: the counter does not rebuild")
            elif encoding != "derived_current":
                series = _object(nwbfile, where)
                if series.data.shape != (n,):
                    problems.append(f"column {name}: {series.data.shape[0]} samples, not {n}")
                elif encoding == "adc_counts" and not np.array_equal(
                    ns.adc_to_mV(series.data[:], cal), values
                ):
                    problems.append(f"column {name}: values differ from the journal")
                elif encoding == "dac_counts" and not np.array_equal(
                    series.data[:], ns.pA_to_dac(values, cal)
                ):
                    problems.append(f"column {name}: counts differ from the journal's current")
        events = sum(len(nwbfile.events[t]) for t in document["event_tables"])
        if events != len(data.events):
            problems.append(f"{events} events in the file, {len(data.events)} logged")
    return problems


def compact_bytes_per_row(columns: list[str], adc_bits: int = 16, dac_bits: int = 16) -> int:
    """Bytes per sample row of the compact layout before compression, an upper bound.

    ``columns`` are a run's journal columns (``RingLayout.names``). Counts for V and I,
    float32 for conductances, element currents (as if none could be derived),
    turnaround, and one byte for flags, status and latency; spikes and the counter
    take no per-sample space. Compression typically divides this by 2-3 (README,
    Recordings); use it as the conservative figure of a disk budget.
    """
    total = 0
    for name in columns:
        kind, _ = ns.column_kind(name)
        if kind == "v":
            total += 2 if adc_bits <= 16 else 4
        elif kind == "i":
            total += 2 if dac_bits <= 16 else 4
        elif kind in ("g", "ie", "turn"):
            total += 4
        elif kind in ("latency", "other"):
            total += 1
    return total


# --------------------------------------------------------------------------- reading


def _in_unit(series: Any, scale: float) -> np.ndarray:
    """Series data in the journal's unit (``scale`` in SI); exact when stored that way."""
    values = np.asarray(series.data[:], dtype=np.float64)
    conversion = float(series.conversion)
    if math.isclose(conversion, scale, rel_tol=1e-12):
        return values
    return values * (conversion / scale)


def _journal_scale(column: str) -> float:
    kind, _ = ns.column_kind(column)
    return {"v": _MV_IN_V, "i": _PA_IN_A, "g": _NS_IN_S, "ie": _PA_IN_A, "turn": _US_IN_S}.get(
        kind, 1.0
    )


def _object(nwbfile: Any, where: str) -> Any:
    group, _, name = where.partition("/")
    if group == "acquisition":
        return nwbfile.acquisition[name]
    if group == "stimulus":
        return nwbfile.stimulus[name]
    if group == "events":
        return nwbfile.events[name]
    module_name, _, series_name = name.partition("/")
    return nwbfile.processing[module_name][series_name]


def _storage(document: dict) -> dict[str, dict]:
    """Per-column storage specs; a version-1 file maps a column to its path (all float64)."""
    out = {}
    for column, spec in document["columns"].items():
        if isinstance(spec, dict):
            out[column] = spec
        else:
            kind = "spikes" if ns.column_kind(column)[0] == "spike" else "float64"
            out[column] = {"path": spec, "encoding": kind}
    return out


def _read_columns(
    nwbfile: Any, storage: dict[str, dict], cal: Any, n: int, first_sample: int, rate_hz: float
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    columns: dict[str, np.ndarray] = {}
    spike_times: dict[str, np.ndarray] = {}
    derived = []
    for column, spec in storage.items():
        encoding, where = spec["encoding"], spec.get("path")
        if encoding == "spikes":
            samples = read_spike_samples(nwbfile, where)
            spike_times[ns.column_kind(column)[1]] = samples / rate_hz
            flags = np.zeros(n, dtype=np.float64)
            flags[samples - first_sample] = 1.0
            columns[column] = flags
        elif encoding == "derived_current":
            derived.append((column, spec))
        elif encoding == "counter_gaps":
            rows = missing = np.zeros(0, dtype=np.int64)
            timing = nwbfile.processing.get(_TIMING_MODULE)
            if timing is not None and "sample_counter_gaps" in timing.data_interfaces:
                gaps = timing["sample_counter_gaps"]
                rows, missing = gaps["row"].data[:], gaps["missing"].data[:]
            columns[column] = ns.rebuild_counter(int(spec["first"]), n, rows, missing)
        else:
            series = _object(nwbfile, where)
            if encoding == "adc_counts":
                columns[column] = ns.adc_to_mV(series.data[:], cal)
            elif encoding == "dac_counts":
                columns[column] = ns.dac_to_pA(series.data[:], cal)
            elif encoding == "uint":
                columns[column] = ns.from_uint(series.data[:], spec.get("unknown"))
            else:
                columns[column] = _in_unit(series, _journal_scale(column))
    for column, spec in derived:
        e = ns.e_schedule(spec["e_mV"], [tuple(c) for c in spec["e_changes"]], n)
        columns[column] = ns.derive_current(columns[spec["conductance"]], columns["v_mV"], e)
    return columns, spike_times


def _document(nwbfile: Any, path: Path) -> dict:
    """The file's JSON document of the recording (``data_collection``), checked to be ours."""
    try:
        document = json.loads(nwbfile.data_collection or "")
    except json.JSONDecodeError:
        document = None
    if not isinstance(document, dict) or document.get(_FORMAT_KEY) not in _READABLE_VERSIONS:
        raise NwbError(f"{path} was not written by clampcore (no recording metadata)")
    return document


def read_nwb_summary(path: Path) -> dict:
    """Read a clampcore NWB file back with pynwb, in the journal's units.

    Keys: ``rate_hz``, ``first_sample``, ``starting_time_s``, ``n_samples``,
    ``v_mV`` and ``i_pA`` (arrays or None; ``i_pA`` is the command as sent to the
    board, i.e. rounded to DAC counts, in files of format 2), ``columns`` (every
    journal column by its name, spike columns rebuilt as 0/1, derived element
    currents computed), ``spike_times_s`` (source -> array), ``param_changes`` and
    ``events`` (every event, with ``time_s``), ``timing``, ``summary``, ``meta``,
    ``source``, ``experiment_text``, ``complete``, ``problems``, ``placeholders``,
    ``subject``, ``session``, ``electrode``, ``storage`` (how each column is stored),
    ``calibration`` (or None), ``format_version``.
    """
    from pynwb import NWBHDF5IO

    path = Path(path)
    if not path.is_file():
        raise NwbError(f"{path} does not exist")
    try:
        io = NWBHDF5IO(str(path), mode="r")
    except Exception as exc:  # h5py/pynwb raise many types for a file that is not NWB
        raise NwbError(f"cannot read {path} as NWB: {exc}") from exc
    with io:
        nwbfile = io.read()
        document = _document(nwbfile, path)
        meta = document["meta"]
        rate_hz = float(meta["rate_hz"])
        first_sample = int(meta.get("first_sample", 0))
        n_samples = int(document["n_samples"])
        cal_doc = document.get("calibration")
        cal = ns.Calibration.from_dict(cal_doc) if cal_doc else None
        storage = _storage(document)
        columns, spike_times = _read_columns(
            nwbfile, storage, cal, n_samples, first_sample, rate_hz
        )
        events = read_events(nwbfile, document["event_tables"], rate_hz)
        summary = {
            "format_version": document[_FORMAT_KEY],
            "rate_hz": rate_hz,
            "first_sample": first_sample,
            "starting_time_s": first_sample / rate_hz,
            "n_samples": n_samples,
            "v_mV": columns.get("v_mV"),
            "i_pA": columns.get("i_pA"),
            "columns": columns,
            "storage": storage,
            "calibration": cal,
            "spike_times_s": spike_times,
            "param_changes": [e for e in events if e["kind"] == "param"],
            "events": events,
            "timing": meta.get("timing", {}),
            "summary": meta.get("summary", {}),
            "meta": meta,
            "source": meta.get("source"),
            "complete": bool(document["journal_complete"]),
            "problems": list(document["journal_problems"]),
            "placeholders": list(document["placeholders"]),
            **read_metadata(nwbfile),
        }
    return summary


def validate_nwb(path: Path) -> list[str]:
    """Problems pynwb's validator finds in ``path``, as strings (empty: valid).

    Reads what ``pynwb.validate`` returns (its command line exits 0 even when it
    finds problems). A file that cannot be opened as NWB yields one problem.
    """
    from pynwb import validate

    path = Path(path)
    if not path.is_file():
        raise NwbError(f"{path} does not exist")
    try:
        errors = validate(path=str(path))
    except Exception as exc:  # not HDF5, not NWB, truncated...: report, do not crash
        return [f"{path} cannot be read as NWB: {type(exc).__name__}: {exc}"]
    return [str(error) for error in errors]
