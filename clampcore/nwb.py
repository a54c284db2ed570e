"""Write a clampcore recording as NWB (Neurodata Without Borders) and read it back.

A run is journalled while it goes on (:mod:`clampcore.journal`); at stop, or
later through ``clampcore recover``, :func:`journal_to_nwb` converts the journal
into one NWB file. Journal columns map to NWB as follows (time of sample ``n`` is
``n / rate_hz`` s after ``session_start``; row ``k`` is sample ``first_sample + k``):

=====================  ==================================================================
journal column          NWB object
=====================  ==================================================================
``v_mV``               ``acquisition/membrane_potential``, CurrentClampSeries (volts;
                       data stay in mV with ``conversion`` 1e-3)
``i_pA``               ``stimulus/command_current``, CurrentClampStimulusSeries (amperes;
                       data in pA, ``conversion`` 1e-12); both linked in the
                       intracellular-recordings table
``g_nS/<element>``     ``processing/virtual_conductances/conductance_<element>`` (siemens,
                       ``conversion`` 1e-9)
``i_pA/<element>``     ``processing/virtual_conductances/current_<element>`` (amperes,
                       ``conversion`` 1e-12)
``spike/<name>``       ``events/spikes_<name>``, an EventsTable: one row per sample whose
                       value is > 0.5, with its time in s and its sample index
``latency_samples``    ``processing/loop_timing/latency_samples`` (unit "samples")
``turnaround_us``      ``processing/loop_timing/host_turnaround`` (seconds, conversion 1e-6)
anything else          ``processing/loop_timing/<name>`` (unit "n/a")
=====================  ==================================================================

Events of kind ``"param"`` go to the EventsTable ``events/parameter_changes``; every
other kind ``k`` to ``events/<k>_events`` (the NWB schema asks for one event type
per table). Each table has the event's time, its ``sample`` and one column per
field (strings and numbers as such, anything else as JSON text); every event is
kept. The experiment file's text is ``stimulus_notes``; ``data_collection`` holds
a JSON document with the run's metadata (source, rate, amplifier calibration,
board, timing statistics, summary, journal state) and the map from journal
columns to NWB objects, which :func:`read_nwb_summary` uses. Numeric timing
statistics are also a table ``processing/loop_timing/timing_statistics``.

Spike times are EventsTables, not the ``units`` table: the units table is meant
for sorted extracellular units, and nwbinspector flags as CRITICAL a units table
whose spike times all happen to be whole seconds (it takes them for sample
indices), which a short run can legitimately produce.

Missing subject/session/electrode details get clear placeholders (nwbinspector
calls a missing Subject, age or sex critical), named in the descriptions.

Public names: ``write_nwb``, ``journal_to_nwb``, ``read_nwb_summary``,
``validate_nwb``, ``NwbError``, ``SIMULATED_SOURCES``.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import re
import uuid
from collections.abc import Mapping
from importlib import metadata as _metadata
from pathlib import Path
from typing import Any

import numpy as np

from clampcore.journal import JournalData, JournalError, check_meta, read_journal
from clampcore.journal import _json_default as journal_json_default

SIMULATED_SOURCES = ("offline simulation", "simulated rig")

_FORMAT_KEY = "clampcore_recording"  # marks our JSON document in data_collection
_FORMAT_VERSION = 1
_RESERVED_EVENT_COLUMNS = ("id", "timestamp", "duration", "annotation")  # EventsTable's own
_JSON_ENCODING = "json"
# gzip datasets above 50 MB of float64, the size from which nwbinspector's
# check_small_dataset_compression suggests compression; below it, gzip doubled the
# conversion time of a 60 s x 20 kHz run and saved little on noisy data (measured here).
_COMPRESS_MIN_VALUES = 50_000_000 // 8
_GZIP_LEVEL = 4  # common practice: most of level 9's ratio at a fraction of its time

# Scale of each journal unit in SI (exact decimal prefixes).
_MV_IN_V = 1e-3
_PA_IN_A = 1e-12
_NS_IN_S = 1e-9
_US_IN_S = 1e-6


class NwbError(ValueError):
    """An NWB file cannot be written or read; the message says which and why."""


# --------------------------------------------------------------------------- helpers


def _version() -> str:
    try:
        return _metadata.version("clampcore")
    except _metadata.PackageNotFoundError:
        return "unknown"


def _json_default(value: Any) -> Any:
    try:
        return journal_json_default(value)
    except TypeError:
        return repr(value)  # never fail a recording over one odd metadata value


def _dumps(value: Any, indent: int | None = None) -> str:
    return json.dumps(value, default=_json_default, indent=indent, ensure_ascii=False)


def _nwb_name(text: str) -> str:
    """An HDF5/NWB-safe object name: no slashes, backslashes or colons."""
    cleaned = re.sub(r"[/\\:]", "_", str(text)).strip()
    return cleaned or "unnamed"


def _unique(name: str, taken: set[str]) -> str:
    candidate, number = name, 2
    while candidate in taken:
        candidate = f"{name}_{number}"
        number += 1
    taken.add(candidate)
    return candidate


def _table(meta: Mapping[str, Any], key: str) -> dict:
    experiment = meta.get("experiment")
    if not isinstance(experiment, Mapping):
        return {}
    value = experiment.get(key)
    return dict(value) if isinstance(value, Mapping) else {}


def _text(value: Any) -> str | None:
    if value is None:
        return None
    if isinstance(value, str):
        return value.strip() or None
    return str(value)


def _dataset(array: np.ndarray) -> Any:
    """Large arrays are chunked and gzip-compressed; small ones are stored as they are."""
    if array.size < _COMPRESS_MIN_VALUES:
        return array
    from hdmf.backends.hdf5.h5_utils import H5DataIO

    return H5DataIO(
        data=array, compression="gzip", compression_opts=_GZIP_LEVEL, shuffle=True, chunks=True
    )


def _flatten_numbers(value: Any, prefix: str = "") -> list[tuple[str, float]]:
    """``{"a": {"b": 1}}`` -> ``[("a.b", 1.0)]``; non-numeric leaves are skipped."""
    out: list[tuple[str, float]] = []
    if isinstance(value, Mapping):
        for key, item in value.items():
            out += _flatten_numbers(item, f"{prefix}.{key}" if prefix else str(key))
    elif isinstance(value, int | float | np.integer | np.floating) and not isinstance(value, bool):
        out.append((prefix, float(value)))
    return out


# --------------------------------------------------------------------------- metadata


def _subject(meta: Mapping[str, Any], simulated: bool, placeholders: list[str]) -> Any:
    from pynwb.file import Subject

    given = _table(meta, "subject")
    if simulated:
        defaults = {
            "subject_id": "simulated-cell",
            "species": "in silico model cell",
            "description": "Placeholder: no animal; a model cell simulated by clampcore "
            f"({meta.get('source', 'simulation')}).",
        }
    else:
        defaults = {
            "subject_id": "unspecified",
            "species": "unspecified",
            "description": "Placeholder: the experiment file gave no subject description; "
            "fill it in before sharing this file.",
        }
    # nwbinspector calls a missing age or sex critical: "P0D/" is the ISO 8601 open range
    # "0 days or older" (nwbinspector's range form), "U" is NWB's code for unknown sex.
    defaults.update({"age": "P0D/", "sex": "U"})
    kwargs: dict[str, str] = {}
    missing: list[str] = []
    for key in ("subject_id", "species", "age", "sex", "description"):
        value = _text(given.get(key))
        if value is None:
            value = defaults[key]
            missing.append(key)
        kwargs[key] = value
    others = [key for key in missing if key != "description"]
    if others:
        kwargs["description"] += f" Placeholder values: {', '.join(others)}."
    placeholders += [f"subject.{key}" for key in missing]
    for key in ("strain", "genotype", "weight"):
        value = _text(given.get(key))
        if value is not None:
            kwargs[key] = value
    return Subject(**kwargs)


def _resistance_text(value: Any) -> str | None:
    """``"7.5 MOhm"`` from a number of MOhm; 0, negative or missing means not measured."""
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, int | float | np.integer | np.floating):
        return f"{float(value):g} MOhm" if math.isfinite(value) and value > 0 else None
    return _text(value)


def _experimenter(value: Any) -> list[str] | None:
    if value is None:
        return None
    if isinstance(value, str):
        return [value] if value.strip() else None
    if isinstance(value, list | tuple):
        names = [str(v) for v in value if str(v).strip()]
        return names or None
    return [str(value)]


# --------------------------------------------------------------------------- events


def _event_columns(events: list[dict]) -> list[tuple[str, str, str, list[Any]]]:
    """Columns ``(column name, field, encoding, values)`` for the fields of ``events``.

    Encoding: "text" (all strings), "int", "float" (all numbers, no bool) or
    "json" (anything else, including a field some events lack: then ``null``).
    """
    fields: list[str] = []
    for record in events:
        for key in record:
            if key not in ("sample", "kind") and key not in fields:
                fields.append(key)
    taken = {"id", "timestamp", "duration", "annotation", "sample"}
    columns = []
    missing = object()
    for key in fields:
        values = [record.get(key, missing) for record in events]
        present = all(v is not missing for v in values)
        numbers = present and all(
            isinstance(v, int | float) and not isinstance(v, bool) for v in values
        )
        if present and all(isinstance(v, str) for v in values):
            encoding, data = "text", values
        elif numbers and all(isinstance(v, int) for v in values):
            encoding, data = "int", values
        elif numbers:
            encoding, data = "float", [float(v) for v in values]
        else:
            encoding = _JSON_ENCODING
            data = [_dumps(None if v is missing else v) for v in values]
        base = _nwb_name(key)
        if base in _RESERVED_EVENT_COLUMNS or base == "sample":
            base = f"field_{base}"
        columns.append((_unique(base, taken), key, encoding, data))
    return columns


def _events_table(
    name: str, description: str, samples: np.ndarray, rate_hz: float, fields: list
) -> Any:
    from hdmf.common import VectorData
    from pynwb.event import EventsTable, TimestampVectorData

    period_s = 1.0 / rate_hz
    columns = [
        TimestampVectorData(
            name="timestamp",
            description="Time of the sample the event belongs to, in s from session start.",
            data=np.asarray(samples, dtype=np.float64) * period_s,
            resolution=period_s,
        ),
        VectorData(
            name="sample",
            description="Absolute index of the sample the event belongs to (time = sample / rate).",
            data=np.asarray(samples, dtype=np.int64),
        ),
    ]
    for column, key, encoding, data in fields:
        if encoding == "int":
            array: Any = np.asarray(data, dtype=np.int64)
        elif encoding == "float":
            array = np.asarray(data, dtype=np.float64)
        else:
            array = list(data)
        how = " (JSON text)" if encoding == _JSON_ENCODING else ""
        columns.append(
            VectorData(name=column, description=f"Event field '{key}'{how}.", data=array)
        )
    return EventsTable(name=name, description=description, columns=columns)


# --------------------------------------------------------------------------- writing


def _column_kind(name: str) -> tuple[str, str]:
    """``(kind, element)`` of a journal column: kind in v, i, g, ie, spike, latency, turn, other."""
    if name == "v_mV":
        return "v", ""
    if name == "i_pA":
        return "i", ""
    for prefix, kind in (("g_nS/", "g"), ("i_pA/", "ie"), ("spike/", "spike")):
        if name.startswith(prefix) and len(name) > len(prefix):
            return kind, name[len(prefix) :]
    if name == "latency_samples":
        return "latency", ""
    if name == "turnaround_us":
        return "turn", ""
    return "other", ""


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


def _build_nwbfile(data: JournalData) -> Any:
    from hdmf.common import DynamicTable, VectorData
    from pynwb import NWBFile, TimeSeries
    from pynwb.device import Device
    from pynwb.icephys import (
        CurrentClampSeries,
        CurrentClampStimulusSeries,
        IntracellularElectrode,
    )

    rate_hz, first_sample, n_samples = _check_data(data)
    meta = data.meta
    start_s = first_sample / rate_hz
    source = _text(meta.get("source")) or "unspecified source"
    simulated = source in SIMULATED_SOURCES
    session = _table(meta, "session")
    electrode_meta = _table(meta, "electrode")
    amplifier = _table(meta, "amplifier")
    placeholders: list[str] = []
    version = _version()

    description = _text(session.get("description"))
    if description is None:
        description = f"Dynamic-clamp recording made with clampcore ({source})."
        placeholders.append("session.description")
    experiment_text = meta.get("experiment_text")
    if not isinstance(experiment_text, str) or not experiment_text.strip():
        experiment_text = None

    column_map: dict[str, str | None] = {}
    event_map: dict[str, dict] = {}
    stored_meta = {k: v for k, v in meta.items() if k != "experiment_text"}
    document = {
        _FORMAT_KEY: _FORMAT_VERSION,
        "written_by": f"clampcore {version}",
        "journal_complete": bool(data.complete),
        "journal_problems": list(data.problems),
        "n_samples": n_samples,
        "columns": column_map,
        "event_tables": event_map,
        "placeholders": placeholders,
        "meta": stored_meta,
    }

    nwbfile = NWBFile(
        session_description=description,
        identifier=str(uuid.uuid4()),
        session_start_time=_dt.datetime.fromisoformat(meta["session_start"]),
        experimenter=_experimenter(session.get("experimenter")),
        lab=_text(session.get("lab")),
        institution=_text(session.get("institution")),
        session_id=_text(session.get("session_id")),
        experiment_description=(
            "Dynamic clamp: clampcore computed the current of virtual conductances from the "
            "measured membrane potential, sample by sample, and injected it in current clamp. "
            "The experiment file is in stimulus_notes."
        ),
        keywords=["dynamic clamp", "current clamp", "virtual conductance"],
        stimulus_notes=experiment_text
        or "No experiment file text was recorded; see data_collection for the metadata.",
        notes=(
            f"Recorded by clampcore {version} from {source}. data_collection holds the run's "
            "metadata as JSON (amplifier calibration, board, loop-timing statistics, summary)."
            + ("" if data.complete else " Recovered from a journal that did not end normally.")
        ),
        was_generated_by=[["clampcore", version]],
    )
    nwbfile.subject = _subject(meta, simulated, placeholders)

    board = meta.get("board")
    board_text = f" Board: {_dumps(board)}." if board else ""
    device = nwbfile.create_device(
        name="clampcore board",
        description=f"Serial DAQ board driven by clampcore; source: {source}.{board_text}",
    )
    if amplifier:
        nwbfile.add_device(
            Device(
                name="amplifier",
                description=f"Patch-clamp amplifier; calibration used: {_dumps(amplifier)}",
            )
        )

    resistance = electrode_meta.get("resistance_MOhm")
    electrode_description = _text(electrode_meta.get("description"))
    if electrode_description is None:
        electrode_description = (
            "Virtual electrode of the simulated rig (placeholder)."
            if simulated
            else "Patch pipette (placeholder: the experiment file gave no electrode description)."
        )
        placeholders.append("electrode.description")
    location = _text(electrode_meta.get("location"))
    if location is None and simulated:
        location = "in silico (placeholder)"
        placeholders.append("electrode.location")
    cell_id = _text(electrode_meta.get("cell_id"))
    if cell_id is None and simulated:
        cell_id = nwbfile.subject.subject_id
    electrode = IntracellularElectrode(
        name="electrode",
        device=device,
        description=electrode_description,
        location=location,
        resistance=_resistance_text(resistance),
        cell_id=cell_id,
    )
    nwbfile.add_icephys_electrode(electrode)

    names = list(data.columns)
    kinds = {name: _column_kind(name) for name in names}
    common = {"rate": rate_hz, "starting_time": start_s}
    response = stimulus = None
    modules: dict[str, Any] = {}
    taken: dict[str, set[str]] = {}

    def module(name: str, description: str) -> Any:
        if name not in modules:
            modules[name] = nwbfile.create_processing_module(name=name, description=description)
            taken[name] = {"timing_statistics"}  # the name of the statistics table
        return modules[name]

    for name in names:
        kind, element = kinds[name]
        values = np.asarray(data.columns[name], dtype=np.float64)
        comment = f"clampcore journal column '{name}'"
        if kind == "v":
            response = CurrentClampSeries(
                name="membrane_potential",
                data=_dataset(values),
                electrode=electrode,
                conversion=_MV_IN_V,  # data in mV
                description="Membrane potential measured by the amplifier, one value per loop "
                "sample (after clampcore's calibration and liquid-junction correction).",
                comments=comment,
                stimulus_description="dynamic clamp (see stimulus_notes)",
                **common,
            )
            column_map[name] = "acquisition/membrane_potential"
        elif kind == "i":
            stimulus = CurrentClampStimulusSeries(
                name="command_current",
                data=_dataset(values),
                electrode=electrode,
                conversion=_PA_IN_A,  # data in pA
                description="Total command current computed from each sample (positive "
                "depolarises); in force from the next sample on (plus any extra delay).",
                comments=comment,
                stimulus_description="dynamic clamp (see stimulus_notes)",
                **common,
            )
            column_map[name] = "stimulus/command_current"
        elif kind in ("g", "ie"):
            mod = module(
                "virtual_conductances",
                "Conductance and current of each virtual element (current I = -g (V - E); "
                "positive current depolarises).",
            )
            stem = "conductance" if kind == "g" else "current"
            series_name = _unique(f"{stem}_{_nwb_name(element)}", taken[mod.name])
            mod.add(
                TimeSeries(
                    name=series_name,
                    data=_dataset(values),
                    unit="siemens" if kind == "g" else "amperes",
                    conversion=_NS_IN_S if kind == "g" else _PA_IN_A,  # data in nS / pA
                    description=f"{stem.capitalize()} of virtual element '{element}'.",
                    comments=comment,
                    **common,
                )
            )
            column_map[name] = f"processing/virtual_conductances/{series_name}"
        elif kind in ("latency", "turn", "other"):
            mod = module("loop_timing", "Per-sample timing of the dynamic-clamp loop.")
            if kind == "latency":
                base, unit, conversion = "latency_samples", "samples", 1.0
                text = (
                    "Loop latency: samples between a sample and the one from which its command "
                    "was in force, as reported by the board (NaN where unknown)."
                )
            elif kind == "turn":
                base, unit, conversion = "host_turnaround", "seconds", _US_IN_S  # data in µs
                text = "Host turnaround from frame arrival to command written (NaN where unknown)."
            else:
                base, unit, conversion = _nwb_name(name), "n/a", 1.0
                text = f"Per-sample loop value '{name}'."
            series_name = _unique(base, taken[mod.name])
            mod.add(
                TimeSeries(
                    name=series_name,
                    data=_dataset(values),
                    unit=unit,
                    conversion=conversion,
                    description=text,
                    comments=comment,
                    **common,
                )
            )
            column_map[name] = f"processing/loop_timing/{series_name}"

    if response is not None:
        nwbfile.add_acquisition(response)
    if stimulus is not None:
        nwbfile.add_stimulus(stimulus)
    if n_samples and (response is not None or stimulus is not None):  # the table needs a row
        nwbfile.add_intracellular_recording(
            electrode=electrode, stimulus=stimulus, response=response
        )

    tables: list[Any] = []
    table_names: set[str] = set()
    for name in names:
        kind, source_name = kinds[name]
        if kind != "spike":
            continue
        values = np.asarray(data.columns[name], dtype=np.float64)
        samples = first_sample + np.flatnonzero(values > 0.5)
        if samples.size == 0:  # an empty table trips nwbinspector; None says "no spikes"
            column_map[name] = None
            continue
        table_name = _unique(f"spikes_{_nwb_name(source_name)}", table_names)
        who = (
            "the recorded cell (detected online by clampcore from the measured membrane potential)"
            if source_name == "cell"
            else f"virtual neuron '{source_name}' (simulated by clampcore)"
        )
        tables.append(
            _events_table(table_name, f"Spikes of {who}; one row per spike.", samples, rate_hz, [])
        )
        column_map[name] = f"events/{table_name}"

    events = sorted(data.events, key=lambda record: record["sample"])  # stable: file order kept
    by_kind: dict[str, list[dict]] = {}
    for record in events:
        by_kind.setdefault(record["kind"], []).append(record)
    for kind_name, records in by_kind.items():
        if kind_name == "param":
            table_name = _unique("parameter_changes", table_names)
            text = (
                "Parameter changes applied while running, each at a sample boundary: "
                "element, field, old and new value (in the field's unit, see stimulus_notes)."
            )
        else:
            table_name = _unique(f"{_nwb_name(kind_name)}_events", table_names)
            text = f"Events of kind '{kind_name}' logged by clampcore while running."
        fields = _event_columns(records)
        samples = np.array([record["sample"] for record in records], dtype=np.int64)
        tables.append(_events_table(table_name, text, samples, rate_hz, fields))
        event_map[table_name] = {
            "kind": kind_name,
            "fields": {column: [key, encoding] for column, key, encoding, _ in fields},
        }
    for table in tables:
        nwbfile.add_events_table(table)

    stats = _flatten_numbers(meta.get("timing"))
    if stats:
        mod = module("loop_timing", "Per-sample timing of the dynamic-clamp loop.")
        mod.add(
            DynamicTable(
                name="timing_statistics",
                description="Loop-timing statistics of the whole run (names carry their unit).",
                columns=[
                    VectorData(
                        name="statistic",
                        description="Name of the statistic.",
                        data=[key for key, _ in stats],
                    ),
                    VectorData(
                        name="value",
                        description="Value of the statistic.",
                        data=np.array([value for _, value in stats], dtype=np.float64),
                    ),
                ],
            )
        )

    nwbfile.data_collection = _dumps(document, indent=1)
    return nwbfile


def write_nwb(path: Path, data: JournalData, *, overwrite: bool = False) -> None:
    """Write ``data`` (from :func:`~clampcore.journal.read_journal`) as an NWB file at ``path``.

    The file is written to ``<stem>.partial.nwb`` beside it and renamed when complete, so
    ``path`` is never left half-written. An existing ``path`` is an error unless
    ``overwrite``.
    """
    from pynwb import NWBHDF5IO

    path = Path(path)
    if path.exists() and not overwrite:
        raise NwbError(f"{path} exists: choose another name or pass overwrite=True")
    if path.is_dir():
        raise NwbError(f"{path} is a directory")
    nwbfile = _build_nwbfile(data)
    tmp = path.with_name(f"{path.stem}.partial{path.suffix or '.nwb'}")
    try:
        if tmp.exists():
            tmp.unlink()
        with NWBHDF5IO(str(tmp), mode="w") as io:
            io.write(nwbfile)
        os.replace(tmp, path)
    except OSError as exc:
        raise NwbError(f"cannot write {path}: {exc}") from exc
    finally:
        if tmp.exists():
            tmp.unlink()


def journal_to_nwb(journal: Path, out: Path, *, overwrite: bool = False) -> Path:
    """Convert a journal directory (complete or left by a crash) into the NWB file ``out``."""
    try:
        data = read_journal(Path(journal))
    except JournalError as exc:
        raise NwbError(f"cannot convert {journal}: {exc}") from exc
    write_nwb(Path(out), data, overwrite=overwrite)
    return Path(out)


# --------------------------------------------------------------------------- reading


def _in_unit(series: Any, scale: float) -> np.ndarray:
    """Series data in the journal's unit (``scale`` in SI); exact when stored that way."""
    values = np.asarray(series.data[:], dtype=np.float64)
    conversion = float(series.conversion)
    if math.isclose(conversion, scale, rel_tol=1e-12):
        return values
    return values * (conversion / scale)


