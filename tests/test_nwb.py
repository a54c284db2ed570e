"""Tests of the NWB writer and reader (clampcore.nwb).

Outside references: pynwb's validator (``pynwb.validate``, read through what it
returns), nwbinspector's messages (their ``importance``; nothing at CRITICAL or
above), and pynwb's own reader (``NWBHDF5IO``) to check types, units and
conversions independently of ``read_nwb_summary``. h5py damages a file to show
that the validator's problems reach the caller.
"""

from __future__ import annotations

import datetime as dt
import shutil
import time
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
from pynwb import NWBHDF5IO

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_pA,
    pA_to_counts,
)
from clampcore.journal import Journal, JournalData, read_journal
from clampcore.nwb import (
    NwbError,
    check_against_journal,
    journal_to_nwb,
    read_nwb_summary,
    validate_nwb,
    write_nwb,
)
from clampcore.nwb_metadata import SYNTHETIC_SPECIES

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
RATE_HZ = 20000.0
START = "2026-03-02T09:30:00+01:00"
COLUMNS = [
    "v_mV",
    "i_pA",
    "g_nS/gNa",
    "i_pA/gNa",
    "g_nS/syn:AMPA",  # a colon is not allowed in NWB names: the writer replaces it
    "i_pA/syn:AMPA",
    "spike/cell",
    "spike/n1",
    "spike/quiet",
    "latency_samples",
    "turnaround_us",
    "fault_flags",
]
EXPERIMENT_TEXT = '[loop]\nrate_hz = 20000\n\n[[element]]\nname = "gNa"\nkind = "hh_na"\n'


def _serious_inspector_messages(path: Path, least: str = "CRITICAL") -> list[str]:
    """nwbinspector messages of importance ``least`` or above (incl. its own check errors)."""
    from nwbinspector import Importance, inspect_nwbfile

    return [
        f"{m.importance.name} {m.object_type} {m.object_name}: {m.message[:300]}"
        for m in inspect_nwbfile(nwbfile_path=str(path))
        if m.importance.value >= Importance[least].value
    ]


_AMPLIFIER = {
    "vm_mV_per_V": 100.0,
    "command_pA_per_V": 400.0,
    "vm_offset_mV": 0.0,
    "command_offset_pA": 0.0,
    "liquid_junction_mV": 0.0,
}


def _meta(**extra: object) -> dict:
    return {
        "rate_hz": RATE_HZ,
        "session_start": START,
        "source": "simulated rig",
        "experiment_text": EXPERIMENT_TEXT,
        "experiment": {"amplifier": dict(_AMPLIFIER)},
        "board": {"firmware": "clampcore-board 1", "adc_bits": 16},
        **extra,
    }


def _columns(n: int, seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(n, len(COLUMNS)))
    block[:, 0] = -65.0 + 5.0 * block[:, 0]
    block[:, 6] = 0.0
    block[[k for k in (40, 900, 1500) if k < n], 6] = 1.0
    block[:, 7] = 0.0
    block[7 % n, 7] = 1.0
    block[:, 8] = 0.0  # a source that never fired
    block[::3, 9] = np.nan  # latency unknown on some samples
    return block


EVENTS = [
    {"sample": 100, "kind": "param", "element": "gNa", "field": "g_nS", "old": 10.0, "new": 12.5},
    {"sample": 50, "kind": "fault", "code": 4, "message": "current limit"},
    {"sample": 400, "kind": "param", "element": "syn:AMPA", "field": "e_mV", "old": 0, "new": -5},
    {"sample": 700, "kind": "note", "text": "bath applied"},
    {"sample": 700, "kind": "fault", "code": 1, "message": "late command"},
]


