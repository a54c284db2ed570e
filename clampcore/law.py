"""The current law in the board's units: what the host sends ahead, and the board's rules.

Every element's current is linear in V given its conductance, so the sum over the
cell's elements is I(V) = a - g·V + B(V)·(a_b - g_b·V) (pA, V in mV; B the Mg2+
block of Jahr & Stevens 1990), which ``clampcore.step.element_conductances``
computes for each sample without knowing V. The board evaluates it at its own
fresh V (``firmware_protocol.boardlaw``), in counts:

    V(adc)  = mv0 + mv1·adc                       (ADC and amplifier, host's calibration)
    x(I)    = (I - i0)·k                          (the DAC value for I, unrounded)
    x       = alpha - beta·adc + B(adc)·(alpha_b - beta_b·adc)
    alpha   = k·(a - g·mv0 - i0),   beta   = k·g·mv1
    alpha_b = k·(a_b - g_b·mv0),    beta_b = k·g_b·mv1

(substitute V(adc) into I(V) and I into x; the offset i0 appears once). A law with
g > 0 is self-limiting: a passive cell (g_m, E_m) under it settles at
(g_m·E_m + a)/(g_m + g), never beyond its effective reversal potential.

``board_arrays`` turns an experiment's loop rules (current limit, implausible-V
guard, spike detection, one threshold_reset element, the law's lifetime, the block
table) into the board's parameter arrays.

Public names: ``LAW_MODE``, ``CURRENT_MODE``, ``law_scale``, ``law_to_counts``, ``make_law``,
``current_to_law``, ``board_arrays``, ``BoardArrays``, ``live_board_rules``,
``first_count_at_or_above``, ``block_table``.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from clampcore.calibration import C_ADC_TOP, C_DAC_TOP, counts_to_mV, counts_to_pA, pA_to_counts
from clampcore.elements import KIND_THRESHOLD_RESET, P_ENABLED
from clampcore.elements import synapse as _syn
from clampcore.elements import threshold_reset as _tr
from clampcore.firmware_protocol import boardlaw as bl
from clampcore.jit import kernel
from clampcore.program import Program, ProgramArrays
from clampcore.step import (
    LP_DT_MS,
    LP_MAX_CURRENT_PA,
    LP_MG_MM,
    LP_SPIKE_HYSTERESIS_MV,
    LP_SPIKE_THRESHOLD_MV,
    element_conductances,
)

LAW_MODE = "law"  # the board evaluates the law at its own V (protocol v2)
CURRENT_MODE = "current"  # the host computes the current from the newest V it has

# law_scale columns
SC_MV0, SC_MV1, SC_I0_PA, SC_K = 0, 1, 2, 3

# Table points 2^shift ADC counts apart: at most this many intervals over the ADC range.
# 1024 intervals of a 16-bit ±10 V, 100 mV/V input are h = 1.95 mV apart, where linear
# interpolation of B errs by at most h²/8·max|B''| = 1.8e-4 (B'' <= 0.062²/(6√3), the
# logistic's largest second derivative): under one count of the 16-bit, 400 pA/V DAC
# (0.12 pA) for a blocked current below ~690 pA.
_BLOCK_INTERVALS = 1024


def law_scale(conv: np.ndarray) -> np.ndarray:
    """``[mv0, mv1, i0, k]``: V(adc) = mv0 + mv1·adc and x(I) = (I - i0)·k for ``conv``."""
    mv0 = counts_to_mV(conv, 0.0)
    mv1 = counts_to_mV(conv, 1.0) - mv0
    top = conv[C_DAC_TOP]
    # pA_to_counts before rounding is x = (I - i0)·k: two points give i0 and k.
    i0 = counts_to_pA(conv, 0.0)
    k = top / (counts_to_pA(conv, top) - i0)
    return np.array([mv0, mv1, i0, k])


@kernel
def law_to_counts(
    scale: np.ndarray, a_pA: float, g_nS: float, ab_pA: float, gb_nS: float, out: np.ndarray
) -> None:
    """The law I = a - gV + B(V)(a_b - g_b V) as the board's float32 (alpha, beta, ...)."""
    mv0 = scale[SC_MV0]
    mv1 = scale[SC_MV1]
    k = scale[SC_K]
    out[bl.LAW_ALPHA] = k * (a_pA - g_nS * mv0 - scale[SC_I0_PA])
    out[bl.LAW_BETA] = k * g_nS * mv1
    out[bl.LAW_ALPHA_B] = k * (ab_pA - gb_nS * mv0)
    out[bl.LAW_BETA_B] = k * gb_nS * mv1


