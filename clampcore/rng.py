"""Seeded random numbers for compiled per-sample code.

Every element and model cell that needs randomness owns one 64-bit state word in
a ``uint64`` array, so each stream is reproducible on its own whatever the order
of elements, and identical in offline simulation and in the running loop.

The generator is SplitMix64 (Steele, Lea & Flood 2014, "Fast splittable
pseudorandom number generators", OOPSLA; constants from that paper); normal
deviates use the Box–Muller transform (Box & Muller 1958).

Public names: ``seed_state``, ``next_u64``, ``uniform``, ``normal``, ``normal_cached``.
"""

from __future__ import annotations

import math
import os
import warnings

import numpy as np

from clampcore.jit import kernel

_GOLDEN_GAMMA = np.uint64(0x9E3779B97F4A7C15)  # SplitMix64 increment (Steele et al. 2014)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)  # SplitMix64 finaliser constants (Steele et al. 2014)
_MIX2 = np.uint64(0x94D049BB133111EB)
_TWO_POW_53 = 9007199254740992.0  # 2**53: a double has 53 bits of mantissa

if os.environ.get("NUMBA_DISABLE_JIT") == "1":
    # As plain Python, numpy warns on the uint64 wrap-around that SplitMix64 relies on.
    warnings.filterwarnings("ignore", "overflow encountered in scalar", RuntimeWarning)


def seed_state(seed: int, stream: int = 0) -> np.uint64:
    """A state word for ``seed`` and a per-element ``stream`` number (distinct streams)."""
    mixed = (int(seed) * 0x100000001B3 + int(stream) * 0x9E3779B97F4A7C15) & 0xFFFFFFFFFFFFFFFF
    return np.uint64(mixed)


@kernel
def next_u64(state: np.ndarray, i: int) -> np.uint64:
    """Advance ``state[i]`` and return the next 64-bit output (SplitMix64)."""
    z = state[i] + _GOLDEN_GAMMA
    state[i] = z
    z = (z ^ (z >> np.uint64(30))) * _MIX1
    z = (z ^ (z >> np.uint64(27))) * _MIX2
    return z ^ (z >> np.uint64(31))


@kernel
def uniform(state: np.ndarray, i: int) -> float:
    """A uniform deviate in [0, 1) from ``state[i]``."""
    return float(next_u64(state, i) >> np.uint64(11)) / _TWO_POW_53


@kernel
def normal(state: np.ndarray, i: int) -> float:
    """A standard normal deviate from ``state[i]`` (Box–Muller, one value per call)."""
    u1 = 1.0 - uniform(state, i)  # in (0, 1]: log is finite
    u2 = uniform(state, i)
    return math.sqrt(-2.0 * math.log(u1)) * math.cos(2.0 * math.pi * u2)


@kernel
def normal_cached(state: np.ndarray, i: int, spare: np.ndarray, col: int) -> float:
    """A standard normal deviate; Box–Muller's second value is kept in ``spare[col]``.

    ``spare[col + 1]`` is 1.0 while a kept value waits. Half the cost of ``normal``.
    """
    if spare[col + 1] != 0.0:
        spare[col + 1] = 0.0
        return spare[col]
    u1 = 1.0 - uniform(state, i)
    u2 = uniform(state, i)
    radius = math.sqrt(-2.0 * math.log(u1))
    spare[col] = radius * math.sin(2.0 * math.pi * u2)
    spare[col + 1] = 1.0
    return radius * math.cos(2.0 * math.pi * u2)
