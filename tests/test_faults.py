"""The fault matrix: what a user meets when things go wrong (README, "When things go wrong").

One parametrised test per row of issue #11: bad option values, bad paths, duplicate
outputs, a disk that fills up mid-run (a file-size limit, needing no root; and a real
small tmpfs when running as root), a port that vanishes, two runs on one port, and
Ctrl-C twice. Each row asserts the exit code and the message; where a run started,
that the simulated rig's ground-truth log shows 0 pA as the last command the host had
applied, and that every sample the journal took reached the NWB file (or ``recover``):
sample counters contiguous, as many as the journal holds.

A property test (hypothesis) corrupts experiment files built from the schema: the loader
either loads them or raises ``ExperimentError`` naming the element (or section) and the
field, nothing else.
"""

from __future__ import annotations

import contextlib
import copy
import os
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import NO_COMMAND, read_log
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
)
from clampcore.calibration import pA_to_counts as _pa_to_counts
from clampcore.cli import main
from clampcore.engine import Engine, RunOptions
from clampcore.experiment import ExperimentError, load_experiment
from clampcore.journal import Journal, JournalError, read_journal
from clampcore.nwb import read_nwb_summary
from clampcore.schema import COMMON_FIELDS, ELEMENT_FIELDS, KINDS, SECTION_FIELDS

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "imposed_lif.toml"


# --------------------------------------------------------------------------- helpers


def _zero_counts() -> int:
    """The DAC count of 0 pA with the example's amplifier on the rig's converters."""
    amplifier = load_experiment(EXAMPLE).amplifier
    return _pa_to_counts(conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, amplifier), 0.0)


def _assert_left_at_zero(rig_log: Path, run: int = 1) -> None:
    """The last host command the rig applied was 0 pA (ground truth, not the host's word)."""
    gt = read_log(rig_log).for_run(run)
    applied = gt.records[gt.cmd_seq != NO_COMMAND]
    assert applied.size, "the rig applied no command"
    assert int(applied["dac_counts"][-1]) == _zero_counts()


def _assert_no_sample_lost(nwb: Path, journal: Path) -> int:
    """Every sample the journal holds is in the NWB file, in order, without gaps."""
    rec = read_nwb_summary(nwb)
    kept = read_journal(journal).n_samples
    assert rec["n_samples"] == kept > 0
    counters = np.asarray(rec["columns"]["sample_counter"])
    # The rig's sample counter counts every sample it took (PROTOCOL.md): a gap would be a
    # sample lost on the way; none is expected on a healthy pseudo-terminal.
    assert np.all(np.diff(counters) == 1)
    return kept


def _cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str]:
    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out + out.err


def _wait_for_rows(engine: Engine, rows: int, timeout_s: float = 120.0) -> None:
    deadline = time.monotonic() + timeout_s
    while engine.status().get("written", 0) < rows:
        assert engine.running, f"the run ended early: {engine.finish().error}"
        assert time.monotonic() < deadline, "no samples arrived"
        time.sleep(0.05)


# --------------------------------------------------------------------------- bad values

BAD_VALUES = [
    ("run", "--duration", "0"),
    ("run", "--duration", "-1"),
    ("run", "--duration", "inf"),
    ("run", "--duration", "nan"),
    ("run", "--duration", "ten"),
    ("simulate", "--duration", "0"),
    ("simulate", "--duration", "nan"),
    ("run", "--watchdog-ms", "nan"),
    ("run", "--watchdog-ms", "0"),
    ("run", "--watchdog-ms", "5000"),
    ("run", "--seed", "-1"),
    ("run", "--seed", "1.5"),
    ("simulate", "--seed", "-1"),
    ("run", "--spin-us", "-1"),
    ("run", "--realtime", "100"),
    ("run", "--warn-late-percent", "0"),
    ("run", "--warn-latency-samples", "0"),
    ("demo", "--duration", "inf"),
]


