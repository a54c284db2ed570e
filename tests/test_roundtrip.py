"""The offline loop's converter round trips (clampcore/roundtrip.py) against the exact ones.

Reference: clampcore.calibration's four functions, composed as the simulated rig composes
them (``counts_to_mV(mV_to_counts(v))``, ``counts_to_pA(pA_to_counts(i))``); those follow
PROTOCOL.md §6 and are checked against its shared vectors in test_protocol_vectors.py.
The round trips must give the same float, bit for bit, for every input: values at and
next to every rounding boundary, out of range, infinite and NaN.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from clampcore import calibration as cal
from clampcore.calibration import Converter, conversion_array
from clampcore.roundtrip import (
    Q_ADC_K0,
    Q_ADC_K1,
    Q_ADC_MARGIN,
    _clear_count,
    adc_round_trip_mV,
    dac_round_trip_pA,
    round_trip_arrays,
)

AMPLIFIERS = [
    # the schema's defaults
    {"vm_mV_per_V": 100.0, "vm_offset_mV": 0.0, "liquid_junction_mV": 0.0,
     "command_pA_per_V": 400.0, "command_offset_pA": 0.0},
    # awkward scales and offsets, none a power of two
    {"vm_mV_per_V": 33.3, "vm_offset_mV": -7.1, "liquid_junction_mV": 13.7,
     "command_pA_per_V": 2000.0 / 3.0, "command_offset_pA": 12.34},
    {"vm_mV_per_V": 10.0, "vm_offset_mV": 250.0, "liquid_junction_mV": -2.5,
     "command_pA_per_V": 50.0, "command_offset_pA": -333.3},
]  # fmt: skip
BOARDS = [
    (cal.DEFAULT_BOARD_ADC, cal.DEFAULT_BOARD_DAC),
    (Converter(12, 0.0, 5.0), Converter(10, -2.5, 2.5)),  # a small microcontroller's
]


def _boundary_values(lo_V: float, hi_V: float, top: float, scale: float, offset: float):
    """Values whose exact count is k + 1/2 for every k, each with its neighbours."""
    k = np.arange(-2.0, top + 2.0)
    volts = lo_V + (k + 0.5) * (hi_V - lo_V) / top
    v = volts * scale + offset
    return np.concatenate([v, np.nextafter(v, np.inf), np.nextafter(v, -np.inf)])


def _inputs(conv: np.ndarray, adc: bool) -> np.ndarray:
    if adc:
        lo, hi, top = conv[cal.C_ADC_MIN], conv[cal.C_ADC_MAX], conv[cal.C_ADC_TOP]
        scale, offset = conv[cal.C_VM_SCALE], conv[cal.C_VM_OFFSET] - conv[cal.C_LJP]
    else:
        lo, hi, top = conv[cal.C_DAC_MIN], conv[cal.C_DAC_MAX], conv[cal.C_DAC_TOP]
        scale, offset = conv[cal.C_CMD_SCALE], conv[cal.C_CMD_OFFSET]
    rng = np.random.default_rng(1)
    span = (hi - lo) * scale
    inside = rng.uniform(lo * scale + offset, hi * scale + offset, 20000)
    beyond = rng.uniform(-3.0, 3.0, 2000) * span + offset
    special = np.array([0.0, -0.0, math.inf, -math.inf, math.nan, 1e300, -1e300, 5e-324])
    return np.concatenate([_boundary_values(lo, hi, top, scale, offset), inside, beyond, special])


def _same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or (
        a == b and math.copysign(1, a) == math.copysign(1, b)
    )


def _check(ours, exact, x: float) -> None:
    """``ours(x)`` is ``exact(x)`` bit for bit, or raises as it does (plain Python: inf, NaN)."""
    try:
        expected = exact(x)
    except (OverflowError, ValueError) as err:
        with pytest.raises(type(err)):
            ours(x)
        return
    assert _same(ours(x), expected), x


@pytest.mark.parametrize("amplifier", AMPLIFIERS)
@pytest.mark.parametrize("board", BOARDS)
def test_round_trips_equal_the_exact_conversions_bit_for_bit(amplifier, board) -> None:
    conv = conversion_array(*board, amplifier)
    rt = round_trip_arrays(conv)
    for v in _inputs(conv, adc=True):
        _check(
            lambda x: adc_round_trip_mV(conv, rt.coef, rt.adc_mV, x),
            lambda x: cal.counts_to_mV(conv, cal.mV_to_counts(conv, x)),
            v,
        )
    for i in _inputs(conv, adc=False):
        _check(
            lambda x: dac_round_trip_pA(conv, rt.coef, rt.dac_pA, x),
            lambda x: cal.counts_to_pA(conv, cal.pA_to_counts(conv, x)),
            i,
        )


def test_the_short_path_decides_away_from_boundaries_and_defers_at_them() -> None:
    conv = conversion_array(cal.DEFAULT_BOARD_ADC, cal.DEFAULT_BOARD_DAC, AMPLIFIERS[0])
    coef = round_trip_arrays(conv).coef
    top, margin = conv[cal.C_ADC_TOP], coef[Q_ADC_MARGIN]
    assert 0.0 < margin < 1e-6  # a few rounding errors of counts near 2**16, no more
    v = np.random.default_rng(2).uniform(-900.0, 900.0, 5000)  # inside the ±10 V range
    short = [_clear_count(x * coef[Q_ADC_K1] + coef[Q_ADC_K0], top, margin) for x in v]
    assert all(c == cal.mV_to_counts(conv, x) for c, x in zip(short, v, strict=True))
    assert _clear_count(1234.5, top, margin) == -1  # exactly on a boundary: the exact path
    assert _clear_count(1234.5 + 0.5 * margin, top, margin) == -1
    assert _clear_count(1234.5 + 2.0 * margin, top, margin) == 1235
    assert _clear_count(-5.0, top, margin) == 0  # below the range: clipped
    assert _clear_count(top + 5.0, top, margin) == top  # above it
    assert _clear_count(math.nan, top, margin) == -1
