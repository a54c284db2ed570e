"""``noise``: a fluctuating background conductance, I = -g (V - E).

g follows an Ornstein–Uhlenbeck process with mean ``g_mean_nS``, stationary SD
``g_sd_nS`` and correlation time ``tau_ms`` (the point-conductance model of
Destexhe, Rudolph, Fellous & Sejnowski 2001, Neuroscience 107:13), advanced
with the exact update of Gillespie 1996 (Phys Rev E 54:2084):

    g <- mu + (g - mu) exp(-h/tau) + sigma sqrt(1 - exp(-2h/tau)) N(0, 1)

The process itself is not clipped (its statistics stay those of the OU
process); the conductance applied to the cell is max(g, 0).

Public names: ``SPEC``, ``NOISE_SD_COUNTED``, ``ou_exact_step``, ``noise_conductance``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.elements.spec import ElementSpec, RowContext
from clampcore.fields import Field
from clampcore.jit import kernel
from clampcore.rng import normal_cached

FIELDS = (
    # Defaults: excitatory background of the point-conductance model (Destexhe et al.
    # 2001, Neuroscience 107:13): g_e0 = 12 nS, sigma_e = 3 nS, tau_e = 2.7 ms.
    Field("g_mean_nS", 12.0, "nonnegative"),
    Field("g_sd_nS", 3.0, "nonnegative"),
    Field("tau_ms", 2.7, "positive"),
    Field("e_mV", 0.0),
    Field("seed", 0, "int", live=False),
)

# The loop-stability bound (clampcore.stability) counts a noise conductance as mean + 3 SD
# (Gaussian: exceeded 0.13% of the time).
NOISE_SD_COUNTED = 3.0


def _init(p: np.ndarray, s: np.ndarray, el: dict[str, Any], ctx: RowContext) -> None:
    s[S_G] = el["g_mean_nS"]  # the OU process starts at its mean


SPEC = ElementSpec(
    "noise",
    code=3,
    fields=FIELDS,
    params=("g_mean_nS", "g_sd_nS", "tau_ms", "e_mV"),
    # g_nS: the OU process (unclipped); decay_*: the cached decay (clampcore.elements.decay);
    # spare*: the Box–Muller spare deviate and its flag (clampcore.rng.normal_cached).
    state=("g_nS", "decay_tau_ms", "decay_factor", "spare", "spare_ready"),
    conductance=True,
    init=_init,
    feedback_nS=lambda el: (0.0, el["g_mean_nS"] + NOISE_SD_COUNTED * el["g_sd_nS"]),
)
P_G_MEAN = SPEC.param("g_mean_nS")
P_G_SD = SPEC.param("g_sd_nS")
P_TAU = SPEC.param("tau_ms")
P_E = SPEC.param("e_mV")

S_G = SPEC.state_col("g_nS")
S_DECAY = SPEC.state_col("decay_tau_ms")
S_SPARE = SPEC.state_col("spare")


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