@pytest.mark.parametrize(("command", "option", "value"), BAD_VALUES)
def test_bad_option_value(capsys, tmp_path, command, option, value):
    argv = [command] + ([] if command == "demo" else [EXAMPLE])
    argv += ["--port", "sim"] if command == "run" else []
    argv += [option, value, "--out", tmp_path / "x.nwb"] if command != "demo" else [option, value]
    with pytest.raises(SystemExit) as stop:
        main([str(a) for a in argv])
    err = capsys.readouterr().err
    assert stop.value.code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err  # one line, no usage block, no traceback
    assert f"{option} '{value}': must be" in lines[0]
    assert not list(tmp_path.iterdir())  # nothing started, nothing written


# --------------------------------------------------------------------------- bad paths


def _write(tmp_path: Path, name: str, data: bytes) -> Path:
    path = tmp_path / name
    path.write_bytes(data)
    return path


BAD_PATHS = [
    ("missing, no .toml", lambda d: d / "nosuch", "no such file"),
    ("missing .toml", lambda d: d / "nosuch.toml", "no such file"),
    ("empty string", lambda d: "", "no file given"),
    ("folder", lambda d: d, "is not a file"),
    ("empty file", lambda d: _write(d, "empty.toml", b""), "is empty: an experiment needs"),
    ("comments only", lambda d: _write(d, "c.toml", b"# nothing\n\n"), "is empty"),
    ("Latin-1", lambda d: _write(d, "l1.toml", "[loop]\n# Zelle 2, 37 °C\n".encode("latin-1")),
     "is not UTF-8 text"),
    ("binary", lambda d: _write(d, "b.toml", bytes(range(256))), "is not a text file"),
    ("not TOML", lambda d: _write(d, "t.txt", b"rate = \n"), "not valid TOML"),
]  # fmt: skip


@pytest.mark.parametrize(("label", "make", "message"), BAD_PATHS, ids=[r[0] for r in BAD_PATHS])
@pytest.mark.parametrize("command", ["check", "simulate", "run"])
def test_bad_experiment_path(capsys, tmp_path, label, make, message, command):
    path = make(tmp_path)
    argv = [command, path] + (["--port", "sim"] if command == "run" else [])
    code, text = _cli(capsys, *argv)
    assert code == 2
    lines = text.strip().splitlines()
    assert len(lines) == 1, text
    assert message in lines[0]
    if str(path) and label not in ("folder", "empty string"):
        assert str(path) in lines[0] or Path(path).name in lines[0]  # names the file


def test_byte_order_mark_is_accepted(capsys, tmp_path):
    path = _write(tmp_path, "bom.toml", b"\xef\xbb\xbf" + EXAMPLE.read_bytes())
    code, text = _cli(capsys, "check", path)
    assert code == 0, text
    assert "valid" in text


# --------------------------------------------------------------------------- outputs


def test_existing_outputs_are_never_replaced_without_force(capsys, tmp_path):
    precious = tmp_path / "precious.nwb"
    precious.write_bytes(b"30,000 samples of a real cell")
    journal = tmp_path / "other.journal"
    with Journal(journal, ["sample_counter", "v_mV"], {"rate_hz": 1000.0,
                 "session_start": "2026-12-01T10:00:00+00:00"}) as j:  # fmt: skip
        j.append(np.array([[0.0, -70.0], [1.0, -70.0]]))
    for argv in (
        ["recover", journal, "--out", precious],
        ["simulate", EXAMPLE, "--duration", "0.01", "--out", precious],
        ["run", EXAMPLE, "--port", "sim", "--duration", "1", "--out", precious],
    ):
        code, text = _cli(capsys, *argv)
        assert code == 1, text
        assert f"{precious} exists: choose another --out, or pass --force" in text
        assert precious.read_bytes() == b"30,000 samples of a real cell"
    assert not (tmp_path / "precious.journal").exists()
    # recover on a journal whose NWB exists (a finished run) is refused the same way
    (tmp_path / "other.nwb").write_bytes(b"finished")
    code, text = _cli(capsys, "recover", journal)
    assert code == 1 and "other.nwb exists" in text
    # with --force the file is replaced by the recording
    code, text = _cli(capsys, "recover", journal, "--out", precious, "--force")
    assert code == 0, text
    assert read_nwb_summary(precious)["n_samples"] == 2


