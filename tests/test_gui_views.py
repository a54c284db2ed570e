"""The window's views (issue 15): pause, zoom and pan, axes on the data, the readout
strip and the limit banner.

References: the steady state of a passive membrane with an added leak, the
conductance-weighted mean of the reversal potentials
V = (g_cell E_rest + g E) / (g_cell + g) (Hodgkin & Huxley 1952, J Physiol 117:500,
the parallel-conductance form), and its current I = -g (V - E); numpy on the ring's
own rows for the axis ranges.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")

from guikit import LEAK_EXPERIMENT, RATE_HZ, make_window, start, stop, wait_samples
from PySide6 import QtCore

pytestmark = pytest.mark.gui


def test_pause_zoom_axes_readout_and_banner(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, LEAK_EXPERIMENT)
    traces = window.traces
    start(qtbot, window, min_samples=int(0.4 * RATE_HZ))
    window._tick()

    # The readout: steady state of 5 nS to -70 mV in parallel with 2 nS to -40 mV.
    g_cell, e_rest, g, e = 5.0, -70.0, 2.0, -40.0
    v_ss = (g_cell * e_rest + g * e) / (g_cell + g)  # -61.43 mV
    i_ss = -g * (v_ss - e)  # 42.9 pA
    wait_samples(qtbot, window, int(0.8 * RATE_HZ))  # more than the readout's 1 s in all
    for _ in range(20):
        window._tick()
    vm = float(traces.readout.labels["vm"].text().split()[1])
    command = float(traces.readout.labels["command"].text().split()[1])
    assert vm == pytest.approx(v_ss, abs=0.2)
    assert command == pytest.approx(i_ss, abs=1.0)
    assert "cell 0.0 Hz" in traces.readout.labels["rates"].text()  # a passive cell never fires
    assert "last 1 s" in traces.readout.labels["window"].text()  # the window is stated

    # Vm on the data: the -20 mV detection line (40 mV above) is not in the range.
    _x, y = traces.v_curve.getData()
    lo, hi = traces.p_v.vb.viewRange()[1]
    assert lo <= y.min() and y.max() <= hi and hi < -20.0
    assert hi - lo < 10.0  # not squashed: the trace spans a fair part of the axis
    # The command on the data (and 0), not on the ±2000 pA limit.
    lo, hi = traces.p_i.vb.viewRange()[1]
    assert hi < 2000.0 and lo > -2000.0

    # Pause: the run goes on, the drawing does not.
    qtbot.mouseClick(traces.pause_button, QtCore.Qt.MouseButton.LeftButton)
    assert traces.paused and traces.pause_button.text() == "Resume display"
    frozen = traces.v_curve.getData()[0].copy()
    wait_samples(qtbot, window, 4000)
    for _ in range(5):
        window._tick()
    assert np.array_equal(traces.v_curve.getData()[0], frozen)
    traces.set_paused(False)
    window._tick()
    assert traces.v_curve.getData()[0][-1] > frozen[-1]

    # Zoom by hand: the view stays where it was put until Reset view.
    traces.p_v.vb.scaleBy((0.5, 0.5))  # as a wheel turn does
    traces.p_v.vb.sigRangeChangedManually.emit([True, True])
    assert not traces.follow
    zoomed = traces.p_v.vb.viewRange()[0]
    wait_samples(qtbot, window, 2000)
    window._tick()
    assert traces.p_v.vb.viewRange()[0] == zoomed
    traces.reset_button.click()
    window._tick()
    assert traces.follow and traces.p_v.vb.viewRange()[0][1] > zoomed[1]

    # The limit reached: the banner says how much of the run and by how much.
    assert window.editor.enter_text("extra_leak", "e_mV", "0") is None
    assert window.editor.enter_text("extra_leak", "g_nS", "100") is None
    qtbot.waitUntil(lambda: window.engine.status()["limited"] > 0, timeout=10_000)
    wait_samples(qtbot, window, 200)
    window._tick()
    text = window.banner.label.text()
    assert "CURRENT LIMIT" in text and "% of the run" in text and "beyond it" in text
    stop(qtbot, window)


def test_test_pulse_gives_the_input_resistance(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, LEAK_EXPERIMENT)
    readout = window.traces.readout
    readout.pulse_box.click()  # switched on before Start: added to the experiment
    pulse = window.experiment.element("test_pulse")
    assert pulse["kind"] == "current" and pulse["enabled"]
    assert window.editor.is_shown("test_pulse", "amplitude_pA")  # in the form like any element
    start(qtbot, window, min_samples=int(1.3 * RATE_HZ))  # a whole pulse and its baseline
    for _ in range(16):
        window._tick()
    # Reference: Ohm's law with the conductances in parallel, R = 1 / (5 nS + 2 nS);
    # 1/nS = 1 GOhm = 1000 MOhm.
    expected = 1000.0 / (5.0 + 2.0)  # 142.9 MOhm
    r = float(readout.labels["rin"].text().split()[1])
    assert r == pytest.approx(expected, rel=0.03)
    assert "-20 pA for 100 ms every 1 s" in readout.labels["rin"].toolTip()
    readout.pulse_box.click()  # off, live
    assert not window.experiment.element("test_pulse")["enabled"]
    wait_samples(qtbot, window, 2000)
    rec = stop(qtbot, window)
    # Size and period are recorded with the run (the experiment in the NWB file).
    assert "test_pulse" in rec["experiment_text"] and "amplitude_pA = -20" in rec["experiment_text"]
    off = [c for c in rec["param_changes"] if c["element"] == "test_pulse"]
    assert [(c["field"], c["new"]) for c in off] == [("enabled", 0.0)]
