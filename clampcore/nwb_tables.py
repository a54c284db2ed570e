"""NWB tables of a clampcore recording: spikes, logged events, timing statistics.

Spike times are EventsTables, not the ``units`` table: the units table is meant
for sorted extracellular units, and nwbinspector flags as CRITICAL a units table
whose spike times all happen to be whole seconds (it takes them for sample
indices), which a short run can legitimately produce.

Events of kind ``"param"`` go to the EventsTable ``events/parameter_changes``; every
other kind ``k`` to ``events/<k>_events`` (the NWB schema asks for one event type
per table). Each table has the event's time, its ``sample`` and one column per
field (strings and numbers as such, anything else as JSON text); every event is
kept.

Public names: ``add_spike_tables``, ``add_event_tables``, ``add_timing_statistics``,
``add_counter_gaps``, ``read_events``, ``read_spike_samples``, ``JSON_ENCODING``.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from clampcore.nwb_metadata import dumps, flatten_numbers, nwb_name, unique

JSON_ENCODING = "json"
_RESERVED_EVENT_COLUMNS = ("id", "timestamp", "duration", "annotation")  # EventsTable's own


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
            encoding = JSON_ENCODING
            data = [dumps(None if v is missing else v) for v in values]
        base = nwb_name(key)
        if base in _RESERVED_EVENT_COLUMNS or base == "sample":
            base = f"field_{base}"
        columns.append((unique(base, taken), key, encoding, data))
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
        how = " (JSON text)" if encoding == JSON_ENCODING else ""
        columns.append(
            VectorData(name=column, description=f"Event field '{key}'{how}.", data=array)
        )
    return EventsTable(name=name, description=description, columns=columns)


def add_spike_tables(
    nwbfile: Any,
    spikes: dict[str, np.ndarray],
    first_sample: int,
    rate_hz: float,
    taken: set[str],
) -> dict[str, str | None]:
    """One EventsTable per spike column (journal name -> 0/1 per row); returns the column map
    (``None``: no spike, no table, since an empty table trips nwbinspector)."""
    column_map: dict[str, str | None] = {}
    for column, values in spikes.items():
        source_name = column.partition("/")[2]
        samples = first_sample + np.flatnonzero(np.asarray(values, dtype=np.float64) > 0.5)
        if samples.size == 0:
            column_map[column] = None
            continue
        table_name = unique(f"spikes_{nwb_name(source_name)}", taken)
        who = (
            "the recorded cell (detected online by clampcore from the measured membrane potential)"
            if source_name == "cell"
            else f"virtual neuron '{source_name}' (simulated by clampcore)"
        )
        nwbfile.add_events_table(
            _events_table(table_name, f"Spikes of {who}; one row per spike.", samples, rate_hz, [])
        )
        column_map[column] = f"events/{table_name}"
    return column_map


def add_event_tables(
    nwbfile: Any, events: list[dict], rate_hz: float, taken: set[str]
) -> dict[str, dict]:
    """One EventsTable per event kind; returns ``{table: {"kind", "fields"}}`` for the reader."""
    event_map: dict[str, dict] = {}
    ordered = sorted(events, key=lambda record: record["sample"])  # stable: file order kept
    by_kind: dict[str, list[dict]] = {}
    for record in ordered:
        by_kind.setdefault(record["kind"], []).append(record)
    for kind_name, records in by_kind.items():
        if kind_name == "param":
            table_name = unique("parameter_changes", taken)
            text = (
                "Parameter changes applied while running, each at a sample boundary: "
                "element, field, old and new value (in the field's unit, see stimulus_notes)."
            )
        else:
            table_name = unique(f"{nwb_name(kind_name)}_events", taken)
            text = f"Events of kind '{kind_name}' logged by clampcore while running."
        fields = _event_columns(records)
        samples = np.array([record["sample"] for record in records], dtype=np.int64)
        nwbfile.add_events_table(_events_table(table_name, text, samples, rate_hz, fields))
        event_map[table_name] = {
            "kind": kind_name,
            "fields": {column: [key, encoding] for column, key, encoding, _ in fields},
        }
    return event_map


def add_timing_statistics(module: Any, timing: Any) -> None:
    """The run's numeric loop-timing statistics as a two-column table (if there are any)."""
    from hdmf.common import DynamicTable, VectorData

    stats = flatten_numbers(timing)
    if not stats:
        return
    module.add(
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


def add_counter_gaps(module: Any, first: int, rows: np.ndarray, missing: np.ndarray) -> None:
    """The board's sample counter as its gaps: a table only when there are some."""
    from hdmf.common import DynamicTable, VectorData

    module.add(
        DynamicTable(
            name="sample_counter_gaps",
            description=(
                f"Gaps in the board's sample counter: samples the host never received. The "
                f"counter of row k is {first} + k + the sum of 'missing' over the gaps whose "
                "'row' is <= k."
            ),
            columns=[
                VectorData(
                    name="row",
                    description="Row (index into every per-sample series) after the gap.",
                    data=np.asarray(rows, dtype=np.int64),
                ),
                VectorData(
                    name="missing",
                    description="Samples missing just before that row.",
                    data=np.asarray(missing, dtype=np.int64),
                ),
            ],
        )
    )


def _decode(value: Any, encoding: str) -> Any:
    if isinstance(value, bytes):
        value = value.decode("utf-8")
    if encoding == JSON_ENCODING:
        return json.loads(value)
    if encoding == "int":
        return int(value)
    if encoding == "float":
        return float(value)
    return str(value)


def read_spike_samples(nwbfile: Any, where: str | None) -> np.ndarray:
    """Absolute sample indices of the spikes in the table at ``events/<name>`` (None: none)."""
    if where is None:
        return np.zeros(0, dtype=np.int64)
    name = where.partition("/")[2]
    return np.asarray(nwbfile.events[name]["sample"].data[:], dtype=np.int64)


def read_events(nwbfile: Any, event_map: dict[str, dict], rate_hz: float) -> list[dict]:
    """Every logged event, with ``time_s``, sorted by sample."""
    events: list[dict] = []
    for table_name, spec in event_map.items():
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
    return events
