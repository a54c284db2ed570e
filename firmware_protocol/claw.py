"""ctypes binding of the board's per-sample arithmetic (``c/ccb_law.c``) for tests.

Build the library with ``firmware_protocol.cboard.build_law_library(tmpdir)``, then
``LawLibrary(path)`` gives ``reset(state)``, ``set(state, law, sample)`` and
``eval(params, state, table, adc, k) -> (counts, flags)``, the three C functions.
The structures mirror ``ccb_law.h`` field for field:

* ``LawParams`` - ``ccb_law_params`` (``from_arrays(bf, bi)`` fills it from the
  numba mirror's parameter arrays, ``firmware_protocol.boardlaw``);
* ``LawState`` - ``ccb_law_state`` (``law`` is a ``Law``);
* ``Law`` - ``ccb_law``, the four float32 coefficients.

Public names: ``Law``, ``LawParams``, ``LawState``, ``LawLibrary``.
"""

from __future__ import annotations

import ctypes
import os

import numpy as np
from clampcore.firmware_protocol import boardlaw as bl

_f32 = ctypes.c_float
_i32 = ctypes.c_int32
_i64 = ctypes.c_int64


class Law(ctypes.Structure):
    """``ccb_law``: x = alpha - beta·adc + B(adc)·(alpha_b - beta_b·adc)."""

    _fields_ = (("alpha", _f32), ("beta", _f32), ("alpha_b", _f32), ("beta_b", _f32))

    @classmethod
    def from_array(cls, law: np.ndarray) -> Law:
        """From the mirror's float32[4] (``LAW_ALPHA`` ... ``LAW_BETA_B``)."""
        v = np.asarray(law, dtype=np.float32)
        return cls(*(float(v[j]) for j in range(bl.N_LAW)))


class LawParams(ctypes.Structure):
    """``ccb_law_params``."""

    _fields_ = (
        ("limit_lo", _f32),
        ("limit_hi", _f32),
        ("tr_alpha", _f32),
        ("tr_beta", _f32),
        ("dac_top", _i32),
        ("fault_counts", _i32),
        ("adc_ok_lo", _i32),
        ("adc_ok_hi", _i32),
        ("spike_adc", _i32),
        ("rearm_adc", _i32),
        ("tr_adc", _i32),
        ("tr_samples", _i32),
        ("lifetime", _i32),
        ("block_shift", _i32),
    )

    @classmethod
    def from_arrays(cls, bf: np.ndarray, bi: np.ndarray) -> LawParams:
        """From the mirror's ``bf`` (float32, ``BF_*``) and ``bi`` (int64, ``BI_*``)."""
        # Both lists follow the C struct's order, which is the mirror's column order.
        floats = [float(np.float32(bf[j])) for j in range(bl.N_BF)]
        ints = [int(bi[j]) for j in range(bl.N_BI)]
        return cls(*floats, *ints)


class LawState(ctypes.Structure):
    """``ccb_law_state``."""

    _fields_ = (
        ("armed", _i32),
        ("tr_remain", _i32),
        ("law_sample", _i64),
        ("hold_zero", _i32),
        ("law", Law),
    )


class LawLibrary:
    """The compiled ``ccb_law.c`` loaded through ctypes."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        lib = ctypes.CDLL(str(path))
        lib.ccb_law_reset.restype = None
        lib.ccb_law_reset.argtypes = [ctypes.POINTER(LawState)]
        lib.ccb_law_set.restype = None
        lib.ccb_law_set.argtypes = [ctypes.POINTER(LawState), ctypes.POINTER(Law), _i64]
        lib.ccb_law_eval.restype = ctypes.c_uint16
        lib.ccb_law_eval.argtypes = [
            ctypes.POINTER(LawParams),
            ctypes.POINTER(LawState),
            ctypes.POINTER(_f32),
            ctypes.c_uint16,
            _i64,
            ctypes.POINTER(ctypes.c_uint8),
        ]
        self._lib = lib

    def reset(self, state: LawState) -> None:
        """``ccb_law_reset``: no law, detector disarmed, zero request off."""
        self._lib.ccb_law_reset(ctypes.byref(state))

    def set(self, state: LawState, law: Law, sample: int) -> None:
        """``ccb_law_set``: put ``law`` (made for ``sample``) in force."""
        self._lib.ccb_law_set(ctypes.byref(state), ctypes.byref(law), sample)

    def eval(
        self, params: LawParams, state: LawState, table: np.ndarray | None, adc: int, k: int
    ) -> tuple[int, int]:
        """``ccb_law_eval``: (DAC counts, flags) for sample ``k`` read as ``adc``.

        ``table`` must be a C-contiguous float32 array (or None without a block).
        """
        ptr = None
        if table is not None and table.size:
            if table.dtype != np.float32 or not table.flags.c_contiguous:
                raise ValueError("table: must be a C-contiguous float32 array")
            ptr = table.ctypes.data_as(ctypes.POINTER(_f32))
        flags = ctypes.c_uint8(0)
        counts = self._lib.ccb_law_eval(
            ctypes.byref(params), ctypes.byref(state), ptr, adc, k, ctypes.byref(flags)
        )
        return int(counts), int(flags.value)
