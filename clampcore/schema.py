"""What every section and element kind of an experiment file may contain.

One table per kind lists its fields with unit (in the name), default, the rule a
value must satisfy, and whether it may change while the loop runs (``live``).
The experiment loader and the window validate with these same tables, so a value
the window accepts is a value the loader accepts.

Each field also says when it applies (``Field.when``: which kinetics, source,
waveform or model it belongs to); ``field_applies`` answers it for given values.

Public names: ``Field``, ``ELEMENT_FIELDS``, ``SECTION_FIELDS``, ``KINDS``,
``check_value``, ``field_applies``.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Any

INF = math.inf


@dataclass(frozen=True)
class Field:
    """One field of a section or element: ``rule`` is checked by ``check_value``.

    Rules: ``real`` (any finite number), ``positive`` (> 0, may be inf where
    ``allow_inf``), ``nonnegative`` (>= 0), ``fraction`` (0 < x <= 1), ``int``
    (whole number >= 0), ``choice`` (one of ``choices``), ``bool``, ``text``,
    ``times`` (list of times >= 0, ascending), ``ref`` (a name: resolved by the
    loader).
    """

    name: str
    default: Any
    rule: str = "real"
    live: bool = True
    choices: tuple[str, ...] = ()
    allow_inf: bool = False
    doc: str = ""
    # Which fields apply: the field matters only when every (other field, values) pair
    # holds (see ``_only``). Empty: it always applies.
    when: tuple[tuple[str, tuple[str, ...]], ...] = ()


def _f(name: str, default: Any, rule: str = "real", **kw: Any) -> Field:
    return Field(name, default, rule, **kw)


def _only(other: str, *values: str) -> tuple[tuple[str, tuple[str, ...]], ...]:
    """``Field.when``: the field applies only while field ``other`` is one of ``values``."""
    return ((other, values),)


# Fields every element has.
COMMON_FIELDS = (
    _f("enabled", True, "bool", doc="a disabled element passes no current and keeps its state"),
)

ELEMENT_FIELDS: dict[str, tuple[Field, ...]] = {
    "leak": (
        _f("g_nS", 0.0, "real", doc="may be negative to cancel part of the cell's own leak"),
        _f("e_mV", -70.0, doc="reversal potential"),
    ),
    "threshold_reset": (
        _f("threshold_mV", -50.0),
        _f("reset_mV", -65.0),
        # 1-2 ms: typical absolute refractory period of neurons (common practice).
        _f("refractory_ms", 2.0, "positive"),
        # Clamp conductance: large against a whole-cell leak of 2-20 nS (common practice), so
        # V reaches reset within about C/g (2 ms for 100 pF and 50 nS).
        _f("g_nS", 50.0, "positive"),
    ),
    "synapse": (
        _f("kinetics", "exp", "choice", live=False, choices=("exp", "alpha", "dual_exp")),
        _f("g_max_nS", 1.0, "nonnegative", doc="peak conductance of one event"),
        _f("e_mV", 0.0, doc="0 mV: glutamatergic; -70 to -80 mV: GABA-A (common practice)"),
        _f(
            "tau_decay_ms",
            5.0,
            "positive",
            doc="exp and dual_exp kinetics",
            when=_only("kinetics", "exp", "dual_exp"),
        ),
        _f(
            "tau_rise_ms",
            0.5,
            "positive",
            doc="dual_exp kinetics",
            when=_only("kinetics", "dual_exp"),
        ),
        _f(
            "tau_ms",
            2.0,
            "positive",
            doc="alpha kinetics: time to peak",
            when=_only("kinetics", "alpha"),
        ),
        _f("mg_mM", 0.0, "nonnegative", doc="NMDA-type Mg2+ block (Jahr & Stevens 1990); 0 = none"),
        _f("u_se", 0.5, "fraction", doc="Tsodyks-Markram release fraction"),
        _f("tau_rec_ms", 0.0, "nonnegative", doc="depression recovery; 0 = no depression"),
        _f("tau_facil_ms", 0.0, "nonnegative", doc="facilitation decay; 0 = no facilitation"),
        _f("source", "poisson", "ref", live=False, doc="poisson | train | cell | <neuron name>"),
        _f(
            "delay_ms",
            0.0,
            "nonnegative",
            live=False,
            doc="cell source: synaptic delay, rounded to whole samples; 0 = the same sample "
            "(current mode only: a board-evaluated law needs at least the look-ahead + 1 sample)",
            when=_only("source", "cell"),
        ),
        _f("rate_hz", 10.0, "positive", doc="poisson source", when=_only("source", "poisson")),
        _f("times_ms", [], "times", live=False, doc="train source", when=_only("source", "train")),
        _f("seed", 0, "int", live=False, when=_only("source", "poisson")),
        _f("target", "cell", "ref", live=False, doc="cell | <neuron name>"),
    ),
    "noise": (
        # Defaults: excitatory background of the point-conductance model (Destexhe et al.
        # 2001, Neuroscience 107:13): g_e0 = 12 nS, sigma_e = 3 nS, tau_e = 2.7 ms.
        _f("g_mean_nS", 12.0, "nonnegative"),
        _f("g_sd_nS", 3.0, "nonnegative"),
        _f("tau_ms", 2.7, "positive"),
        _f("e_mV", 0.0),
        _f("seed", 0, "int", live=False),
    ),
    "neuron": (
        _f("model", "lif", "choice", live=False, choices=("lif", "eif", "adex")),
        # LIF defaults: C 200 pF, gL 10 nS (tau 20 ms), EL -70, threshold -50, reset -70,
        # refractory 2 ms: a typical cortical cell (common practice).
        _f("capacitance_pF", 200.0, "positive"),
        _f("leak_nS", 10.0, "positive"),
        _f("rest_mV", -70.0),
        _f("threshold_mV", -50.0, doc="lif: spike threshold; eif/adex: V_T"),
        _f("reset_mV", -70.0),
        _f("refractory_ms", 2.0, "positive"),
        # EIF/AdEx shape: delta_T 2 mV, a 4 nS, b 80.5 pA, tau_w 144 ms (Brette & Gerstner 2005).
        _f("delta_t_mV", 2.0, "positive", when=_only("model", "eif", "adex")),
        _f(
            "v_peak_mV",
            0.0,
            doc="eif/adex: a spike is cut here",
            when=_only("model", "eif", "adex"),
        ),
        _f("a_nS", 4.0, "real", when=_only("model", "adex")),
        _f("b_pA", 80.5, "real", when=_only("model", "adex")),
        _f("tau_w_ms", 144.0, "positive", when=_only("model", "adex")),
        _f("bias_pA", 0.0, doc="constant current into the virtual neuron"),
    ),
    "current": (
        _f(
            "waveform",
            "step",
            "choice",
            live=False,
            choices=("step", "train", "ramp", "sine", "white", "coloured"),
        ),
        _f("amplitude_pA", 0.0, doc="step/train/sine: amplitude; ramp: final value; noise: SD"),
        _f("offset_pA", 0.0, doc="added while the waveform is on"),
        _f("start_ms", 0.0, "nonnegative"),
        _f("duration_ms", INF, "positive", allow_inf=True),
        _f("period_ms", 100.0, "positive", doc="train", when=_only("waveform", "train")),
        _f("pulse_ms", 10.0, "positive", doc="train", when=_only("waveform", "train")),
        _f("frequency_hz", 10.0, "positive", doc="sine", when=_only("waveform", "sine")),
        _f(
            "tau_ms",
            5.0,
            "positive",
            doc="coloured noise correlation time",
            when=_only("waveform", "coloured"),
        ),
        _f("seed", 0, "int", live=False, when=_only("waveform", "white", "coloured")),
    ),
}

KINDS = tuple(ELEMENT_FIELDS)

SECTION_FIELDS: dict[str, tuple[Field, ...]] = {
    "loop": (
        _f("rate_hz", 20000.0, "positive", live=False),
        # Conservative default: enough to make most cortical cells fire (common practice).
        _f("max_current_pA", 500.0, "positive"),
        _f("spike_threshold_mV", -20.0),
        _f("spike_hysteresis_mV", 10.0, "positive"),
        # A measured |V| beyond this means a lost seal or a saturated amplifier: a living
        # membrane stays within about +-150 mV (common practice).
        _f("v_fault_mV", 200.0, "positive", live=False),
        _f("extra_delay_samples", 0, "int", live=False, doc="offline simulation only"),
        _f(
            "mode",
            "current",
            "choice",
            live=False,
            choices=("current", "law"),
            doc="current: the host computes each current from the newest V it has; law: the "
            "board evaluates the current law, sent ahead, at its own V (PROTOCOL.md §10)",
        ),
        # Law mode's look-ahead: a jitter buffer well above a USB link's 1-2 ms round trip
        # (full-speed USB's 1 ms frames both ways; common practice).
        _f(
            "lead_ms",
            10.0,
            "positive",
            live=False,
            doc="law mode: laws computed this far ahead",
            when=_only("mode", "law"),
        ),
        # How long the board may hold the newest law past its own sample: short, because a
        # negative leak or a pure current is not self-limiting (PROTOCOL.md §10.3).
        _f(
            "lifetime_ms",
            2.0,
            "positive",
            live=False,
            doc="law mode: then 0 pA",
            when=_only("mode", "law"),
        ),
    ),
    "cell": (
        _f("model", "passive", "choice", live=False, choices=("passive", "hh")),
        _f("capacitance_pF", 100.0, "positive", live=False),
        # Passive defaults: tau = C/gL = 20 ms, within the typical 10-50 ms (common practice).
        _f("leak_nS", 5.0, "positive", live=False, when=_only("model", "passive")),
        _f("rest_mV", -70.0, live=False, when=_only("model", "passive")),
        _f("electrode_MOhm", 0.0, "nonnegative", live=False),
        _f("noise_pA", 0.0, "nonnegative", live=False),
        _f("measurement_noise_mV", 0.0, "nonnegative", live=False),
        _f("seed", 0, "int", live=False),
        _f("substeps", 0, "int", live=False, doc="0 = choose automatically"),
        # Hodgkin & Huxley 1952 squid axon, modern convention (rest -65 mV).
        _f("gna_mS_per_cm2", 120.0, "nonnegative", live=False, when=_only("model", "hh")),
        _f("gk_mS_per_cm2", 36.0, "nonnegative", live=False, when=_only("model", "hh")),
        _f("gl_mS_per_cm2", 0.3, "nonnegative", live=False, when=_only("model", "hh")),
        _f("ena_mV", 50.0, live=False, when=_only("model", "hh")),
        _f("ek_mV", -77.0, live=False, when=_only("model", "hh")),
        _f("el_mV", -54.4, live=False, when=_only("model", "hh")),
        _f("cm_uF_per_cm2", 1.0, "positive", live=False, when=_only("model", "hh")),
    ),
    "amplifier": (
        # Typical current-clamp amplifier: Vm output x10 (100 mV of membrane per V) and a
        # command input of 400 pA/V (common practice; check your own amplifier's manual).
        _f("vm_mV_per_V", 100.0, "positive", live=False),
        _f("vm_offset_mV", 0.0, live=False),
        _f("command_pA_per_V", 400.0, "positive", live=False),
        _f("command_offset_pA", 0.0, live=False),
        _f("liquid_junction_mV", 0.0, live=False, doc="subtracted from the measured V"),
    ),
    "session": (
        _f("description", "", "text", live=False),
        _f("experimenter", "", "text", live=False),
        _f("lab", "", "text", live=False),
        _f("institution", "", "text", live=False),
        _f("session_id", "", "text", live=False),
    ),
    "subject": (
        _f("subject_id", "", "text", live=False),
        _f("species", "", "text", live=False),
        _f("age", "", "text", live=False, doc="ISO 8601 duration, e.g. P21D (NWB)"),
        # NWB's Subject.sex: M, F, U (unknown) or O (other).
        _f("sex", "U", "choice", live=False, choices=("M", "F", "U", "O")),
        _f("description", "", "text", live=False),
    ),
    "electrode": (
        _f("description", "", "text", live=False),
        _f("location", "", "text", live=False),
        _f("resistance_MOhm", 0.0, "nonnegative", live=False),
    ),
}


def field_applies(field: Field, values: dict[str, Any]) -> bool:
    """Whether ``field`` matters given the other ``values`` of its section or element."""
    return all(str(values.get(other, "")) in allowed for other, allowed in field.when)


def check_value(field: Field, value: Any) -> str | None:
    """Why ``value`` does not satisfy ``field``'s rule, or None when it does."""
    rule = field.rule
    if rule in ("real", "positive", "nonnegative", "fraction"):
        if isinstance(value, bool) or not isinstance(value, int | float):
            return "must be a number"
        if math.isnan(value):
            return "must be a number, not NaN"
        if math.isinf(value) and not (field.allow_inf and value > 0):
            return "must be finite"
        if rule == "positive" and not value > 0:
            return "must be greater than 0"
        if rule == "nonnegative" and not value >= 0:
            return "must be 0 or more"
        if rule == "fraction" and not 0 < value <= 1:
            return "must be in (0, 1]"
        return None
    if rule == "int":
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            return "must be a whole number, 0 or more"
        return None
    if rule == "choice":
        return None if value in field.choices else f"must be one of {', '.join(field.choices)}"
    if rule == "bool":
        return None if isinstance(value, bool) else "must be true or false"
    if rule in ("text", "ref"):
        return None if isinstance(value, str) else "must be text"
    if rule == "times":
        if not isinstance(value, list) or any(
            isinstance(t, bool) or not isinstance(t, int | float) or not t >= 0 for t in value
        ):
            return "must be a list of times >= 0"
        if any(b < a for a, b in itertools.pairwise(value)):
            return "must be in ascending order"
        if any(math.isinf(t) for t in value):
            return "must be finite"
        return None
    raise AssertionError(f"unknown rule {rule!r}")
