"""How each per-sample journal column is stored in NWB, compactly, and read back.

Encodings (the name is stored in the file's metadata document, per column):

``adc_counts``
    Membrane potential as the ADC counts the board sent (unsigned integers).
    ``conversion``/``offset`` give volts (NWB: value = data x conversion + offset);
    :func:`adc_to_mV` rebuilds the journal's mV exactly (same operations, same order, as
    ``clampcore.calibration.counts_to_mV``). Used only when that rebuild reproduces
    every sample of the journal bit for bit; otherwise ``float64``.
``dac_counts``
    Command as the DAC counts sent to the board (``pA_to_counts`` of the computed
    current): the current the amplifier was commanded. :func:`dac_to_pA` gives it in
    pA, exactly as the board side computes it. The unrounded value the step computed
    differs from it by at most half a DAC step and is not kept.
``float32``, ``float64``
    Values in the journal's unit; ``conversion`` gives SI.
``uint``
    Integers in the smallest unsigned type that holds them; a column with unknown
    values (NaN in the journal) stores them as the type's largest value, named in
    the series description and in the document (``unknown``).
``derived_current``
    Not stored: ``I = -g (V - E)`` from the stored conductance, the membrane
    potential and the element's reversal potential (``e_mV`` with its changes).
    Used only when this reproduces the journal's current to float32 precision.
``counter_gaps``
    The board's sample counter: ``first`` plus the row index, plus the gaps listed in
    ``processing/loop_timing/sample_counter_gaps`` (none: no table).

Public names: ``column_kind``, ``Calibration``, ``calibration_from_meta``, ``adc_to_mV``,
``dac_to_pA``, ``mV_to_adc_exact``, ``pA_to_dac``, ``adc_nwb_scale``, ``dac_nwb_scale``,
``smallest_uint``, ``counter_gaps``, ``rebuild_counter``, ``derive_current``, ``dataset``,
``COMPRESSION``, ``CHUNK_ROWS``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from clampcore.calibration import DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, Converter
from clampcore.jit import kernel

# Filter chosen by measurement (bench/bench_recording.py, README): with HDF5's byte shuffle,
# gzip level 1 came within 3% of levels 4 and 9 in size (10.9x, 11.2x, 11.4x smaller than
# the first layout) at the least time of the three (level 9 took twice as long); lzf was
# about a quarter faster but 10% larger, and h5py itself warns that lzf "may not be
# available on all installations of HDF5" (other NWB readers could not open the file).
COMPRESSION: tuple[str, int | None] = ("gzip", 1)
# Rows per HDF5 chunk: 2^16 samples (3.3 s at 20 kHz) keeps chunks of a few hundred kB for
# the widest types, within HDF5's advice of 10 kB - 1 MB per chunk (HDF5 documentation,
# "Chunking in HDF5"); a slice of a recording then decompresses only the chunks it needs.
CHUNK_ROWS = 1 << 16
_UV_PER_V = 1e6  # HELLO reports converter ranges in µV (PROTOCOL.md §4.1)


def column_kind(name: str) -> tuple[str, str]:
    """``(kind, element)`` of a journal column."""
    if name == "v_mV":
        return "v", ""
    if name == "i_pA":
        return "i", ""
    for prefix, kind in (("g_nS/", "g"), ("i_pA/", "ie"), ("spike/", "spike")):
        if name.startswith(prefix) and len(name) > len(prefix):
            return kind, name[len(prefix) :]
    return {
        "sample_counter": ("counter", ""),
        "latency_samples": ("latency", ""),
        "turnaround_us": ("turn", ""),
    }.get(name, ("other", ""))


@dataclass(frozen=True)
class Calibration:
    """The converters and amplifier scaling that turned counts into mV and pA."""

    adc: Converter
    dac: Converter
    amplifier: dict[str, float]
    origin: str  # where the converters came from, stored in the file
    dac_known: bool = True  # False: the DAC is not known, the command is stored as floats

    def to_dict(self) -> dict[str, Any]:
        return {
            "adc": {"bits": self.adc.bits, "min_V": self.adc.min_V, "max_V": self.adc.max_V},
            "dac": {"bits": self.dac.bits, "min_V": self.dac.min_V, "max_V": self.dac.max_V},
            "amplifier": dict(self.amplifier),
            "origin": self.origin,
            "dac_known": self.dac_known,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Calibration:
        return cls(
            Converter(int(d["adc"]["bits"]), float(d["adc"]["min_V"]), float(d["adc"]["max_V"])),
            Converter(int(d["dac"]["bits"]), float(d["dac"]["min_V"]), float(d["dac"]["max_V"])),
            {k: float(v) for k, v in d["amplifier"].items()},
            str(d.get("origin", "")),
            bool(d.get("dac_known", True)),
        )


_AMPLIFIER_KEYS = (
    "vm_mV_per_V",
    "vm_offset_mV",
    "liquid_junction_mV",
    "command_pA_per_V",
    "command_offset_pA",
)
_AMPLIFIER_DEFAULTS = {"vm_offset_mV": 0.0, "liquid_junction_mV": 0.0, "command_offset_pA": 0.0}


def calibration_from_meta(meta: dict[str, Any], simulated: bool) -> Calibration | None:
    """The run's calibration: the board's HELLO when the journal has it (a complete run); for
    the simulated rig and the offline simulation, whose converters are fixed, their 16-bit
    +-10 V ones. A journal left by a crash on another port has no HELLO: then the common
    16-bit +-10 V ADC is assumed for V only (kept only if it reproduces every sample bit
    for bit, see :func:`mV_to_adc_exact`) and the command stays in floats. None without an
    amplifier calibration."""
    experiment = meta.get("experiment")
    amp = experiment.get("amplifier") if isinstance(experiment, dict) else None
    if not isinstance(amp, dict) or "vm_mV_per_V" not in amp or "command_pA_per_V" not in amp:
        return None
    try:
        amplifier = {k: float(amp.get(k, _AMPLIFIER_DEFAULTS.get(k, 0.0))) for k in _AMPLIFIER_KEYS}
    except (TypeError, ValueError):
        return None
    board = meta.get("board")
    keys = ("adc_bits", "adc_min_uV", "adc_max_uV", "dac_bits", "dac_min_uV", "dac_max_uV")
    if isinstance(board, dict) and all(isinstance(board.get(k), int) for k in keys):
        # Divide (exact for whole volts), as clampcore.board_link.board_converters does.
        adc = Converter(
            board["adc_bits"], board["adc_min_uV"] / _UV_PER_V, board["adc_max_uV"] / _UV_PER_V
        )
        dac = Converter(
            board["dac_bits"], board["dac_min_uV"] / _UV_PER_V, board["dac_max_uV"] / _UV_PER_V
        )
        return Calibration(adc, dac, amplifier, "the board's HELLO message")
    if simulated:
        return Calibration(
            DEFAULT_BOARD_ADC,
            DEFAULT_BOARD_DAC,
            amplifier,
            "the simulated converters (16 bit, +-10 V) of clampcore's simulated rig",
        )
    return Calibration(
        DEFAULT_BOARD_ADC,
        DEFAULT_BOARD_DAC,
        amplifier,
        "assumed 16-bit +-10 V ADC (the journal has no HELLO); it reproduced every recorded "
        "membrane potential bit for bit",
        dac_known=False,
    )


def _top(conv: Converter) -> float:
    return float(2**conv.bits - 1)


def _count_dtype(conv: Converter) -> np.dtype:
    return np.dtype(np.uint16 if conv.bits <= 16 else np.uint32)


def adc_to_mV(counts: np.ndarray, cal: Calibration) -> np.ndarray:
    """ADC counts -> mV, the operations of ``calibration.counts_to_mV`` in the same order."""
    a, amp = cal.adc, cal.amplifier
    c = np.asarray(counts, dtype=np.float64)
    volts = a.min_V + c * (a.max_V - a.min_V) / _top(a)
    return volts * amp["vm_mV_per_V"] + amp["vm_offset_mV"] - amp["liquid_junction_mV"]


def mV_to_adc_exact(v_mV: np.ndarray, cal: Calibration) -> np.ndarray | None:
    """The ADC counts behind ``v_mV``, or None unless they reproduce every value bit for bit."""
    a, amp = cal.adc, cal.amplifier
    v = np.asarray(v_mV, dtype=np.float64)
    if not np.all(np.isfinite(v)):
        return None
    volts = (v + amp["liquid_junction_mV"] - amp["vm_offset_mV"]) / amp["vm_mV_per_V"]
    c = np.round((volts - a.min_V) / (a.max_V - a.min_V) * _top(a))
    if c.size and (c.min() < 0 or c.max() > _top(a)):
        return None
    counts = c.astype(_count_dtype(a))
    if not np.array_equal(adc_to_mV(counts, cal), v):
        return None
    return counts


def pA_to_dac(i_pA: np.ndarray, cal: Calibration) -> np.ndarray:
    """Command in pA -> the DAC counts the host sent (``calibration.pA_to_counts``, vectorised)."""
    d, amp = cal.dac, cal.amplifier
    i = np.nan_to_num(np.asarray(i_pA, dtype=np.float64))  # the loop never sends NaN: 0 pA
    volts = (i - amp["command_offset_pA"]) / amp["command_pA_per_V"]
    c = np.round((volts - d.min_V) / (d.max_V - d.min_V) * _top(d))
    return np.clip(c, 0.0, _top(d)).astype(_count_dtype(d))


def dac_to_pA(counts: np.ndarray, cal: Calibration) -> np.ndarray:
    """DAC counts -> pA commanded, as ``calibration.counts_to_pA`` (the board side) computes it."""
    d, amp = cal.dac, cal.amplifier
    c = np.asarray(counts, dtype=np.float64)
    volts = d.min_V + c * (d.max_V - d.min_V) / _top(d)
    return volts * amp["command_pA_per_V"] + amp["command_offset_pA"]


def adc_nwb_scale(cal: Calibration) -> tuple[float, float]:
    """``(conversion, offset)`` in volts per count for the membrane-potential counts."""
    a, amp = cal.adc, cal.amplifier
    mV_per_count = (a.max_V - a.min_V) / _top(a) * amp["vm_mV_per_V"]
    offset_mV = a.min_V * amp["vm_mV_per_V"] + amp["vm_offset_mV"] - amp["liquid_junction_mV"]
    return mV_per_count * 1e-3, offset_mV * 1e-3  # mV -> V (exact decimal prefix)


def dac_nwb_scale(cal: Calibration) -> tuple[float, float]:
    """``(conversion, offset)`` in amperes per count for the command counts."""
    d, amp = cal.dac, cal.amplifier
    pA_per_count = (d.max_V - d.min_V) / _top(d) * amp["command_pA_per_V"]
    offset_pA = d.min_V * amp["command_pA_per_V"] + amp["command_offset_pA"]
    return pA_per_count * 1e-12, offset_pA * 1e-12  # pA -> A


@kernel
def _integer_survey(v: np.ndarray) -> tuple:
    """One pass: (all whole numbers >= 0 or NaN, any NaN, largest whole number)."""
    top = 0.0
    has_nan = False
    for k in range(v.shape[0]):
        x = v[k]
        if x != x:
            has_nan = True
        elif not (x >= 0.0 and x == math.floor(x) and x < 4294967296.0):
            return False, has_nan, top
        elif x > top:
            top = x
    return True, has_nan, top


def smallest_uint(values: np.ndarray) -> tuple[np.ndarray, int | None] | None:
    """``(array, unknown)``: whole numbers >= 0 in the smallest unsigned type; NaN becomes the
    type's largest value ``unknown`` (None when there is no NaN). None if not whole numbers."""
    v = np.asarray(values, dtype=np.float64)
    whole, has_unknown, top = _integer_survey(v)
    if not whole:
        return None
    for dtype in (np.uint8, np.uint16, np.uint32):
        limit = np.iinfo(dtype).max
        if top < limit or (top == limit and not has_unknown):
            if not has_unknown:
                return v.astype(dtype), None
            return np.where(np.isnan(v), limit, v).astype(dtype), int(limit)
    return None


