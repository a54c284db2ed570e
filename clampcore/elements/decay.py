"""Cached exponential decay factors for per-sample kernels.

exp(-dt/tau) changes only when tau (a live parameter) changes, so each element
keeps the tau it last used and the factor in two of its state columns and
recomputes only on a change: a comparison instead of an exp every sample.

Public names: ``decay_factor``.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.jit import kernel


@kernel
def decay_factor(s: np.ndarray, col: int, tau_ms: float, dt_ms: float) -> float:
    """exp(-dt/tau), cached in ``s[col]`` (tau) and ``s[col + 1]`` (factor)."""
    if s[col] != tau_ms:
        s[col] = tau_ms
        s[col + 1] = math.exp(-dt_ms / tau_ms)
    return s[col + 1]
