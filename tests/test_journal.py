"""Tests of the crash-safe journal (clampcore.journal).

Outside references: Python's ``struct`` module (IEEE 754 little-endian doubles,
format ``"<d"``) and ``json`` module read the files independently of numpy and of
the journal's reader; a real child process killed with SIGKILL provides the crash.
"""

from __future__ import annotations

import json
import os
import signal
import struct
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from clampcore.journal import Journal, JournalError, read_journal

COLUMNS = ["v_mV", "i_pA", "g_nS/leak", "spike/cell"]
META = {
    "rate_hz": 20000.0,
    "session_start": "2026-03-02T09:30:00+01:00",
    "source": "offline simulation",
    "experiment_text": "[loop]\nrate_hz = 20000\n",
    "experiment": {"session": {"description": "journal test"}},
}


def _rows(n: int, start: int = 0, seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(n, len(COLUMNS)))
    block[:, 0] = np.arange(start, start + n)  # row number in column 0: checks order
    return block


def test_rows_and_events_round_trip(tmp_path: Path) -> None:
    path = tmp_path / "run"
    journal = Journal(path, COLUMNS, META)
    blocks = [_rows(5, 0, seed=1), _rows(0, 5, seed=2), _rows(17, 5, seed=3)]
    events = [
        {"sample": 3, "kind": "param", "element": "leak", "field": "g_nS", "old": 1.0, "new": 2.5},
        {"sample": np.int64(9), "kind": "note", "text": "ünïcode ✓", "value": np.float32(0.5)},
    ]
    journal.append(blocks[0])
    journal.event(events[0])
    journal.flush()
    journal.append(blocks[1])
    journal.append(blocks[2])
    journal.event(events[1])
    journal.close({"timing": {"turnaround_us_p50": 61.5}, "summary": {"spikes": 0}})

    data = read_journal(path)
    expected = np.concatenate(blocks)
    assert data.complete
    assert data.problems == []
    assert list(data.columns) == COLUMNS
    for j, name in enumerate(COLUMNS):
        np.testing.assert_array_equal(data.columns[name], expected[:, j])
    assert data.events[0] == events[0]
    # numpy scalars are stored as plain JSON numbers (np.float32(0.5) is exactly 0.5)
    assert data.events[1] == {"sample": 9, "kind": "note", "text": "ünïcode ✓", "value": 0.5}
    assert data.meta["rate_hz"] == 20000.0
    assert data.meta["timing"] == {"turnaround_us_p50": 61.5}  # final.json merged over meta
    assert data.n_samples == 22


def test_file_layout_read_with_struct_and_json(tmp_path: Path) -> None:
    # Reference: Python's struct module, "<d" = little-endian IEEE 754 double, row-major.
    path = tmp_path / "run"
    block = _rows(4)
    with Journal(path, COLUMNS, META) as journal:
        journal.append(block)
        journal.event({"sample": 1, "kind": "fault", "code": 2})
    raw = (path / "samples.f64").read_bytes()
    assert len(raw) == block.size * 8
    values = struct.unpack(f"<{block.size}d", raw)
    assert values == tuple(block.ravel(order="C").tolist())
    # Reference: json module, one object per line.
    lines = (path / "events.jsonl").read_text(encoding="utf-8").splitlines()
    assert [json.loads(line) for line in lines] == [{"sample": 1, "kind": "fault", "code": 2}]
    header = json.loads((path / "meta.json").read_text(encoding="utf-8"))
    assert header["columns"] == COLUMNS
    assert header["meta"] == META
    assert json.loads((path / "final.json").read_text(encoding="utf-8")) == {}


def test_meta_written_at_once_and_rows_buffered_until_flush(tmp_path: Path) -> None:
    path = tmp_path / "run"
    journal = Journal(path, COLUMNS, META)
    assert json.loads((path / "meta.json").read_text())["meta"]["rate_hz"] == 20000.0
    assert not list(path.glob("*.tmp"))
    journal.append(_rows(10))
    journal.event({"sample": 0, "kind": "note"})
    assert (path / "samples.f64").stat().st_size == 0  # buffered
    assert read_journal(path).n_samples == 0
    journal.flush()
    assert (path / "samples.f64").stat().st_size == 10 * len(COLUMNS) * 8
    assert journal.rows_written == 10 and journal.events_written == 1
    data = read_journal(path)  # readable while the run goes on
    assert data.n_samples == 10 and not data.complete
    journal.close()
    assert read_journal(path).complete


