"""Counts <-> mV and pA (``clampcore.calibration``) against PROTOCOL.md §6, evaluated exactly.

The reference here is the specification's formula computed in exact rational
arithmetic (``fractions.Fraction``), independently of the code's floating point:

    x = (v - min) / (max - min) * (2^N - 1),   count = floor(x + 1/2), clipped to 0 .. 2^N - 1
    v_mV = vm_mV_per_V * v_adc + vm_offset_mV - liquid_junction_mV
    v_dac = (i_pA - command_offset_pA) / command_pA_per_V

The junction term follows the usual whole-cell convention V_m = V_recorded - V_LJ
(Neher 1992, Methods Enzymol 207:123), as PROTOCOL.md §6 and the README state.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    Converter,
    conversion_array,
    counts_to_mV,
    counts_to_pA,
    current_range_pA,
    mV_to_counts,
    pA_to_counts,
)

AMP_PLAIN = {
    "vm_mV_per_V": 100.0,
    "command_pA_per_V": 400.0,
    "vm_offset_mV": 0.0,
    "liquid_junction_mV": 0.0,
    "command_offset_pA": 0.0,
}
# Non-zero offsets and a junction potential of the usual size (a K-gluconate pipette
# against ACSF: about +10 to +15 mV, common practice); values chosen to be distinct.
AMP_OFFSETS = {
    "vm_mV_per_V": 50.0,
    "command_pA_per_V": 2000.0,
    "vm_offset_mV": 3.0,
    "liquid_junction_mV": 13.0,
    "command_offset_pA": -25.0,
}


def spec_count(v_V: float, conv: Converter) -> int:
    """PROTOCOL.md §6, exactly: floor(x + 1/2) of x = (v - min)/(max - min)(2^N - 1), clipped."""
    top = 2**conv.bits - 1
    x = (Fraction(v_V) - Fraction(conv.min_V)) / (Fraction(conv.max_V) - Fraction(conv.min_V)) * top
    return min(max(math.floor(x + Fraction(1, 2)), 0), top)


def spec_volts(c: int, conv: Converter) -> Fraction:
    """PROTOCOL.md §6: v = min + c (max - min) / (2^N - 1), exactly."""
    return Fraction(conv.min_V) + c * (Fraction(conv.max_V) - Fraction(conv.min_V)) / (
        2**conv.bits - 1
    )


def test_worked_numbers_of_the_specification() -> None:
    """PROTOCOL.md §6's worked numbers: 16-bit ±10 V board, 100 mV/V, 400 pA/V, no offsets."""
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, AMP_PLAIN)
    assert round(counts_to_mV(conv, 29_491), 2) == -99.99
    assert pA_to_counts(conv, 0.0) == 32_768  # x = 32 767.5 exactly: half up
    assert pA_to_counts(conv, 100.0) == 33_587
    assert round(counts_to_pA(conv, 33_587), 2) == 100.04


def test_exact_halves_round_up_as_the_specification_says() -> None:
    """A converter whose range in volts equals 2^N - 1 makes x = v - min exactly, so every
    whole volt is an exact half: floor(x + 1/2) rounds each one up, half-to-even would
    take every other one down."""
    dac = Converter(8, -127.5, 127.5)  # x = v + 127.5
    amp = dict(AMP_PLAIN, command_pA_per_V=1.0)  # 1 pA per volt: i_pA = v
    conv = conversion_array(dac, dac, amp)
    for i_pA in range(-127, 128):
        expected = spec_count(float(i_pA), dac)
        assert expected == i_pA + 128
        assert pA_to_counts(conv, float(i_pA)) == expected, i_pA
        # The board-side ADC physics uses the same rule (membrane mV -> count).
        assert mV_to_counts(conv, 100.0 * i_pA) == expected, i_pA


@pytest.mark.parametrize("compiled", [True, False], ids=["compiled", "plain-python"])
def test_counts_saturate_beyond_the_range_and_at_infinity(compiled: bool) -> None:
    """PROTOCOL.md §6 clips to 0 .. 2^N - 1: a value beyond either end, infinite ones too,
    takes that end's count (a float infinity has no integer: it must be clipped first);
    NaN takes the count of 0 V (the spec's formula at v = 0), never an end of the range."""
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, AMP_PLAIN)
    to_mv = mV_to_counts if compiled else mV_to_counts.py_func
    to_pa = pA_to_counts if compiled else pA_to_counts.py_func
    top = 2**DEFAULT_BOARD_ADC.bits - 1
    for convert, huge in ((to_mv, 1e4), (to_pa, 1e6)):  # ±10 V is ±1000 mV, ±4000 pA
        assert convert(conv, huge) == convert(conv, math.inf) == top
        assert convert(conv, -huge) == convert(conv, -math.inf) == 0
        assert convert(conv, math.nan) == spec_count(0.0, DEFAULT_BOARD_ADC) == 32_768


