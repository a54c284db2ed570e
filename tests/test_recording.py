"""Recordings end to end: compact NWB from a lockstep run, one copy, recover, `show`.

Outside references, named beside each check: the simulated rig's ground-truth log
(the ADC and DAC counts the board really exchanged), the NWB specification's rule
"value = data x conversion + offset" read with h5py only, pynwb's validator and
nwbinspector (their returned lists), and the recording committed in
``tests/fixtures`` by the first NWB layout.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import NO_COMMAND, read_log

import clampcore
from clampcore.cli import main
from clampcore.engine import Engine, RunOptions
from clampcore.journal import read_journal
from clampcore.nwb import convert_journal, read_nwb_summary, validate_nwb

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
FIXTURES = Path(__file__).resolve().parent / "fixtures"


def _inspector_problems(path: Path) -> list[str]:
    """nwbinspector messages at BEST_PRACTICE_VIOLATION or worse (its returned list)."""
    from nwbinspector import Importance, inspect_nwbfile

    return [
        f"{m.importance.name} {m.check_function_name}: {m.message[:200]}"
        for m in inspect_nwbfile(nwbfile_path=str(path))
        if m.importance.value >= Importance.BEST_PRACTICE_VIOLATION.value
    ]


@pytest.fixture(scope="module")
def lockstep_run(tmp_path_factory):
    """A 0.3 s lockstep run of the slice example on the simulated rig, journal kept."""
    tmp = tmp_path_factory.mktemp("lockstep")
    log = tmp / "rig.log"
    options = RunOptions(rig_clock="lockstep", seed=2, rig_log=log, keep_journal=True)
    engine = Engine(EXAMPLES / "slice_background.toml", "sim", options, rig_factory=start_rig)
    engine.start(duration_s=0.3, out=tmp / "run.nwb")
    assert engine.wait(120), "the run did not end"
    result = engine.finish()
    assert result.error is None, result.error
    return result, read_log(log).for_run(1)


def test_counts_equal_the_rigs_ground_truth(lockstep_run):
    result, truth = lockstep_run
    with h5py.File(result.nwb_path, "r") as f:
        v = f["acquisition/membrane_potential/data"]
        i = f["stimulus/presentation/command_current/data"]
        assert v.dtype == np.uint16 and i.dtype == np.uint16  # counts, as integers
        assert v.compression == "gzip" and v.shuffle and v.chunks is not None
        v_counts, i_counts = v[:], i[:]
        timing = f["processing/loop_timing"]
        for name in ("flags", "board_status", "latency_samples"):  # smallest integer type
            assert timing[name]["data"].dtype == np.uint8, name
        assert "sample_counter" not in timing  # no gaps in lockstep: nothing stored
        assert "sample_counter_gaps" not in timing
        assert "current_background_exc" not in f["processing/virtual_conductances"]  # derived
    back = read_nwb_summary(result.nwb_path)
    counter = back["columns"]["sample_counter"].astype(np.int64)
    # Reference: the rig's ground-truth log, the ADC count it sent for each sample counter.
    adc_by_counter = dict(zip(truth.counter.tolist(), truth.adc_counts.tolist(), strict=True))
    np.testing.assert_array_equal(v_counts, [adc_by_counter[c] for c in counter])
    # The DAC count applied by the rig for the command that answered host sample k.
    applied = truth.cmd_seq != NO_COMMAND
    dac_by_answer = dict(
        zip(truth.cmd_answers[applied].tolist(), truth.dac_counts[applied].tolist(), strict=True)
    )
    answered = [k for k, c in enumerate(counter) if c in dac_by_answer]
    assert len(answered) >= counter.size - 2  # the last command(s) may not have been applied
    np.testing.assert_array_equal(i_counts[answered], [dac_by_answer[c] for c in counter[answered]])


def test_conversion_and_offset_give_v_and_i_to_rounding(lockstep_run):
    result, truth = lockstep_run
    journal = read_journal(result.journal_path)
    with h5py.File(result.nwb_path, "r") as f:  # h5py only: the NWB attributes as stored
        v = f["acquisition/membrane_potential/data"]
        v_offset = v.attrs["offset"]
        v_V = v[:] * v.attrs["conversion"] + v_offset
        assert v.attrs["unit"] == "volts"
        i = f["stimulus/presentation/command_current/data"]
        i_offset = i.attrs["offset"]
        i_A = i[:] * i.attrs["conversion"] + i_offset
        assert i.attrs["unit"] == "amperes"
    # NWB specification (TimeSeries.data): value = data x conversion + offset. One ulp of V
    # itself is out of reach for any (conversion, offset) in float64: the loop's own
    # counts -> mV subtracts the converter's full-scale end (-10 V), so its result carries a
    # rounding of the order of one ulp of that term (up to 62 ulp of V, measured over all
    # 65536 counts). The bound is therefore in ulps of the offset, the full-scale term:
    # 2 for V (x 1e-3 adds one rounding), 4 for I (the offset is -4000 pA, x 1e-12).
    np.testing.assert_allclose(
        v_V, journal.columns["v_mV"] * 1e-3, rtol=0, atol=2 * np.spacing(abs(v_offset))
    )
    # The run's I: the current the rig applied (ground-truth log), per answered sample.
    applied = truth.cmd_seq != NO_COMMAND
    by_answer = dict(
        zip(truth.cmd_answers[applied].tolist(), truth.i_applied_pA[applied].tolist(), strict=True)
    )
    counter = journal.columns["sample_counter"].astype(np.int64)
    rows = [k for k, c in enumerate(counter) if c in by_answer]
    expected_A = np.array([by_answer[c] for c in counter[rows]]) * 1e-12
    np.testing.assert_allclose(i_A[rows], expected_A, rtol=0, atol=4 * np.spacing(abs(i_offset)))
    # read_nwb_summary (the project's reader) gives the journal's V bit for bit.
    np.testing.assert_array_equal(
        read_nwb_summary(result.nwb_path)["v_mV"], journal.columns["v_mV"]
    )


def test_run_simulate_recover_pass_validator_and_inspector(lockstep_run, tmp_path):
    result, _ = lockstep_run
    sim = clampcore.simulate(EXAMPLES / "slice_background.toml", 0.2, seed=1).save(
        tmp_path / "sim.nwb"
    )
    recovered, removed = convert_journal(
        result.journal_path, tmp_path / "recovered.nwb", keep_journal=True
    )
    assert not removed
    for path in (result.nwb_path, sim, recovered):
        assert validate_nwb(path) == [], path  # reference: pynwb's validator
        assert _inspector_problems(path) == [], path  # reference: nwbinspector


def test_one_copy_journal_removed_only_after_a_check(tmp_path, monkeypatch):
    result, _ = None, None
    engine = Engine(
        EXAMPLES / "imposed_lif.toml",
        "sim",
        RunOptions(rig_clock="lockstep"),
        rig_factory=start_rig,
    )
    engine.start(duration_s=0.05, out=tmp_path / "a.nwb")
    engine.wait(120)
    result = engine.finish()
    assert result.nwb_path.exists() and not result.journal_path.exists()
    # A failed check keeps both files and says so.
    import clampcore.nwb as nwb

    monkeypatch.setattr(nwb, "check_against_journal", lambda path, data: ["forced mismatch"])
    engine = Engine(
        EXAMPLES / "imposed_lif.toml",
        "sim",
        RunOptions(rig_clock="lockstep"),
        rig_factory=start_rig,
    )
    engine.start(duration_s=0.05, out=tmp_path / "b.nwb")
    engine.wait(120)
    result = engine.finish()  # no exception: the run's result says it (issue #11)
    assert result.nwb_path is None and "kept both" in result.error
    assert "clampcore recover" in result.error
    assert (tmp_path / "b.nwb").exists() and (tmp_path / "b.journal").is_dir()


@pytest.mark.slow
def test_recover_after_sigkill_is_compact_and_complete(tmp_path):
    """SIGKILL of `clampcore run --port sim`: recover yields every sample the journal had
    received (its raw rows, read with numpy) in the compact format."""
    out = tmp_path / "crash.nwb"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    host = subprocess.Popen(
        [sys.executable, "-m", "clampcore", "run", str(EXAMPLES / "imposed_lif.toml"),
         "--port", "sim", "--out", str(out)],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )  # fmt: skip
    journal = out.with_suffix(".journal")
    samples = journal / "samples.f64"
    deadline = time.monotonic() + 90
    while not samples.exists() or samples.stat().st_size < 1_000_000:
        assert host.poll() is None and time.monotonic() < deadline, "the journal did not grow"
        time.sleep(0.05)
    host.send_signal(signal.SIGKILL)
    host.wait()
    time.sleep(0.5)
    assert main(["recover", str(journal), "--keep-journal"]) == 0
    back = read_nwb_summary(out)
    columns = read_journal(journal).meta  # the journal's header: its column names
    names = list(read_journal(journal).columns)
    raw = np.fromfile(samples, dtype="<f8")
    rows = raw[: raw.size // len(names) * len(names)].reshape(-1, len(names))
    assert back["n_samples"] == rows.shape[0] and columns["source"] == "simulated rig"
    np.testing.assert_array_equal(back["v_mV"], rows[:, names.index("v_mV")])
    assert back["storage"]["v_mV"]["encoding"] == "adc_counts"
    assert back["storage"]["i_pA"]["encoding"] == "dac_counts"
    # The board's HELLO reached the journal's header before the first sample (the run was
    # killed: final.json, which also has it, was never written).
    assert not (journal / "final.json").exists()
    assert back["calibration"].origin == "the board's HELLO message"
    assert validate_nwb(out) == []  # reference: pynwb's validator
    assert _inspector_problems(out) == []  # reference: nwbinspector


@pytest.mark.parametrize("name", ["v1_run_imposed_lif.nwb", "v1_simulate_imposed_lif.nwb"])
def test_show_reads_the_first_layout(name, tmp_path, capsys):
    png = tmp_path / "fig.png"
    assert main(["show", str(FIXTURES / name), "--out", str(png)]) == 0
    text = capsys.readouterr().out
    back = read_nwb_summary(FIXTURES / name)
    n_spikes = len(back["spike_times_s"]["cell"])
    # The fixture's own record: spikes counted from the fixture's spike table via pynwb.
    assert f"spikes cell: {n_spikes} " in text and n_spikes > 0
    assert f"({back['n_samples']} samples)" in text
    assert png.stat().st_size > 10_000 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_show_a_slice_of_a_new_recording(tmp_path, capsys):
    rec = clampcore.simulate(EXAMPLES / "slice_background.toml", 1.0, seed=1)
    path = rec.save(tmp_path / "new.nwb")
    assert main(["show", str(path), "--from", "0.25", "--to", "0.75"]) == 0
    text = capsys.readouterr().out
    expected = int(np.count_nonzero((rec.spike_times_s >= 0.25) & (rec.spike_times_s < 0.75)))
    assert f"spikes cell: {expected} ({expected / 0.5:.2f} Hz)" in text  # the simulation's own
    assert (tmp_path / "new.png").exists()
    assert main(["show", str(path), "--from", "2", "--to", "3"]) == 1  # outside: one-line error
    assert "outside the recording" in capsys.readouterr().err


def test_long_traces_keep_every_sample_in_their_envelope():
    """The figure draws long traces as min/max per bin: every sample, up to the last, is
    inside (reference: the trace's own extremes and its last time)."""
    from clampcore.plot import _trace

    class Axis:
        def fill_between(self, t, lo, hi, **kw):
            self.t, self.lo, self.hi = t, lo, hi

    rate = 10_000.0
    y = np.random.default_rng(0).normal(size=10_001)  # 1 s + 1 sample: bins do not divide it
    y[-1] = 50.0  # a spike on the very last sample
    t = np.arange(y.size) / rate
    ax = Axis()
    _trace(ax, t, y)
    assert ax.hi.max() == 50.0 and ax.lo.min() == y.min()
    assert ax.t[-1] <= t[-1] and t[-1] - ax.t[-1] < y.size / 4000 / rate


def test_compact_bytes_per_row_bounds_the_file(tmp_path):
    """compact_bytes_per_row is an upper bound of what a second of recording adds to the file
    (reference: the files' sizes on disk, at the margin between 1 s and 2 s)."""
    from clampcore.nwb import compact_bytes_per_row

    rec = clampcore.simulate(EXAMPLES / "slice_background.toml", 2.0, seed=1)
    sizes = []
    for seconds in (1.0, 2.0):
        part = clampcore.simulate(EXAMPLES / "slice_background.toml", seconds, seed=1)
        sizes.append(part.save(tmp_path / f"{seconds}.nwb").stat().st_size)
    rows = rec.v_mV.size // 2
    bound = compact_bytes_per_row(list(rec.columns()))
    assert bound == 2 + 2 + 4 * 5 + 4 * 5  # V, I counts; 5 conductances, 5 currents float32
    assert (sizes[1] - sizes[0]) / rows <= bound


def test_counter_gaps_and_small_integers_worked_examples():
    from clampcore.nwb_series import counter_gaps, from_uint, rebuild_counter, smallest_uint

    # Worked example: counter 10, 11, 14, 15, 20 lost 2 samples before row 2, 4 before row 4.
    counter = np.array([10, 11, 14, 15, 20], dtype=np.float64)
    first, rows, missing = counter_gaps(counter)
    assert (first, rows.tolist(), missing.tolist()) == (10, [2, 4], [2, 4])
    np.testing.assert_array_equal(rebuild_counter(first, 5, rows, missing), counter)
    assert counter_gaps(np.array([3.0, 3.0])) is None  # not increasing: stored as a series
    # Reference for the limits: numpy's iinfo (uint8 holds 0..255).
    latency = np.array([1, 2, np.nan, 254])
    data, unknown = smallest_uint(latency)
    assert data.dtype == np.uint8 and unknown == np.iinfo(np.uint8).max
    np.testing.assert_array_equal(from_uint(data, unknown), latency)
    data, unknown = smallest_uint(np.array([0, 255, np.nan]))  # 255 taken: the next type
    assert data.dtype == np.uint16 and unknown == np.iinfo(np.uint16).max
    assert smallest_uint(np.array([0.5])) is None and smallest_uint(np.array([-1.0])) is None


def test_show_counts_law_mode_samples_without_a_young_law(tmp_path):
    """A law-mode sample the board served with 0 pA for want of a young law (PROTOCOL.md §10,
    recorded as the ring's FLAG_STALE bit) is counted in the summary, within the slice."""
    from clampcore.lawloop import FLAG_STALE
    from clampcore.show import summary_text

    rec = clampcore.simulate(EXAMPLES / "slice_background.toml", 0.2, seed=1)
    summary = read_nwb_summary(rec.save(tmp_path / "law.nwb"))
    # A run's recording has a flags column (an offline one has none): the same, all clear.
    flags = summary["columns"].setdefault("flags", np.zeros(summary["n_samples"]))
    assert "without a young law" not in summary_text(summary, 0.0, 0.2)
    flags[100:130] = FLAG_STALE  # 30 stale samples, at 5-6.5 ms at 20 kHz
    flags[3000] = FLAG_STALE  # one outside the slice below
    rate = float(summary["rate_hz"])
    assert "without a young law (0 pA): 31" in summary_text(summary, 0.0, 0.2)
    assert "without a young law (0 pA): 30" in summary_text(summary, 0.0, 2000 / rate)
