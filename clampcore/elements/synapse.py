"""``synapse``: a conductance driven by presynaptic spikes, I = -g B(V) (V - E).

Kinetics (all advanced with the exact exponential update for one sample h):

- ``exp``: g' = -g / tau_decay; each event adds w.
- ``alpha``: g(t) = w e (t/tau) exp(-t/tau), peak w at t = tau; as the linear
  pair g' = -g/tau + x, x' = -x/tau with x += w e / tau per event.
- ``dual_exp``: g = f w (exp(-t/tau_d) - exp(-t/tau_r)) with the closed-form
  peak normalisation f = 1 / (exp(-t_p/tau_d) - exp(-t_p/tau_r)),
  t_p = tau_d tau_r / (tau_d - tau_r) ln(tau_d / tau_r), so the peak is w.

Magnesium block (NMDA type, Jahr & Stevens 1990, J Neurosci 10:3178):
B(V) = 1 / (1 + [Mg2+]/3.57 mM * exp(-0.062 V/mV)); ``mg_mM = 0`` means none.

Short-term plasticity (Tsodyks & Markram 1997 PNAS 94:719; Markram, Wang &
Tsodyks 1998 PNAS 95:5323; in the recursive form of Maass & Markram 2002,
Neural Comput 14:2903), event by event with the interval dt since the last
presynaptic spike: u_n = U + u_{n-1}(1 - U) exp(-dt/tau_F) (u_n = U without
facilitation), R_n = 1 + (R_{n-1}(1 - u_{n-1}) - 1) exp(-dt/tau_rec) (R_n = 1
without depression); the event weight is w = g_max u_n R_n / U, so the first
event from rest has peak g_max.

Sources: ``poisson`` (a Poisson-distributed count of events each sample, mean
rate dt, so that the count over any time T has mean rate T and Fano factor 1 as a
Poisson process has: Cox & Lewis 1966, The Statistical Analysis of Series of
Events), ``train`` (listed times, each counted at the sample nearest
to it), ``cell`` (the recorded cell's detected spikes, ``delay_ms`` later: the same
sample by default) and a
virtual neuron (its spike of the previous sample).

Public names: ``SPEC``, ``delay_samples``, the ``SRC_*`` and ``KIN_*`` codes, ``synapse_events``,
``synapse_conductance``, ``mg_block``, ``dual_exp_peak_factor``, ``poisson_count``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.elements.spec import P_TARGET, ElementSpec, Problem, RowContext
from clampcore.fields import Field, only
from clampcore.jit import kernel
from clampcore.rng import normal, uniform

if TYPE_CHECKING:  # clampcore.program builds on the element modules
    from clampcore.program import ProgramArrays

FIELDS = (
    Field("kinetics", "exp", "choice", live=False, choices=("exp", "alpha", "dual_exp")),
    Field("g_max_nS", 1.0, "nonnegative", doc="peak conductance of one event"),
    Field("e_mV", 0.0, doc="0 mV: glutamatergic; -70 to -80 mV: GABA-A (common practice)"),
    Field(
        "tau_decay_ms",
        5.0,
        "positive",
        doc="exp and dual_exp kinetics",
        when=only("kinetics", "exp", "dual_exp"),
    ),
    Field(
        "tau_rise_ms",
        0.5,
        "positive",
        doc="dual_exp kinetics",
        when=only("kinetics", "dual_exp"),
    ),
    Field(
        "tau_ms",
        2.0,
        "positive",
        doc="alpha kinetics: time to peak",
        when=only("kinetics", "alpha"),
    ),
    Field("mg_mM", 0.0, "nonnegative", doc="NMDA-type Mg2+ block (Jahr & Stevens 1990); 0 = none"),
    Field("u_se", 0.5, "fraction", doc="Tsodyks-Markram release fraction"),
    Field("tau_rec_ms", 0.0, "nonnegative", doc="depression recovery; 0 = no depression"),
    Field("tau_facil_ms", 0.0, "nonnegative", doc="facilitation decay; 0 = no facilitation"),
    Field("source", "poisson", "ref", live=False, doc="poisson | train | cell | <neuron name>"),
    Field(
        "delay_ms",
        0.0,
        "nonnegative",
        live=False,
        doc="cell source: synaptic delay, rounded to whole samples; 0 = the same sample "
        "(current mode only: a board-evaluated law needs at least the look-ahead + 1 sample)",
        when=only("source", "cell"),
    ),
    Field("rate_hz", 10.0, "positive", doc="poisson source", when=only("source", "poisson")),
    Field("times_ms", [], "times", live=False, doc="train source", when=only("source", "train")),
    Field("seed", 0, "int", live=False, when=only("source", "poisson")),
    Field("target", "cell", "ref", live=False, doc="cell | <neuron name>"),
)

SRC_POISSON, SRC_TRAIN, SRC_CELL, SRC_NEURON = 0, 1, 2, 3
_SOURCE_CODES = {"poisson": SRC_POISSON, "train": SRC_TRAIN, "cell": SRC_CELL}


def delay_samples(delay_ms: float, dt_ms: float) -> int:
    """A synaptic delay in whole samples (nearest; 1e-9 absorbs rounding of exact halves)."""
    return math.floor(delay_ms / dt_ms + 0.5 + 1e-9)


def _check(el: dict[str, Any], dt_ms: float) -> Problem:
    if el["kinetics"] == "dual_exp" and not el["tau_rise_ms"] < el["tau_decay_ms"]:
        return "tau_rise_ms", "must be shorter than tau_decay_ms"
    if el["source"] == "train" and not el["times_ms"]:
        return "times_ms", "a train source needs times"
    return None


def _check_refs(el: dict[str, Any], neurons: set[str]) -> Problem:
    if el["source"] not in _SOURCE_CODES and el["source"] not in neurons:
        return "source", "must be poisson, train, cell or the name of a neuron element"
    if el["target"] != "cell" and el["target"] not in neurons:
        return "target", "must be cell or the name of a neuron"
    return None


def _init(p: np.ndarray, s: np.ndarray, el: dict[str, Any], ctx: RowContext) -> None:
    if el["target"] != "cell":
        p[P_TARGET] = ctx.names.index(el["target"])
    src = el["source"]
    p[P_SOURCE] = _SOURCE_CODES.get(src, SRC_NEURON)
    if src == "train":
        p[P_TRAIN_START] = len(ctx.trains)
        p[P_TRAIN_COUNT] = len(el["times_ms"])
        ctx.trains.extend(el["times_ms"])
    elif src == "cell":
        p[P_DELAY] = delay_samples(el["delay_ms"], ctx.dt_ms)
    elif src != "poisson":
        p[P_SOURCE_ROW] = ctx.names.index(src)
    s[S_LAST_MS] = -math.inf
    s[S_U] = el["u_se"]
    s[S_R] = 1.0


def _describe(el: dict[str, Any]) -> str:
    return f" {el['kinetics']}, from {el['source']} onto {el['target']}"


SPEC = ElementSpec(
    "synapse",
    code=2,
    fields=FIELDS,
    params=(
        "kinetics",
        "g_max_nS",
        "e_mV",
        "tau_decay_ms",
        "tau_rise_ms",
        "tau_ms",
        "mg_mM",
        "u_se",
        "tau_rec_ms",
        "tau_facil_ms",
        "source_code",  # SRC_* code
        "source_row",  # row of the presynaptic neuron element
        "rate_hz",
        "train_start",  # first index of this synapse's times in the program's trains array
        "train_count",
        "delay_samples",  # cell source: synaptic delay in whole samples (from delay_ms)
    ),
    state=(
        "g_a_nS",  # exp: g; alpha: g; dual_exp: decaying part
        "g_b",  # alpha: x; dual_exp: rising part
        "u",  # STP: u of the last event
        "r",  # STP: R of the last event
        "last_event_ms",  # time of the last event (-inf before the first)
        "train_pos",  # next index into the train
        "events",  # events counted
        "decay_a_tau_ms",  # cached decay of the first kinetic variable (tau, factor)
        "decay_a_factor",
        "decay_b_tau_ms",  # cached decay of the rising part (dual_exp)
        "decay_b_factor",
        # cell source, law mode: spikes heard after this synapse's law for them was made, to
        # be delivered at the next sample computed (clampcore.step.queue_late_cell_spike)
        "late_spikes",
    ),
    conductance=True,
    init=_init,
    check=_check,
    check_refs=_check_refs,
    describe=_describe,
    feedback_nS=lambda el: (0.0, el["g_max_nS"]) if el["target"] == "cell" else None,
)
KINETICS_CODES = SPEC.codes("kinetics")
KIN_EXP, KIN_ALPHA, KIN_DUAL = (KINETICS_CODES[k] for k in ("exp", "alpha", "dual_exp"))

P_KINETICS = SPEC.param("kinetics")
P_G_MAX = SPEC.param("g_max_nS")
P_E = SPEC.param("e_mV")
P_TAU_DECAY = SPEC.param("tau_decay_ms")
P_TAU_RISE = SPEC.param("tau_rise_ms")
P_TAU_ALPHA = SPEC.param("tau_ms")
P_MG = SPEC.param("mg_mM")
P_U = SPEC.param("u_se")
P_TAU_REC = SPEC.param("tau_rec_ms")
P_TAU_FACIL = SPEC.param("tau_facil_ms")
P_SOURCE = SPEC.param("source_code")
P_SOURCE_ROW = SPEC.param("source_row")
P_RATE = SPEC.param("rate_hz")
P_TRAIN_START = SPEC.param("train_start")
P_TRAIN_COUNT = SPEC.param("train_count")
P_DELAY = SPEC.param("delay_samples")

S_A = SPEC.state_col("g_a_nS")
S_B = SPEC.state_col("g_b")
S_U = SPEC.state_col("u")
S_R = SPEC.state_col("r")
S_LAST_MS = SPEC.state_col("last_event_ms")
S_TRAIN_POS = SPEC.state_col("train_pos")
S_EVENTS = SPEC.state_col("events")
S_DECAY_A = SPEC.state_col("decay_a_tau_ms")
S_DECAY_B = SPEC.state_col("decay_b_tau_ms")
S_LATE = SPEC.state_col("late_spikes")

# A decayed conductance below this is set to 0: left alone it would sink into subnormal
# floats after ~700 time constants, whose arithmetic is ~100x slower on x86 (measured here:
# 150 ns instead of 30 ns a step). 1e-12 nS passes < 1e-10 pA at any membrane potential.
_G_FLOOR_NS = 1e-12

# Jahr & Stevens 1990: K_Mg = 3.57 mM, voltage dependence 0.062 per mV.
_MG_K_MM = 3.57
_MG_SLOPE_PER_MV = 0.062


@kernel
def mg_block(v_mV: float, mg_mM: float) -> float:
    """Fraction of NMDA-type conductance not blocked by Mg2+ (Jahr & Stevens 1990)."""
    if mg_mM <= 0.0:
        return 1.0
    return 1.0 / (1.0 + mg_mM / _MG_K_MM * math.exp(-_MG_SLOPE_PER_MV * v_mV))


@kernel
def dual_exp_peak_factor(tau_rise_ms: float, tau_decay_ms: float) -> float:
    """f such that f (exp(-t/tau_d) - exp(-t/tau_r)) peaks at exactly 1."""
    t_peak = tau_decay_ms * tau_rise_ms / (tau_decay_ms - tau_rise_ms)
    t_peak *= math.log(tau_decay_ms / tau_rise_ms)
    return 1.0 / (math.exp(-t_peak / tau_decay_ms) - math.exp(-t_peak / tau_rise_ms))


# Above this mean count per sample the search below would take many steps; the count is
# then drawn from the normal approximation N(mean, mean), rounded (common practice for
# Poisson means of several tens; far beyond the 0.1 per sample that the loader warns at).
_POISSON_SEARCH_MAX_MEAN = 30.0


@kernel
def poisson_count(rng: np.ndarray, row: int, mean: float) -> int:
    """A Poisson-distributed count with mean ``mean`` from one uniform deviate.

    Inversion by sequential search (Devroye 1986, Non-Uniform Random Variate Generation,
    section X.3.2): the smallest k with P(N <= k) >= u, P(N = k) = e^-m m^k / k!.
    """
    if mean <= 0.0:
        return 0
    if mean > _POISSON_SEARCH_MAX_MEAN:
        return max(0, math.floor(mean + math.sqrt(mean) * normal(rng, row) + 0.5))
    u = uniform(rng, row)
    p = math.exp(-mean)
    cdf = p
    k = 0
    while u > cdf and p > 0.0:  # p > 0: ends even when rounding keeps cdf just below u
        k += 1
        p *= mean / k
        cdf += p
    return k


@kernel
def synapse_events(
    pa: ProgramArrays, row: int, t_ms: float, dt_ms: float, cell_spiked: bool
) -> int:
    """Presynaptic events at this sample for the synapse of ``row`` (0, 1, or more for a
    dense train); ``pa``: the program's arrays (a neuron source's spike flag is in its state).
    """
    p, s, rng, trains, state = pa.params[row], pa.state[row], pa.rng, pa.trains, pa.state
    source = int(p[P_SOURCE])
    if source == SRC_POISSON:
        return poisson_count(rng, row, p[P_RATE] * dt_ms * 1e-3)
    if source == SRC_TRAIN:
        start = int(p[P_TRAIN_START])
        count = int(p[P_TRAIN_COUNT])
        events = 0
        pos = int(s[S_TRAIN_POS])
        while pos < count and trains[start + pos] < t_ms + 0.5 * dt_ms:
            pos += 1
            events += 1
        s[S_TRAIN_POS] = pos
        return events
    if source == SRC_CELL:
        late = int(s[S_LATE])
        s[S_LATE] = 0.0
        return late + (1 if cell_spiked else 0)
    return 1 if state[int(p[P_SOURCE_ROW]), NEURON_S_SPIKED] != 0.0 else 0


@kernel
def _event_weight(p: np.ndarray, s: np.ndarray, t_ms: float) -> float:
    """g_max times the Tsodyks-Markram efficacy u R / U of an event at ``t_ms``."""
    tau_rec = p[P_TAU_REC]
    tau_facil = p[P_TAU_FACIL]
    if tau_rec <= 0.0 and tau_facil <= 0.0:
        return p[P_G_MAX]
    big_u = p[P_U]
    if math.isinf(s[S_LAST_MS]):
        u, r = big_u, 1.0
    else:
        gap = t_ms - s[S_LAST_MS]
        u = big_u + s[S_U] * (1.0 - big_u) * math.exp(-gap / tau_facil) if tau_facil > 0 else big_u
        r = 1.0 + (s[S_R] * (1.0 - s[S_U]) - 1.0) * math.exp(-gap / tau_rec) if tau_rec > 0 else 1.0
    s[S_U], s[S_R], s[S_LAST_MS] = u, r, t_ms
    return p[P_G_MAX] * u * r / big_u


@kernel
def synapse_conductance(
    p: np.ndarray, s: np.ndarray, events: int, t_ms: float, dt_ms: float
) -> float:
    """Decay over one sample, add this sample's events, return g in nS."""
    kinetics = int(p[P_KINETICS])
    if kinetics == KIN_EXP:
        s[S_A] *= decay_factor(s, S_DECAY_A, p[P_TAU_DECAY], dt_ms)
    elif kinetics == KIN_ALPHA:
        decay = decay_factor(s, S_DECAY_A, p[P_TAU_ALPHA], dt_ms)
        s[S_A] = (s[S_A] + dt_ms * s[S_B]) * decay
        s[S_B] *= decay
    else:
        s[S_A] *= decay_factor(s, S_DECAY_A, p[P_TAU_DECAY], dt_ms)
        s[S_B] *= decay_factor(s, S_DECAY_B, p[P_TAU_RISE], dt_ms)
    if abs(s[S_A]) < _G_FLOOR_NS and abs(s[S_B]) < _G_FLOOR_NS:
        s[S_A] = 0.0
        s[S_B] = 0.0
    for _ in range(events):
        w = _event_weight(p, s, t_ms)
        s[S_EVENTS] += 1.0
        if kinetics == KIN_EXP:
            s[S_A] += w
        elif kinetics == KIN_ALPHA:
            s[S_B] += w * math.e / p[P_TAU_ALPHA]
        else:
            f = dual_exp_peak_factor(p[P_TAU_RISE], p[P_TAU_DECAY])
            s[S_A] += f * w
            s[S_B] += f * w
    if kinetics == KIN_DUAL:
        return s[S_A] - s[S_B]
    return s[S_A]