def test_out_keeps_the_users_name(capsys, tmp_path):
    """`--out slice1.cell2` records slice1.cell2.nwb (and its journal), never slice1.nwb."""
    out = tmp_path / "slice1.cell2"
    log = tmp_path / "rig.log"
    code, text = _cli(capsys, "run", EXAMPLE, "--port", "sim", "--duration", "0.5",
                      "--out", out, "--rig-log", log, "--keep-journal")  # fmt: skip
    assert code == 0, text
    assert (tmp_path / "slice1.cell2.nwb").is_file()
    assert not (tmp_path / "slice1.nwb").exists()
    _assert_no_sample_lost(tmp_path / "slice1.cell2.nwb", tmp_path / "slice1.cell2.journal")
    _assert_left_at_zero(log)
    # the same --out again: refused, the first recording untouched
    before = (tmp_path / "slice1.cell2.nwb").read_bytes()
    code, text = _cli(capsys, "run", EXAMPLE, "--port", "sim", "--duration", "0.5", "--out", out)
    assert code == 1
    assert "slice1.cell2.nwb exists" in text
    assert (tmp_path / "slice1.cell2.nwb").read_bytes() == before
    code, text = _cli(capsys, "simulate", EXAMPLE, "--duration", "0.01", "--out", out)
    assert code == 0 and (tmp_path / "slice1.cell2.npz").is_file()


# --------------------------------------------------------------------------- full disk


def test_journal_keeps_whole_rows_at_a_file_size_limit(tmp_path):
    """A write cut short by the file-size limit keeps whole rows and buffers the rest."""
    columns = ["a", "b", "c"]  # 24-byte rows
    meta = {"rate_hz": 1000.0, "session_start": "2026-12-01T10:00:00+00:00"}
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    old = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # EFBIG instead of a core dump
    journal = Journal(tmp_path / "j", columns, meta)
    rows = np.arange(300, dtype=float).reshape(100, 3)
    try:
        resource.setrlimit(resource.RLIMIT_FSIZE, (1000, hard))  # 41 whole rows + 16 bytes
        journal.append(rows)
        with pytest.raises(JournalError, match=r"samples\.f64"):
            journal.flush()
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        signal.signal(signal.SIGXFSZ, old)
    assert journal.rows_written == 1000 // 24
    journal.flush()  # room again: the buffered rest follows
    journal.close()
    np.testing.assert_array_equal(read_journal(tmp_path / "j").columns["c"], rows[:, 2])


def _fill_with_file_limit(engine: Engine, journal: Path) -> None:
    """Limit every file this process writes to 1 MB beyond the journal's present size."""
    size = (journal / "samples.f64").stat().st_size
    hard = resource.getrlimit(resource.RLIMIT_FSIZE)[1]
    resource.setrlimit(resource.RLIMIT_FSIZE, (size + 1_000_000, hard))


def _fill_the_tmpfs(engine: Engine, journal: Path) -> None:
    """Another program fills the disk: leave it 200 kB."""
    free = shutil.disk_usage(journal).free
    with open(journal.parent / "filler", "wb") as handle, contextlib.suppress(OSError):
        handle.write(b"\0" * max(0, free - 200_000))


_FSIZE_AT_START = resource.getrlimit(resource.RLIMIT_FSIZE)


def _restore_file_limit() -> None:
    resource.setrlimit(resource.RLIMIT_FSIZE, _FSIZE_AT_START)


@contextlib.contextmanager
def _small_disk(kind: str, tmp_path: Path):
    """A folder for the recording: on the ordinary disk (file-size limit) or a 32 MB tmpfs."""
    if kind == "rlimit":
        old = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # EFBIG instead of a core dump
        try:
            yield tmp_path
        finally:
            _restore_file_limit()
            signal.signal(signal.SIGXFSZ, old)
        return
    if os.geteuid() != 0:
        pytest.skip("a real tmpfs needs root (mount -t tmpfs)")
    mnt = tmp_path / "tmpfs"
    mnt.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=32m", "tmpfs", str(mnt)],
                          capture_output=True, text=True)  # fmt: skip
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)


@pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning")  # h5py, EFBIG
@pytest.mark.parametrize(("kind", "fill"), [("rlimit", _fill_with_file_limit),
                                            ("tmpfs", _fill_the_tmpfs)])  # fmt: skip
def test_disk_fills_up_mid_run(capsys, tmp_path, kind, fill):
    """The run ends with 0 pA commanded, the status says why, and `recover` rebuilds every
    sample the journal took once there is room again."""
    log = tmp_path / "rig.log"
    with _small_disk(kind, tmp_path) as folder:
        out = folder / "full.nwb"
        journal = folder / "full.journal"
        options = RunOptions(rig_clock="wall", rig_log=log, keep_journal=True)
        engine = Engine(EXAMPLE, "sim", options, rig_factory=start_rig)
        engine.start(duration_s=3.0, out=out)  # 3 s fit in 32 MB: the start-up check passes
        _wait_for_rows(engine, 2000)
        # The recorder flushes the journal on its own thread (after encoding the spool's
        # chunks too): wait until rows are on disk, so that the disk fills mid-run.
        deadline = time.monotonic() + 60.0
        while (flushed := read_journal(journal).n_samples) == 0:  # on disk before the fill
            assert engine.running and time.monotonic() < deadline, "the journal stayed empty"
            time.sleep(0.05)
        fill(engine, journal)
        assert engine.wait(60.0), "the run did not stop when the disk filled"
        status = engine.status()
        result = engine.finish()
        if kind == "tmpfs":
            (folder / "filler").unlink()  # room again
        else:
            _restore_file_limit()
        assert "RECORDING FAILED" in _status_line(status)
        assert result.error and "the recording failed" in result.error
        assert "0 pA" in result.error
        assert result.samples < 3.0 * 10000  # it stopped before the duration
        _assert_left_at_zero(log)
        # The compact NWB file is smaller than the journal: under a per-file size limit it
        # may still be written; on the full tmpfs (200 kB left) it cannot be.
        nwb = result.nwb_path
        if kind == "tmpfs" or nwb is None:
            assert nwb is None
            assert f"clampcore recover {journal}" in result.error
            nwb = tmp_path / "recovered.nwb"
            code, text = _cli(capsys, "recover", journal, "--out", nwb, "--keep-journal")
            assert code == 0, text
        kept = _assert_no_sample_lost(nwb, journal)
        assert kept >= flushed > 0  # every row the journal had written is recovered


def _status_line(status: dict) -> str:
    from clampcore.engine import status_line

    return status_line(status, 10000.0)


def test_a_run_that_cannot_fit_is_refused(capsys, tmp_path, monkeypatch):
    """The start-up check against the expected size (ten minutes for an open-ended run)."""
    from clampcore import recorder

    usage = shutil.disk_usage(tmp_path)
    per_s = recorder.bytes_per_second(load_experiment(EXAMPLE))
    free = per_s * 100  # room for 100 s
    monkeypatch.setattr(recorder.shutil, "disk_usage", lambda p: usage._replace(free=int(free)))
    code, text = _cli(capsys, "run", EXAMPLE, "--port", "sim", "--out", tmp_path / "r.nwb")
    assert code == 1
    assert "refusing to start" in text and "ten minutes" in text and "free" in text
    assert not list(tmp_path.iterdir())
    code, text = _cli(capsys, "run", EXAMPLE, "--port", "sim", "--duration", "200",
                      "--out", tmp_path / "r.nwb")  # fmt: skip
    assert code == 1 and "200 s" in text


# --------------------------------------------------------------------------- the port