def from_uint(data: np.ndarray, unknown: int | None) -> np.ndarray:
    out = np.asarray(data, dtype=np.float64)
    if unknown is not None:
        out[np.asarray(data) == unknown] = np.nan
    return out


def counter_gaps(counter: np.ndarray) -> tuple[int, np.ndarray, np.ndarray] | None:
    """``(first, rows, missing)``: counter[k] = first + k + sum(missing[rows <= k]).
    None when the column is not an increasing run of whole numbers."""
    c = np.asarray(counter, dtype=np.float64)
    if c.size == 0:
        return 0, np.zeros(0, np.int64), np.zeros(0, np.int64)
    if not np.all(np.isfinite(c)) or np.any(c != np.floor(c)):
        return None
    steps = np.diff(c)
    if np.any(steps < 1):
        return None
    rows = np.flatnonzero(steps != 1) + 1
    return int(c[0]), rows.astype(np.int64), (steps[rows - 1] - 1).astype(np.int64)


def rebuild_counter(first: int, n: int, rows: np.ndarray, missing: np.ndarray) -> np.ndarray:
    """The sample counter from its first value and gaps (see :func:`counter_gaps`)."""
    extra = np.zeros(n, dtype=np.int64)
    if len(rows):
        np.add.at(extra, np.asarray(rows, dtype=np.int64), np.asarray(missing, dtype=np.int64))
    return (first + np.arange(n, dtype=np.int64) + np.cumsum(extra)).astype(np.float64)


