"""``leak``: a fixed virtual conductance, I = -g (V - E).

A negative ``g_nS`` cancels part of the cell's own leak (raises its input
resistance). Public names: ``SPEC``, ``leak_current``.
"""

from __future__ import annotations

import numpy as np

from clampcore.elements.spec import ElementSpec
from clampcore.fields import Field
from clampcore.jit import kernel

FIELDS = (
    Field("g_nS", 0.0, "real", doc="may be negative to cancel part of the cell's own leak"),
    Field("e_mV", -70.0, doc="reversal potential"),
)

SPEC = ElementSpec(
    "leak",
    code=0,
    fields=FIELDS,
    params=("g_nS", "e_mV"),
    conductance=True,
    feedback_nS=lambda el: (el["g_nS"], el["g_nS"]),
)
P_G = SPEC.param("g_nS")
P_E = SPEC.param("e_mV")


@kernel
def leak_current(p: np.ndarray, v_mV: float) -> float:
    """Current in pA (nS x mV) that the leak passes at ``v_mV``."""
    return -p[P_G] * (v_mV - p[P_E])