def test_block_is_copied_when_appended(tmp_path: Path) -> None:
    # The loop hands over views of a ring buffer it reuses at once.
    path = tmp_path / "run"
    block = _rows(3)
    original = block.copy()
    journal = Journal(path, COLUMNS, META)
    journal.append(block)
    block[:] = -1.0
    journal.close()
    np.testing.assert_array_equal(read_journal(path).columns["v_mV"], original[:, 0])


def test_torn_last_row_is_dropped(tmp_path: Path) -> None:
    path = tmp_path / "run"
    block = _rows(6)
    journal = Journal(path, COLUMNS, META)
    journal.append(block)
    journal.flush()
    samples = path / "samples.f64"
    size = samples.stat().st_size
    os.truncate(samples, size - 11)  # mid-row: 5 full rows and 21 of 32 bytes of the sixth
    data = read_journal(path)
    assert data.n_samples == 5
    np.testing.assert_array_equal(data.columns["i_pA"], block[:5, 1])
    assert any("torn last row" in problem for problem in data.problems)


def test_torn_last_event_line_is_dropped(tmp_path: Path) -> None:
    path = tmp_path / "run"
    journal = Journal(path, COLUMNS, META)
    records = [{"sample": k, "kind": "note", "text": f"event {k}"} for k in range(4)]
    for record in records:
        journal.event(record)
    journal.flush()
    events = path / "events.jsonl"
    whole = events.read_bytes()
    events.write_bytes(whole[:-6])  # cut the last line in its middle
    data = read_journal(path)
    assert data.events == records[:3]
    assert any("torn last line" in problem for problem in data.problems)
    # A complete last object that only lost its newline is kept.
    events.write_bytes(whole[:-1])
    assert read_journal(path).events == records


def test_unreadable_middle_line_is_skipped_not_fatal(tmp_path: Path) -> None:
    path = tmp_path / "run"
    Journal(path, COLUMNS, META).close()
    good = [json.dumps({"sample": k, "kind": "note"}) for k in (0, 2)]
    (path / "events.jsonl").write_text(good[0] + "\n\x00\x00garbage\n" + good[1] + "\n")
    data = read_journal(path)
    assert [e["sample"] for e in data.events] == [0, 2]
    assert any("line 2" in problem for problem in data.problems)


def test_exception_in_context_leaves_an_incomplete_but_readable_journal(tmp_path: Path) -> None:
    path = tmp_path / "run"
    with pytest.raises(RuntimeError), Journal(path, COLUMNS, META) as journal:
        journal.append(_rows(4))
        raise RuntimeError("serial port vanished")
    data = read_journal(path)
    assert not data.complete
    assert data.n_samples == 4


CHILD = textwrap.dedent(
    """
    import sys
    import numpy as np
    from clampcore.journal import Journal
    meta = {"rate_hz": 10000.0, "session_start": "2026-03-02T09:30:00+00:00",
            "source": "simulated rig"}
    journal = Journal(sys.argv[1], ["v_mV", "i_pA"], meta)
    n = 0
    while True:  # write as fast as it can: the kill lands at an arbitrary moment
        rows = np.arange(n, n + 1000, dtype=np.float64)
        journal.append(np.column_stack([rows, -rows]))
        journal.event({"sample": n, "kind": "note", "text": "block"})
        n += 1000
        journal.flush()
        print(n, flush=True)  # every row below n is with the operating system now
    """
)


def test_sigkill_after_flush_keeps_every_flushed_row(tmp_path: Path) -> None:
    path = tmp_path / "run"
    root = Path(__file__).resolve().parents[1]
    env = {**os.environ, "PYTHONPATH": str(root)}
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(path)], stdout=subprocess.PIPE, text=True, env=env
    )
    try:
        reported = [int(child.stdout.readline()) for _ in range(20)]
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=30)
        child.stdout.close()
    assert child.returncode == -signal.SIGKILL
    data = read_journal(path)
    assert not data.complete
    assert data.n_samples >= reported[-1] == 20_000
    # Every recovered row is one the child wrote, in order, with its content intact.
    expected = np.arange(data.n_samples, dtype=np.float64)
    np.testing.assert_array_equal(data.columns["v_mV"], expected)
    np.testing.assert_array_equal(data.columns["i_pA"], -expected)
    samples = [e["sample"] for e in data.events]
    assert samples == list(range(0, 1000 * len(samples), 1000))
    assert len(samples) >= 20 and samples[-1] < data.n_samples

    from clampcore.nwb import journal_to_nwb, read_nwb_summary, validate_nwb

    out = journal_to_nwb(path, tmp_path / "recovered.nwb")
    assert validate_nwb(out) == []  # reference: pynwb's validator
    summary = read_nwb_summary(out)
    np.testing.assert_array_equal(summary["v_mV"], expected)
    assert summary["complete"] is False


