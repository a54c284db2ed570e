"""``leak``: a fixed virtual conductance, I = -g (V - E).

A negative ``g_nS`` cancels part of the cell's own leak (raises its input
resistance). Public names: ``COLUMNS``, ``leak_current``.
"""

from __future__ import annotations

import numpy as np

from clampcore.jit import kernel

P_G = 2
P_E = 3
COLUMNS = {"g_nS": P_G, "e_mV": P_E}


@kernel
def leak_current(p: np.ndarray, v_mV: float) -> float:
    """Current in pA (nS x mV) that the leak passes at ``v_mV``."""
    return -p[P_G] * (v_mV - p[P_E])
