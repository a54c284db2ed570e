"""Tests of the tuning window (gui/), on the offscreen Qt platform and the simulated rig.

Outside references named beside the checks: the ohmic conductance current
I = -g (V - E) (Hodgkin & Huxley 1952, J Physiol 117:500, eq. 1 form; the
project's sign convention in DEVELOPERS.md) recomputed here from the recorded
V; numpy's own min/max and percentile on the raw data for the decimation and
the health figures; Python's ``tomllib`` (the standard library's TOML parser)
for the saved file; the simulated rig's ground-truth log (what the model cell
really received) for the frozen-window test.
"""

from __future__ import annotations

import os
import time
import tomllib

import numpy as np
import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before pytest-qt makes the app

from clampcore.gui.editor import parse_value, unit_of
from clampcore.gui.traces import PeakDecimator, SpikeTimes
from clampcore.gui.window import ZERO_SHORTCUT, TuningWindow
from clampcore.simulated_rig.groundtruth import LOG_FAULT_OUTPUT, NO_COMMAND, read_log
from guikit import LEAK_EXPERIMENT, RATE_HZ, ROOT
from guikit import make_window as _window
from guikit import start as _start
from guikit import stop as _stop
from guikit import wait_samples as _wait_samples
from guikit import written as _written
from PySide6 import QtCore, QtWidgets

from clampcore.experiment import ExperimentError, load_experiment
from clampcore.health import loop_health
from clampcore.hostloop import FLAG_ZEROED
from clampcore.schema import SECTION_FIELDS
from clampcore.shared import (
    CTRL_MAIL_WRITTEN,
    N_STATS,
    ST_LAT_HIST,
    ST_TURN_HIST,
    TURN_BIN_US,
)

pytestmark = pytest.mark.gui


# --------------------------------------------------------------------------- pure parts


