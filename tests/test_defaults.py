"""Defaults and examples sit in the ranges typical of real neurons.

Membrane time constants of 10-50 ms and absolute refractory periods of 1-2 ms are
typical of cortical neurons (common practice, no single source). The
Hodgkin–Huxley cell keeps the squid axon's own constants (tau = C/g_L = 3.3 ms,
Hodgkin & Huxley 1952) and is exempt from the time-constant range.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from clampcore.experiment import load_experiment
from clampcore.schema import ELEMENT_FIELDS, SECTION_FIELDS

EXAMPLES = sorted((Path(__file__).resolve().parent.parent / "examples").glob("*.toml"))


def _default(fields, name):
    return next(f.default for f in fields if f.name == name)


def test_default_cell_and_neuron_time_constants():
    cell = SECTION_FIELDS["cell"]
    tau_cell_ms = _default(cell, "capacitance_pF") / _default(cell, "leak_nS")  # pF/nS = ms
    neuron = ELEMENT_FIELDS["neuron"]
    tau_neuron_ms = _default(neuron, "capacitance_pF") / _default(neuron, "leak_nS")
    assert 10 <= tau_cell_ms <= 50
    assert 10 <= tau_neuron_ms <= 50


def test_default_refractory_periods():
    for kind in ("threshold_reset", "neuron"):
        assert 1 <= _default(ELEMENT_FIELDS[kind], "refractory_ms") <= 2


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_examples_are_in_typical_ranges(path):
    exp = load_experiment(path)
    if exp.cell["model"] == "passive":
        assert 10 <= exp.cell["capacitance_pF"] / exp.cell["leak_nS"] <= 50
    for el in exp.elements:
        if el["kind"] in ("threshold_reset", "neuron"):
            assert 1 <= el["refractory_ms"] <= 2
        if el["kind"] == "neuron":
            assert 10 <= el["capacitance_pF"] / el["leak_nS"] <= 50
    # The current limit stays conservative (safety: below 1 nA in every example).
    assert exp.loop["max_current_pA"] < 1000
