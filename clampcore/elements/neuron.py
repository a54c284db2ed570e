"""``neuron``: a virtual neuron simulated in the computer, for hybrid circuits.

Models (V in mV, currents in pA, C in pF, conductances in nS, t in ms):

- ``lif`` (leaky integrate-and-fire): C dV/dt = -gL (V - EL) + I; a spike when
  V > threshold_mV, then V = reset_mV. Advanced with the exact exponential
  update for input held over the sample.
- ``eif`` (exponential integrate-and-fire, Fourcaud-Trocmé et al. 2003):
  C dV/dt = -gL (V - EL) + gL dT exp((V - VT)/dT) + I; a spike when
  V > v_peak_mV.
- ``adex`` (adaptive exponential, Brette & Gerstner 2005, J Neurophysiol
  94:3637): the eif equation minus w, with tau_w dw/dt = a (V - EL) - w and
  w += b at each spike. eif and adex use the forward Euler step of one sample
  (both variables from their old values), as brian2's ``euler`` method does.

I is the sum of the synapses that target the neuron (computed with its V at
the start of the sample) plus ``bias_pA``. Refractoriness: for
N = round(refractory_ms / dt) samples from the spike's sample (the spike's own
sample included) V stays at reset and no spike is possible; w keeps evolving.

Public names: ``COLUMNS``, ``MODEL_CODES``, ``neuron_step``, ``S_V``,
``S_SPIKED``, ``S_ISYN``, ``S_COUNT``.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.jit import kernel

MODEL_LIF, MODEL_EIF, MODEL_ADEX = 0, 1, 2
MODEL_CODES = {"lif": MODEL_LIF, "eif": MODEL_EIF, "adex": MODEL_ADEX}

P_MODEL = 2
P_C = 3
P_GL = 4
P_EL = 5
P_VT = 6
P_RESET = 7
P_REFRACTORY = 8
P_DELTA_T = 9
P_V_PEAK = 10
P_A = 11
P_B = 12
P_TAU_W = 13
P_BIAS = 14
COLUMNS = {
    "capacitance_pF": P_C,
    "leak_nS": P_GL,
    "rest_mV": P_EL,
    "threshold_mV": P_VT,
    "reset_mV": P_RESET,
    "refractory_ms": P_REFRACTORY,
    "delta_t_mV": P_DELTA_T,
    "v_peak_mV": P_V_PEAK,
    "a_nS": P_A,
    "b_pA": P_B,
    "tau_w_ms": P_TAU_W,
    "bias_pA": P_BIAS,
}

S_V = 0
S_W = 1
S_LAST_SPIKE = 2  # sample index of the last spike (-inf before the first)
S_ISYN = 3  # synaptic current gathered during this sample, pA
S_SPIKED = 4  # 1.0 when the neuron spiked at this sample
S_COUNT = 5
S_DECAY = 6  # cached LIF decay (tau, factor): columns 6, 7


@kernel
def neuron_step(p: np.ndarray, s: np.ndarray, n: int, dt_ms: float) -> bool:
    """Advance one sample (index ``n``); True when the neuron spikes."""
    i_pA = s[S_ISYN] + p[P_BIAS]
    s[S_ISYN] = 0.0
    v = s[S_V]
    w = s[S_W]
    c, g_l, e_l = p[P_C], p[P_GL], p[P_EL]
    refractory = (n - s[S_LAST_SPIKE]) < round(p[P_REFRACTORY] / dt_ms)
    model = int(p[P_MODEL])
    if model == MODEL_LIF:
        if not refractory:
            v_inf = e_l + i_pA / g_l
            v = v_inf + (v - v_inf) * decay_factor(s, S_DECAY, c / g_l, dt_ms)
        threshold = p[P_VT]
    else:
        d_t = p[P_DELTA_T]
        dv = (-g_l * (v - e_l) + g_l * d_t * math.exp((v - p[P_VT]) / d_t) + i_pA - w) / c
        if model == MODEL_ADEX:
            w += dt_ms * (p[P_A] * (v - e_l) - w) / p[P_TAU_W]
        if not refractory:
            v += dt_ms * dv
        threshold = p[P_V_PEAK]
    spiked = (not refractory) and v > threshold
    if spiked:
        v = p[P_RESET]
        if model == MODEL_ADEX:
            w += p[P_B]
        s[S_LAST_SPIKE] = n
        s[S_COUNT] += 1.0
    s[S_V] = v
    s[S_W] = w
    s[S_SPIKED] = 1.0 if spiked else 0.0
    return spiked