def test_port_vanishes_mid_run(tmp_path):
    engine = Engine(
        EXAMPLE, "sim", RunOptions(rig_clock="wall", keep_journal=True), rig_factory=start_rig
    )
    engine.start(duration_s=None, out=tmp_path / "vanished.nwb")
    _wait_for_rows(engine, 3000)
    engine._rig.kill()  # the board disappears (USB unplugged): no log to read afterwards
    assert engine.wait(20.0), "the loop did not notice the port vanishing"
    result = engine.finish()
    assert result.exit_code != 0 and result.error
    assert "port" in result.error or "board" in result.error
    assert _assert_no_sample_lost(result.nwb_path, tmp_path / "vanished.journal") >= 3000


def test_two_runs_on_one_port(capsys, tmp_path):
    """The second run is refused with a message naming the port; the first loses nothing."""
    log = tmp_path / "rig.log"
    with start_rig(EXAMPLE, clock="wall", log=log) as rig:
        first = Engine(EXAMPLE, rig.path, RunOptions(keep_journal=True))
        first.start(duration_s=None, out=tmp_path / "first.nwb")
        _wait_for_rows(first, 2000)
        code, text = _cli(capsys, "run", EXAMPLE, "--port", rig.path, "--duration", "1",
                          "--out", tmp_path / "second.nwb")  # fmt: skip
        time.sleep(0.3)
        result = first.finish()
    assert code == 1
    assert rig.path in text and "another program holds it" in text
    assert len(text.strip().splitlines()) == 1 or "clampcore:" in text
    assert not (tmp_path / "second.nwb").exists()
    assert result.error is None, result.error
    assert result.summary["missing"] == 0 and result.summary["bad_frames"] == 0
    assert result.board_status["bad_frames"] == 0
    assert result.board_status["rejected"] == 0
    _assert_no_sample_lost(result.nwb_path, tmp_path / "first.journal")
    _assert_left_at_zero(log)


# --------------------------------------------------------------------------- Ctrl-C twice


def test_ctrl_c_twice_still_writes_the_nwb(tmp_path):
    out = tmp_path / "twice.nwb"
    log = tmp_path / "rig.log"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    host = subprocess.Popen(
        [sys.executable, "-m", "clampcore", "run", str(EXAMPLE), "--port", "sim",
         "--out", str(out), "--rig-log", str(log), "--keep-journal"],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    try:
        journal = out.with_suffix(".journal")
        deadline = time.monotonic() + 120
        while (
            not (journal / "samples.f64").exists()
            or (journal / "samples.f64").stat().st_size < 1_000_000
        ):
            assert host.poll() is None, host.stderr.read()
            assert time.monotonic() < deadline, "the journal did not grow"
            time.sleep(0.05)
        host.send_signal(signal.SIGINT)
        for line in host.stdout:  # the first Ctrl-C is being handled
            if line.startswith("stopping"):
                break
        host.send_signal(signal.SIGINT)
        stdout, stderr = host.communicate(timeout=120)
    finally:
        if host.poll() is None:
            host.kill()
    assert host.returncode == 0, stderr
    assert "already stopping" in stderr
    assert f"clampcore recover {journal}" in stderr
    assert "Traceback" not in stderr
    assert "recording: " in stdout
    _assert_no_sample_lost(out, journal)
    _assert_left_at_zero(log)


# --------------------------------------------------------------------------- the loader


def _value_for(f) -> st.SearchStrategy:
    """A valid value of a schema field (its default, or one of its choices)."""
    if f.rule == "choice":
        return st.sampled_from(f.choices)
    return st.just(f.default)


JUNK = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**70), 2**70),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8),
    st.lists(st.floats(allow_nan=True), max_size=3), st.dictionaries(st.text(max_size=3),
    st.integers(), max_size=2),
)  # fmt: skip


