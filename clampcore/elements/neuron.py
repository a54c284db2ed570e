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

Public names: ``SPEC``, ``MODEL_CODES``, ``neuron_step``, ``S_V``,
``S_SPIKED``, ``S_ISYN``, ``S_COUNT``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.elements.spec import ElementSpec, Problem, RowContext, refractory_problem
from clampcore.fields import Field, only
from clampcore.jit import kernel

FIELDS = (
    Field("model", "lif", "choice", live=False, choices=("lif", "eif", "adex")),
    # LIF defaults: C 200 pF, gL 10 nS (tau 20 ms), EL -70, threshold -50, reset -70,
    # refractory 2 ms: a typical cortical cell (common practice).
    Field("capacitance_pF", 200.0, "positive"),
    Field("leak_nS", 10.0, "positive"),
    Field("rest_mV", -70.0),
    Field("threshold_mV", -50.0, doc="lif: spike threshold; eif/adex: V_T"),
    Field("reset_mV", -70.0),
    Field("refractory_ms", 2.0, "positive"),
    # EIF/AdEx shape: delta_T 2 mV, a 4 nS, b 80.5 pA, tau_w 144 ms (Brette & Gerstner 2005).
    Field("delta_t_mV", 2.0, "positive", when=only("model", "eif", "adex")),
    Field(
        "v_peak_mV",
        0.0,
        doc="eif/adex: a spike is cut here",
        when=only("model", "eif", "adex"),
    ),
    Field("a_nS", 4.0, "real", when=only("model", "adex")),
    Field("b_pA", 80.5, "real", when=only("model", "adex")),
    Field("tau_w_ms", 144.0, "positive", when=only("model", "adex")),
    Field("bias_pA", 0.0, doc="constant current into the virtual neuron"),
)


def _check(el: dict[str, Any], dt_ms: float) -> Problem:
    problem = refractory_problem(el, dt_ms)
    if problem is not None:
        return problem
    if not el["reset_mV"] < el["threshold_mV"]:
        return "reset_mV", "must be below threshold_mV"
    if el["model"] != "lif" and not el["v_peak_mV"] > el["threshold_mV"]:
        return "v_peak_mV", "must be above threshold_mV"
    return None


def _init(p: np.ndarray, s: np.ndarray, el: dict[str, Any], ctx: RowContext) -> None:
    s[S_V] = el["rest_mV"]
    s[S_LAST_SPIKE] = -math.inf


SPEC = ElementSpec(
    "neuron",
    code=4,
    fields=FIELDS,
    params=(
        "model",
        "capacitance_pF",
        "leak_nS",
        "rest_mV",
        "threshold_mV",
        "reset_mV",
        "refractory_ms",
        "delta_t_mV",
        "v_peak_mV",
        "a_nS",
        "b_pA",
        "tau_w_ms",
        "bias_pA",
    ),
    state=(
        "v_mV",
        "w_pA",
        "last_spike_sample",  # sample index of the last spike (-inf before the first)
        "isyn_pA",  # synaptic current gathered during this sample
        "spiked",  # 1.0 when the neuron spiked at this sample
        "count",
        "decay_tau_ms",  # cached LIF decay (tau, factor), clampcore.elements.decay
        "decay_factor",
    ),
    init=_init,
    check=_check,
    describe=lambda el: f" {el['model']}",
)
MODEL_CODES = SPEC.codes("model")
MODEL_LIF, MODEL_EIF, MODEL_ADEX = (MODEL_CODES[m] for m in ("lif", "eif", "adex"))

P_MODEL = SPEC.param("model")
P_C = SPEC.param("capacitance_pF")
P_GL = SPEC.param("leak_nS")
P_EL = SPEC.param("rest_mV")
P_VT = SPEC.param("threshold_mV")
P_RESET = SPEC.param("reset_mV")
P_REFRACTORY = SPEC.param("refractory_ms")
P_DELTA_T = SPEC.param("delta_t_mV")
P_V_PEAK = SPEC.param("v_peak_mV")
P_A = SPEC.param("a_nS")
P_B = SPEC.param("b_pA")
P_TAU_W = SPEC.param("tau_w_ms")
P_BIAS = SPEC.param("bias_pA")

S_V = SPEC.state_col("v_mV")
S_W = SPEC.state_col("w_pA")
S_LAST_SPIKE = SPEC.state_col("last_spike_sample")
S_ISYN = SPEC.state_col("isyn_pA")
S_SPIKED = SPEC.state_col("spiked")
S_COUNT = SPEC.state_col("count")
S_DECAY = SPEC.state_col("decay_tau_ms")


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
