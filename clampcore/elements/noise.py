"""``noise``: a fluctuating background conductance, I = -g (V - E).

g follows an Ornstein–Uhlenbeck process with mean ``g_mean_nS``, stationary SD
``g_sd_nS`` and correlation time ``tau_ms`` (the point-conductance model of
Destexhe, Rudolph, Fellous & Sejnowski 2001, Neuroscience 107:13), advanced
with the exact update of Gillespie 1996 (Phys Rev E 54:2084):

    g <- mu + (g - mu) exp(-h/tau) + sigma sqrt(1 - exp(-2h/tau)) N(0, 1)

The process itself is not clipped (its statistics stay those of the OU
process); the conductance applied to the cell is max(g, 0).

Public names: ``COLUMNS``, ``ou_exact_step``, ``noise_conductance``.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.jit import kernel
from clampcore.rng import normal_cached

P_G_MEAN = 2
P_G_SD = 3
P_TAU = 4
P_E = 5
COLUMNS = {"g_mean_nS": P_G_MEAN, "g_sd_nS": P_G_SD, "tau_ms": P_TAU, "e_mV": P_E}

S_G = 0  # the OU process (unclipped), nS
S_DECAY = 1  # cached decay (tau, factor): columns 1, 2
S_SPARE = 3  # Box–Muller spare deviate and its flag: columns 3, 4


@kernel
def ou_exact_step(x: float, mean: float, sd: float, decay: float, z: float) -> float:
    """One exact Ornstein–Uhlenbeck update (Gillespie 1996).

    ``decay`` = exp(-dt/tau); ``z`` a standard normal deviate.
    """
    return mean + (x - mean) * decay + sd * math.sqrt(1.0 - decay * decay) * z


@kernel
def noise_conductance(
    p: np.ndarray, s: np.ndarray, rng: np.ndarray, row: int, dt_ms: float
) -> float:
    """Advance the process one sample; return the applied conductance (>= 0) in nS."""
    decay = decay_factor(s, S_DECAY, p[P_TAU], dt_ms)
    z = normal_cached(rng, row, s, S_SPARE)
    s[S_G] = ou_exact_step(s[S_G], p[P_G_MEAN], p[P_G_SD], decay, z)
    return max(s[S_G], 0.0)