def _journal_scale(column: str) -> float:
    kind, _ = _column_kind(column)
    return {"v": _MV_IN_V, "i": _PA_IN_A, "g": _NS_IN_S, "ie": _PA_IN_A, "turn": _US_IN_S}.get(
        kind, 1.0
    )


def _decode(value: Any, encoding: str) -> Any:
    if isinstance(value, bytes):
        value = value.decode("utf-8")
    if encoding == _JSON_ENCODING:
        return json.loads(value)
    if encoding == "int":
        return int(value)
    if encoding == "float":
        return float(value)
    return str(value)


def read_nwb_summary(path: Path) -> dict:
    """Read a clampcore NWB file back with pynwb, in the journal's units.

    Keys: ``rate_hz``, ``first_sample``, ``starting_time_s``, ``n_samples``,
    ``v_mV`` and ``i_pA`` (arrays or None), ``columns`` (every journal column by
    its name, spike columns rebuilt as 0/1), ``spike_times_s`` (source -> array),
    ``param_changes`` and ``events`` (every event, with ``time_s``), ``timing``,
    ``summary``, ``meta``, ``source``, ``experiment_text``, ``complete``,
    ``problems``, ``placeholders``, ``subject``, ``session``, ``electrode``.
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
        try:
            document = json.loads(nwbfile.data_collection or "")
        except json.JSONDecodeError:
            document = None
        if not isinstance(document, dict) or document.get(_FORMAT_KEY) != _FORMAT_VERSION:
            raise NwbError(f"{path} was not written by clampcore (no recording metadata)")
        meta = document["meta"]
        rate_hz = float(meta["rate_hz"])
        first_sample = int(meta.get("first_sample", 0))
        n_samples = int(document["n_samples"])

        columns: dict[str, np.ndarray] = {}
        spike_times: dict[str, np.ndarray] = {}
        for column, where in document["columns"].items():
            group, _, name = (where or "").partition("/")
            _, element = _column_kind(column)
            if where is None or group == "events":
                samples = (
                    np.zeros(0, dtype=np.int64)
                    if where is None
                    else np.asarray(nwbfile.events[name]["sample"].data[:], dtype=np.int64)
                )
                spike_times[element] = samples / rate_hz
                flags = np.zeros(n_samples, dtype=np.float64)
                flags[samples - first_sample] = 1.0
                columns[column] = flags
                continue
            if group == "acquisition":
                series = nwbfile.acquisition[name]
            elif group == "stimulus":
                series = nwbfile.stimulus[name]
            else:
                module_name, _, series_name = name.partition("/")
                series = nwbfile.processing[module_name][series_name]
            columns[column] = _in_unit(series, _journal_scale(column))

        events: list[dict] = []
        for table_name, spec in document["event_tables"].items():
            table = nwbfile.events[table_name]
            samples = np.asarray(table["sample"].data[:], dtype=np.int64)
            field_values = {
                column: [_decode(v, encoding) for v in table[column].data[:]]
                for column, (_, encoding) in spec["fields"].items()
            }
            for row, sample in enumerate(samples):
                record = {"sample": int(sample), "kind": spec["kind"]}
                for column, (key, _) in spec["fields"].items():
                    record[key] = field_values[column][row]
                record["time_s"] = int(sample) / rate_hz
                events.append(record)
        events.sort(key=lambda record: record["sample"])

        subject = nwbfile.subject
        electrode = next(iter(nwbfile.icephys_electrodes.values()), None)
        summary = {
            "rate_hz": rate_hz,
            "first_sample": first_sample,
            "starting_time_s": first_sample / rate_hz,
            "n_samples": n_samples,
            "v_mV": columns.get("v_mV"),
            "i_pA": columns.get("i_pA"),
            "columns": columns,
            "spike_times_s": spike_times,
            "param_changes": [e for e in events if e["kind"] == "param"],
            "events": events,
            "timing": meta.get("timing", {}),
            "summary": meta.get("summary", {}),
            "meta": meta,
            "source": meta.get("source"),
            "experiment_text": nwbfile.stimulus_notes,
            "complete": bool(document["journal_complete"]),
            "problems": list(document["journal_problems"]),
            "placeholders": list(document["placeholders"]),
            "subject": {
                key: getattr(subject, key, None)
                for key in ("subject_id", "species", "age", "sex", "description")
            },
            "session": {
                "description": nwbfile.session_description,
                "session_id": nwbfile.session_id,
                "session_start": nwbfile.session_start_time.isoformat(),
                "experimenter": list(nwbfile.experimenter or []),
                "lab": nwbfile.lab,
                "institution": nwbfile.institution,
            },
            "electrode": {
                key: getattr(electrode, key, None)
                for key in ("description", "location", "resistance", "cell_id")
            },
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
