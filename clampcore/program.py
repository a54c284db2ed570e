"""Turn a validated experiment into the flat arrays that ``step`` reads.

A ``Program`` owns every array of one run: element kinds, parameters, state,
random-number streams, spike-train times, per-element outputs and the loop's
own parameters and state. ``param_slot`` says which array cell a live change
of ``element.field`` writes, so a running loop can apply it between samples.

Public names: ``Program``, ``build_program``, ``ParamSlot``, ``check_live_change``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from clampcore import elements as el_mod
from clampcore import step as step_mod
from clampcore.calibration import range_limit_problem
from clampcore.elements import current, neuron, synapse
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
    loop_p: np.ndarray
    loop_s: np.ndarray
    experiment: Experiment

    @property
    def dt_ms(self) -> float:
        return float(self.loop_p[step_mod.LP_DT_MS])

    def arrays(self) -> tuple[np.ndarray, ...]:
        """The arguments of ``step`` after ``v_mV`` and ``n``, in order."""
        return (
            self.kind,
            self.params,
            self.state,
            self.rng,
            self.trains,
            self.g_out,
            self.i_out,
            self.loop_p,
            self.loop_s,
        )

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
            return ParamSlot("params", r, el_mod.P_ENABLED)
        columns = el_mod.COLUMNS[kind]
        if field not in columns:
            raise KeyError(f"{kind} '{element}': field {field!r} cannot change while running")
        return ParamSlot("params", r, columns[field])

    def encode_value(self, value: Any) -> float:
        """The float a live change stores (booleans as 1.0/0.0)."""
        if isinstance(value, bool):
            return 1.0 if value else 0.0
        return float(value)

    def spike_sources(self) -> list[str]:
        """Names with a spike record: the cell, then every virtual neuron."""
        return ["cell", *[n for n, k in zip(self.names, self.kinds, strict=True) if k == "neuron"]]


def delay_samples(delay_ms: float, dt_ms: float) -> int:
    """A synaptic delay in whole samples (nearest; 1e-9 absorbs rounding of exact halves)."""
    return math.floor(delay_ms / dt_ms + 0.5 + 1e-9)


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
    params = np.zeros((n, el_mod.N_PARAMS))
    state = np.zeros((n, el_mod.N_STATE))
    rng = np.zeros(n, dtype=np.uint64)
    trains: list[float] = []
    dt_ms = exp.dt_ms
    for r, e in enumerate(exp.elements):
        k = e["kind"]
        kind[r] = el_mod.KIND_CODES[k]
        p = params[r]
        p[el_mod.P_ENABLED] = 1.0 if e["enabled"] else 0.0
        p[el_mod.P_TARGET] = el_mod.TARGET_CELL
        for fname, col in el_mod.COLUMNS[k].items():
            p[col] = float(e[fname])
        if "seed" in e:
            # Each element gets its own stream: the run's seed, the element's seed and its row.
            rng[r] = seed_state(int(e["seed"]) + (int(seed) << 20), stream=r)
        if k == "synapse":
            p[synapse.P_KINETICS] = synapse.KINETICS_CODES[e["kinetics"]]
            if e["target"] != "cell":
                p[el_mod.P_TARGET] = names.index(e["target"])
            src = e["source"]
            if src == "poisson":
                p[synapse.P_SOURCE] = synapse.SRC_POISSON
            elif src == "train":
                p[synapse.P_SOURCE] = synapse.SRC_TRAIN
                p[synapse.P_TRAIN_START] = len(trains)
                p[synapse.P_TRAIN_COUNT] = len(e["times_ms"])
                trains.extend(e["times_ms"])
            elif src == "cell":
                p[synapse.P_SOURCE] = synapse.SRC_CELL
                p[synapse.P_DELAY] = delay_samples(e["delay_ms"], dt_ms)
            else:
                p[synapse.P_SOURCE] = synapse.SRC_NEURON
                p[synapse.P_SOURCE_ROW] = names.index(src)
            state[r, synapse.S_LAST_MS] = -math.inf
            state[r, synapse.S_U] = e["u_se"]
            state[r, synapse.S_R] = 1.0
        elif k == "noise":
            state[r, 0] = e["g_mean_nS"]  # the OU process starts at its mean
        elif k == "neuron":
            p[neuron.P_MODEL] = neuron.MODEL_CODES[e["model"]]
            state[r, neuron.S_V] = e["rest_mV"]
            state[r, neuron.S_LAST_SPIKE] = -math.inf
        elif k == "current":
            p[current.P_WAVEFORM] = current.WAVEFORM_CODES[e["waveform"]]
    loop = exp.loop
    loop_p = np.zeros(step_mod.N_LOOP_PARAMS)
    loop_p[step_mod.LP_DT_MS] = dt_ms
    loop_p[step_mod.LP_MAX_CURRENT_PA] = loop["max_current_pA"]
    loop_p[step_mod.LP_SPIKE_THRESHOLD_MV] = loop["spike_threshold_mV"]
    loop_p[step_mod.LP_SPIKE_HYSTERESIS_MV] = loop["spike_hysteresis_mV"]
    loop_p[step_mod.LP_V_FAULT_MV] = loop["v_fault_mV"]
    loop_p[step_mod.LP_MG_MM] = blocked_group_mg_mM(exp)
    longest = max((int(params[r, synapse.P_DELAY]) for r in range(n)), default=0)
    ring = 1 << (longest + 1).bit_length()  # a power of two above the longest delay
    loop_p[step_mod.LP_SPIKE_RING] = ring
    loop_s = np.zeros(step_mod.N_LOOP_STATE + ring)
    return Program(
        names=names,
        kinds=[e["kind"] for e in exp.elements],
        kind=kind,
        params=params,
        state=state,
        rng=rng,
        trains=np.asarray(trains, dtype=np.float64),
        g_out=np.zeros(n),
        i_out=np.zeros(n),
        loop_p=loop_p,
        loop_s=loop_s,
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
