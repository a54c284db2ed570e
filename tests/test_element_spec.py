"""One description per element kind (issue 10): a kind made of its spec alone, registered
here in the test suite, is accepted by the schema, checked by the loader (one-line errors
naming element, field and value), built into its program row, summarised by the command
line, counted by the loop-stability bound and shown by the window's editor. Nothing of
the project is edited for it: that is the recipe of DEVELOPERS.md ("Adding an element
kind"), less the per-sample dispatch in step.py, which this test does not run.

References: errors are one line naming what is wrong (README, "When things go wrong"),
here in the loader's form "element 'NAME', field 'FIELD' = VALUE: reason"; the decay
factor the toy keeps is exp(-dt/tau), computed here with Python's ``math.exp``; the toy's
fields, columns and state are its own definition below.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from clampcore import stability
from clampcore.cli import main
from clampcore.elements import CONDUCTANCE_KINDS, KINDS, SPECS, register, unregister
from clampcore.elements.spec import N_PARAMS, N_STATE, ElementSpec, Problem, RowContext
from clampcore.experiment import ExperimentError, load_experiment
from clampcore.fields import Field, only
from clampcore.program import build_program, check_live_change
from clampcore.schema import ELEMENT_FIELDS

TOY = "toy_gate"
TOY_FIELDS = (
    Field("mode", "fast", "choice", live=False, choices=("fast", "slow")),
    Field("g_nS", 3.0, "positive"),
    Field("e_mV", -80.0),
    Field("tau_ms", 4.0, "positive", when=only("mode", "slow")),
    Field("seed", 0, "int", live=False),
)


def _toy_init(p: np.ndarray, s: np.ndarray, el: dict[str, Any], ctx: RowContext) -> None:
    p[TOY_SPEC.param("driving_pA")] = el["g_nS"] * el["e_mV"]
    s[TOY_SPEC.state_col("decay_factor")] = math.exp(-ctx.dt_ms / el["tau_ms"])


def _toy_check(el: dict[str, Any], dt_ms: float) -> Problem:
    if el["mode"] == "slow" and el["tau_ms"] < dt_ms:
        return "tau_ms", "must be at least one sample"
    return None


TOY_SPEC = ElementSpec(
    TOY,
    code=90,
    fields=TOY_FIELDS,
    params=("mode", "g_nS", "e_mV", "tau_ms", "driving_pA"),
    state=("x", "decay_factor"),
    conductance=True,
    init=_toy_init,
    check=_toy_check,
    describe=lambda el: f" {el['mode']}",
    feedback_nS=lambda el: (0.0, el["g_nS"]),
)


@pytest.fixture
def toy():
    register(TOY_SPEC)
    try:
        yield TOY_SPEC
    finally:
        unregister(TOY)


def _error(source: Any) -> str:
    with pytest.raises(ExperimentError) as info:
        load_experiment(source)
    return str(info.value)


def test_the_schema_lists_a_registered_kind_and_forgets_it_after(toy) -> None:
    assert TOY in KINDS and TOY in CONDUCTANCE_KINDS
    assert ELEMENT_FIELDS[TOY] == TOY_FIELDS
    assert list(KINDS)[-1] == TOY  # after the six of the project, in registration order
    unregister(TOY)
    try:
        assert TOY not in KINDS and TOY not in ELEMENT_FIELDS and len(KINDS) == 6
        assert "toy_gate" not in _error({"element": [{"kind": "toy", "name": "x"}]})
    finally:
        register(TOY_SPEC)


def test_the_loader_fills_defaults_and_names_element_field_and_value(toy) -> None:
    exp = load_experiment({"element": [{"kind": TOY, "name": "gate", "g_nS": 2}]})
    el = exp.element("gate")
    assert el == {"kind": TOY, "name": "gate", "enabled": True, "mode": "fast", "g_nS": 2.0,
                  "e_mV": -80.0, "tau_ms": 4.0, "seed": 0}  # fmt: skip
    assert type(el["g_nS"]) is float  # a whole number given for a real one
    # The field's rule, the kind's own cross-field check, an unknown field, a wrong choice.
    bad = {"kind": TOY, "name": "gate"}
    assert _error({"element": [{**bad, "g_nS": -1}]}) == (
        "element 'gate', field 'g_nS' = -1.0: must be greater than 0"
    )
    # 20 kHz: one sample is 0.05 ms.
    assert _error({"element": [{**bad, "mode": "slow", "tau_ms": 0.01}]}) == (
        "element 'gate', field 'tau_ms' = 0.01: must be at least one sample"
    )
    assert _error({"element": [{**bad, "gain": 2.0}]}).startswith(
        f"element 'gate', field 'gain' = 2.0: not a field of a {TOY}; known: enabled, mode"
    )
    assert _error({"element": [{**bad, "mode": "medium"}]}) == (
        "element 'gate', field 'mode' = 'medium': must be one of fast, slow"
    )
    assert _error({"element": [{"kind": "toy", "name": "x"}]}).endswith(
        "unknown kind; one of leak, threshold_reset, synapse, noise, neuron, current, toy_gate"
    )


def test_the_program_builds_the_row_from_the_spec(toy) -> None:
    exp = {"loop": {"rate_hz": 10000.0},
           "element": [{"kind": "leak", "name": "leak"},
                       {"kind": TOY, "name": "gate", "mode": "slow", "g_nS": 2.5,
                        "e_mV": -90.0, "tau_ms": 8.0, "seed": 7}]}  # fmt: skip
    program = build_program(exp)
    assert program.kind.tolist() == [SPECS["leak"].code, 90]
    p, s = program.params[1], program.state[1]
    assert p[0] == 1.0 and p[1] == -1.0  # enabled; target: the recorded cell
    # Columns follow the spec's names from column 2 on; a choice is stored as its index.
    assert p[2:7].tolist() == [1.0, 2.5, -90.0, 8.0, 2.5 * -90.0]
    assert not p[7:].any()
    assert s[0] == 0.0 and s[1] == math.exp(-0.1 / 8.0)  # dt = 0.1 ms at 10 kHz
    assert program.rng[1] != 0  # a seed field gets the element its own random stream
    # A running loop may change the live fields, at their columns, with the loader's rules.
    assert program.param_slot("gate", "g_nS").col == 3
    assert program.param_slot("gate", "tau_ms").col == 5
    with pytest.raises(KeyError):
        program.param_slot("gate", "mode")
    with pytest.raises(ExperimentError, match=r"element 'gate', field 'e_mV' = 'x'"):
        check_live_change(program, "gate", "e_mV", "x")
    assert check_live_change(program, "gate", "g_nS", 4) == 4.0
    slots = program.slot_names()
    assert slots[("params", 1, 3)] == ("gate", "g_nS")
    assert ("params", 1, 2) not in slots  # mode: fixed for a run


def test_the_command_line_and_the_stability_bound_see_it(toy, tmp_path: Path, capsys) -> None:
    path = tmp_path / "toy.toml"
    path.write_text(f'[[element]]\nkind = "{TOY}"\nname = "gate"\nmode = "slow"\ng_nS = 6.0\n')
    exp = load_experiment(path)
    assert stability.virtual_conductances_nS(exp) == [("gate", TOY, 0.0, 6.0)]
    assert main(["check", str(path)]) == 0
    listed = [line.split() for line in capsys.readouterr().out.splitlines() if line[:2] == "  "]
    assert [TOY, "gate", "slow"] in listed
    path.write_text(f'[[element]]\nkind = "{TOY}"\nname = "gate"\ng_nS = "lots"\n')
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "'gate'" in err and "'g_nS'" in err and "lots" in err


@pytest.mark.gui
def test_the_window_editor_shows_its_fields(toy, qtbot, tmp_path: Path) -> None:
    pytest.importorskip("PySide6", reason="the window needs PySide6 (the 'gui' extra)")
    pytest.importorskip("pyqtgraph", reason="the window needs pyqtgraph (the 'gui' extra)")
    from guikit import make_window

    window = make_window(qtbot, tmp_path, {"element": [{"kind": TOY, "name": "gate"}]})
    ed = window.editor
    kinds = [ed.add_kind.itemText(i) for i in range(ed.add_kind.count())]
    assert TOY in kinds
    for f in TOY_FIELDS:
        ed.widget("gate", f.name)  # every field has its editor (KeyError otherwise)
    # tau_ms applies only to the slow mode (Field.when), as the spec says.
    assert not ed.is_shown("gate", "tau_ms") and ed.is_shown("gate", "g_nS")
    box = ed.widget("gate", "mode")
    box.setCurrentText("slow")
    box.activated.emit(box.currentIndex())
    assert ed.is_shown("gate", "tau_ms")
    # A value the loader refuses is refused by the editor with the loader's reason.
    assert ed.enter_text("gate", "g_nS", "-2") == (
        "element 'gate', field 'g_nS' = -2.0: must be greater than 0"
    )
    assert ed.enter_text("gate", "g_nS", "5") is None
    assert window.experiment.element("gate")["g_nS"] == 5.0


def test_a_spec_that_does_not_fit_the_arrays_is_refused() -> None:
    # The compiled kernels index params and state without bounds checks (numba's default).
    many = tuple(Field(f"x{i}_mV", 0.0) for i in range(N_PARAMS - 1))
    with pytest.raises(ValueError, match=r"'wide'.*do not fit N_PARAMS = 24"):
        ElementSpec("wide", code=91, fields=many, params=tuple(f.name for f in many))
    with pytest.raises(ValueError, match=rf"'deep'.*do not fit N_STATE = {N_STATE}"):
        ElementSpec("deep", code=92, fields=(), state=tuple(f"s{i}" for i in range(N_STATE + 1)))
    # A live field the loop could not change (no column) is a mistake in the spec.
    with pytest.raises(ValueError, match=r"live field 'g_nS' needs a params column"):
        ElementSpec("lost", code=93, fields=(Field("g_nS", 1.0),))
    with pytest.raises(ValueError, match=r"code 0 is already 'leak'"):
        register(ElementSpec("clash", code=0, fields=()))
    assert "clash" not in KINDS
    # Every kind of the project fits (checked when its module is imported).
    assert all(2 + len(s.params) <= N_PARAMS and len(s.state) <= N_STATE for s in SPECS.values())