def _journal(tmp_path: Path, n: int = 2000, meta: dict | None = None, close: bool = True) -> Path:
    path = tmp_path / "journal"
    journal = Journal(path, COLUMNS, _meta() if meta is None else meta)
    block = _columns(n)
    journal.append(block[: n // 2])
    for record in EVENTS:
        journal.event(record)
    journal.append(block[n // 2 :])
    if close:
        journal.close(
            {
                "timing": {"turnaround_us": {"p50": 61.0, "p99_9": 480.5}, "late_commands": 3},
                "summary": {"spikes": 3},
            }
        )
    else:
        journal.flush()
    return path


def test_round_trip_journal_nwb_pynwb(tmp_path: Path) -> None:
    path = _journal(tmp_path)
    out = journal_to_nwb(path, tmp_path / "run.nwb")
    data = read_journal(path)

    assert validate_nwb(out) == []  # reference: pynwb's validator
    assert _serious_inspector_messages(out) == []  # reference: nwbinspector

    summary = read_nwb_summary(out)
    # The command is stored as the DAC counts sent: expected through the loop's own per-sample
    # kernels (clampcore.calibration) and the simulated rig's converters, not the writer's.
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, _AMPLIFIER)
    sent = [counts_to_pA(conv, pA_to_counts(conv, x)) for x in data.columns["i_pA"]]
    for name in COLUMNS:
        expected = np.asarray(data.columns[name])
        if name == "i_pA":
            expected = np.asarray(sent)
        elif name.startswith(("g_nS/", "i_pA/")) or name == "turnaround_us":
            expected = expected.astype(np.float32)  # stored as float32
        np.testing.assert_array_equal(summary["columns"][name], expected, err_msg=name)
    # V here is random, not on the ADC's grid: stored as float64 mV, exactly.
    assert summary["storage"]["v_mV"]["encoding"] == "float64"
    np.testing.assert_array_equal(summary["v_mV"], data.columns["v_mV"])
    np.testing.assert_array_equal(summary["spike_times_s"]["cell"], [40 / RATE_HZ, 0.045, 0.075])
    np.testing.assert_array_equal(summary["spike_times_s"]["quiet"], [])
    expected_events = sorted(EVENTS, key=lambda e: e["sample"])  # stable: file order kept
    assert [{k: v for k, v in e.items() if k != "time_s"} for e in summary["events"]] == [
        expected_events[0],
        expected_events[1],
        expected_events[2],
        expected_events[4],  # the fault at 700 (same table as the one at 50)
        expected_events[3],  # the note at 700
    ]
    assert [(e["element"], e["new"], e["time_s"]) for e in summary["param_changes"]] == [
        ("gNa", 12.5, 100 / RATE_HZ),
        ("syn:AMPA", -5, 400 / RATE_HZ),
    ]
    assert summary["timing"]["turnaround_us"]["p99_9"] == 480.5
    assert summary["experiment_text"] == EXPERIMENT_TEXT
    assert summary["complete"] is True
    assert summary["rate_hz"] == RATE_HZ

    # Independent read with pynwb: types, SI units and conversions as NWB defines them.
    with NWBHDF5IO(str(out), mode="r") as io:
        nwbfile = io.read()
        v = nwbfile.acquisition["membrane_potential"]
        assert type(v).__name__ == "CurrentClampSeries"
        assert v.unit == "volts" and v.conversion == 1e-3 and v.rate == RATE_HZ
        np.testing.assert_allclose(v.data[:] * v.conversion, data.columns["v_mV"] * 1e-3)
        i = nwbfile.stimulus["command_current"]
        assert type(i).__name__ == "CurrentClampStimulusSeries"
        assert i.unit == "amperes" and i.data.dtype == np.uint16
        # NWB specification: value in SI = data x conversion + offset.
        np.testing.assert_allclose(i.data[:] * i.conversion + i.offset, np.asarray(sent) * 1e-12)
        assert i.electrode is v.electrode and v.electrode.device.name == "clampcore board"
        g = nwbfile.processing["virtual_conductances"]["conductance_syn_AMPA"]
        assert g.unit == "siemens" and g.conversion == 1e-9
        np.testing.assert_allclose(g.data[:] * g.conversion, data.columns["g_nS/syn:AMPA"] * 1e-9)
        assert nwbfile.processing["virtual_conductances"]["current_gNa"].unit == "amperes"
        turnaround = nwbfile.processing["loop_timing"]["host_turnaround"]
        assert turnaround.unit == "seconds" and turnaround.conversion == 1e-6
        assert nwbfile.processing["loop_timing"]["fault_flags"].unit == "n/a"
        stats = nwbfile.processing["loop_timing"]["timing_statistics"].to_dataframe()
        assert dict(zip(stats["statistic"], stats["value"], strict=True)) == {
            "turnaround_us.p50": 61.0,
            "turnaround_us.p99_9": 480.5,
            "late_commands": 3.0,
        }
        spikes = nwbfile.events["spikes_cell"]
        np.testing.assert_allclose(spikes["timestamp"].data[:], [0.002, 0.045, 0.075])
        assert "spikes_quiet" not in nwbfile.events  # no empty table
        changes = nwbfile.events["parameter_changes"].to_dataframe()
        assert list(changes["field"]) == ["g_nS", "e_mV"]
        assert list(changes["old"]) == [10.0, 0.0]
        assert len(nwbfile.events["fault_events"]) == 2
        assert len(nwbfile.intracellular_recordings) == 1
        assert "vm_mV_per_V" in nwbfile.devices["amplifier"].description
        assert "adc_bits" in nwbfile.devices["clampcore board"].description
        assert next(iter(nwbfile.was_generated_by[0])) == "clampcore"
        assert nwbfile.session_start_time == dt.datetime.fromisoformat(START)


def test_metadata_from_the_experiment_file(tmp_path: Path) -> None:
    experiment = {
        "session": {
            "description": "Layer 5 pyramidal cell, added sodium conductance",
            "experimenter": "Doe, Jane",
            "lab": "Cellular Physiology",
            "institution": "Some University",
            "session_id": "2026-03-02-cell3",
        },
        "subject": {
            "subject_id": "rat-17",
            "species": "Rattus norvegicus",
            "age": "P30D",
            "sex": "F",
            "description": "Wistar rat, acute slice",
        },
        "electrode": {
            "description": "borosilicate pipette",
            "location": "VISp",
            "resistance_MOhm": 6.5,
        },
        "amplifier": {"vm_mV_per_V": 100.0},
    }
    path = _journal(tmp_path, n=100, meta=_meta(source="/dev/ttyACM0", experiment=experiment))
    out = journal_to_nwb(path, tmp_path / "cell.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    assert _serious_inspector_messages(out) == []  # reference: nwbinspector
    summary = read_nwb_summary(out)
    assert summary["placeholders"] == []
    with NWBHDF5IO(str(out), mode="r") as io:  # reference: pynwb's reader
        nwbfile = io.read()
        assert nwbfile.session_description == experiment["session"]["description"]
        assert list(nwbfile.experimenter) == ["Doe, Jane"]
        assert nwbfile.lab == "Cellular Physiology"
        assert nwbfile.institution == "Some University"
        assert nwbfile.session_id == "2026-03-02-cell3"
        subject = nwbfile.subject
        assert (subject.subject_id, subject.species, subject.age, subject.sex) == (
            "rat-17",
            "Rattus norvegicus",
            "P30D",
            "F",
        )
        assert subject.description == "Wistar rat, acute slice"
        electrode = nwbfile.icephys_electrodes["electrode"]
        assert electrode.description == "borosilicate pipette"
        assert electrode.location == "VISp"
        assert electrode.resistance == "6.5 MOhm"


@pytest.mark.parametrize(
    ("source", "subject_id", "species"),
    [
        ("offline simulation", "simulated-cell", SYNTHETIC_SPECIES),
        ("simulated rig", "simulated-cell", SYNTHETIC_SPECIES),
        ("/dev/ttyUSB0", "unspecified", "unspecified"),
    ],
)
def test_placeholders_when_metadata_is_missing(
    tmp_path: Path, source: str, subject_id: str, species: str
) -> None:
    meta = {"rate_hz": RATE_HZ, "session_start": START, "source": source}
    # The loader fills absent text fields with "" (clampcore.schema defaults): same as missing.
    meta["experiment"] = {
        "subject": {"subject_id": "", "sex": "U"},
        "electrode": {"resistance_MOhm": 0.0},
    }
    path = _journal(tmp_path, n=50, meta=meta)
    out = journal_to_nwb(path, tmp_path / "placeholder.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    # reference: nwbinspector calls a missing Subject, subject_id, age or sex CRITICAL
    assert _serious_inspector_messages(out) == []
    if source != "/dev/ttyUSB0":  # a model cell's subject passes the species checks too
        assert _serious_inspector_messages(out, "BEST_PRACTICE_VIOLATION") == []
    summary = read_nwb_summary(out)
    assert summary["subject"]["subject_id"] == subject_id
    assert summary["subject"]["species"] == species
    assert summary["subject"]["sex"] == "U"  # given, kept
    assert "Placeholder" in summary["subject"]["description"]
    assert "placeholder" in summary["electrode"]["description"]
    assert summary["electrode"]["resistance"] is None  # 0 MOhm means not measured
    assert "subject.subject_id" in summary["placeholders"]
    assert "subject.sex" not in summary["placeholders"]
    assert "session.description" in summary["placeholders"]


def test_empty_and_crashed_journals_convert(tmp_path: Path) -> None:
    empty = tmp_path / "empty"
    Journal(empty, ["v_mV", "i_pA", "spike/cell"], _meta()).close()
    out = journal_to_nwb(empty, tmp_path / "empty.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    assert _serious_inspector_messages(out) == []  # reference: nwbinspector
    summary = read_nwb_summary(out)
    assert summary["n_samples"] == 0 and len(summary["v_mV"]) == 0

    crashed = _journal(tmp_path, n=300, close=False)
    with open(crashed / "samples.f64", "ab") as handle:
        handle.write(b"\x01\x02\x03")  # a torn row
    with open(crashed / "events.jsonl", "ab") as handle:
        handle.write(b'{"sample": 299, "kind": "no')  # a torn line
    out = journal_to_nwb(crashed, tmp_path / "crashed.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    assert _serious_inspector_messages(out) == []  # reference: nwbinspector
    summary = read_nwb_summary(out)
    assert summary["complete"] is False
    assert summary["n_samples"] == 300
    assert len(summary["events"]) == len(EVENTS)
    assert len(summary["problems"]) == 2


def test_first_sample_and_a_rate_float32_cannot_hold(tmp_path: Path) -> None:
    # NWB stores TimeSeries.rate as float32; the exact rate comes from the metadata.
    rate_hz = 12345.678
    assert float(np.float32(rate_hz)) != rate_hz
    columns = ["v_mV", "spike/cell"]
    journal = Journal(
        tmp_path / "j", columns, {"rate_hz": rate_hz, "session_start": START, "first_sample": 1000}
    )
    block = np.zeros((20, 2))
    block[:, 0] = np.linspace(-70.0, -60.0, 20)
    block[5, 1] = 1.0
    journal.append(block)
    journal.event({"sample": 1010, "kind": "note", "text": "x"})
    journal.close()
    out = journal_to_nwb(tmp_path / "j", tmp_path / "j.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    summary = read_nwb_summary(out)
    assert summary["rate_hz"] == rate_hz
    assert summary["starting_time_s"] == 1000 / rate_hz
    assert summary["spike_times_s"]["cell"].tolist() == [1005 / rate_hz]
    assert summary["events"][0]["time_s"] == 1010 / rate_hz
    np.testing.assert_array_equal(summary["columns"]["spike/cell"], block[:, 1])
    with NWBHDF5IO(str(out), mode="r") as io:  # reference: pynwb's reader
        assert io.read().acquisition["membrane_potential"].starting_time == 1000 / rate_hz


def test_event_fields_of_every_type_survive(tmp_path: Path) -> None:
    records = [
        {"sample": 1, "kind": "note", "flag": True, "info": {"a": [1, 2]}, "timestamp": "x"},
        {"sample": 2, "kind": "note", "flag": False, "info": None, "id": 3, "path/name": 1.5},
        {"sample": 3, "kind": "custom kind", "duration": 0.25, "sample_rate": 7},
    ]
    journal = Journal(tmp_path / "j", ["v_mV"], {"rate_hz": 1000.0, "session_start": START})
    journal.append(np.zeros((5, 1)))
    for record in records:
        journal.event(record)
    journal.close()
    out = journal_to_nwb(tmp_path / "j", tmp_path / "j.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    assert _serious_inspector_messages(out) == []  # reference: nwbinspector
    got = [{k: v for k, v in e.items() if k != "time_s"} for e in read_nwb_summary(out)["events"]]
    # A field some events lack comes back as None for them (JSON null).
    assert got == [
        {**records[0], "id": None, "path/name": None},
        {**records[1], "timestamp": None},
        records[2],
    ]


def test_validate_nwb_reports_what_the_validator_returns(tmp_path: Path) -> None:
    out = journal_to_nwb(_journal(tmp_path, n=10), tmp_path / "ok.nwb")
    assert validate_nwb(out) == []
    with h5py.File(out, "r+") as handle:  # remove a required attribute: the file is invalid
        del handle["acquisition/membrane_potential/data"].attrs["unit"]
    problems = validate_nwb(out)
    assert problems and any("unit" in problem for problem in problems)

    not_nwb = tmp_path / "text.nwb"
    not_nwb.write_text("not an HDF5 file")
    assert len(validate_nwb(not_nwb)) == 1
    with pytest.raises(NwbError, match="does not exist"):
        validate_nwb(tmp_path / "missing.nwb")
    with pytest.raises(NwbError, match="cannot read"):
        read_nwb_summary(not_nwb)


def test_refuses_to_overwrite_and_leaves_no_partial_file(tmp_path: Path) -> None:
    path = _journal(tmp_path, n=10)
    out = journal_to_nwb(path, tmp_path / "run.nwb")
    with pytest.raises(NwbError, match="exists"):
        journal_to_nwb(path, out)
    journal_to_nwb(path, out, overwrite=True)
    assert validate_nwb(out) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == ["journal", "run.nwb"]


def test_bad_input_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(NwbError, match="JournalData"):
        write_nwb(tmp_path / "x.nwb", {"meta": {}})  # type: ignore[arg-type]
    ragged = JournalData(
        meta=_meta(), columns={"v_mV": np.zeros(3), "i_pA": np.zeros(4)}, events=[], complete=True
    )
    with pytest.raises(NwbError, match="common length"):
        write_nwb(tmp_path / "x.nwb", ragged)
    no_rate = JournalData(meta={"session_start": START}, columns={}, events=[], complete=True)
    with pytest.raises(NwbError, match="rate_hz"):
        write_nwb(tmp_path / "x.nwb", no_rate)
    with pytest.raises(NwbError, match="not a journal"):
        journal_to_nwb(tmp_path / "nothing", tmp_path / "x.nwb")
    assert not (tmp_path / "x.nwb").exists()


def test_sixty_seconds_at_20_kHz_four_columns(tmp_path: Path) -> None:
    n = 60 * 20_000  # 60 s x 20 kHz
    columns = ["v_mV", "i_pA", "g_nS/leak", "spike/cell"]
    rng = np.random.default_rng(11)
    path = tmp_path / "long"
    journal = Journal(path, columns, _meta())
    block_rows = 20_000
    for _ in range(0, n, block_rows):
        block = rng.normal(size=(block_rows, 4))
        block[:, 3] = rng.random(block_rows) < 1e-3
        journal.append(block)
        journal.flush()
    journal.close()
    t0 = time.perf_counter()
    out = journal_to_nwb(path, tmp_path / "long.nwb")
    elapsed_s = time.perf_counter() - t0
    print(
        f"\n60 s x 20 kHz x 4 columns: journal -> NWB in {elapsed_s:.2f} s "
        f"({out.stat().st_size / 1e6:.1f} MB)"
    )
    assert validate_nwb(out) == []  # reference: pynwb's validator
    summary = read_nwb_summary(out)
    data = read_journal(path)
    np.testing.assert_array_equal(summary["v_mV"], data.columns["v_mV"])  # float64 (off-grid)
    np.testing.assert_array_equal(summary["columns"]["spike/cell"], data.columns["spike/cell"])
    assert check_against_journal(out, data) == []


# --------------------------------------------------------------------------- the spool


def _spool_run(
    tmp_path: Path, name: str, n_s: float = 0.6, edit: Any = None
) -> tuple[Path, list[str], np.ndarray]:
    """A journal of an offline run of the slice example with the loop-timing columns a run on
    a board has (a counter with a gap, flags, latency with unknowns, turnaround), for the
    spool tests: ``(journal, columns, rows)``."""
    import clampcore
    from clampcore.recorder import recording_meta

    rec = clampcore.simulate(EXAMPLES / "slice_background.toml", n_s, seed=1)
    columns = rec.columns()
    n = len(columns["v_mV"])
    rng = np.random.default_rng(5)
    counter = np.arange(n, dtype=np.float64) + 7.0
    counter[n // 3 :] += 2.0  # two samples lost on the way
    latency = rng.integers(1, 4, n).astype(np.float64)
    latency[::97] = np.nan
    columns = {
        "sample_counter": counter,
        **columns,
        "flags": (rng.random(n) < 0.01) * 8.0,
        "latency_samples": latency,
        "turnaround_us": rng.gamma(4.0, 15.0, n),
    }
    names = list(columns)
    rows = np.column_stack([columns[k] for k in names])
    if edit is not None:
        edit(names, rows)
    meta = recording_meta(rec.experiment, rec.source, seed=1)
    journal = Journal(tmp_path / name, names, meta)
    journal.append(rows)
    journal.close({"timing": {"samples": float(n)}})
    return tmp_path / name, names, rows


def _feed(spool: object, rows: np.ndarray, block: int = 777) -> None:
    for start in range(0, rows.shape[0], block):  # the recorder's drains: blocks of any size
        spool.append(rows[start : start + block])  # type: ignore[attr-defined]


@pytest.fixture
def small_chunks(monkeypatch: pytest.MonkeyPatch) -> int:
    """Chunks of 2^12 rows, so that a short run has several whole chunks and a partial one."""
    import clampcore.nwb_series as ns

    monkeypatch.setattr(ns, "CHUNK_ROWS", 1 << 12)
    return 1 << 12


def _same_recording(a: Path, b: Path) -> None:
    """Every column and storage choice of ``a`` equals ``b``'s (read back through pynwb)."""
    ra, rb = read_nwb_summary(a), read_nwb_summary(b)
    assert ra["storage"] == rb["storage"]
    assert set(ra["columns"]) == set(rb["columns"])
    for column, values in rb["columns"].items():
        np.testing.assert_array_equal(ra["columns"][column], values, err_msg=column)


def test_spooled_columns_are_the_stops_conversion(tmp_path, small_chunks, monkeypatch):
    """Columns encoded while recording (nwb_spool) give the file the journal's conversion at
    stop gives; V bit for bit the journal's. References: the journal itself, pynwb's
    validator, and h5py's report of each dataset's filters."""
    import clampcore.nwb_series as ns
    from clampcore.nwb import convert_journal
    from clampcore.nwb_spool import SPOOL_DIR, Spool

    journal, names, rows = _spool_run(tmp_path, "a.journal")
    copy = tmp_path / "b.journal"
    shutil.copytree(journal, copy)
    spool = Spool(journal, names, read_journal(journal).meta)
    _feed(spool, rows)
    assert spool.n_rows == rows.shape[0] - rows.shape[0] % small_chunks  # whole chunks only
    spool.complete()  # the run ended: the last, partial chunk
    assert spool.n_rows == rows.shape[0]
    # The writer must take V, the small integers and the derived currents from the spool:
    # computing them again from the journal would fail.
    for name in ("mV_to_adc_exact", "smallest_uint", "current_is_derivable"):
        monkeypatch.setattr(ns, name, lambda *a, **k: pytest.fail("recomputed at stop"))
    convert_journal(journal, tmp_path / "a.nwb", spool=spool)
    monkeypatch.undo()
    monkeypatch.setattr(ns, "CHUNK_ROWS", small_chunks)
    convert_journal(copy, tmp_path / "b.nwb")
    assert not journal.exists() and not (journal / SPOOL_DIR).exists()
    _same_recording(tmp_path / "a.nwb", tmp_path / "b.nwb")
    back = read_nwb_summary(tmp_path / "a.nwb")
    np.testing.assert_array_equal(back["v_mV"], rows[:, names.index("v_mV")])
    assert back["storage"]["v_mV"]["encoding"] == "adc_counts"
    assert back["storage"]["i_pA/ampa_inputs"]["encoding"] == "derived_current"
    assert back["storage"]["latency_samples"] == {
        "path": back["storage"]["latency_samples"]["path"],
        "encoding": "uint",
        "unknown": 255,
    }
    with h5py.File(tmp_path / "a.nwb", "r") as f:  # reference: h5py's dataset properties
        v = f["acquisition/membrane_potential/data"]
        assert v.dtype == np.uint16 and v.compression == "gzip" and v.shuffle
        assert v.chunks == (small_chunks,)
    assert validate_nwb(tmp_path / "a.nwb") == []  # reference: pynwb's validator


def test_a_column_that_stops_fitting_comes_from_the_journal(tmp_path, small_chunks):
    """V off the ADC grid, a latency above 254 and a current no longer -g (V - E), each in a
    later chunk than the first: those columns are converted from the journal at stop, the
    others still come from the spool; the file equals the stop's conversion."""
    from clampcore.nwb import convert_journal
    from clampcore.nwb_spool import Spool

    late = 2 * small_chunks + 5  # in the third chunk

    def spoil(names: list[str], rows: np.ndarray) -> None:
        rows[late, names.index("v_mV")] += 1e-3  # not a count of any ADC step
        rows[late, names.index("latency_samples")] = 300.0
        rows[late, names.index("i_pA/extra_leak")] += 1.0

    journal, names, rows = _spool_run(tmp_path, "a.journal", edit=spoil)
    shutil.copytree(journal, tmp_path / "b.journal")
    spool = Spool(journal, names, read_journal(journal).meta)
    _feed(spool, rows)
    convert_journal(journal, tmp_path / "a.nwb", spool=spool)
    convert_journal(tmp_path / "b.journal", tmp_path / "b.nwb")
    _same_recording(tmp_path / "a.nwb", tmp_path / "b.nwb")
    storage = read_nwb_summary(tmp_path / "a.nwb")["storage"]
    assert storage["v_mV"]["encoding"] == "float64"
    assert storage["latency_samples"]["encoding"] == "uint"  # uint16 now, from the journal
    assert storage["i_pA/extra_leak"]["encoding"] == "float32"
    assert storage["g_nS/extra_leak"]["encoding"] == "float32"


def test_a_spool_that_failed_or_missed_rows_is_not_used(tmp_path, small_chunks, monkeypatch):
    """A spool that raised (here: a block of the wrong width), holds fewer rows than the
    journal or whose chunks were damaged is not used: the file is the stop's conversion."""
    import clampcore.nwb as nwb
    from clampcore.nwb import convert_journal
    from clampcore.nwb_spool import Spool

    journal, names, rows = _spool_run(tmp_path, "a.journal")
    spoils = ("width", "rows", "corrupt")
    for k, spoil in enumerate(spoils):
        target = tmp_path / f"{spoil}.journal"
        shutil.copytree(journal, target)
        spool = Spool(target, names, read_journal(target).meta)
        _feed(spool, rows[: -small_chunks - 1] if spoil == "rows" else rows)
        if spoil == "width":
            spool.append(np.zeros((small_chunks, 3)))
            assert spool.failed is not None
        if spoil == "corrupt":  # a damaged chunk of V: zlib cannot inflate it
            chunks = spool.path / f"{names.index('v_mV')}.chunks"
            raw = bytearray(chunks.read_bytes())
            raw[10:60] = bytes(50)
            chunks.write_bytes(bytes(raw))
        calls: list[bool] = []

        def spy(*a: Any, calls: list[bool] = calls, real: Any = nwb._write_and_check) -> Any:
            calls.append(a[2] is not None)  # with the spool's chunks or not
            return real(*a)

        monkeypatch.setattr(nwb, "_write_and_check", spy)
        convert_journal(target, tmp_path / f"{k}.nwb", spool=spool)
        monkeypatch.undo()
        monkeypatch.setattr(nwb.ns, "CHUNK_ROWS", small_chunks)
        # The damaged chunks were written, failed the read-back, and the journal served.
        assert calls == ([True, False] if spoil == "corrupt" else [False])
    convert_journal(journal, tmp_path / "ref.nwb")
    for k in range(len(spoils)):
        _same_recording(tmp_path / f"{k}.nwb", tmp_path / "ref.nwb")


def test_recover_rebuilds_exact_counts_for_any_board(tmp_path):
    """A crashed journal of a board with 12-bit +-5 V ADC and 14-bit +-2.5 V DAC, whose
    HELLO the recorder stored in the journal's header: `recover` stores V and I as that
    board's counts. References: the board's counts themselves (V made from them by the
    board-side arithmetic, clampcore.calibration) and the NWB rule value = data x
    conversion + offset read with h5py only. Without the description, V is kept as floats."""
    from clampcore.calibration import Converter, counts_to_mV
    from clampcore.nwb import convert_journal

    hello = {  # PROTOCOL.md §4.1: ranges in µV
        "identity": "bench board",
        "adc_bits": 12,
        "adc_min_uV": -5_000_000,
        "adc_max_uV": 5_000_000,
        "dac_bits": 14,
        "dac_min_uV": -2_500_000,
        "dac_max_uV": 2_500_000,
    }
    amplifier = dict(_AMPLIFIER, vm_offset_mV=1.5, liquid_junction_mV=7.0)
    conv = conversion_array(Converter(12, -5.0, 5.0), Converter(14, -2.5, 2.5), amplifier)
    rng = np.random.default_rng(8)
    adc = rng.integers(1000, 3000, 4000)
    v_mV = np.array([counts_to_mV(conv, float(c)) for c in adc])
    dac = rng.integers(0, 2**14, 4000)
    i_pA = np.array([counts_to_pA(conv, float(c)) for c in dac])
    for described in (True, False):
        meta = {
            "rate_hz": 10000.0,
            "session_start": START,
            "source": "/dev/ttyACM0",
            "experiment": {"amplifier": amplifier},
        }
        path = tmp_path / f"{described}.journal"
        journal = Journal(path, ["v_mV", "i_pA"], meta)
        if described:
            journal.describe_board(hello)  # as the recorder does before the first rows
        journal.append(np.column_stack([v_mV, i_pA]))
        journal.flush()  # then the crash: no final.json
        del journal
        out = tmp_path / f"{described}.nwb"
        convert_journal(path, out, keep_journal=True)
        back = read_nwb_summary(out)
        assert not back["complete"]
        if not described:
            assert back["storage"]["v_mV"]["encoding"] == "float64"
            np.testing.assert_array_equal(back["v_mV"], v_mV)
            continue
        assert back["storage"]["v_mV"]["encoding"] == "adc_counts"
        assert back["storage"]["i_pA"]["encoding"] == "dac_counts"
        with h5py.File(out, "r") as f:  # reference: NWB's conversion/offset rule, h5py only
            v = f["acquisition/membrane_potential/data"]
            i = f["stimulus/presentation/command_current/data"]
            np.testing.assert_array_equal(v[:], adc)
            np.testing.assert_array_equal(i[:], dac)
            volts = v[:] * v.attrs["conversion"] + v.attrs["offset"]
            np.testing.assert_allclose(volts * 1e3, v_mV, rtol=0, atol=1e-9)
            amperes = i[:] * i.attrs["conversion"] + i.attrs["offset"]
            np.testing.assert_allclose(amperes * 1e12, i_pA, rtol=0, atol=1e-6)
        np.testing.assert_array_equal(back["v_mV"], v_mV)  # bit for bit
        assert validate_nwb(out) == []  # reference: pynwb's validator
