"""ADC/DAC counts <-> membrane potential and command current.

A board's N-bit converter maps count c (0 .. 2^N - 1) linearly onto its range
[min_V, max_V]: volts = min_V + c (max_V - min_V) / (2^N - 1) (PROTOCOL.md).
The amplifier then scales: its membrane-potential output gives
v_mV = volts * vm_mV_per_V + vm_offset_mV, from which the liquid-junction
potential is subtracted (V_m = V_recorded - V_LJ, the convention of Neher 1992,
Methods Enzymol 207:123); its command input passes
i_pA = volts * command_pA_per_V + command_offset_pA.

The host side (``counts_to_mV``, ``pA_to_counts``) is what the loop uses; the
board side (``mV_to_counts``, ``counts_to_pA``) is the physics a simulated rig
applies. All four are compiled and read one float64 array ``conv`` built by
``conversion_array``.

Public names: ``Converter``, ``DEFAULT_BOARD_ADC``, ``DEFAULT_BOARD_DAC``,
``conversion_array``, ``counts_to_mV``, ``pA_to_counts``, ``mV_to_counts``,
``counts_to_pA``, ``current_range_pA``, ``current_limit_problem``,
``range_limit_problem``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from clampcore.jit import kernel


@dataclass(frozen=True)
class Converter:
    """One converter of a board: resolution and full-scale range in volts."""

    bits: int
    min_V: float
    max_V: float


# The simulated rig's converters: 16-bit, +-10 V, as on common lab DAQ boards (common practice).
DEFAULT_BOARD_ADC = Converter(16, -10.0, 10.0)
DEFAULT_BOARD_DAC = Converter(16, -10.0, 10.0)

C_ADC_TOP, C_ADC_MIN, C_ADC_MAX = 0, 1, 2
C_DAC_TOP, C_DAC_MIN, C_DAC_MAX = 3, 4, 5
C_VM_SCALE, C_VM_OFFSET, C_LJP = 6, 7, 8
C_CMD_SCALE, C_CMD_OFFSET = 9, 10
N_CONV = 11


def conversion_array(adc: Converter, dac: Converter, amplifier: dict[str, Any]) -> np.ndarray:
    """The ``conv`` array for a board's converters and an ``[amplifier]`` table."""
    conv = np.zeros(N_CONV)
    conv[C_ADC_TOP] = 2**adc.bits - 1
    conv[C_ADC_MIN], conv[C_ADC_MAX] = adc.min_V, adc.max_V
    conv[C_DAC_TOP] = 2**dac.bits - 1
    conv[C_DAC_MIN], conv[C_DAC_MAX] = dac.min_V, dac.max_V
    conv[C_VM_SCALE] = amplifier["vm_mV_per_V"]
    conv[C_VM_OFFSET] = amplifier["vm_offset_mV"]
    conv[C_LJP] = amplifier["liquid_junction_mV"]
    conv[C_CMD_SCALE] = amplifier["command_pA_per_V"]
    conv[C_CMD_OFFSET] = amplifier["command_offset_pA"]
    return conv


@kernel
def _nearest_count(volts: float, min_V: float, max_V: float, top: float) -> int:
    """PROTOCOL.md §6: x = (v - min) / (max - min) * (2^N - 1), count floor(x + 1/2)
    (round half up, not half to even), clipped to 0 .. 2^N - 1.

    x is formed as (v - min) * top / (max - min): the same real number, but exact in
    binary floating point whenever (v - min) * top is and divides evenly, so exact halves
    stay exact halves.

    Beyond the range the count saturates, infinities too (clipped before the floor: an
    infinite float has no integer); NaN gives the count of 0 V, never an end of the range.
    """
    if volts != volts:  # NaN
        volts = 0.0
    x = min(max((volts - min_V) * top / (max_V - min_V), -1.0), top + 1.0)
    c = math.floor(x + 0.5)
    return int(min(max(c, 0.0), top))


@kernel
def counts_to_mV(conv: np.ndarray, counts: float) -> float:
    """Host: ADC counts -> membrane potential in mV (junction potential corrected)."""
    volts = conv[C_ADC_MIN] + counts * (conv[C_ADC_MAX] - conv[C_ADC_MIN]) / conv[C_ADC_TOP]
    return volts * conv[C_VM_SCALE] + conv[C_VM_OFFSET] - conv[C_LJP]


@kernel
def pA_to_counts(conv: np.ndarray, i_pA: float) -> int:
    """Host: command current in pA -> DAC count (PROTOCOL.md §6 rounding), clipped."""
    volts = (i_pA - conv[C_CMD_OFFSET]) / conv[C_CMD_SCALE]
    return _nearest_count(volts, conv[C_DAC_MIN], conv[C_DAC_MAX], conv[C_DAC_TOP])


@kernel
def mV_to_counts(conv: np.ndarray, v_mV: float) -> int:
    """Board physics: true membrane potential -> the ADC count the board reads (same rounding)."""
    volts = (v_mV + conv[C_LJP] - conv[C_VM_OFFSET]) / conv[C_VM_SCALE]
    return _nearest_count(volts, conv[C_ADC_MIN], conv[C_ADC_MAX], conv[C_ADC_TOP])


@kernel
def counts_to_pA(conv: np.ndarray, counts: float) -> float:
    """Board physics: DAC count -> the current the amplifier injects, pA."""
    volts = conv[C_DAC_MIN] + counts * (conv[C_DAC_MAX] - conv[C_DAC_MIN]) / conv[C_DAC_TOP]
    return volts * conv[C_CMD_SCALE] + conv[C_CMD_OFFSET]


def current_range_pA(conv: np.ndarray) -> tuple[float, float]:
    """The lowest and highest current the DAC and amplifier can command, pA."""
    ends = (counts_to_pA(conv, 0.0), counts_to_pA(conv, conv[C_DAC_TOP]))
    return min(ends), max(ends)


def current_limit_problem(conv: np.ndarray, max_current_pA: float) -> str | None:
    """Why ``max_current_pA`` cannot be honoured through these converters, or None.

    The rule for every run, live or offline: the DAC and amplifier must reach ±limit, or a
    command inside the limit would be clipped silently at the converter.
    """
    return range_limit_problem(current_range_pA(conv), max_current_pA)


def range_limit_problem(range_pA: tuple[float, float], max_current_pA: float) -> str | None:
    """``current_limit_problem`` for a known range (lo, hi) of commandable current, pA.

    A running loop publishes its board's range; a live change of the limit passes this
    same rule as Start, so the recording never shows a current the cell did not receive.
    """
    lo, hi = range_pA
    if lo > -max_current_pA or hi < max_current_pA:
        return (
            f"the board and amplifier can command {lo:.0f}..{hi:.0f} pA, "
            f"which cannot represent max_current_pA = ±{max_current_pA:g}"
        )
    return None