@pytest.mark.parametrize(
    ("columns", "meta", "message"),
    [
        ([], META, "at least one column"),
        (["a", "a"], META, "duplicate"),
        ("v_mV", META, "list of names"),
        (["v_mV", ""], META, "non-empty string"),
        (COLUMNS, {**META, "rate_hz": 0}, "rate_hz"),
        (COLUMNS, {**META, "rate_hz": float("nan")}, "rate_hz"),
        (COLUMNS, {k: v for k, v in META.items() if k != "session_start"}, "session_start"),
        (COLUMNS, {**META, "session_start": "2026-03-02T09:30:00"}, "time zone"),
        (COLUMNS, {**META, "session_start": "yesterday"}, "ISO 8601"),
        (COLUMNS, {**META, "first_sample": -1}, "first_sample"),
        (COLUMNS, {**META, "board": "fast"}, "board"),
        (COLUMNS, {**META, "extra": object()}, "JSON"),
    ],
)
def test_bad_construction_is_a_clear_error(
    tmp_path: Path, columns: list, meta: dict, message: str
) -> None:
    with pytest.raises(JournalError, match=message):
        Journal(tmp_path / "run", columns, meta)


def test_bad_writes_are_clear_errors(tmp_path: Path) -> None:
    journal = Journal(tmp_path / "run", COLUMNS, META)
    with pytest.raises(JournalError, match=r"shape \(n, 4\)"):
        journal.append(np.zeros((3, 3)))
    with pytest.raises(JournalError, match=r"shape"):
        journal.append(np.zeros(4))
    with pytest.raises(JournalError, match="numbers"):
        journal.append(np.array([["a"] * 4]))
    with pytest.raises(JournalError, match="sample"):
        journal.event({"kind": "note"})
    with pytest.raises(JournalError, match="sample"):
        journal.event({"sample": True, "kind": "note"})
    with pytest.raises(JournalError, match="kind"):
        journal.event({"sample": 1})
    with pytest.raises(JournalError, match="JSON"):
        journal.event({"sample": 1, "kind": "note", "what": {1, 2}})
    with pytest.raises(JournalError, match="dict"):
        journal.event([("sample", 1)])
    journal.close()
    journal.close()  # a second close does nothing
    with pytest.raises(JournalError, match="closed"):
        journal.append(_rows(1))


def test_existing_paths(tmp_path: Path) -> None:
    (tmp_path / "empty").mkdir()
    Journal(tmp_path / "empty", COLUMNS, META).close()  # an empty directory is fine
    with pytest.raises(JournalError, match="not empty"):
        Journal(tmp_path / "empty", COLUMNS, META)
    (tmp_path / "file").write_text("x")
    with pytest.raises(JournalError, match="not a directory"):
        Journal(tmp_path / "file", COLUMNS, META)


def test_reading_something_that_is_not_a_journal(tmp_path: Path) -> None:
    with pytest.raises(JournalError, match="not a journal directory"):
        read_journal(tmp_path / "missing")
    (tmp_path / "plain").mkdir()
    with pytest.raises(JournalError, match=r"meta\.json is missing"):
        read_journal(tmp_path / "plain")
    (tmp_path / "plain" / "meta.json").write_text("{not json")
    with pytest.raises(JournalError, match="cannot read"):
        read_journal(tmp_path / "plain")


def test_the_boards_description_goes_into_the_header(tmp_path: Path) -> None:
    """describe_board rewrites meta.json (read here with json alone) with the board's
    description; a journal left without final.json still has it."""
    path = tmp_path / "j"
    journal = Journal(path, ["v_mV"], dict(META))
    journal.describe_board({"adc_bits": 12, "adc_min_uV": -5_000_000})
    journal.append(np.zeros((3, 1)))
    journal.flush()
    header = json.loads((path / "meta.json").read_text(encoding="utf-8"))
    assert header["meta"]["board"] == {"adc_bits": 12, "adc_min_uV": -5_000_000}
    assert header["columns"] == ["v_mV"]
    assert not (path / "meta.json.tmp").exists()
    data = read_journal(path)
    assert not data.complete and data.meta["board"]["adc_bits"] == 12
    with pytest.raises(JournalError, match="table"):
        journal.describe_board(["not", "a", "table"])  # type: ignore[arg-type]
    journal.close()
    with pytest.raises(JournalError, match="closed"):
        journal.describe_board({"adc_bits": 16})
