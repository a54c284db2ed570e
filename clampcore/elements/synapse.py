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

Public names: ``COLUMNS``, the ``SRC_*`` and ``KIN_*`` codes, ``synapse_events``,
``synapse_conductance``, ``mg_block``, ``dual_exp_peak_factor``, ``poisson_count``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.jit import kernel
from clampcore.rng import normal, uniform

if TYPE_CHECKING:  # clampcore.program builds on the element modules
    from clampcore.program import ProgramArrays

KIN_EXP, KIN_ALPHA, KIN_DUAL = 0, 1, 2
KINETICS_CODES = {"exp": KIN_EXP, "alpha": KIN_ALPHA, "dual_exp": KIN_DUAL}
SRC_POISSON, SRC_TRAIN, SRC_CELL, SRC_NEURON = 0, 1, 2, 3

P_KINETICS = 2
P_G_MAX = 3
P_E = 4
P_TAU_DECAY = 5
P_TAU_RISE = 6
P_TAU_ALPHA = 7
P_MG = 8
P_U = 9
P_TAU_REC = 10
P_TAU_FACIL = 11
P_SOURCE = 12  # SRC_* code
P_SOURCE_ROW = 13  # row of the presynaptic neuron element
P_RATE = 14
P_TRAIN_START = 15  # first index of this synapse's times in the program's trains array
P_TRAIN_COUNT = 16
P_DELAY = 17  # cell source: synaptic delay in whole samples (from delay_ms)
COLUMNS = {
    "g_max_nS": P_G_MAX,
    "e_mV": P_E,
    "tau_decay_ms": P_TAU_DECAY,
    "tau_rise_ms": P_TAU_RISE,
    "tau_ms": P_TAU_ALPHA,
    "mg_mM": P_MG,
    "u_se": P_U,
    "tau_rec_ms": P_TAU_REC,
    "tau_facil_ms": P_TAU_FACIL,
    "rate_hz": P_RATE,
}

S_A = 0  # exp: g; alpha: g; dual_exp: decaying part
S_B = 1  # alpha: x; dual_exp: rising part
S_U = 2  # STP: u of the last event
S_R = 3  # STP: R of the last event
S_LAST_MS = 4  # time of the last event (-inf before the first)
S_TRAIN_POS = 5  # next index into the train
S_EVENTS = 6  # events counted
S_DECAY_A = 7  # cached decay of the first kinetic variable (tau, factor): columns 7, 8
S_DECAY_B = 9  # cached decay of the rising part (dual_exp): columns 9, 10
# cell source, law mode: spikes heard after this synapse's law for them was made, to be
# delivered at the next sample computed (clampcore.step.queue_late_cell_spike)
S_LATE = 11

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