@kernel
def make_law(s: int, scale: np.ndarray, pa: ProgramArrays, out: np.ndarray) -> None:
    """Advance every element to sample ``s`` and write that sample's law, in counts, to ``out``.

    A threshold_reset row's ``g_out`` and ``e_out`` get the rule the board applies from this
    sample on (its conductance while clamping, its reset potential), so that a sample's
    record keeps the rule its law was made with (``lawloop.board_reset_current``).
    """
    element_conductances(s, pa)
    for r in range(pa.kind.shape[0]):
        if pa.kind[r] == KIND_THRESHOLD_RESET:
            p = pa.params[r]
            pa.g_out[r] = p[_tr.P_G] if p[P_ENABLED] != 0.0 else 0.0
            pa.e_out[r] = p[_tr.P_RESET]
    ls = pa.loop_s[0]
    law_to_counts(scale, ls["law_a_pA"], ls["law_g_nS"], ls["law_ab_pA"], ls["law_gb_nS"], out)


@kernel
def current_to_law(scale: np.ndarray, i_pA: float, out: np.ndarray) -> None:
    """A plain current (current mode) as a law with g = 0."""
    law_to_counts(scale, i_pA, 0.0, 0.0, 0.0, out)


@kernel
def first_count_at_or_above(conv: np.ndarray, v_mV: float) -> int:
    """The smallest ADC count whose membrane potential is >= ``v_mV`` (top + 1: none).

    Found by bisection on the host's own ``counts_to_mV``, so a board comparing counts
    decides exactly as the host comparing quantised potentials would.
    """
    top = np.int64(conv[C_ADC_TOP])
    lo, hi = np.int64(0), top + 1
    while lo < hi:
        mid = (lo + hi) // 2
        if counts_to_mV(conv, float(mid)) >= v_mV:
            hi = mid
        else:
            lo = mid + 1
    return lo


def block_table(conv: np.ndarray, mg_mM: float) -> tuple[np.ndarray, int]:
    """(float32 table of B(V(adc)) at adc = i·2^shift, shift) for [Mg2+] ``mg_mM``."""
    bits = int(conv[C_ADC_TOP]).bit_length()
    shift = max(0, bits - int(math.log2(_BLOCK_INTERVALS)))
    points = (1 << (bits - shift)) + 1
    table = np.array(
        [_syn.mg_block(counts_to_mV(conv, float(i << shift)), mg_mM) for i in range(points)],
        dtype=np.float32,
    )
    return table, shift


