"""The per-sample step: every element of an experiment, at one sample.

``step(v_mV, n, pa)`` takes the membrane potential measured at sample ``n``
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
3. Leaks, synapses, noise and current waveforms: each element's conductance
   (``element_conductances``), which needs no V of the cell: it also sums the
   cell's *current law* I(V) = a - g V + B(V) (a_b - g_b V) into ``loop_s``,
   so the same pass serves a board that evaluates the law at its own fresh V.
   Elements on a virtual neuron pass their current at the neuron's V to it.
   Virtual neurons then advance with their gathered synaptic current; a spike
   reaches their synapses at the next sample.
4. The cell's element currents at this V (``cell_currents``), summed.
5. Guard the output: non-finite -> 0 pA and ``FAULT_NONFINITE``; beyond
   max_current_pA -> clipped and ``FLAG_LIMITED``.

Public names: ``step``, ``element_conductances``, ``cell_currents``,
``hist_record_cell_spike``, ``queue_late_cell_spike``, the ``LP_*`` loop-parameter
columns, the loop state's record type ``LOOP_STATE``, and the ``FAULT_*``/``FLAG_*`` bits.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from clampcore.elements import (
    KIND_CURRENT,
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

if TYPE_CHECKING:  # program.py builds on this module
    from clampcore.program import ProgramArrays

# Loop parameters (float64 array ``loop_p``).
LP_DT_MS = 0
LP_MAX_CURRENT_PA = 1
LP_SPIKE_THRESHOLD_MV = 2
LP_SPIKE_HYSTERESIS_MV = 3
LP_V_FAULT_MV = 4
LP_MG_MM = 5  # [Mg2+] of the cell's one Mg-blocked group (0: none); see ``element_conductances``
N_LOOP_PARAMS = 6

# Loop state: a record (``loop_s``, a structured array of length 1).
LOOP_STATE = np.dtype(
    [
        ("armed", np.bool_),  # detector armed (V went below threshold - hysteresis)
        ("cell_spiked", np.bool_),  # the cell spiked at this sample
        ("spikes", np.int64),  # cell spikes counted
        ("flags", np.int64),  # FAULT_*/FLAG_* bits of this sample
        ("n_fault", np.int64),  # samples that injected 0 pA because of a fault
        ("n_limited", np.int64),  # samples whose command was clipped to max_current_pA
        # The cell's current law at the last sample: I(V) = a - g V + B(V) (a_b - g_b V), pA
        # with V in mV, B the Mg2+ block of LP_MG_MM (every conductance is linear in V given g).
        ("law_a_pA", np.float64),
        ("law_g_nS", np.float64),
        ("law_ab_pA", np.float64),
        ("law_gb_nS", np.float64),
    ]
)

FAULT_BAD_V = 1
FAULT_NONFINITE = 2
FLAG_LIMITED = 4


@kernel
def _detect_cell_spike(v_mV: float, loop_p: np.ndarray, loop_s: np.ndarray) -> bool:
    threshold = loop_p[LP_SPIKE_THRESHOLD_MV]
    ls = loop_s[0]
    if ls["armed"]:
        if v_mV >= threshold:
            ls["armed"] = False
            return True
    elif v_mV < threshold - loop_p[LP_SPIKE_HYSTERESIS_MV]:
        ls["armed"] = True
    return False


@kernel
def hist_record_cell_spike(n: int, spiked: bool, spike_ring: np.ndarray) -> None:
    """Remember whether the cell spiked at sample ``n`` (read back by delayed synapses).

    ``spike_ring``: the program's history ring (its length a power of two). A spike is
    stored as n + 1, so a sample not heard yet (law mode, a slot still holding an older
    sample) never reads as a spike (``_heard_cell_spike``).
    """
    spike_ring[n & (spike_ring.shape[0] - 1)] = n + 1 if spiked else 0


@kernel
def _heard_cell_spike(j: int, spike_ring: np.ndarray) -> bool:
    """Whether the cell's spike of sample ``j`` is in the history ring."""
    return j >= 0 and spike_ring[j & (spike_ring.shape[0] - 1)] == j + 1


@kernel
def queue_late_cell_spike(m: int, hi: int, pa: ProgramArrays) -> int:
    """The cell's spike of sample ``m``, heard when the conductances of samples up to ``hi``
    are already made: every enabled cell-driven synapse whose delivery sample m + delay is
    among them missed it, and hears it at the first sample still to be made (hi + 1, through
    ``synapse.S_LATE``). Returns how many synapses heard it late."""
    late = 0
    for r in range(pa.kind.shape[0]):
        p = pa.params[r]
        if (
            pa.kind[r] == KIND_SYNAPSE
            and int(p[_syn.P_SOURCE]) == _syn.SRC_CELL
            and p[P_ENABLED] != 0.0
            and m + int(p[_syn.P_DELAY]) <= hi
        ):
            pa.state[r, _syn.S_LATE] += 1.0
            late += 1
    return late