@st.composite
def corrupted_experiments(draw) -> tuple[dict, dict, str, str | None, str]:
    """A schema-built experiment and a copy with one field corrupted:
    (clean, corrupted, 'element' or 'section', element name or section, field)."""
    clean: dict = {"loop": {"rate_hz": 10000.0}, "element": []}
    for i in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(KINDS))
        el = {"kind": kind, "name": f"e{i}"}
        for f in ELEMENT_FIELDS[kind]:
            if draw(st.booleans()):
                el[f.name] = draw(_value_for(f))
        clean["element"].append(el)
    bad = copy.deepcopy(clean)
    if draw(st.booleans()):
        index = draw(st.integers(0, len(bad["element"]) - 1))
        el = bad["element"][index]
        fields = [f.name for f in (*COMMON_FIELDS, *ELEMENT_FIELDS[el["kind"]])]
        name = draw(st.sampled_from([*fields, "kind", "name", "bogus_field"]))
        where = el["name"] if name != "name" else f"#{index + 1}"
        el[name] = draw(JUNK)
        return clean, bad, "element", where, name
    section = draw(st.sampled_from(sorted(SECTION_FIELDS)))
    name = draw(st.sampled_from([*(f.name for f in SECTION_FIELDS[section]), "bogus_field"]))
    bad.setdefault(section, {})[name] = draw(JUNK)
    return clean, bad, "section", section, name


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(corrupted_experiments())
def test_loader_loads_or_names_element_and_field(case):
    """Arbitrary corruption of a schema-built experiment: it loads, or the error names the
    element (or section) and the field; no other exception type escapes."""
    clean, bad, what, where, field = case
    try:
        load_experiment(clean)
    except ExperimentError:
        clean_loads = False  # some valid-looking combinations are refused (e.g. a bare ramp)
    else:
        clean_loads = True
    try:
        load_experiment(bad)
    except ExperimentError as exc:
        message = str(exc)
        assert exc.where in message
        if exc.field is not None:
            assert f"field '{exc.field}'" in message
        if clean_loads:  # the corruption is what was refused: it names its place
            if what == "element":
                assert exc.where in (f"element '{where}'", f"element {where}")
                if field not in ("kind", "name"):
                    # the field itself, or one it is checked against (reset below threshold)
                    assert exc.field is not None
            elif exc.where == f"section [{where}]":
                assert exc.field == field
            else:  # a valid but different loop rate can make an element's field invalid
                assert where == "loop" and exc.where.startswith("element")
                assert exc.field is not None


# --------------------------------------------------------------------------- the window


def test_gui_without_a_display_says_so_and_does_not_abort(tmp_path):
    env = {k: v for k, v in os.environ.items()
           if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}  # fmt: skip
    env["PYTHONPATH"] = str(ROOT)
    done = subprocess.run([sys.executable, "-m", "clampcore", "gui"], env=env,
                          capture_output=True, text=True, timeout=120)  # fmt: skip
    if "needs PySide6" in done.stderr:
        pytest.skip("the window's extra is not installed")
    assert done.returncode == 1  # not 134 (SIGABRT from Qt)
    assert "no display" in done.stderr and "QT_QPA_PLATFORM=offscreen" in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1


def test_display_problem_rules():
    from clampcore.gui.app import display_problem

    if sys.platform != "linux":
        pytest.skip("the check applies to Linux")
    assert display_problem({"QT_QPA_PLATFORM": "offscreen"}) is None
    assert "no display" in display_problem({})
    assert "WAYLAND_DISPLAY" in display_problem({"QT_QPA_PLATFORM": "wayland"})
    assert display_problem({"WAYLAND_DISPLAY": "wayland-0"}) is None


# --------------------------------------------------------------------------- live status


def _stats(samples: int, late: int, latency_bin: int) -> dict:
    from clampcore.health import loop_health
    from clampcore.shared import LAT_BINS, N_STATS, ST_LAT_HIST, ST_LATE, ST_SAMPLES

    st_ = np.zeros(N_STATS)
    st_[ST_SAMPLES] = samples
    st_[ST_LATE] = late
    st_[ST_LAT_HIST + min(latency_bin, LAT_BINS - 1)] = samples
    out = loop_health(st_, 10000.0)
    out.update(state=1, written=samples, zero_held=False, recording_error=None)
    return out