def e_schedule(e_mV: float, changes: list[tuple[int, float]], n: int) -> float | np.ndarray:
    """Reversal potential per row: ``e_mV``, then each ``(row, value)`` change from its row
    on; a plain number when it never changed."""
    if not changes:
        return float(e_mV)
    e = np.full(n, float(e_mV))
    for row, value in sorted(changes, key=lambda rv: rv[0]):
        e[max(int(row), 0) :] = float(value)
    return e


def derive_current(g_nS: np.ndarray, v_mV: np.ndarray, e_mV: float | np.ndarray) -> np.ndarray:
    """``I = -g (V - E)`` in pA (nS x mV = pA; positive current depolarises)."""
    out = np.subtract(v_mV, e_mV, dtype=np.float64)
    np.multiply(out, g_nS, out=out)
    return np.negative(out, out=out)


@kernel
def _within_float32(i_pA: np.ndarray, g32: np.ndarray, v_mV: np.ndarray, e_mV: np.ndarray) -> bool:
    # |-g (V - E) - I| <= 2^-22 |g (V - E)|: float32 rounding of g is 2^-24 relative, with a
    # margin of 4x for the float64 products; one pass, no temporaries.
    scalar = e_mV.shape[0] == 1
    for k in range(i_pA.shape[0]):
        e = e_mV[0] if scalar else e_mV[k]
        derived = -np.float64(g32[k]) * (v_mV[k] - e)
        if not abs(derived - i_pA[k]) <= 2.0**-22 * abs(derived) + 1e-300:
            return False  # also for NaN
    return True


