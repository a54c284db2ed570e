"""``threshold_reset``: the leaky integrate-and-fire rule imposed on a real membrane.

When the measured V crosses ``threshold_mV`` upwards (V[n-1] < theta <= V[n]),
a spike is counted and, for ``refractory_ms``, a clamp conductance pulls V to
the reset: I = -g_clamp (V - V_reset). Then the membrane is released. A new
spike needs a new upward crossing after the release.

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

S_PREV_V = 0  # V at the previous sample (NaN before the first: no spike at start)
S_REMAIN = 1  # samples of clamp still to apply
S_COUNT = 2  # spikes counted
S_SPIKED = 3  # 1.0 when this sample crossed threshold


@kernel
def threshold_reset_step(p: np.ndarray, s: np.ndarray, v_mV: float, dt_ms: float) -> float:
    """Advance one sample; returns the clamp current in pA. ``s[S_REMAIN]`` jumps on a spike."""
    s[S_SPIKED] = 0.0
    if s[S_REMAIN] <= 0.0 and s[S_PREV_V] < p[P_THRESHOLD] <= v_mV:
        s[S_COUNT] += 1.0
        s[S_SPIKED] = 1.0
        # The clamp is applied for ceil(refractory / dt) samples (1e-9 absorbs rounding).
        s[S_REMAIN] = math.ceil(p[P_REFRACTORY] / dt_ms - 1e-9)
    s[S_PREV_V] = v_mV
    if s[S_REMAIN] > 0.0:
        s[S_REMAIN] -= 1.0
        return -p[P_G] * (v_mV - p[P_RESET])
    return 0.0
