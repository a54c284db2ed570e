"""``threshold_reset``: the leaky integrate-and-fire rule imposed on a real membrane.

When the measured V reaches ``threshold_mV`` (V >= theta) outside the
refractory period, a spike is counted and, for ``refractory_ms``, a clamp
conductance pulls V to the reset: I = -g_clamp (V - V_reset). Then the membrane
is released. This is the integrate-and-fire rule as written (threshold on the
level, not on an upward crossing): a membrane the clamp could not bring below
threshold in time (a late command, a current limit) fires and is clamped again
at the end of the refractory period instead of staying stranded above threshold.

Public names: ``SPEC``, ``threshold_reset_step``, ``S_COUNT``, ``S_SPIKED``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from clampcore.elements.spec import ElementSpec, Problem, refractory_problem
from clampcore.fields import Field
from clampcore.jit import kernel

FIELDS = (
    Field("threshold_mV", -50.0),
    Field("reset_mV", -65.0),
    # 1-2 ms: typical absolute refractory period of neurons (common practice).
    Field("refractory_ms", 2.0, "positive"),
    # Clamp conductance: large against a whole-cell leak of 2-20 nS (common practice), so
    # V reaches reset within about C/g (2 ms for 100 pF and 50 nS).
    Field("g_nS", 50.0, "positive"),
)


def _check(el: dict[str, Any], dt_ms: float) -> Problem:
    problem = refractory_problem(el, dt_ms)
    if problem is None and not el["reset_mV"] < el["threshold_mV"]:
        return "reset_mV", "must be below threshold_mV"
    return problem


SPEC = ElementSpec(
    "threshold_reset",
    code=1,
    fields=FIELDS,
    params=("threshold_mV", "reset_mV", "refractory_ms", "g_nS"),
    # remain: samples of clamp still to apply; count: spikes counted; spiked: 1.0 when
    # this sample fired.
    state=("remain_samples", "count", "spiked"),
    conductance=True,
    check=_check,
    feedback_nS=lambda el: (0.0, el["g_nS"]),
)
P_THRESHOLD = SPEC.param("threshold_mV")
P_RESET = SPEC.param("reset_mV")
P_REFRACTORY = SPEC.param("refractory_ms")
P_G = SPEC.param("g_nS")

S_REMAIN = SPEC.state_col("remain_samples")
S_COUNT = SPEC.state_col("count")
S_SPIKED = SPEC.state_col("spiked")


@kernel
def threshold_reset_step(p: np.ndarray, s: np.ndarray, v_mV: float, dt_ms: float) -> float:
    """Advance one sample; returns the clamp current in pA. ``s[S_REMAIN]`` jumps on a spike."""
    s[S_SPIKED] = 0.0
    if s[S_REMAIN] <= 0.0 and v_mV >= p[P_THRESHOLD]:
        s[S_COUNT] += 1.0
        s[S_SPIKED] = 1.0
        # The clamp is applied for ceil(refractory / dt) samples (1e-9 absorbs rounding).
        s[S_REMAIN] = math.ceil(p[P_REFRACTORY] / dt_ms - 1e-9)
    if s[S_REMAIN] > 0.0:
        s[S_REMAIN] -= 1.0
        return -p[P_G] * (v_mV - p[P_RESET])
    return 0.0
