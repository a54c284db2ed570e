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

Public names: ``SPEC``, ``WAVEFORM_CODES``, ``current_waveform``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from clampcore.elements.decay import decay_factor
from clampcore.elements.noise import ou_exact_step
from clampcore.elements.spec import ElementSpec, Problem
from clampcore.fields import Field, only
from clampcore.jit import kernel
from clampcore.rng import normal_cached

FIELDS = (
    Field(
        "waveform",
        "step",
        "choice",
        live=False,
        choices=("step", "train", "ramp", "sine", "white", "coloured"),
    ),
    Field("amplitude_pA", 0.0, doc="step/train/sine: amplitude; ramp: final value; noise: SD"),
    Field("offset_pA", 0.0, doc="added while the waveform is on"),
    Field("start_ms", 0.0, "nonnegative"),
    Field("duration_ms", math.inf, "positive", allow_inf=True),
    Field("period_ms", 100.0, "positive", doc="train", when=only("waveform", "train")),
    Field("pulse_ms", 10.0, "positive", doc="train", when=only("waveform", "train")),
    Field("frequency_hz", 10.0, "positive", doc="sine", when=only("waveform", "sine")),
    Field(
        "tau_ms",
        5.0,
        "positive",
        doc="coloured noise correlation time",
        when=only("waveform", "coloured"),
    ),
    Field("seed", 0, "int", live=False, when=only("waveform", "white", "coloured")),
)


def _check(el: dict[str, Any], dt_ms: float) -> Problem:
    if el["waveform"] == "ramp" and math.isinf(el["duration_ms"]):
        # Refused rather than warned: its slope is amplitude_pA / duration_ms, so with the
        # default (infinite) duration it would hold offset_pA for the whole run, never ramping.
        return (
            "duration_ms",
            "a ramp needs a finite duration_ms (it rises by amplitude_pA over that time)",
        )
    if el["waveform"] == "train" and el["pulse_ms"] > el["period_ms"]:
        return "pulse_ms", "must not exceed period_ms"
    return None


SPEC = ElementSpec(
    "current",
    code=5,
    fields=FIELDS,
    params=(
        "waveform",
        "amplitude_pA",
        "offset_pA",
        "start_ms",
        "duration_ms",
        "period_ms",
        "pulse_ms",
        "frequency_hz",
        "tau_ms",
    ),
    # ou_pA: coloured noise; decay_*: the cached decay (clampcore.elements.decay);
    # spare*: the Box–Muller spare deviate and its flag (clampcore.rng.normal_cached).
    state=("ou_pA", "decay_tau_ms", "decay_factor", "spare", "spare_ready"),
    check=_check,
    describe=lambda el: f" {el['waveform']}",
)
WAVEFORM_CODES = SPEC.codes("waveform")
WF_STEP, WF_TRAIN, WF_RAMP, WF_SINE, WF_WHITE, WF_COLOURED = (
    WAVEFORM_CODES[w] for w in ("step", "train", "ramp", "sine", "white", "coloured")
)

P_WAVEFORM = SPEC.param("waveform")
P_AMPLITUDE = SPEC.param("amplitude_pA")
P_OFFSET = SPEC.param("offset_pA")
P_START = SPEC.param("start_ms")
P_DURATION = SPEC.param("duration_ms")
P_PERIOD = SPEC.param("period_ms")
P_PULSE = SPEC.param("pulse_ms")
P_FREQUENCY = SPEC.param("frequency_hz")
P_TAU = SPEC.param("tau_ms")

S_OU = SPEC.state_col("ou_pA")
S_DECAY = SPEC.state_col("decay_tau_ms")
S_SPARE = SPEC.state_col("spare")


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