@kernel
def element_conductances(n: int, pa: ProgramArrays) -> None:
    """Advance every element but threshold_reset to sample ``n``; sum the cell's law.

    Writes each element's conductance to ``g_out`` (nS) and its reversal potential to
    ``e_out`` (mV), the current of elements that do not depend on the cell's V (current
    waveforms, elements on virtual neurons) to ``i_out``, and the cell's law coefficients
    to ``loop_s``'s ``law_*`` fields.
    A cell-driven synapse hears the cell's spike of sample n - delay from the
    history ring (``hist_record_cell_spike`` must have run for that sample).
    """
    kind, params, state, rng = pa.kind, pa.params, pa.state, pa.rng
    g_out, i_out, loop_p, loop_s = pa.g_out, pa.i_out, pa.loop_p, pa.loop_s
    dt_ms = loop_p[LP_DT_MS]
    t_ms = n * dt_ms
    a_pA = 0.0
    g_nS = 0.0
    ab_pA = 0.0
    gb_nS = 0.0
    for r in range(kind.shape[0]):
        k = kind[r]
        if k in (KIND_THRESHOLD_RESET, KIND_NEURON):
            continue
        p = params[r]
        if p[P_ENABLED] == 0.0:
            g_out[r] = 0.0
            i_out[r] = 0.0
            continue
        target = int(p[P_TARGET])
        e_mV = 0.0
        blocked = False
        if k == KIND_LEAK:
            g = p[_leak.P_G]
            e_mV = p[_leak.P_E]
        elif k == KIND_SYNAPSE:
            heard = _heard_cell_spike(n - int(p[_syn.P_DELAY]), pa.spike_ring)
            events = _syn.synapse_events(pa, r, t_ms, dt_ms, heard)
            g = _syn.synapse_conductance(p, state[r], events, t_ms, dt_ms)
            e_mV = p[_syn.P_E]
            blocked = p[_syn.P_MG] > 0.0
        elif k == KIND_NOISE:
            g = _noise.noise_conductance(p, state[r], rng, r, dt_ms)
            e_mV = p[_noise.P_E]
        else:  # KIND_CURRENT: a current, the same at any V
            g = 0.0
            i_out[r] = current_waveform(p, state[r], rng, r, t_ms, dt_ms)
        g_out[r] = g
        pa.e_out[r] = e_mV
        if target >= 0:
            v_target = state[target, _neuron.S_V]
            if k != KIND_CURRENT:
                i_out[r] = (
                    -g
                    * _syn.mg_block(v_target, p[_syn.P_MG] if blocked else 0.0)
                    * (v_target - e_mV)
                )
            state[target, _neuron.S_ISYN] += i_out[r]
        elif k == KIND_CURRENT:
            a_pA += i_out[r]
        elif blocked:
            ab_pA += g * e_mV
            gb_nS += g
        else:
            a_pA += g * e_mV
            g_nS += g
    ls = loop_s[0]
    ls["law_a_pA"] = a_pA
    ls["law_g_nS"] = g_nS
    ls["law_ab_pA"] = ab_pA
    ls["law_gb_nS"] = gb_nS
    for r in range(kind.shape[0]):
        if kind[r] != KIND_NEURON:
            continue
        g_out[r] = 0.0
        i_out[r] = 0.0
        if params[r, P_ENABLED] == 0.0:
            state[r, _neuron.S_SPIKED] = 0.0
            state[r, _neuron.S_ISYN] = 0.0
            continue
        _neuron.neuron_step(params[r], state[r], n, dt_ms)


@kernel
def cell_currents(
    v_mV: float,
    kind: np.ndarray,
    params: np.ndarray,
    g_out: np.ndarray,
    i_out: np.ndarray,
    e_out: np.ndarray,
) -> float:
    """Each cell element's current at ``v_mV`` from its conductance in ``g_out`` and its
    reversal potential in ``e_out`` (as ``element_conductances`` made them); their sum.

    I = -g B(V) (V - E) for a conductance (B = 1 unless an Mg-blocked synapse);
    a current waveform's ``i_out`` is kept as ``element_conductances`` set it.
    """
    total = 0.0
    for r in range(kind.shape[0]):
        k = kind[r]
        if k in (KIND_THRESHOLD_RESET, KIND_NEURON):
            continue
        p = params[r]
        if int(p[P_TARGET]) >= 0:
            continue
        # A disabled element has g = 0 (element_conductances): no enabled flag read here, so
        # that the law mode's samples in flight keep the state their laws were made with.
        if k == KIND_SYNAPSE:
            i_out[r] = -g_out[r] * _syn.mg_block(v_mV, p[_syn.P_MG]) * (v_mV - e_out[r])
        elif k != KIND_CURRENT:
            i_out[r] = -g_out[r] * (v_mV - e_out[r])
        total += i_out[r]
    return total


@kernel
def step(v_mV: float, n: int, pa: ProgramArrays) -> float:
    """Command current (pA) for sample ``n`` at measured ``v_mV``; see the module doc.

    ``pa``: the program's arrays (``clampcore.program.Program.arrays``).
    """
    kind, params, state, g_out, i_out = pa.kind, pa.params, pa.state, pa.g_out, pa.i_out
    loop_p, loop_s = pa.loop_p, pa.loop_s
    ls = loop_s[0]
    dt_ms = loop_p[LP_DT_MS]
    ls["cell_spiked"] = False
    if not math.isfinite(v_mV) or abs(v_mV) > loop_p[LP_V_FAULT_MV]:
        ls["flags"] = FAULT_BAD_V
        ls["n_fault"] += 1
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
        ls["cell_spiked"] = True
        ls["spikes"] += 1

    # 3-4. Conductances (and the cell's current law), then the currents at this V.
    hist_record_cell_spike(n, cell_spiked, pa.spike_ring)
    element_conductances(n, pa)
    total += cell_currents(v_mV, kind, params, g_out, i_out, pa.e_out)

    # 5. Output guard.
    limit = loop_p[LP_MAX_CURRENT_PA]
    if not math.isfinite(total):
        ls["flags"] = FAULT_NONFINITE
        ls["n_fault"] += 1
        return 0.0
    if abs(total) > limit:
        ls["flags"] = FLAG_LIMITED
        ls["n_limited"] += 1
        return limit if total > 0 else -limit
    ls["flags"] = 0
    return total
