"""The board's per-sample arithmetic: the current law evaluated at the board's own fresh V.

This is the part of a board that must act at once, written once in C
(``c/ccb_law.c``) and once here for the simulated rig, the offline simulation and
the tests; both give bit-identical results, which the shared vectors
(``vectors/law_v2.json``) demand. Everything is in the converters' counts, so a
board needs no calibration and no ``exp``:

* the **law** for one sample, four float32 numbers (alpha, beta, alpha_b, beta_b):
  the DAC value is x = alpha - beta·adc + B(adc)·(alpha_b - beta_b·adc), where B
  is the Mg2+ block, a float32 table over the ADC range that the host computes and
  the board interpolates linearly (index adc >> shift, fraction exact in float32);
* **threshold-and-reset**: when adc >= ``tr_adc`` outside the refractory samples,
  a spike, and for ``tr_samples`` samples the reset law tr_alpha - tr_beta·adc is
  added (a conductance pulling V to the reset potential);
* **spike detection**: adc >= ``spike_adc`` while armed (re-armed below
  ``rearm_adc``); a crossing during an imposed reset is the same spike;
* **guards**: an ADC count outside [adc_ok_lo, adc_ok_hi] (|V| beyond the
  implausible-V limit; such a count advances neither detector nor reset), no law,
  a law older than ``lifetime`` samples, a non-finite x, or the zero request → the
  fault value (0 pA); x is clipped to [limit_lo, limit_hi] (the current limit in DAC
  units), then rounded (floor(x + 1/2), exactly: not x + 0.5 in float32, which
  rounds 0.49999997 up) and clipped to the DAC's counts.

Floating point: float32 throughout, one rounding per operation and no fused
multiply-add (C: ``-ffp-contract=off``; numba does not contract without fastmath),
which is why C and numba agree to the bit. Evaluating the law at the board's own V
is what makes a conductance self-limiting: I = -g (V - E) vanishes at E.

Arrays (the C structs' fields, in order): ``bf`` float32[N_BF], ``bi`` int64[N_BI],
``bs`` int64[N_BS] (state), ``law`` float32[4] (the law in force), ``table`` float32.

Public names: ``board_eval``, ``board_set_law``, ``new_board_arrays``, the column
constants ``BF_*``, ``BI_*``, ``BS_*``, ``LAW_*`` and the flag bits ``BF_FLAG_*``.
"""

from __future__ import annotations

import math

import numpy as np

from clampcore.jit import kernel

# Float parameters (float32).
BF_LIMIT_LO = 0  # lowest DAC value the current limit allows (DAC counts, as a float)
BF_LIMIT_HI = 1  # highest
BF_TR_ALPHA = 2  # threshold-and-reset: the reset law, added while clamping
BF_TR_BETA = 3
N_BF = 4

# Integer parameters (int64 here, int32 in C).
BI_DAC_TOP = 0  # highest DAC count, 2^N - 1
BI_FAULT_COUNTS = 1  # the DAC count for 0 pA
BI_ADC_OK_LO = 2  # ADC counts outside [lo, hi]: implausible V, fault value out
BI_ADC_OK_HI = 3
BI_SPIKE_ADC = 4  # spike detection threshold (counts); above the ADC's top: off
BI_REARM_ADC = 5  # the detector re-arms below this count
BI_TR_ADC = 6  # threshold-and-reset threshold (counts); above the ADC's top: off
BI_TR_SAMPLES = 7  # samples the reset law is applied after a threshold crossing
BI_LIFETIME = 8  # samples a law may stay in force after its own sample
BI_BLOCK_SHIFT = 9  # Mg block table index = adc >> shift; -1: no blocked law
N_BI = 10

# State (int64).
BS_ARMED = 0  # spike detector armed
BS_TR_REMAIN = 1  # reset samples still to apply
BS_LAW_SAMPLE = 2  # the sample the law in force was made for; -1: none
BS_HOLD_ZERO = 3  # 1: the zero request holds the output at the fault value
N_BS = 4

LAW_ALPHA, LAW_BETA, LAW_ALPHA_B, LAW_BETA_B = 0, 1, 2, 3
N_LAW = 4

# Flags of one sample (the SAMPLE message's per-sample flags byte).
BF_FLAG_SPIKE = 0x01  # the cell spiked (detected, or threshold-and-reset fired)
BF_FLAG_RESET = 0x02  # the reset law was applied at this sample
BF_FLAG_LIMITED = 0x04  # x was clipped to the current limit
BF_FLAG_FAULT = 0x08  # the fault value went out (see the next bits for why)
BF_FLAG_BAD_V = 0x10  # ADC count outside the plausible range
BF_FLAG_STALE = 0x20  # no law, or the law in force is older than its lifetime
BF_FLAG_ZERO = 0x40  # the zero request is on
BF_FLAG_NONFINITE = 0x80  # the law gave a non-finite value