def current_is_derivable(
    i_pA: np.ndarray, g32: np.ndarray, v_mV: np.ndarray, e_mV: float | np.ndarray
) -> bool:
    """True when ``-g (V - E)`` from the float32 conductance equals the journal's current to
    float32 precision, sample by sample."""
    e = np.atleast_1d(np.asarray(e_mV, dtype=np.float64))
    return bool(
        _within_float32(
            np.asarray(i_pA, dtype=np.float64),  # views of the journal's table: no copy
            np.asarray(g32, dtype=np.float32),
            np.asarray(v_mV, dtype=np.float64),
            e,
        )
    )


def dataset(array: np.ndarray, compression: tuple[str, int | None] | None = COMPRESSION) -> Any:
    """``array`` chunked along time with shuffle + ``compression``; None: stored plain. A
    dataset already described (a spooled column's placeholder, :mod:`clampcore.nwb_spool`)
    is returned as it is."""
    from hdmf.backends.hdf5.h5_utils import H5DataIO

    if isinstance(array, H5DataIO):
        return array
    array = np.asarray(array)
    if compression is None or array.size == 0:
        return array

    name, level = compression
    chunks = (min(CHUNK_ROWS, array.shape[0]), *array.shape[1:])
    return H5DataIO(
        data=array, compression=name, compression_opts=level, shuffle=True, chunks=chunks
    )