@pytest.mark.parametrize("amp", [AMP_PLAIN, AMP_OFFSETS], ids=["plain", "offsets"])
def test_random_currents_and_potentials_against_the_exact_formula(amp: dict) -> None:
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, amp)
    rng = np.random.default_rng(9)
    for i_pA in rng.uniform(-25_000, 25_000, 2000):  # past both ends: clipping included
        v_dac = (Fraction(float(i_pA)) - Fraction(amp["command_offset_pA"])) / Fraction(
            amp["command_pA_per_V"]
        )
        expected = spec_count(v_dac, DEFAULT_BOARD_DAC)
        assert pA_to_counts(conv, float(i_pA)) == expected, i_pA
    for c in rng.integers(0, 2**16, 2000):
        v_mV = (
            Fraction(amp["vm_mV_per_V"]) * spec_volts(int(c), DEFAULT_BOARD_ADC)
            + Fraction(amp["vm_offset_mV"])
            - Fraction(amp["liquid_junction_mV"])
        )
        assert counts_to_mV(conv, float(c)) == pytest.approx(float(v_mV), abs=1e-9)
        i_pA = Fraction(amp["command_pA_per_V"]) * spec_volts(int(c), DEFAULT_BOARD_DAC) + Fraction(
            amp["command_offset_pA"]
        )
        assert counts_to_pA(conv, float(c)) == pytest.approx(float(i_pA), abs=1e-9)


def test_offsets_and_junction_potential_by_hand() -> None:
    """Hand-computed with PROTOCOL.md §6 (16-bit ±10 V, 50 mV/V, 2000 pA/V, Vm offset 3 mV,
    LJP 13 mV, command offset -25 pA):

    - ADC count 32 768 is 10/65 535 V = 0.000 152 6 V -> 50 * 0.000 152 6 + 3 - 13 = -9.992 37 mV;
    - 0 pA needs v = (0 - (-25)) / 2000 = 0.0125 V -> x = 10.0125/20 * 65 535 = 32 808.46
      -> count 32 808;
    - a true membrane potential of -60 mV reads on the amplifier as -60 + 13 = -47 mV
      -> v = (-47 - 3)/50 = -1 V -> x = 9/20 * 65 535 = 29 490.75 -> count 29 491."""
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, AMP_OFFSETS)
    assert counts_to_mV(conv, 32_768) == pytest.approx(-9.99237, abs=1e-5)
    assert pA_to_counts(conv, 0.0) == 32_808
    assert mV_to_counts(conv, -60.0) == 29_491
    # Host and board physics invert each other to within one ADC step of membrane potential.
    step_mV = 50.0 * 20.0 / 65_535
    assert abs(counts_to_mV(conv, mV_to_counts(conv, -60.0)) - -60.0) <= step_mV / 2
    # The current range the limit check uses: both DAC ends through the amplifier.
    assert current_range_pA(conv) == pytest.approx((-20_025.0, 19_975.0))


def test_offsets_and_junction_potential_through_a_simulated_run() -> None:
    """A passive cell (rest -70 mV, 5 nS) seen through an amplifier with every offset set:
    the host must still record the true membrane potential and inject the asked current.
    Anchors: the cell at rest reads its rest potential; 100 pA into 5 nS settles 20 mV
    higher (Ohm's law). A wrong sign of the junction correction reads 26 mV off; a wrong
    sign of the command offset injects 50 pA too much or too little (10 mV off)."""
    import clampcore

    exp = {
        "loop": {"rate_hz": 10_000.0, "max_current_pA": 400.0},
        "cell": {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0},
        "amplifier": AMP_OFFSETS,
        "element": [
            {"kind": "current", "name": "step", "waveform": "step", "amplitude_pA": 100.0,
             "start_ms": 100.0}
        ],
    }  # fmt: skip
    rec = clampcore.simulate(exp, 0.3)
    # Tolerance: one ADC count of membrane potential (50 mV/V over 20 V / 65 535) plus the
    # DAC's half step (20 V / 65 535 * 2000 pA/V / 2 = 0.31 pA) into 5 nS, 0.061 mV.
    tol_mV = 50.0 * 20.0 / 65_535 + 0.061
    assert np.mean(rec.v_mV[:900]) == pytest.approx(-70.0, abs=tol_mV)
    # tau = C/g = 20 ms: after 200 ms (10 tau) the response is complete to 5e-5 of 20 mV.
    assert np.mean(rec.v_mV[-100:]) == pytest.approx(-50.0, abs=tol_mV + 0.001)
