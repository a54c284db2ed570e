"""Value -> converter count -> value, bit for bit as ``clampcore.calibration``, in fewer steps.

The offline loop passes every V through the ADC (``mV_to_counts`` then ``counts_to_mV``)
and every command through the DAC (``pA_to_counts`` then ``counts_to_pA``). Done as
written, that is six divisions and two roundings on the path from one sample to the next,
which cost more than the experiment's elements together (bench/bench_engine.py). The same
results, cheaper:

- count: the nearest count is ``floor(x + 1/2)`` of the affine ``x = k1·value + k0``
  (PROTOCOL.md §6). Evaluated as one multiply-add, x differs from the exact path's x by a
  few rounding errors of the largest term involved; where ``x + 1/2`` lies farther than
  ``margin`` (64 of those rounding errors) from an integer, both paths take the same
  floor, and closer than that (a fraction of about 1e-8 of all values) the exact
  function decides, as it does for values whose count would not fit an integer, the
  infinities and NaN.
- value: each count's value is computed by the exact function the first time it is
  needed and kept in a table (2^bits entries). 0.0 marks "not yet computed", so the table
  starts as untouched zeroed memory and costs only the pages a run reaches; a count
  whose value is 0 (or NaN) is simply computed each time, with the same result.

So ``adc_round_trip_mV`` returns exactly ``counts_to_mV(conv, mV_to_counts(conv, v))``
and ``dac_round_trip_pA`` exactly ``counts_to_pA(conv, pA_to_counts(conv, i))``
(tests/test_roundtrip.py checks both against calibration.py, boundaries included).

Public names: ``RoundTrip``, ``round_trip_arrays``, ``adc_round_trip_mV``,
``dac_round_trip_pA``.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from clampcore.calibration import (
    C_ADC_MAX,
    C_ADC_MIN,
    C_ADC_TOP,
    C_CMD_OFFSET,
    C_CMD_SCALE,
    C_DAC_MAX,
    C_DAC_MIN,
    C_DAC_TOP,
    C_LJP,
    C_VM_OFFSET,
    C_VM_SCALE,
    counts_to_mV,
    counts_to_pA,
    mV_to_counts,
    pA_to_counts,
)
from clampcore.jit import kernel

# Columns of RoundTrip.coef: x = K1·value + K0 in counts, and the margin around a boundary.
Q_ADC_K1, Q_ADC_K0, Q_ADC_MARGIN = 0, 1, 2
Q_DAC_K1, Q_DAC_K0, Q_DAC_MARGIN = 3, 4, 5
N_COEF = 6

_EPS = 2.0**-52  # double precision's relative rounding bound (IEEE 754 binary64)
# Rounding errors allowed for in the margin: each path has under ten operations, each
# off by at most half an _EPS of a term no larger than the bound below; 64 is ample.
_ERRORS_ALLOWED = 64.0
_NEVER = -1  # _clear_count's answer when the exact function must decide
_FLOOR_FITS = 2.0**52  # |y| below this: floor(y) is exact and fits an int64


class RoundTrip(NamedTuple):
    """What the round trips read: coefficients and the two tables of values per count."""

    coef: np.ndarray  # float64 (N_COEF,)
    adc_mV: np.ndarray  # float64 (ADC top + 1,), 0.0 until that count was seen
    dac_pA: np.ndarray  # float64 (DAC top + 1,)


def _affine(scale: float, offset: float, lo_V: float, hi_V: float, top: float) -> tuple:
    """k1, k0 and the margin of x = ((value - offset)/scale - lo)·top/(hi - lo)."""
    per_V = top / (hi_V - lo_V)
    k1 = per_V / scale
    k0 = -offset * k1 - lo_V * per_V
    # Every term either path forms, in counts, while x is within the converter's range
    # (|k1·value| <= top + 1 + |k0| there); outside it both paths clip alike.
    bound = 2.0 * (top + 1.0) + 2.0 * abs(k0) + abs(offset * k1) + abs(lo_V * per_V)
    return k1, k0, _ERRORS_ALLOWED * _EPS * bound


def round_trip_arrays(conv: np.ndarray) -> RoundTrip:
    """The ``RoundTrip`` for a ``conv`` array (``clampcore.calibration.conversion_array``)."""
    coef = np.zeros(N_COEF)
    adc = _affine(
        conv[C_VM_SCALE],
        conv[C_VM_OFFSET] - conv[C_LJP],
        conv[C_ADC_MIN],
        conv[C_ADC_MAX],
        conv[C_ADC_TOP],
    )
    dac = _affine(
        conv[C_CMD_SCALE], conv[C_CMD_OFFSET], conv[C_DAC_MIN], conv[C_DAC_MAX], conv[C_DAC_TOP]
    )
    coef[Q_ADC_K1], coef[Q_ADC_K0], coef[Q_ADC_MARGIN] = adc
    coef[Q_DAC_K1], coef[Q_DAC_K0], coef[Q_DAC_MARGIN] = dac
    return RoundTrip(
        coef,
        np.zeros(int(conv[C_ADC_TOP]) + 1),
        np.zeros(int(conv[C_DAC_TOP]) + 1),
    )


@kernel
def _clear_count(x: float, top: float, margin: float) -> int:
    """floor(x + 1/2) clipped to 0..top where no rounding error can change it, else -1."""
    y = x + 0.5
    if y >= -margin and y < top + 1.0 + margin:  # false for NaN
        whole = math.floor(y)
        part = y - whole
        if part > margin and part < 1.0 - margin:
            return int(whole)
        return _NEVER
    # Clipped, as long as the exact path's floor fits its integer (beyond, that path has
    # its own answer: infinities and NaN go there too).
    if -_FLOOR_FITS < y < -margin:
        return 0
    if top + 1.0 + margin <= y < _FLOOR_FITS:
        return int(top)
    return _NEVER


@kernel
def _value(conv: np.ndarray, table: np.ndarray, c: int, adc: bool) -> float:
    """Count ``c``'s value from the table, computed by the exact function the first time."""
    value = table[c]
    if value == 0.0 or value != value:  # not yet computed (or 0 or NaN: computed again)
        value = counts_to_mV(conv, float(c)) if adc else counts_to_pA(conv, float(c))
        table[c] = value
    return value


@kernel
def adc_round_trip_mV(conv: np.ndarray, rt_coef: np.ndarray, table: np.ndarray, v: float) -> float:
    """``counts_to_mV(conv, mV_to_counts(conv, v))``, exactly."""
    x = v * rt_coef[Q_ADC_K1] + rt_coef[Q_ADC_K0]
    c = _clear_count(x, conv[C_ADC_TOP], rt_coef[Q_ADC_MARGIN])
    return _value(conv, table, mV_to_counts(conv, v) if c == _NEVER else c, True)


@kernel
def dac_round_trip_pA(conv: np.ndarray, rt_coef: np.ndarray, table: np.ndarray, i: float) -> float:
    """``counts_to_pA(conv, pA_to_counts(conv, i))``, exactly."""
    x = i * rt_coef[Q_DAC_K1] + rt_coef[Q_DAC_K0]
    c = _clear_count(x, conv[C_DAC_TOP], rt_coef[Q_DAC_MARGIN])
    return _value(conv, table, pA_to_counts(conv, i) if c == _NEVER else c, False)
