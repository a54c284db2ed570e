"""``threshold_reset``: the leaky integrate-and-fire rule imposed on a real membrane.

When the measured V reaches ``threshold_mV`` (V >= theta) outside the
refractory period, a spike is counted and, for ``refractory_ms``, a clamp
conductance pulls V to the reset: I = -g_clamp (V - V_reset). Then the membrane
is released. This is the integrate-and-fire rule as written (threshold on the
level, not on an upward crossing): a membrane the clamp could not bring below
threshold in time (a late command, a current limit) fires and is clamped again
at the end of the refractory period instead of staying stranded above threshold.

Public names: ``COLUMNS``, ``threshold_reset_step``, ``S_COUNT``, ``S_SPIKED``.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.jit import kernel

P_THRESHOLD = 2
P_RESET = 3
P_REFRACTORY = 4
P_G = 5
COLUMNS = {
    "threshold_mV": P_THRESHOLD,
    "reset_mV": P_RESET,
    "refractory_ms": P_REFRACTORY,
    "g_nS": P_G,
}

S_REMAIN = 0  # samples of clamp still to apply
S_COUNT = 1  # spikes counted
S_SPIKED = 2  # 1.0 when this sample fired


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
