"""The parameter form (issue 15): only the fields that apply, a unit on every number, a
new element brought into view, and save-as that keeps the user's file.

References: the synaptic kinetics' parameters as published (Roth & van Rossum 2009,
"Modeling synapses", in Computational Modeling Methods for Neuroscientists: the
single exponential has one decay time constant, the alpha function one time
constant, the difference of two exponentials a rise and a decay); Python's
``tomllib`` (the standard library's TOML parser) for the saved file.
"""

from __future__ import annotations

import tomllib

import pytest

pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")

from clampcore.gui.editor import unit_label
from guikit import ROOT, make_window
from PySide6 import QtWidgets

from clampcore.experiment import load_experiment
from clampcore.schema import COMMON_FIELDS, ELEMENT_FIELDS, SECTION_FIELDS

pytestmark = pytest.mark.gui

SYNAPSE_TIMES = {"exp": {"tau_decay_ms"}, "alpha": {"tau_ms"},
                 "dual_exp": {"tau_rise_ms", "tau_decay_ms"}}  # fmt: skip


def _pick(window, element: str, field: str, choice: str) -> None:
    box = window.editor.widget(element, field)
    box.setCurrentText(choice)
    box.activated.emit(box.currentIndex())  # as a click on the entry does


def test_only_fields_that_apply_are_shown(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, {"element": [{"kind": "synapse", "name": "syn"}]})
    ed = window.editor
    for kinetics, times in SYNAPSE_TIMES.items():
        _pick(window, "syn", "kinetics", kinetics)
        shown = {f for f in ("tau_ms", "tau_rise_ms", "tau_decay_ms") if ed.is_shown("syn", f)}
        assert shown == times, kinetics
    # A Poisson source has a rate and a seed, no spike times; a train the other way round.
    assert ed.is_shown("syn", "rate_hz") and not ed.is_shown("syn", "times_ms")
    # A train needs its times first: the refusal says so and shows the field to fill.
    reason = ed.enter_text("syn", "source", "train")
    assert "times_ms" in reason and ed.is_shown("syn", "times_ms")
    assert ed.enter_text("syn", "times_ms", "10, 20") is None
    assert ed.enter_text("syn", "source", "train") is None
    assert ed.is_shown("syn", "times_ms") and not ed.is_shown("syn", "rate_hz")
    assert not ed.is_shown("syn", "seed")
    # The passive model cell shows no Hodgkin-Huxley field.
    assert not ed.is_shown("cell", "gna_mS_per_cm2") and ed.is_shown("cell", "leak_nS")


def test_every_number_has_a_unit():
    fields = [*COMMON_FIELDS]
    for group in (*ELEMENT_FIELDS.values(), *SECTION_FIELDS.values()):
        fields += group
    for f in fields:
        if f.rule in ("real", "positive", "nonnegative", "fraction", "int", "times"):
            assert unit_label(f), f.name
    assert unit_label(next(f for f in ELEMENT_FIELDS["synapse"] if f.name == "u_se")) == (
        "fraction"
    )


def test_a_new_element_is_brought_into_view_and_named_right(qtbot, tmp_path):
    window = make_window(qtbot, tmp_path, ROOT / "examples" / "hybrid_pair.toml")
    window.resize(1280, 720)
    ed = window.editor
    window.tabs.setCurrentWidget(ed)
    window.activateWindow()
    ed.add_kind.setCurrentText("current")
    name = ed.add_name.text()
    ed.add_button.click()
    assert ed.message.text().startswith(f"added {name}")
    box = ed.findChild(QtWidgets.QGroupBox, f"element:{name}")
    viewport = ed.scroll.viewport()
    top_left = box.mapTo(viewport, box.rect().topLeft())
    assert 0 <= top_left.y() < viewport.height()  # scrolled to it
    qtbot.waitUntil(lambda: QtWidgets.QApplication.focusWidget() is not None, timeout=2000)
    focused = QtWidgets.QApplication.focusWidget()
    assert box.isAncestorOf(focused)  # the cursor is in it


def test_save_as_keeps_comments_and_writes_only_what_differs(qtbot, tmp_path):
    source = ROOT / "examples" / "imposed_lif.toml"
    original = source.read_text(encoding="utf-8")
    window = make_window(qtbot, tmp_path, source)
    ed = window.editor
    assert ed.enter_text("imposed_spike", "threshold_mV", "-47.5") is None
    ed.add_kind.setCurrentText("leak")
    ed.add_name.setText("extra")
    ed.add_button.click()
    out = tmp_path / "tuned.toml"
    assert window.save_file(out) is None
    text = out.read_text(encoding="utf-8")
    comments = [line for line in original.splitlines() if line.lstrip().startswith("#")]
    assert comments and all(line in text for line in comments)  # every comment kept
    assert "# the rate this 2-core machine serves best" in text  # a trailing one too
    raw = tomllib.loads(text)
    assert raw["element"][0]["threshold_mV"] == -47.5
    # The new leak is written with its kind and name only: every other value is a default.
    assert raw["element"][-1] == {"kind": "leak", "name": "extra"}
    for never in ("gna_mS_per_cm2", "tau_w_ms", "v_fault_mV"):  # defaults, never set
        assert never not in text
    assert load_experiment(out) == window.experiment
