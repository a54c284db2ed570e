"""``current``: a command waveform added to the injected current.

While on (start_ms <= t < start_ms + duration_ms; t_on = t - start_ms) the
element passes ``offset_pA`` plus:

- ``step``: amplitude_pA
- ``train``: amplitude_pA during the first pulse_ms of every period_ms
- ``ramp``: amplitude_pA * t_on / duration_ms (0 to amplitude)
- ``sine``: amplitude_pA * sin(2 pi frequency_hz t_on)
- ``white``: Gaussian, SD amplitude_pA, a new value every sample (seeded)
- ``coloured``: Ornstein–Uhlenbeck, SD amplitude_pA, correlation time tau_ms
  (exact update, Gillespie 1996)

Public names: ``COLUMNS``, ``WAVEFORM_CODES``, ``current_waveform``.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.elements.noise import ou_exact_step
from clampcore.jit import kernel
from clampcore.rng import normal_cached

WF_STEP, WF_TRAIN, WF_RAMP, WF_SINE, WF_WHITE, WF_COLOURED = 0, 1, 2, 3, 4, 5
WAVEFORM_CODES = {
    "step": WF_STEP,
    "train": WF_TRAIN,
    "ramp": WF_RAMP,
    "sine": WF_SINE,
    "white": WF_WHITE,
    "coloured": WF_COLOURED,
}

P_WAVEFORM = 2
P_AMPLITUDE = 3
P_OFFSET = 4
P_START = 5
P_DURATION = 6
P_PERIOD = 7
P_PULSE = 8
P_FREQUENCY = 9
P_TAU = 10
COLUMNS = {
    "amplitude_pA": P_AMPLITUDE,
    "offset_pA": P_OFFSET,
    "start_ms": P_START,
    "duration_ms": P_DURATION,
    "period_ms": P_PERIOD,
    "pulse_ms": P_PULSE,
    "frequency_hz": P_FREQUENCY,
    "tau_ms": P_TAU,
}

S_OU = 0  # coloured noise state, pA
S_DECAY = 1  # cached decay (tau, factor): columns 1, 2
S_SPARE = 3  # Box–Muller spare deviate and its flag: columns 3, 4


@kernel
def current_waveform(
    p: np.ndarray, s: np.ndarray, rng: np.ndarray, row: int, t_ms: float, dt_ms: float
) -> float:
    """The waveform's current in pA at ``t_ms``."""
    t_on = t_ms - p[P_START]
    if t_on < 0.0 or t_on >= p[P_DURATION]:
        return 0.0
    waveform = int(p[P_WAVEFORM])
    amp = p[P_AMPLITUDE]
    if waveform == WF_STEP:
        value = amp
    elif waveform == WF_TRAIN:
        value = amp if (t_on % p[P_PERIOD]) < p[P_PULSE] else 0.0
    elif waveform == WF_RAMP:
        value = amp * t_on / p[P_DURATION]
    elif waveform == WF_SINE:
        value = amp * math.sin(2.0 * math.pi * p[P_FREQUENCY] * t_on * 1e-3)
    elif waveform == WF_WHITE:
        value = amp * normal_cached(rng, row, s, S_SPARE)
    else:
        decay = decay_factor(s, S_DECAY, p[P_TAU], dt_ms)
        s[S_OU] = ou_exact_step(s[S_OU], 0.0, amp, decay, normal_cached(rng, row, s, S_SPARE))
        value = s[S_OU]
    return p[P_OFFSET] + value