@kernel
def live_board_rules(
    conv: np.ndarray,
    scale: np.ndarray,
    kind: np.ndarray,
    params: np.ndarray,
    loop_p: np.ndarray,
    law_mode: bool,
    bf: np.ndarray,
    bi: np.ndarray,
) -> None:
    """The board's rules that a live change may touch, from the loop's and the elements'
    parameters: the current limit, spike detection and the (first) threshold_reset element
    (in current mode the host runs it, so the board's is off). The run's fixed rules
    (implausible V, lifetime, block table, DAC top, fault count) are left as they are."""
    limit = loop_p[LP_MAX_CURRENT_PA]
    a = (limit - scale[SC_I0_PA]) * scale[SC_K]
    b = (-limit - scale[SC_I0_PA]) * scale[SC_K]
    bf[bl.BF_LIMIT_LO] = min(a, b)
    bf[bl.BF_LIMIT_HI] = max(a, b)
    threshold = loop_p[LP_SPIKE_THRESHOLD_MV]
    bi[bl.BI_SPIKE_ADC] = first_count_at_or_above(conv, threshold)
    bi[bl.BI_REARM_ADC] = first_count_at_or_above(conv, threshold - loop_p[LP_SPIKE_HYSTERESIS_MV])
    bi[bl.BI_TR_ADC] = np.int64(conv[C_ADC_TOP]) + 1  # above the ADC's top: off
    bi[bl.BI_TR_SAMPLES] = 0
    bf[bl.BF_TR_ALPHA] = 0.0
    bf[bl.BF_TR_BETA] = 0.0
    for r in range(kind.shape[0]):
        if kind[r] != KIND_THRESHOLD_RESET:
            continue
        if law_mode and params[r, P_ENABLED] != 0.0:
            bi[bl.BI_TR_ADC] = first_count_at_or_above(conv, params[r, _tr.P_THRESHOLD])
            bi[bl.BI_TR_SAMPLES] = math.ceil(params[r, _tr.P_REFRACTORY] / loop_p[LP_DT_MS] - 1e-9)
            g = params[r, _tr.P_G]
            bf[bl.BF_TR_ALPHA] = scale[SC_K] * g * (params[r, _tr.P_RESET] - scale[SC_MV0])
            bf[bl.BF_TR_BETA] = scale[SC_K] * g * scale[SC_MV1]
        return


class BoardArrays(NamedTuple):
    """A law-evaluating board's arrays (``firmware_protocol.boardlaw``): rules and state."""

    bf: np.ndarray  # float32[N_BF]: BF_* rules in counts
    bi: np.ndarray  # int64[N_BI]: BI_* rules
    bs: np.ndarray  # int64[N_BS]: BS_* state
    law: np.ndarray  # float32[4]: the law in force
    table: np.ndarray  # float32: the Mg2+ block table (empty: no blocked group)


def board_arrays(
    program: Program, conv: np.ndarray, mode: str, lifetime_samples: int
) -> BoardArrays:
    """``(bf, bi, bs, law, table)`` for ``program`` on a board with converters ``conv``.

    In current mode the host runs threshold_reset itself, so the board's is off.
    Raises ``ValueError`` when the calibration cannot be expressed in counts (a
    membrane-potential scale that falls with the ADC count) or when the experiment
    has more than one threshold_reset element (a board evaluates one).
    """
    scale = law_scale(conv)
    if not scale[SC_MV1] > 0:
        raise ValueError("the board's rules need a membrane potential that rises with the count")
    loop = program.experiment.loop
    mg = float(program.loop_p[LP_MG_MM])
    table, shift = block_table(conv, mg) if mg > 0 else (np.ones(0, np.float32), -1)
    bf, bi, bs, law, _ = bl.new_board_arrays()
    bi[bl.BI_DAC_TOP] = int(conv[C_DAC_TOP])
    bi[bl.BI_FAULT_COUNTS] = pA_to_counts(conv, 0.0)
    v_fault = float(loop["v_fault_mV"])
    bi[bl.BI_ADC_OK_LO] = first_count_at_or_above(conv, -v_fault)
    # |V| > v_fault is implausible: the last count at or below +v_fault is the top of the range.
    bi[bl.BI_ADC_OK_HI] = first_count_at_or_above(conv, math.nextafter(v_fault, math.inf)) - 1
    bi[bl.BI_LIFETIME] = lifetime_samples
    bi[bl.BI_BLOCK_SHIFT] = shift
    rows = [r for r, k in enumerate(program.kind) if k == KIND_THRESHOLD_RESET]
    if len(rows) > 1:
        names = ", ".join(program.names[r] for r in rows)
        raise ValueError(
            f"a board evaluates one threshold_reset element, not {len(rows)} ({names})"
        )
    live_board_rules(
        conv, scale, program.kind, program.params, program.loop_p, mode == LAW_MODE, bf, bi
    )
    return BoardArrays(bf, bi, bs, law, table)