def test_status_line_has_no_nan_and_shows_the_histograms_last_bin():
    from clampcore.engine import status_line

    starting = status_line(_stats(0, 0, 1), 10000.0)
    assert "nan" not in starting.lower()
    line = status_line(_stats(5000, 0, 40), 10000.0)  # 40 samples: beyond the last bin
    assert "p99 >=15" in line and "nan" not in line.lower()
    assert "watchdog 0 rejected 0" in line


def test_timing_warning_once_past_the_threshold():
    from clampcore.console import TimingWatch

    watch = TimingWatch(late_percent=5.0, latency_samples=8)
    assert watch.check(_stats(10000, 0, 1), 10000.0) is None  # first status: no interval yet
    assert watch.check(_stats(20000, 100, 1), 10000.0) is None  # 1% late, latency 1: fine
    warning = watch.check(_stats(30000, 1100, 1), 10000.0)  # 10% late in this interval
    assert warning and "10.0% of commands came late" in warning
    assert watch.check(_stats(40000, 5000, 1), 10000.0) is None  # warned once only
    watch = TimingWatch(late_percent=5.0, latency_samples=8)
    watch.check(_stats(10000, 0, 1), 10000.0)
    assert "latency p99" in watch.check(_stats(20000, 0, 12), 10000.0)


def test_rejected_commands_show_live(tmp_path):
    """Commands corrupted on the way to the board: it flags RX_ERROR in its samples, the
    live status counts them."""
    faults = {"corrupt_rx": 0.01}
    engine = Engine(
        EXAMPLE,
        "sim",
        RunOptions(rig_clock="wall", rig_faults=faults, seed=2),
        rig_factory=start_rig,
    )
    engine.start(duration_s=1.0, out=tmp_path / "rx.nwb")
    assert engine.wait(120.0)
    result = engine.finish()
    assert result.summary["rx_errors"] > 0
    assert result.board_status["bad_frames"] > 0


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow,
          HealthCheck.function_scoped_fixture])  # fmt: skip
@given(st.lists(st.tuples(st.integers(0, 10_000), st.binary(max_size=4)), min_size=1, max_size=4))
def test_corrupted_experiment_files_load_or_say_why(tmp_path, edits):
    """Byte-level corruption of a real experiment file (replace a few bytes anywhere, also
    with invalid UTF-8): it loads, or an ExperimentError names the file or the place."""
    data = bytearray(EXAMPLE.read_bytes())
    for position, junk in edits:
        at = position % (len(data) + 1)
        data[at : at + len(junk)] = junk
    path = tmp_path / "corrupted.toml"
    path.write_bytes(bytes(data))
    try:
        load_experiment(path)
    except ExperimentError as exc:
        assert exc.where in str(exc)
        assert "corrupted.toml" in str(exc) or exc.where.startswith(("element", "section", "["))


def test_low_disk_space_is_warned_once_while_the_run_goes_on(tmp_path, monkeypatch):
    """An open-ended run whose disk holds less than ten more minutes: one warning, the run
    goes on (it is stopped only when just its NWB file and a margin still fit)."""
    from clampcore import recorder

    usage = shutil.disk_usage(tmp_path)
    per_s = recorder.bytes_per_second(load_experiment(EXAMPLE))
    calls = []

    def fake_usage(path):
        calls.append(path)  # the start-up check sees plenty, the recorder 60 s worth
        return usage._replace(free=int(per_s * (3600 if len(calls) == 1 else 60)))

    monkeypatch.setattr(recorder.shutil, "disk_usage", fake_usage)
    engine = Engine(EXAMPLE, "sim", RunOptions(rig_clock="wall"), rig_factory=start_rig)
    engine.start(duration_s=None, out=tmp_path / "low.nwb")
    _wait_for_rows(engine, 5000)
    deadline = time.monotonic() + 30
    while not engine.status()["recording_warning"]:
        assert time.monotonic() < deadline, "no warning"
        time.sleep(0.1)
    warning = engine.status()["recording_warning"]
    assert "not enough for ten more minutes" in warning and "0 pA first" in warning
    assert engine.running  # the run goes on
    result = engine.finish()
    assert result.error is None and result.nwb_path is not None
