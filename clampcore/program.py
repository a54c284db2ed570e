"""Turn a validated experiment into the flat arrays that ``step`` reads.

A ``Program`` owns every array of one run: element kinds, parameters, state,
random-number streams, spike-train times, per-element outputs and the loop's
own parameters and state. ``param_slot`` says which array cell a live change
of ``element.field`` writes, so a running loop can apply it between samples.

Public names: ``Program``, ``ProgramArrays``, ``build_program``, ``ParamSlot``,
``check_live_change``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from clampcore import step as step_mod
from clampcore.calibration import range_limit_problem
from clampcore.elements import (
    KIND_NEURON,
    N_PARAMS,
    N_STATE,
    P_ENABLED,
    P_TARGET,
    SPECS,
    TARGET_CELL,
)
from clampcore.elements.spec import RowContext
from clampcore.elements.synapse import P_DELAY
from clampcore.elements.synapse import delay_samples as delay_samples  # re-exported
from clampcore.experiment import Experiment, ExperimentError, load_experiment, validate_element
from clampcore.rng import seed_state
from clampcore.schema import SECTION_FIELDS, check_value

# Loop fields a running loop may change, and the loop_p column each one writes.
LOOP_COLUMNS = {
    "max_current_pA": step_mod.LP_MAX_CURRENT_PA,
    "spike_threshold_mV": step_mod.LP_SPIKE_THRESHOLD_MV,
    "spike_hysteresis_mV": step_mod.LP_SPIKE_HYSTERESIS_MV,
}


# The mailbox's code for each ParamSlot.array (clampcore.shared.MAIL_TO_*).
MAIL_TARGETS = {"params": 0.0, "loop": 1.0}


@dataclass(frozen=True)
class ParamSlot:
    """Where a live parameter lives: ``array`` is "params" (row, col) or "loop" (col)."""

    array: str
    row: int
    col: int


# ``Program``'s array fields, in the order compiled code takes them (``ProgramArrays``).
ARRAY_FIELDS = (
    "kind", "params", "state", "rng", "trains", "g_out", "i_out", "e_out", "loop_p", "loop_s",
    "spike_ring",
)  # fmt: skip

# A program's arrays as compiled code takes them (``step``, ``make_law``, the loops): one
# argument that numba passes as the eleven arrays, at no cost per call. Fields: as ``Program``.
ProgramArrays = NamedTuple("ProgramArrays", [(f, np.ndarray) for f in ARRAY_FIELDS])  # type: ignore[misc]


@dataclass
class Program:
    """All arrays of one run (see ``clampcore.step`` for the loop arrays)."""

    names: list[str]
    kinds: list[str]
    kind: np.ndarray  # int64 (n,)
    params: np.ndarray  # float64 (n, N_PARAMS)
    state: np.ndarray  # float64 (n, N_STATE)
    rng: np.ndarray  # uint64 (n,)
    trains: np.ndarray  # float64, every train source's times (ms) one after another
    g_out: np.ndarray  # float64 (n,)  conductance of each element at the last sample, nS
    i_out: np.ndarray  # float64 (n,)  current of each element at the last sample, pA
    e_out: np.ndarray  # float64 (n,)  reversal potential of each conductance at it, mV
    loop_p: np.ndarray  # float64 (N_LOOP_PARAMS,): clampcore.step's LP_* columns
    loop_s: np.ndarray  # clampcore.step.LOOP_STATE (1,): the loop's state, one record
    spike_ring: np.ndarray  # int64 (power of two,): the cell's spike history (clampcore.step)
    experiment: Experiment

    @property
    def dt_ms(self) -> float:
        return float(self.loop_p[step_mod.LP_DT_MS])

    def arrays(self) -> ProgramArrays:
        """The arrays of ``step`` (its argument after ``v_mV`` and ``n``)."""
        return ProgramArrays(*(getattr(self, f) for f in ARRAY_FIELDS))

    def row(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            raise KeyError(f"no element named {name!r}") from None

    def param_slot(self, element: str, field: str) -> ParamSlot:
        """Where a running loop writes ``element.field`` (element "loop" for [loop] fields).

        Raises ``KeyError`` for a field that cannot change while running.
        """
        if element == "loop":
            if field not in LOOP_COLUMNS:
                raise KeyError(f"[loop] {field} cannot change while running")
            return ParamSlot("loop", -1, LOOP_COLUMNS[field])
        r = self.row(element)
        kind = self.kinds[r]
        if field == "enabled":
            return ParamSlot("params", r, P_ENABLED)
        columns = SPECS[kind].live_columns
        if field not in columns:
            raise KeyError(f"{kind} '{element}': field {field!r} cannot change while running")
        return ParamSlot("params", r, columns[field])

    def encode_value(self, value: Any) -> float:
        """The float a live change stores (booleans as 1.0/0.0)."""
        if isinstance(value, bool):
            return 1.0 if value else 0.0
        return float(value)

    def spike_rows(self) -> np.ndarray:
        """Rows of the virtual neurons (int64), whose spikes are recorded after the cell's."""
        return np.flatnonzero(self.kind == KIND_NEURON).astype(np.int64)

    def spike_sources(self) -> list[str]:
        """Names with a spike record: the cell, then every virtual neuron."""
        return ["cell", *[self.names[r] for r in self.spike_rows()]]

    def slot_names(self) -> dict[tuple[str, int, int], tuple[str, str]]:
        """(array, row, col) of every live parameter (see ``ParamSlot``) -> (element, field)."""
        out: dict[tuple[str, int, int], tuple[str, str]] = {}
        for r, (name, kind) in enumerate(zip(self.names, self.kinds, strict=True)):
            out[("params", r, P_ENABLED)] = (name, "enabled")
            for field, col in SPECS[kind].live_columns.items():
                out[("params", r, col)] = (name, field)
        for field, col in LOOP_COLUMNS.items():
            out[("loop", -1, col)] = ("loop", field)
        return out


