"""The window's hazards (issue 15): safety controls always in reach, no surprise values.

Each test drives the window as a hand would (keys, clicks, dialogs) on the offscreen Qt
platform and the simulated rig, and checks what reached the loop: its control words
and mailbox (clampcore.shared) and the recording it wrote. Outside references named
beside the checks: the current range of the simulated board's 16-bit ±10 V DAC times
the amplifier's 400 pA/V (arithmetic, from the converter's definition in PROTOCOL.md),
and the ohmic current I = -g (V - E) (Hodgkin & Huxley 1952, J Physiol 117:500).
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")

from guikit import LEAK_EXPERIMENT, ROOT, make_window, start, stop, wait_samples, written
from PySide6 import QtCore, QtWidgets
from PySide6.QtTest import QTest

from clampcore.experiment import ExperimentError
from clampcore.hostloop import FLAG_ZEROED
from clampcore.program import build_program, check_live_change
from clampcore.shared import CTRL_MAIL_WRITTEN, CTRL_ZERO

pytestmark = pytest.mark.gui

# The simulated board's DAC spans ±10 V (DEFAULT_BOARD_DAC); the amplifier passes
# 400 pA/V (LEAK_EXPERIMENT): ±10 V x 400 pA/V = ±4000 pA is all it can command.
BOARD_LIMIT_PA = 10.0 * 400.0


def _mail(window) -> int:
    return int(window.engine.shared.ctrl[CTRL_MAIL_WRITTEN])


def test_live_limit_obeys_the_start_rule():
    # Without a running board (offline programs) only the field's own rule applies...
    program = build_program(LEAK_EXPERIMENT)
    assert check_live_change(program, "loop", "max_current_pA", 1e5) == 1e5
    # ...with one, the same rule as Start (clampcore.calibration.range_limit_problem).
    board = (-BOARD_LIMIT_PA, BOARD_LIMIT_PA)
    assert check_live_change(program, "loop", "max_current_pA", 3999.0, board) == 3999.0
    with pytest.raises(ExperimentError, match=r"-4000\.\.4000 pA.*cannot represent"):
        check_live_change(program, "loop", "max_current_pA", 4001.0, board)


def test_running_edits_limit_focus_undo_and_remove(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, LEAK_EXPERIMENT)
    start(qtbot, window)
    ed = window.editor
    engine = window.engine
    assert engine.shared.current_range_pA() == pytest.approx((-BOARD_LIMIT_PA, BOARD_LIMIT_PA))

    # 1. A limit beyond what board and amplifier represent: refused with the reason.
    mail = _mail(window)
    reason = ed.enter_text("loop", "max_current_pA", "100000")
    assert reason and "cannot represent" in reason and "4000" in reason
    assert ed.widget("loop", "max_current_pA").text() == "2000"  # snapped back
    assert _mail(window) == mail  # nothing reached the loop
    assert window.experiment.loop["max_current_pA"] == 2000.0
    assert ed.enter_text("loop", "max_current_pA", "3000") is None  # within range: sent
    assert _mail(window) == mail + 1

    # 2. Typing without Enter, then leaving the field: nothing applied, value put back.
    window.activateWindow()
    g_edit = ed.widget("extra_leak", "g_nS")
    e_edit = ed.widget("extra_leak", "e_mV")
    g_edit.setFocus()
    qtbot.waitUntil(g_edit.hasFocus, timeout=2000)
    g_edit.selectAll()
    qtbot.keyClicks(g_edit, "4")
    mail = _mail(window)
    e_edit.setFocus()  # focus moves on
    qtbot.waitUntil(e_edit.hasFocus, timeout=2000)
    assert _mail(window) == mail
    assert g_edit.text() == "2"
    assert "Not applied" in ed.message.text() and "'4'" in ed.message.text()

    # 3. Enter applies; undo brings old text back; leaving then applies nothing.
    g_edit.setFocus()
    qtbot.waitUntil(g_edit.hasFocus, timeout=2000)
    g_edit.selectAll()
    qtbot.keyClicks(g_edit, "6")
    qtbot.keyClick(g_edit, QtCore.Qt.Key.Key_Return)
    assert _mail(window) == mail + 1
    qtbot.keyClick(g_edit, QtCore.Qt.Key.Key_Z, QtCore.Qt.KeyboardModifier.ControlModifier)
    assert g_edit.text() != "6"  # the undo did something
    e_edit.setFocus()
    qtbot.waitUntil(e_edit.hasFocus, timeout=2000)
    assert _mail(window) == mail + 1  # still only the Enter
    assert g_edit.text() == "6"  # what the loop holds
    wait_samples(qtbot, window, 2000)

    # 4. Removing a running element asks first, says what happens, switches it off now.
    mail = _mail(window)
    window.request_remove("extra_leak")
    assert window.question is not None
    text = window.question.informativeText()
    assert "switched off now" in text and "next run" in text
    window.answer(False)  # cancelled: nothing happens
    assert window.experiment.element("extra_leak") and _mail(window) == mail
    qtbot.mouseClick(
        ed.findChild(QtWidgets.QPushButton, "remove:extra_leak"), QtCore.Qt.MouseButton.LeftButton
    )
    assert window.question is not None
    window.answer(True)
    assert _mail(window) == mail + 1
    assert [e["name"] for e in window.experiment.elements] == []
    wait_samples(qtbot, window, 2000)
    rec = stop(qtbot, window)

    changes = [(c["element"], c["field"], c["new"]) for c in rec["param_changes"]]
    assert changes == [
        ("loop", "max_current_pA", 3000.0),
        ("extra_leak", "g_nS", 6.0),
        ("extra_leak", "enabled", 0.0),
    ]
    by_field = {c["field"]: int(c["sample"]) - rec["first_sample"] for c in rec["param_changes"]}
    v, i = rec["columns"]["v_mV"], rec["columns"]["i_pA"]
    g, off = by_field["g_nS"], by_field["enabled"]
    # Reference: I = -g (V - E) with g = 6 nS, E = -40 mV between the change and the removal...
    # The recording holds the DAC count sent: within half a step of 400 pA/V over 16 bits
    # and 20 V (PROTOCOL.md §6).
    half_step = 400.0 * 20.0 / 65535 / 2 + 1e-9
    np.testing.assert_allclose(i[g:off], -6.0 * (v[g:off] + 40.0), rtol=0, atol=half_step)
    # ...and nothing from the element once it was switched off.
    assert np.all(np.abs(i[off:]) <= half_step)


def test_zero_current_reaches_the_loop_from_any_state(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, LEAK_EXPERIMENT)
    start(qtbot, window)
    ctrl = window.engine.shared.ctrl

    # 1. A modal dialog of any origin is open: Esc still holds 0 pA before it closes.
    seen: dict[str, object] = {}

    def press_in_modal() -> None:
        modal = QtWidgets.QApplication.activeModalWidget()
        seen["modal"] = modal is not None
        QTest.keyClick(modal, QtCore.Qt.Key.Key_Escape)
        seen["ctrl"] = int(ctrl[CTRL_ZERO])
        if modal.isVisible():
            modal.done(0)

    box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Icon.Information, "modal", "a modal box")
    QtCore.QTimer.singleShot(50, press_in_modal)
    box.exec()
    assert seen == {"modal": True, "ctrl": 1}
    assert window.zero_held
    window.set_zero_current(False)
    assert int(ctrl[CTRL_ZERO]) == 0

    # 2. A menu is open: Esc holds 0 pA (and closes the menu).
    menu = window.menuBar().actions()[0].menu()
    menu.popup(window.mapToGlobal(QtCore.QPoint(20, 20)))
    qtbot.waitUntil(menu.isVisible, timeout=2000)
    QTest.keyClick(menu, QtCore.Qt.Key.Key_Escape)
    assert int(ctrl[CTRL_ZERO]) == 1
    window.set_zero_current(False)

    # 3. Esc typed in a text field: held, and the field's text is untouched.
    edit = window.editor.widget("extra_leak", "g_nS")
    QTest.keyClick(edit, QtCore.Qt.Key.Key_Escape)
    assert int(ctrl[CTRL_ZERO]) == 1 and edit.text() == "2"
    window.set_zero_current(False)

    # 4. The window's own dialogs during a run (Ctrl+O) do not block the button.
    open_action = window.menuBar().actions()[0].menu().actions()[0]
    open_action.trigger()
    assert window.dialog is not None and window.dialog.isVisible()
    assert QtWidgets.QApplication.activeModalWidget() is None
    qtbot.mouseClick(window.zero_button, QtCore.Qt.MouseButton.LeftButton)
    assert int(ctrl[CTRL_ZERO]) == 1 and window.zero_held
    # Within one redraw the loop has taken a sample held at 0 pA.
    before = written(window)
    window._tick()
    wait_samples(qtbot, window, 10)
    rows = window.engine.shared.read_rows(before + 1, written(window))
    assert np.all(rows[:, 3].astype(np.int64) & FLAG_ZEROED) and np.all(rows[:, 2] == 0.0)
    window.dialog.close()
    stop(qtbot, window)


def test_quit_during_a_run_asks_and_says_what_happens(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, LEAK_EXPERIMENT)
    start(qtbot, window)
    nwb = window.engine.nwb_path
    window.activateWindow()
    qtbot.keyClick(window, QtCore.Qt.Key.Key_Q, QtCore.Qt.KeyboardModifier.ControlModifier)
    if window.question is None:  # the platform gave no key focus: the menu entry instead
        window.menuBar().actions()[0].menu().actions()[-1].trigger()
    assert window.question is not None
    text = window.question.informativeText()
    assert "0 pA" in text and str(nwb) in text
    window.answer(False)
    assert window.isVisible() and window.running
    window.request_quit()  # asked again, and confirmed: the run is stopped and written
    window.answer(True)
    assert not window.isVisible() and not window.running
    assert window.result is not None and window.result.nwb_path == nwb and nwb.exists()


def test_open_during_a_run_or_with_edits_asks(qtbot, tmp_path):
    other = ROOT / "examples" / "imposed_lif.toml"
    window = make_window(qtbot, tmp_path, LEAK_EXPERIMENT)
    start(qtbot, window)
    nwb = window.engine.nwb_path
    window.request_open(other)
    assert window.question is not None
    assert "stopped" in window.question.informativeText()
    assert str(nwb) in window.question.informativeText()
    window.answer(True)
    qtbot.waitUntil(lambda: window.experiment_path == other, timeout=60_000)
    assert nwb.exists() and window.state == "stopped"
    assert (
        window.traces.v_curve.getData()[0] is None or window.traces.v_curve.getData()[0].size == 0
    )
    assert not window.banner.isVisible()
    # Unsaved edits: asked too, and a refusal keeps them.
    assert window.editor.enter_text("imposed_spike", "threshold_mV", "-47") is None
    window.request_open(ROOT / "examples" / "hybrid_pair.toml")
    assert "Unsaved edits" in window.question.informativeText()
    window.answer(False)
    assert window.experiment.element("imposed_spike")["threshold_mV"] == -47.0


def test_law_mode_rules_of_the_board_change_live_and_zero_still_works(qtbot, tmp_path):
    experiment = {**LEAK_EXPERIMENT, "loop": {**LEAK_EXPERIMENT["loop"], "mode": "law"}}
    window = make_window(qtbot, tmp_path, experiment)
    start(qtbot, window)
    ed = window.editor
    # The board applies the current limit itself in law mode (PROTOCOL.md §10): a live
    # change reaches it as RULES_AT (§10.4), so the form lets it be edited like a law's.
    limit = ed.widget("loop", "max_current_pA")
    assert not limit.isReadOnly() and not ed.widget("extra_leak", "g_nS").isReadOnly()
    # Before: the leak's own current, I = -g (V - E) at the passive steady state
    # V = (5 nS x -70 mV + 2 nS x -40 mV) / 7 nS = -61.4 mV: 42.9 pA, well above 20 pA.
    changed = written(window)
    mail = _mail(window)
    assert ed.enter_text("loop", "max_current_pA", "20") is None
    assert _mail(window) == mail + 1 and window.engine.experiment.loop["max_current_pA"] == 20
    wait_samples(qtbot, window, 4000)
    esc = written(window)  # the zero request acts at the board on arrival: from here on
    # Esc holds 0 pA in law mode too (the loop turns it into the board's zero request).
    QTest.keyClick(ed.widget("extra_leak", "g_nS"), QtCore.Qt.Key.Key_Escape)
    assert window.zero_held and int(window.engine.shared.ctrl[CTRL_ZERO]) == 1
    before = written(window)
    wait_samples(qtbot, window, 4000)
    rec = stop(qtbot, window)
    i = rec["columns"]["i_pA"]
    assert i.size > before + 3000
    # What the board applied, to the nearest DAC step (16 bits over 20 V at 400 pA/V).
    half_step_pA = 400.0 * 20.0 / 65535 / 2
    assert np.all(i[changed - 1000 : changed] > 40.0)  # the leak's 42.9 pA, unclipped
    # From the change on (after the look-ahead of 10 ms = 200 samples): clipped to 20 pA.
    clipped = i[changed + 1000 : esc]
    assert clipped.size > 2000 and np.all(np.abs(clipped - 20.0) <= half_step_pA + 1e-9)
    assert np.all(np.abs(i[before + 2000 :]) <= half_step_pA + 1e-12)
