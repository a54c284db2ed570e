"""The per-sample step: every element of an experiment, at one sample.

``step(v_mV, n, ...)`` takes the membrane potential measured at sample ``n``
and returns the command current (pA) to inject from the next sample on. It is
the one function that the offline simulation, the serial loop and the
benchmarks all call.

Real-time rules for everything called from here: compiled with
``@njit(cache=True, nogil=True)``; no allocation, no I/O, no locks, no Python
objects; parameters are read from arrays every sample so a running loop can
change them between samples.

Order within a sample:

1. Guard the input: a non-finite V or |V| > v_fault_mV injects 0 pA and flags
   ``FAULT_BAD_V``; nothing else is advanced.
2. Spike detection on V (upward crossing of spike_threshold_mV, re-armed
   when V falls below threshold - hysteresis) and the ``threshold_reset``
   elements. Either one makes the recorded cell spike at this sample.
3. Leaks, synapses, noise and current waveforms: each element's conductance and
   current, summed onto the cell or gathered by the neuron it targets.
4. Virtual neurons advance with their gathered synaptic current; a spike
   reaches their synapses at the next sample.
5. Guard the output: non-finite -> 0 pA and ``FAULT_NONFINITE``; beyond
   max_current_pA -> clipped and ``FLAG_LIMITED``.

Public names: ``step``, the ``LP_*``/``LS_*`` loop-array columns, and the
``FAULT_*``/``FLAG_*`` bits.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.elements import (
    KIND_LEAK,
    KIND_NEURON,
    KIND_NOISE,
    KIND_SYNAPSE,
    KIND_THRESHOLD_RESET,
    P_ENABLED,
    P_TARGET,
)
from clampcore.elements import leak as _leak
from clampcore.elements import neuron as _neuron
from clampcore.elements import noise as _noise
from clampcore.elements import synapse as _syn
from clampcore.elements import threshold_reset as _tr
from clampcore.elements.current import current_waveform
from clampcore.jit import kernel

# Loop parameters (float64 array ``loop_p``).
LP_DT_MS = 0
LP_MAX_CURRENT_PA = 1
LP_SPIKE_THRESHOLD_MV = 2
LP_SPIKE_HYSTERESIS_MV = 3
LP_V_FAULT_MV = 4
N_LOOP_PARAMS = 5

# Loop state (float64 array ``loop_s``).
LS_ARMED = 0  # detector armed (V went below threshold - hysteresis)
LS_CELL_SPIKED = 1  # 1.0 when the cell spiked at this sample
LS_SPIKES = 2  # cell spikes counted
LS_FLAGS = 3  # FAULT_*/FLAG_* bits of this sample
LS_N_FAULT = 4  # samples that injected 0 pA because of a fault
LS_N_LIMITED = 5  # samples whose command was clipped to max_current_pA
N_LOOP_STATE = 6

FAULT_BAD_V = 1
FAULT_NONFINITE = 2
FLAG_LIMITED = 4


@kernel
def _detect_cell_spike(v_mV: float, loop_p: np.ndarray, loop_s: np.ndarray) -> bool:
    threshold = loop_p[LP_SPIKE_THRESHOLD_MV]
    if loop_s[LS_ARMED] != 0.0:
        if v_mV >= threshold:
            loop_s[LS_ARMED] = 0.0
            return True
    elif v_mV < threshold - loop_p[LP_SPIKE_HYSTERESIS_MV]:
        loop_s[LS_ARMED] = 1.0
    return False


@kernel
def step(
    v_mV: float,
    n: int,
    kind: np.ndarray,
    params: np.ndarray,
    state: np.ndarray,
    rng: np.ndarray,
    trains: np.ndarray,
    g_out: np.ndarray,
    i_out: np.ndarray,
    loop_p: np.ndarray,
    loop_s: np.ndarray,
) -> float:
    """Command current (pA) for sample ``n`` at measured ``v_mV``; see the module doc."""
    dt_ms = loop_p[LP_DT_MS]
    t_ms = n * dt_ms
    loop_s[LS_CELL_SPIKED] = 0.0
    if not math.isfinite(v_mV) or abs(v_mV) > loop_p[LP_V_FAULT_MV]:
        loop_s[LS_FLAGS] = FAULT_BAD_V
        loop_s[LS_N_FAULT] += 1.0
        g_out[:] = 0.0
        i_out[:] = 0.0
        return 0.0
    n_el = kind.shape[0]
    total = 0.0

    # 2. Spikes of the recorded cell.
    detected = _detect_cell_spike(v_mV, loop_p, loop_s)
    imposed = False
    clamping = False
    for r in range(n_el):
        if kind[r] != KIND_THRESHOLD_RESET:
            continue
        if params[r, P_ENABLED] == 0.0:
            g_out[r] = 0.0
            i_out[r] = 0.0
            continue
        was_on = state[r, _tr.S_REMAIN] > 0.0
        clamping = clamping or was_on
        i = _tr.threshold_reset_step(params[r], state[r], v_mV, dt_ms)
        imposed = imposed or state[r, _tr.S_SPIKED] != 0.0
        # The clamp's conductance is on while it clamps, even when V sits exactly at reset.
        on = was_on or state[r, _tr.S_SPIKED] != 0.0
        g_out[r] = params[r, _tr.P_G] if on else 0.0
        i_out[r] = i
        total += i
    # A detector crossing during an imposed reset is the same spike, not a new one.
    cell_spiked = imposed or (detected and not clamping)
    if cell_spiked:
        loop_s[LS_CELL_SPIKED] = 1.0
        loop_s[LS_SPIKES] += 1.0

    # 3. Conductances and currents.
    for r in range(n_el):
        k = kind[r]
        if k in (KIND_THRESHOLD_RESET, KIND_NEURON):
            continue
        p = params[r]
        if p[P_ENABLED] == 0.0:
            g_out[r] = 0.0
            i_out[r] = 0.0
            continue
        target = int(p[P_TARGET])
        v_target = v_mV if target < 0 else state[target, _neuron.S_V]
        if k == KIND_LEAK:
            g = p[_leak.P_G]
            i = _leak.leak_current(p, v_target)
        elif k == KIND_SYNAPSE:
            events = _syn.synapse_events(
                p, state[r], rng, r, trains, t_ms, dt_ms, cell_spiked, state
            )
            g = _syn.synapse_conductance(p, state[r], events, t_ms, dt_ms)
            i = -g * _syn.mg_block(v_target, p[_syn.P_MG]) * (v_target - p[_syn.P_E])
        elif k == KIND_NOISE:
            g = _noise.noise_conductance(p, state[r], rng, r, dt_ms)
            i = -g * (v_target - p[_noise.P_E])
        else:  # KIND_CURRENT
            g = 0.0
            i = current_waveform(p, state[r], rng, r, t_ms, dt_ms)
        g_out[r] = g
        i_out[r] = i
        if target < 0:
            total += i
        else:
            state[target, _neuron.S_ISYN] += i

    # 4. Virtual neurons.
    for r in range(n_el):
        if kind[r] != KIND_NEURON:
            continue
        g_out[r] = 0.0
        i_out[r] = 0.0
        if params[r, P_ENABLED] == 0.0:
            state[r, _neuron.S_SPIKED] = 0.0
            state[r, _neuron.S_ISYN] = 0.0
            continue
        _neuron.neuron_step(params[r], state[r], n, dt_ms)

    # 5. Output guard.
    limit = loop_p[LP_MAX_CURRENT_PA]
    if not math.isfinite(total):
        loop_s[LS_FLAGS] = FAULT_NONFINITE
        loop_s[LS_N_FAULT] += 1.0
        return 0.0
    if abs(total) > limit:
        loop_s[LS_FLAGS] = FLAG_LIMITED
        loop_s[LS_N_LIMITED] += 1.0
        return limit if total > 0 else -limit
    loop_s[LS_FLAGS] = 0.0
    return total
