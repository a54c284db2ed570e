"""A small test pulse and the input resistance read from it.

The pulse is an ordinary ``current`` element named ``test_pulse`` (a train of
``AMPLITUDE_PA`` for ``PULSE_MS`` every ``PERIOD_MS``), so its size and period are
in the experiment, shown in the form and recorded in the NWB file like any other
element. ``input_resistance_MOhm`` reads the newest complete pulse from the
membrane potential and the pulse's own current: R = ΔV / ΔI (Ohm's law), with ΔV
the mean potential over the pulse's last fifth minus the mean over the same time
just before it. The resistance is the cell's together with every virtual
conductance running (what the cell's input sees).

Public names: ``NAME``, ``ELEMENT``, ``AMPLITUDE_PA``, ``PULSE_MS``, ``PERIOD_MS``,
``describe``, ``input_resistance_MOhm``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

NAME = "test_pulse"
# -20 pA for 100 ms every second: a few mV across a 100-500 MΩ neuron, below what makes
# it fire or sag much; long against a 10-50 ms membrane time constant (common practice).
AMPLITUDE_PA = -20.0
PULSE_MS = 100.0
PERIOD_MS = 1000.0
# The pulse's last fifth and as long a baseline before it: the membrane has settled
# (100 ms is 2-10 time constants) and the means average the noise.
_SETTLED_SHARE = 0.2

ELEMENT: dict[str, Any] = {
    "kind": "current",
    "name": NAME,
    "waveform": "train",
    "amplitude_pA": AMPLITUDE_PA,
    "pulse_ms": PULSE_MS,
    "period_ms": PERIOD_MS,
    "start_ms": PERIOD_MS - PULSE_MS,  # a baseline before the first pulse
}


def describe(element: dict[str, Any]) -> str:
    """The pulse as a person says it: size, length, period."""
    return (
        f"{element['amplitude_pA']:g} pA for {element['pulse_ms']:g} ms "
        f"every {element['period_ms'] / 1000:g} s"
    )


def input_resistance_MOhm(v_mV: np.ndarray, pulse_pA: np.ndarray) -> float | None:
    """R = ΔV/ΔI of the newest complete pulse in these rows (MΩ: mV / pA × 1000), or None."""
    on = np.abs(pulse_pA) > 0
    edges = np.flatnonzero(np.diff(on.astype(np.int8)))
    # Pulses that start and end within the rows: a rising edge followed by a falling one.
    rises = [k + 1 for k in edges if not on[k]]
    falls = [k + 1 for k in edges if on[k]]
    for end in reversed(falls):
        start = max((r for r in rises if r < end), default=None)
        if start is None:
            continue
        settle = max(1, round(_SETTLED_SHARE * (end - start)))
        if start - settle < 0:
            return None
        dv = np.nanmean(v_mV[end - settle : end]) - np.nanmean(v_mV[start - settle : start])
        di = np.mean(pulse_pA[end - settle : end])
        return float(dv / di * 1000.0) if di != 0 else None
    return None