def test_peak_decimation_keeps_every_peak():
    # Reference: numpy's min/max over each bin of the raw data, computed directly.
    rng = np.random.default_rng(5)
    data = rng.normal(size=(30_000, 2))
    data[20_345, 0] = 50.0  # a one-sample spike must survive decimation
    dec = PeakDecimator(2, window_samples=10_000, target_bins=100)
    pos = 777
    while pos < 25_000:
        n = int(rng.integers(1, 900))
        dec.append(pos, data[pos : pos + n])
        pos += n
    x, y = dec.envelope()
    b = dec.bin_samples
    assert b == 100
    starts = x[0::2]
    assert starts[0] <= pos - 10_000  # the whole window is covered
    for k, s in enumerate(starts):
        stop = min((s // b + 1) * b, pos)
        np.testing.assert_array_equal(y[:, 2 * k], data[s:stop].min(axis=0))
        np.testing.assert_array_equal(y[:, 2 * k + 1], data[s:stop].max(axis=0))
    assert y[0].max() == 50.0
    # A gap in the sample numbers starts afresh instead of joining unrelated data.
    dec.append(pos + 5, data[:10])
    x2, _ = dec.envelope()
    assert x2[0] == pos + 5


def test_spike_times_and_rate():
    spikes = SpikeTimes(2, keep_samples=40_000)
    flags = np.zeros((40_000, 2))
    flags[[100, 5000, 20_000, 39_999], 0] = 1.0
    flags[[7], 1] = 1.0
    spikes.append(0, flags, np.arange(40_000.0))
    assert spikes.samples(0).tolist() == [100, 5000, 20_000, 39_999]
    assert spikes.values().tolist() == [100.0, 5000.0, 20_000.0, 39_999.0]
    # Counted by hand: spikes in (39_999 - 20_000, 39_999] = {20_000, 39_999} -> 2 per second.
    rate = spikes.rate_hz(0, np.array([39_999]), 20_000, RATE_HZ)
    assert rate.tolist() == [2.0]
    spikes.append(40_000, np.zeros((30_000, 2)), np.zeros(30_000))
    assert spikes.samples(0).tolist() == [39_999]  # older ones fell out of the kept span


def test_parse_value_and_units():
    f = {x.name: x for x in SECTION_FIELDS["loop"]}
    assert parse_value(f["max_current_pA"], " 250 ") == 250.0
    assert parse_value(f["extra_delay_samples"], "3") == 3
    for bad_field, text in (("max_current_pA", "lots"), ("extra_delay_samples", "1.5")):
        with pytest.raises(ValueError):
            parse_value(f[bad_field], text)
    assert unit_of("g_nS") == "nS" and unit_of("gna_mS_per_cm2") == "mS/cm²"
    assert unit_of("electrode_MOhm") == "MΩ" and unit_of("kinetics") == ""


def test_loop_health_percentiles_match_numpy():
    # Reference: numpy.percentile (method "inverted_cdf") of the latencies themselves.
    rng = np.random.default_rng(3)
    latencies = rng.integers(0, 6, size=5000)
    stats = np.zeros(N_STATS)
    np.add.at(stats, ST_LAT_HIST + latencies, 1.0)
    turn_us = rng.uniform(0, 300, size=5000)
    np.add.at(stats, ST_TURN_HIST + (turn_us // TURN_BIN_US).astype(int), 1.0)
    h = loop_health(stats, RATE_HZ)
    assert h["latency_p50_samples"] == np.percentile(latencies, 50, method="inverted_cdf")
    assert h["latency_p99_samples"] == np.percentile(latencies, 99, method="inverted_cdf")
    assert h["latency_p99_us"] == h["latency_p99_samples"] * 50.0  # 1 sample = 50 µs at 20 kHz
    assert h["within_2_samples"] == pytest.approx(np.mean(latencies <= 2))
    # Binned: within one 5 µs bin of the exact percentile.
    assert abs(h["turnaround_p99_us"] - np.percentile(turn_us, 99)) <= TURN_BIN_US


def test_cli_has_the_gui_command(capsys):
    from clampcore.cli import main

    with pytest.raises(SystemExit) as stop:
        main(["gui", "--help"])
    assert stop.value.code == 0
    assert "--port" in capsys.readouterr().out


# --------------------------------------------------------------------------- editing, files


def test_save_then_load_gives_the_same_experiment(qtbot, tmp_path):
    window = _window(qtbot, tmp_path, ROOT / "examples" / "imposed_lif.toml")
    ed = window.editor
    assert ed.enter_text("imposed_spike", "threshold_mV", "-47.5") is None
    assert ed.enter_text("loop", "max_current_pA", "650") is None
    ed.widget("recurrent", "enabled").setChecked(False)  # a click on the checkbox
    ed.widget("recurrent", "kinetics").setCurrentText("exp")
    ed.widget("recurrent", "kinetics").activated.emit(1)
    ed.add_kind.setCurrentText("noise")
    ed.add_name.setText("background")
    qtbot.mouseClick(ed.add_button, QtCore.Qt.MouseButton.LeftButton)
    assert ed.enter_text("background", "g_sd_nS", "1.25") is None
    remove = ed.findChild(QtWidgets.QPushButton, "remove:drive")
    qtbot.mouseClick(remove, QtCore.Qt.MouseButton.LeftButton)

    path = tmp_path / "tuned.toml"
    assert window.save_file(path) is None
    # Reference: the standard library's TOML parser reads what the edits asked for.
    raw = tomllib.loads(path.read_text(encoding="utf-8"))
    by_name = {e["name"]: e for e in raw["element"]}
    assert list(by_name) == ["imposed_spike", "recurrent", "background"]
    assert by_name["imposed_spike"]["threshold_mV"] == -47.5
    assert by_name["recurrent"]["enabled"] is False
    assert by_name["recurrent"]["kinetics"] == "exp"
    assert by_name["background"]["kind"] == "noise" and by_name["background"]["g_sd_nS"] == 1.25
    assert raw["loop"]["max_current_pA"] == 650.0
    # The loader reads it back to the same experiment, and so does the window.
    assert load_experiment(path) == window.experiment
    original = window.experiment
    fresh = _window(qtbot, tmp_path, None)
    assert fresh.load_file(path) is None
    assert fresh.experiment == original
    assert fresh.editor.widget("background", "g_sd_nS").text() == "1.25"


def test_invalid_values_are_refused_and_shown(qtbot, tmp_path):
    window = _window(qtbot, tmp_path, ROOT / "examples" / "imposed_lif.toml")
    before = window.experiment.to_dict()
    ed = window.editor
    cases = [
        ("imposed_spike", "refractory_ms", "-1"),  # rule "positive"
        ("imposed_spike", "reset_mV", "-40"),  # must be below threshold_mV (-50)
        ("recurrent", "u_se", "1.5"),  # a fraction
        ("recurrent", "g_max_nS", "a lot"),  # not a number
    ]
    for element, field, text in cases:
        in_force = ed.widget(element, field).text()
        reason = ed.enter_text(element, field, text)
        assert reason, (element, field, text)
        assert ed.is_invalid(element, field)
        assert ed.widget(element, field).property("invalid") is True
        # The field snaps back to the value in force; the refused text is named with why.
        assert ed.widget(element, field).text() == in_force != text
        assert f"'{text}'" in ed.message.text() and reason in ed.message.text()
        # Reference: the experiment loader refuses the same value.
        if text != "a lot":
            changed = window.experiment.to_dict()
            next(e for e in changed["element"] if e["name"] == element)[field] = float(text)
            with pytest.raises(ExperimentError):
                load_experiment(changed)
    assert window.experiment.to_dict() == before
    # A good value clears the mark.
    assert ed.enter_text("imposed_spike", "refractory_ms", "3") is None
    assert not ed.is_invalid("imposed_spike", "refractory_ms")


# --------------------------------------------------------------------------- runs on the rig


def test_live_leak_change_reaches_the_recorded_current(qtbot, tmp_path):
    window = _window(qtbot, tmp_path, LEAK_EXPERIMENT)
    _start(qtbot, window)
    engine = window.engine
    mail_before = int(engine.shared.ctrl[CTRL_MAIL_WRITTEN])
    # An invalid value during the run: refused, shown, and nothing reaches the mailbox.
    assert window.editor.enter_text("extra_leak", "e_mV", "nan")
    assert window.editor.is_invalid("extra_leak", "e_mV")
    # Non-live fields are read-only while running.
    assert window.editor.widget("cell", "leak_nS").isReadOnly()
    assert int(engine.shared.ctrl[CTRL_MAIL_WRITTEN]) == mail_before
    # A structural change while running: kept for the next run, and the window says so.
    assert window.add_element("leak", "later_leak") is None
    assert "next" in window.editor.notice.text() and "later_leak" in window.editor.notice.text()
    assert [e["name"] for e in engine.experiment.elements] == ["extra_leak"]
    assert [e["name"] for e in window.experiment.elements] == ["extra_leak", "later_leak"]
    # The change, typed into the editor.
    edit = window.editor.widget("extra_leak", "g_nS")
    edit.selectAll()
    qtbot.keyClicks(edit, "6")
    qtbot.keyClick(edit, QtCore.Qt.Key.Key_Return)
    assert not window.editor.is_invalid("extra_leak", "g_nS")
    assert int(engine.shared.ctrl[CTRL_MAIL_WRITTEN]) == mail_before + 1
    qtbot.waitUntil(lambda: bool(engine.shared.applied_changes()), timeout=10_000)
    _wait_samples(qtbot, window, 2000)
    saved = tmp_path / "during_run.toml"
    assert window.save_file(saved) is None  # the live value is what gets saved
    rec = _stop(qtbot, window)

    assert load_experiment(saved).element("extra_leak")["g_nS"] == 6.0
    changes = [c for c in rec["param_changes"] if c["element"] == "extra_leak"]
    assert len(changes) == 1 and changes[0]["field"] == "g_nS" and changes[0]["new"] == 6.0
    s = int(changes[0]["sample"]) - rec["first_sample"]
    v = rec["columns"]["v_mV"]
    i = rec["columns"]["i_pA"]
    assert 1000 < s < v.size - 1000
    # Reference: I = -g (V - E) from the recorded V, with g before and after the change; the
    # recording holds the command as DAC counts sent: within half a DAC step.
    half = _half_dac_step_pA(rec)
    np.testing.assert_allclose(i[:s], -2.0 * (v[:s] + 40.0), rtol=0, atol=half)
    np.testing.assert_allclose(i[s:], -6.0 * (v[s:] + 40.0), rtol=0, atol=half)
    # And the current did change there (not just both formulas agreeing on nothing).
    assert i[s] > 2.5 * i[s - 1] > 0


def _half_dac_step_pA(rec: dict) -> float:
    """Half of one DAC count in pA, from the recording's calibration (rounding to counts)."""
    from clampcore.nwb_series import dac_to_pA

    step = np.diff(dac_to_pA(np.array([0, 1]), rec["calibration"]))[0]
    return float(abs(step)) / 2 * (1 + 1e-9)


def test_zero_current_control(qtbot, tmp_path):
    window = _window(qtbot, tmp_path, LEAK_EXPERIMENT)
    _start(qtbot, window)
    assert ZERO_SHORTCUT in window.zero_button.text()
    qtbot.keyClick(window, QtCore.Qt.Key.Key_Escape)  # the shortcut
    assert window.zero_held and window.zero_button.isChecked()
    engine = window.engine
    qtbot.waitUntil(lambda: engine.status()["zero_held"], timeout=5000)
    _wait_samples(qtbot, window, 1000)
    # The flag is in the ring while held.
    n = _written(window)
    assert int(engine.shared.read_rows(n - 1, n)[0, 3]) & FLAG_ZEROED
    qtbot.keyClick(window, QtCore.Qt.Key.Key_Escape)  # pressed again: still held
    assert window.zero_held
    qtbot.mouseClick(window.zero_button, QtCore.Qt.MouseButton.LeftButton)  # released
    assert not window.zero_held
    _wait_samples(qtbot, window, 1000)
    rec = _stop(qtbot, window)

    flags = rec["columns"]["flags"].astype(np.int64)
    held = (flags & FLAG_ZEROED) != 0
    i = rec["columns"]["i_pA"]
    v = rec["columns"]["v_mV"]
    assert held.sum() >= 1000
    edges = np.flatnonzero(np.diff(held.astype(int)))
    assert edges.size == 2  # one held stretch, then released
    half = _half_dac_step_pA(rec)  # the command is recorded as the DAC counts sent
    assert np.all(np.abs(i[held]) <= half)
    # Outside it, the leak's current (I = -g (V - E), 2 nS, -40 mV) is commanded again.
    np.testing.assert_allclose(i[~held], -2.0 * (v[~held] + 40.0), rtol=0, atol=half)
    assert np.all(i[~held] > 0)


def test_frozen_window_does_not_disturb_the_loop(qtbot, tmp_path):
    log = tmp_path / "rig.log"
    # A 200 ms watchdog: longer than the VM's own scheduling stalls (DEVELOPERS.md, Figures: ms
    # outliers; this is not a timing test), far shorter than the frozen second, so a
    # loop that waited for the window would trip it.
    window = _window(qtbot, tmp_path, LEAK_EXPERIMENT, clock="wall", rig_log=log, watchdog_ms=200.0)
    _start(qtbot, window, min_samples=int(0.5 * RATE_HZ))
    frozen: dict[str, int] = {}

    def freeze() -> None:
        frozen["from"] = _written(window)
        time.sleep(1.0)  # the GUI thread does nothing for a second
        frozen["to"] = _written(window)

    QtCore.QTimer.singleShot(0, freeze)
    qtbot.waitUntil(lambda: "to" in frozen, timeout=10_000)
    _wait_samples(qtbot, window, int(0.3 * RATE_HZ))
    rec = _stop(qtbot, window)

    counter = rec["columns"]["sample_counter"].astype(np.int64)
    a, b = frozen["from"], frozen["to"]
    # The recording has no gap from before the freeze to the end: one row per board
    # sample, counters contiguous. (The first moments of a run are the loop's business.)
    assert np.all(np.diff(counter[a - int(0.25 * RATE_HZ) :]) == 1)
    assert b - a > 0.5 * RATE_HZ  # the loop went on while the window slept
    truth = read_log(log).for_run(1)
    k = np.searchsorted(truth.counter, counter[a:b])
    assert np.array_equal(truth.counter[k], counter[a:b])  # the rig took every one of them
    applied = truth.records[k]
    # Ground truth: a host command was in force at every sample of that second...
    assert np.all(applied["cmd_seq"] != NO_COMMAND)
    assert not np.any(applied["flags"] & LOG_FAULT_OUTPUT)
    assert not truth.watchdog[k].any()
    assert not truth.events_of("watchdog_trip")
    # ...and none older than the watchdog timeout (200 ms = 4000 samples at 20 kHz).
    age = applied["counter"] - applied["cmd_answers"]
    assert age.max() < 0.200 * RATE_HZ


def test_connect_asks_the_board_who_it_is(qtbot, tmp_path):
    window = _window(qtbot, tmp_path, LEAK_EXPERIMENT)
    qtbot.mouseClick(window.connect_button, QtCore.Qt.MouseButton.LeftButton)
    assert window.state == "checking"
    qtbot.waitUntil(lambda: window.state != "checking", timeout=60_000)
    assert window.state == "connected" and window.state_label.text() == "CONNECTED"
    # The identity the simulated rig reports in its HELLO (simulated_rig/board.py).
    assert "clampcore-simrig" in window.state_detail.text()


def test_bad_port_is_reported_not_a_crash(qtbot, tmp_path):
    window = TuningWindow(LEAK_EXPERIMENT, port="/dev/no-such-board", record_dir=tmp_path)
    qtbot.addWidget(window)
    window.show()
    window.start_run()
    qtbot.waitUntil(lambda: window.state in ("failed", "stopped"), timeout=60_000)
    assert window.state == "failed"
    assert "no-such-board" in (window.last_error or "")
    # The window says so where the user looks: the banner, at fault level, naming the port.
    assert window.banner.isVisible() and window.banner.level == "fault"
    assert "no-such-board" in window.banner.label.text()