def mg_groups(exp: Experiment) -> dict[float, list[str]]:
    """The cell's Mg-blocked groups: each distinct ``mg_mM`` with the synapses that use it."""
    groups: dict[float, list[str]] = {}
    for e in exp.elements:
        if e["kind"] == "synapse" and e["target"] == "cell" and e["mg_mM"] > 0:
            groups.setdefault(float(e["mg_mM"]), []).append(e["name"])
    return groups


def blocked_group_mg_mM(exp: Experiment) -> float:
    """The one [Mg2+] of the cell's Mg-blocked synapses (0 when there are none).

    A board evaluates one blocked law, B(V) (a_b - g_b V), whose B is a table made for one
    [Mg2+]; synapses on the cell with different ``mg_mM`` are refused, named.
    """
    groups = mg_groups(exp)
    if len(groups) > 1:
        names = "; ".join(f"{mg:g} mM: {', '.join(n)}" for mg, n in sorted(groups.items()))
        first = min(groups)
        raise ExperimentError(
            f"synapse '{groups[max(groups)][0]}'",
            "mg_mM",
            max(groups),
            f"one Mg2+ concentration for all blocked synapses on the cell, not several ({names});"
            f" e.g. {first:g} mM for all",
        )
    return next(iter(groups), 0.0)


def build_program(experiment: Any, seed: int = 0) -> Program:
    """Arrays for ``experiment`` (anything ``load_experiment`` takes).

    ``seed`` offsets every random stream of the run.
    """
    exp = load_experiment(experiment)
    n = len(exp.elements)
    names = [e["name"] for e in exp.elements]
    kind = np.zeros(n, dtype=np.int64)
    params = np.zeros((n, N_PARAMS))
    state = np.zeros((n, N_STATE))
    rng = np.zeros(n, dtype=np.uint64)
    ctx = RowContext(names=names, trains=[], dt_ms=exp.dt_ms)
    for r, e in enumerate(exp.elements):
        spec = SPECS[e["kind"]]
        kind[r] = spec.code
        params[r, P_ENABLED] = 1.0 if e["enabled"] else 0.0
        params[r, P_TARGET] = TARGET_CELL
        if "seed" in e:
            # Each element gets its own stream: the run's seed, the element's seed and its row.
            rng[r] = seed_state(int(e["seed"]) + (int(seed) << 20), stream=r)
        spec.fill_row(params[r], state[r], e, ctx)
    loop = exp.loop
    loop_p = np.zeros(step_mod.N_LOOP_PARAMS)
    loop_p[step_mod.LP_DT_MS] = exp.dt_ms
    loop_p[step_mod.LP_MAX_CURRENT_PA] = loop["max_current_pA"]
    loop_p[step_mod.LP_SPIKE_THRESHOLD_MV] = loop["spike_threshold_mV"]
    loop_p[step_mod.LP_SPIKE_HYSTERESIS_MV] = loop["spike_hysteresis_mV"]
    loop_p[step_mod.LP_V_FAULT_MV] = loop["v_fault_mV"]
    loop_p[step_mod.LP_MG_MM] = blocked_group_mg_mM(exp)
    synapses = [r for r, e in enumerate(exp.elements) if e["kind"] == "synapse"]
    longest = max((int(params[r, P_DELAY]) for r in synapses), default=0)
    ring = 1 << (longest + 1).bit_length()  # a power of two above the longest delay

    return Program(
        names=names,
        kinds=[e["kind"] for e in exp.elements],
        kind=kind,
        params=params,
        state=state,
        rng=rng,
        trains=np.asarray(ctx.trains, dtype=np.float64),
        g_out=np.zeros(n),
        i_out=np.zeros(n),
        e_out=np.zeros(n),
        loop_p=loop_p,
        loop_s=np.zeros(1, dtype=step_mod.LOOP_STATE),
        spike_ring=np.zeros(ring, dtype=np.int64),
        experiment=exp,
    )


def check_live_change(
    program: Program,
    element: str,
    field: str,
    value: Any,
    board_range_pA: tuple[float, float] | None = None,
) -> float:
    """Validate a live change with the loader's own rules; return the float to store.

    ``board_range_pA``: what board and amplifier can command, when a board runs; a
    new ``max_current_pA`` must then pass the same rule as at Start
    (``calibration.range_limit_problem``). Raises ``ExperimentError`` (naming element,
    field and value, and why) or ``KeyError``.
    """
    exp = program.experiment
    program.param_slot(element, field)  # KeyError when not live
    if element == "loop":
        f = {x.name: x for x in SECTION_FIELDS["loop"]}[field]
        reason = check_value(f, value)
        if not reason and field == "max_current_pA" and board_range_pA is not None:
            reason = range_limit_problem(board_range_pA, float(value))
        if reason:
            raise ExperimentError("section [loop]", field, value, reason)
        return program.encode_value(value)
    r = program.row(element)
    changed = dict(exp.elements[r])
    changed[field] = value
    validate_element(changed, r, exp.dt_ms)
    return program.encode_value(value)
