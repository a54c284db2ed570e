"""The window's loop-stability guard (issue 14): the bound shown, the warning above half of
it, Start and live changes beyond it refused, and an override logged in the recording.

Outside references, beside the checks: for a delay of one sample the sampled loop is
x[n+1] = (r − q)·x[n] (clampcore/stability.py's model), stable iff |r − q| < 1, which
gives g < (1 + r)·g_cell/(1 − r) ≈ 2C/dt (Levin & May 1976 with k = 0: a < 2); for two
samples x[n+1] = r·x[n] − q·x[n−1], whose polynomial z² − r·z + q is stable iff q < 1 and
r < 1 + q (Jury's criterion for a second-order polynomial, Jury 1964), i.e.
g < g_cell/(1 − r) ≈ C/dt (Levin & May with k = 1: a < 2·cos(π/3) = 1).
"""

from __future__ import annotations

import copy
import math

import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")

from guikit import RATE_HZ, ROOT, make_window, start, stop, wait_samples

from clampcore.shared import CTRL_MAIL_WRITTEN

pytestmark = pytest.mark.gui

C_PF, G_CELL_NS = 100.0, 5.0
DT_MS = 1000.0 / RATE_HZ
R = math.exp(-G_CELL_NS * DT_MS / C_PF)  # the passive membrane's decay over one sample
BOUND_D1_NS = (1.0 + R) * G_CELL_NS / (1.0 - R)  # |r - q| < 1 (module docstring)
BOUND_D2_NS = G_CELL_NS / (1.0 - R)  # Jury: q < 1 (module docstring)

# A passive cell without noise and one virtual leak at the resting potential: however
# large the leak, it injects nothing at rest.
EXPERIMENT = {
    "loop": {"rate_hz": RATE_HZ, "max_current_pA": 2000.0},
    "cell": {"model": "passive", "capacitance_pF": C_PF, "leak_nS": G_CELL_NS, "rest_mV": -70.0},
    "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},
    "element": [{"kind": "leak", "name": "extra_leak", "g_nS": 2.0, "e_mV": -70.0}],
}


def _with_leak(g_nS: float) -> dict:
    exp = copy.deepcopy(EXPERIMENT)
    exp["element"][0]["g_nS"] = g_nS
    return exp


def test_the_closed_forms_are_the_textbook_bounds():
    # Levin & May (1976): a < 2 for k = 0 and a < 1 for k = 1, with a = g·dt/C; the cell's
    # own 5 nS leak moves each bound by well under 1%.
    levin_may_k0, levin_may_k1 = 2.0 * C_PF / DT_MS, 1.0 * C_PF / DT_MS
    assert levin_may_k0 == pytest.approx(BOUND_D1_NS, rel=1e-2)
    assert levin_may_k1 == pytest.approx(BOUND_D2_NS, rel=1e-2)


def test_the_line_shows_the_bound_warns_and_start_is_refused(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, EXPERIMENT)
    line, ed = window.stability_line, window.editor
    # The simulated rig: one sample of delay.
    assert line.report.delay_samples == 1
    assert line.report.g_stable_max_nS == pytest.approx(BOUND_D1_NS, rel=1e-9)
    assert f"{BOUND_D1_NS:.4g} nS" in line.text() and "this experiment: 2 nS" in line.text()
    assert line.level == "ok"

    # Above half of it: the warning state (edits while stopped are kept for the next run).
    assert ed.enter_text("extra_leak", "g_nS", f"{0.6 * BOUND_D1_NS:.6g}") is None
    assert line.level == "warn" and "above half" in line.text()
    assert window.start_run()  # a warning does not refuse
    window.stop_run()
    assert window.wait_finished(60.0) is not None

    # Beyond it: red, and Start is refused with the reason, before anything starts.
    assert ed.enter_text("extra_leak", "g_nS", f"{1.1 * BOUND_D1_NS:.6g}") is None
    assert line.level == "beyond" and "UNSTABLE" in line.text()
    assert not window.start_run()
    assert window.engine is None and window.state == "failed"
    assert "UNSTABLE (dynamic)" in window.last_error and "override" in window.last_error

    # Current mode on a hardware port: the assumed link latency, two samples.
    window.port_box.setCurrentText("/dev/ttyUSB7")
    assert line.report.delay_samples == 2
    assert line.report.g_stable_max_nS == pytest.approx(BOUND_D2_NS, rel=1e-6)
    assert "hardware link" in line.delay_from
    # Law mode: the board's own step, whatever the link.
    assert window._submit(("section", "loop"), "mode", "law") is None
    assert line.report.delay_samples == 1 and "board's own step" in line.delay_from
    assert line.report.g_stable_max_nS == pytest.approx(BOUND_D1_NS, rel=1e-9)

    # The static limit: a negative leak larger than the cell's own conductance.
    assert ed.enter_text("extra_leak", "g_nS", "-6") is None
    assert line.level == "beyond" and "total conductance ≤ 0" in line.text()
    assert not window.start_run() and "UNSTABLE (static)" in window.last_error