def new_board_arrays(table_points: int = 0) -> tuple[np.ndarray, ...]:
    """Zeroed ``(bf, bi, bs, law, table)``: no law, block off, detector disarmed.

    The detector arms once V falls below the re-arm count, as the host's step (a run
    that starts above threshold does not count a spike at its first sample).
    """
    bf = np.zeros(N_BF, dtype=np.float32)
    bi = np.zeros(N_BI, dtype=np.int64)
    bi[BI_BLOCK_SHIFT] = -1
    bs = np.zeros(N_BS, dtype=np.int64)
    bs[BS_LAW_SAMPLE] = -1
    return bf, bi, bs, np.zeros(N_LAW, dtype=np.float32), np.ones(table_points, np.float32)


@kernel
def board_set_law(bs: np.ndarray, law: np.ndarray, new_law: np.ndarray, sample: int) -> None:
    """Put ``new_law`` (made for ``sample``) in force: the board calls it at that sample."""
    for j in range(N_LAW):
        law[j] = new_law[j]
    bs[BS_LAW_SAMPLE] = sample


@kernel
def _block(table: np.ndarray, adc: int, shift: int) -> np.float32:
    """B(adc) interpolated linearly between table points 2^shift counts apart."""
    i = adc >> shift
    frac = np.float32(adc & ((1 << shift) - 1)) * np.float32(1.0 / (1 << shift))
    lo = table[i]
    return lo + frac * (table[i + 1] - lo)


@kernel
def board_eval(
    adc: int,
    k: int,
    bf: np.ndarray,
    bi: np.ndarray,
    bs: np.ndarray,
    law: np.ndarray,
    table: np.ndarray,
) -> int:
    """The DAC count for sample ``k`` read as ``adc``; returns counts | flags << 16."""
    flags = 0
    # An implausible count advances nothing (as the host's step): no spike, no reset.
    bad_v = adc < bi[BI_ADC_OK_LO] or adc > bi[BI_ADC_OK_HI]
    # Spike detection, then threshold-and-reset (both on the fresh count).
    detected = False
    fired = False
    clamping = bs[BS_TR_REMAIN] > 0
    reset_on = False
    if not bad_v:
        if bs[BS_ARMED] != 0:
            if adc >= bi[BI_SPIKE_ADC]:
                bs[BS_ARMED] = 0
                detected = True
        elif adc < bi[BI_REARM_ADC]:
            bs[BS_ARMED] = 1
        if not clamping and adc >= bi[BI_TR_ADC]:
            bs[BS_TR_REMAIN] = bi[BI_TR_SAMPLES]
            fired = True
        reset_on = bs[BS_TR_REMAIN] > 0
        if reset_on:
            bs[BS_TR_REMAIN] -= 1
            flags |= BF_FLAG_RESET
    if fired or (detected and not clamping):
        flags |= BF_FLAG_SPIKE

    fault = 0
    if bs[BS_HOLD_ZERO] != 0:
        fault = BF_FLAG_ZERO
    elif bad_v:
        fault = BF_FLAG_BAD_V
    elif bs[BS_LAW_SAMPLE] < 0 or k - bs[BS_LAW_SAMPLE] > bi[BI_LIFETIME]:
        fault = BF_FLAG_STALE
    counts = bi[BI_FAULT_COUNTS]
    if fault == 0:
        a = np.float32(adc)
        x = law[LAW_ALPHA] - law[LAW_BETA] * a
        shift = bi[BI_BLOCK_SHIFT]
        if shift >= 0:
            x = x + _block(table, adc, shift) * (law[LAW_ALPHA_B] - law[LAW_BETA_B] * a)
        if reset_on:
            x = x + (bf[BF_TR_ALPHA] - bf[BF_TR_BETA] * a)
        if not math.isfinite(x):
            fault = BF_FLAG_NONFINITE
        else:
            if x < bf[BF_LIMIT_LO]:
                x = bf[BF_LIMIT_LO]
                flags |= BF_FLAG_LIMITED
            elif x > bf[BF_LIMIT_HI]:
                x = bf[BF_LIMIT_HI]
                flags |= BF_FLAG_LIMITED
            # floor(x + 1/2) exactly: x - floor(x) is exact in float32, x + 0.5 is not
            # (0.49999997 + 0.5 rounds to 1).
            c = math.floor(x)
            if x - np.float32(c) >= np.float32(0.5):
                c += 1
            counts = min(max(c, 0), bi[BI_DAC_TOP])
    if fault != 0:
        flags |= BF_FLAG_FAULT | fault
        flags &= ~BF_FLAG_LIMITED
    return int(counts) | (flags << 16)