def _mail(window) -> int:
    return int(window.engine.shared.ctrl[CTRL_MAIL_WRITTEN])


def test_live_change_refused_then_overridden_and_logged(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, _with_leak(0.6 * BOUND_D1_NS))
    line, ed = window.stability_line, window.editor
    start(qtbot, window)
    assert line.level == "warn"
    assert "warning: above half" in window.log.toPlainText()
    # In lockstep on the simulated rig every command is in force at the next sample: the
    # measured latency confirms the delay of one sample.
    for _ in range(20):
        window._tick()
    assert line.delay_from == "the link's measured median latency"
    assert line.report.delay_samples == 1

    # A change beyond the bound: refused with the reason, nothing reaches the loop.
    mail = _mail(window)
    beyond = f"{1.2 * BOUND_D1_NS:.6g}"
    reason = ed.enter_text("extra_leak", "g_nS", beyond)
    assert reason and "not applied" in reason and "UNSTABLE (dynamic)" in reason
    assert "override" in reason
    assert _mail(window) == mail
    assert ed.widget("extra_leak", "g_nS").text() == f"{0.6 * BOUND_D1_NS:.12g}"
    # A change that moves away from the bound is never refused.
    assert ed.enter_text("extra_leak", "g_nS", f"{0.3 * BOUND_D1_NS:.6g}") is None
    assert _mail(window) == mail + 1 and line.level == "ok"

    # Overridden: applied, shown, logged.
    line.override_box.setChecked(True)
    assert ed.enter_text("extra_leak", "g_nS", beyond) is None
    assert _mail(window) == mail + 2
    assert line.level == "beyond" and "OVERRIDDEN" in line.text()
    assert "stability override: extra_leak.g_nS" in window.log.toPlainText()
    wait_samples(qtbot, window, int(0.2 * RATE_HZ))
    for _ in range(10):
        window._tick()
    out = ROOT / "tests" / "artifacts" / "window-stability.png"
    out.parent.mkdir(exist_ok=True)
    assert window.grab().save(str(out))

    rec = stop(qtbot, window)
    meta = rec["meta"]["stability"]
    # The same record --override-stability leaves (tests/test_stability.py), and the change.
    assert meta["override"] is True and meta["ok"] is False
    assert meta["g_stable_max_nS"] == pytest.approx(BOUND_D1_NS, rel=1e-9)
    assert meta["g_virtual_max_nS"] == pytest.approx(float(beyond))
    (logged,) = meta["live_overrides"]
    assert (logged["element"], logged["field"]) == ("extra_leak", "g_nS")
    assert logged["value"] == pytest.approx(float(beyond))
    applied = [c for c in rec["param_changes"] if c["field"] == "g_nS"]
    assert applied[-1]["new"] == pytest.approx(float(beyond))
    assert applied[-1]["sample"] >= logged["sample"]  # posted, then applied by the loop
    assert not line.override_box.isChecked()  # an override is for one run
