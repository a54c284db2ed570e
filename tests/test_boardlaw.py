"""The board's per-sample arithmetic (protocol v2): C core, numba mirror, host algebra.

``firmware_protocol/c/ccb_law.c`` (compiled here at the optimisation levels the
project builds its C with) and ``firmware_protocol/boardlaw.py`` (compiled, and
as plain Python under ``NUMBA_DISABLE_JIT=1``) must give the same DAC count and
flags bit for bit on the shared vectors (``vectors/law_v2.json``) and on arbitrary
input. Outside references, named beside each check: PROTOCOL.md §6 (converters,
amplifier scaling, the rounding rule floor(x + 1/2)), IEEE 754 single precision as
numpy implements it (the step-by-step float32 evaluation), the error bound of
floating-point sums and products (Higham 2002), the Mg2+ block of Jahr & Stevens
(1990), and the host's own ``clampcore.step.step`` for the spike and reset rules.
"""

from __future__ import annotations

import copy
import importlib.util
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import boardlaw as bl
from clampcore.firmware_protocol.cboard import (
    C_SOURCE_DIR,
    STRICT_FLAGS,
    build_law_library,
    find_c_compiler,
)
from clampcore.firmware_protocol.claw import Law, LawLibrary, LawParams, LawState
from hypothesis import example, given, settings
from hypothesis import strategies as st

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_mV,
    counts_to_pA,
)
from clampcore.law import LAW_MODE, block_table, board_arrays, law_scale, law_to_counts
from clampcore.program import build_program
from clampcore.step import step

ROOT = Path(__file__).resolve().parents[1]
VECTOR_DIR = ROOT / "firmware_protocol" / "vectors"
VECTORS = json.loads((VECTOR_DIR / "law_v2.json").read_text())
NO_CC = "no C compiler found (install cc/gcc/clang or set $CC): C law tests skipped"
_SETTINGS = settings(derandomize=True, deadline=None, max_examples=300)
U32 = 2.0**-24  # unit roundoff of IEEE 754 single precision (binary32)

# The project's C optimisation levels (cboard builds -O2; test_c_core also checks -O0
# and -Os), and -O2 for this very machine: -march=native offers fused multiply-add
# where the processor has it, which -ffp-contract=off must keep out.
C_VARIANTS = [("-O0", ()), ("-O2", ()), ("-Os", ()), ("-O2", ("-march=native",))]


def _load_generator():
    spec = importlib.util.spec_from_file_location("_law_gen", VECTOR_DIR / "generate_law.py")
    assert spec is not None and spec.loader is not None
    gen = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(gen)
    return gen


GEN = _load_generator()


@pytest.fixture(scope="module")
def c_libs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, LawLibrary]:
    if find_c_compiler() is None:
        pytest.skip(NO_CC)
    tmp = tmp_path_factory.mktemp("ccb_law")
    libs = {}
    for opt, extra in C_VARIANTS:
        try:
            path = build_law_library(tmp, opt, extra)
        except RuntimeError:
            if extra:  # a compiler that does not know -march=native: the other builds suffice
                continue
            raise
        libs[opt + "".join(extra)] = LawLibrary(path)
    return libs


@pytest.fixture(scope="module")
def c_lib(c_libs: dict[str, LawLibrary]) -> LawLibrary:
    return c_libs["-O2"]


# ------------------------------------------------------------ two boards ---
class MirrorBoard:
    """The numba mirror behind a small interface shared with ``CBoard``."""

    def __init__(self, bf: np.ndarray, bi: np.ndarray, table: np.ndarray) -> None:
        self.bf, self.bi, self.table = bf.copy(), bi.copy(), table.copy()
        _, _, self.bs, self.law, _ = bl.new_board_arrays()

    def set(self, law: np.ndarray, k: int) -> None:
        bl.board_set_law(self.bs, self.law, law, k)

    def hold_zero(self, on: bool) -> None:
        self.bs[bl.BS_HOLD_ZERO] = int(on)

    def poke(self, zero: bool = False, tr_remain: int = 0) -> None:
        self.hold_zero(zero)
        self.bs[bl.BS_TR_REMAIN] = tr_remain

    def eval(self, adc: int, k: int) -> tuple[int, int]:
        packed = bl.board_eval(adc, k, self.bf, self.bi, self.bs, self.law, self.table)
        return packed & 0xFFFF, packed >> 16


class CBoard:
    """``ccb_law.c`` through ctypes."""

    def __init__(self, lib: LawLibrary, bf: np.ndarray, bi: np.ndarray, table: np.ndarray) -> None:
        self.lib, self.params = lib, LawParams.from_arrays(bf, bi)
        self.table = np.ascontiguousarray(table, dtype=np.float32)
        self.state = LawState()
        lib.reset(self.state)

    def set(self, law: np.ndarray, k: int) -> None:
        self.lib.set(self.state, Law.from_array(law), k)

    def hold_zero(self, on: bool) -> None:
        self.state.hold_zero = int(on)

    def poke(self, zero: bool = False, tr_remain: int = 0) -> None:
        self.hold_zero(zero)
        self.state.tr_remain = tr_remain

    def eval(self, adc: int, k: int) -> tuple[int, int]:
        return self.lib.eval(self.params, self.state, self.table, adc, k)


def _run_case(board: MirrorBoard | CBoard, case: dict) -> list[tuple[int, int]]:
    out = []
    for s in case["steps"]:
        law = GEN.step_law(s)
        if law is not None:
            board.set(law, s["k"])
        board.hold_zero(s["zero"])
        out.append(board.eval(s["adc"], s["k"]))
    return out


def _expected(case: dict) -> list[tuple[int, int]]:
    return [(s["counts"], s["flags"]) for s in case["steps"]]


# ------------------------------------------------------------ vectors ---
def test_vector_file_is_what_the_generator_makes() -> None:
    # The file on disk is the generator's output (the command in its docstring rewrites it).
    assert GEN.dumps(GEN.build_vectors()) == (VECTOR_DIR / "law_v2.json").read_text()


def test_vectors_round_trip_their_floats_and_cover_every_flag() -> None:
    # Each float32 is stored as its bit pattern and a readable repr: both must agree
    # (IEEE 754 binary32, struct's ">f").
    flags_seen = 0
    for case in VECTORS["cases"]:
        for f in GEN.FLOAT_FIELDS:
            v = case["params"][f]
            assert repr(float(GEN.from_hex(v["f32"]))) == v["value"]
        for s in case["steps"]:
            flags_seen |= s["flags"]
            for v in (s["law"] or {}).values():
                back = float(GEN.from_hex(v["f32"]))
                assert repr(back) == v["value"] or (math.isnan(back) and v["value"] == "nan")
    assert flags_seen == 0xFF  # every bit of the flags byte occurs at least once


def test_compiled_mirror_reproduces_every_vector() -> None:
    assert hasattr(bl.board_eval, "py_func") or os.environ.get("NUMBA_DISABLE_JIT") == "1"
    for case in VECTORS["cases"]:
        bf, bi, _, _, table = GEN.case_arrays(case)
        board = MirrorBoard(bf, bi, table)
        assert _run_case(board, case) == _expected(case), case["name"]


def test_plain_python_mirror_reproduces_every_vector() -> None:
    # The same kernels as plain Python (numpy float32 scalars) in a fresh interpreter.
    env = dict(os.environ, NUMBA_DISABLE_JIT="1", PYTHONPATH=str(ROOT))
    code = (
        "import sys, runpy; from firmware_protocol import boardlaw as bl;"
        " assert not hasattr(bl.board_eval, 'py_func'), 'still compiled';"
        " sys.argv = ['generate_law.py', '--replay'];"
        f" runpy.run_path({str(VECTOR_DIR / 'generate_law.py')!r}, run_name='__main__')"
    )
    proc = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True, text=True, env=env, check=False, cwd=ROOT,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    got = json.loads(proc.stdout)
    for case in VECTORS["cases"]:
        assert [tuple(x) for x in got[case["name"]]] == _expected(case), case["name"]


@pytest.mark.parametrize("variant", [o + "".join(e) for o, e in C_VARIANTS])
def test_c_core_reproduces_every_vector(c_libs: dict[str, LawLibrary], variant: str) -> None:
    if variant not in c_libs:
        pytest.skip(f"the compiler does not build {variant}")
    for case in VECTORS["cases"]:
        bf, bi, _, _, table = GEN.case_arrays(case)
        assert _run_case(CBoard(c_libs[variant], bf, bi, table), case) == _expected(case), case[
            "name"
        ]


def test_the_vectors_catch_a_board_built_with_fused_multiply_add(tmp_path: Path) -> None:
    # A fused multiply-add rounds once where two roundings are specified (IEEE 754-2008
    # fusedMultiplyAdd); case no_fused_multiply_add lands exactly on n + 1/2 only with two.
    cc = find_c_compiler()
    cpu = Path("/proc/cpuinfo")
    if cc is None or not cpu.exists() or " fma" not in cpu.read_text():
        pytest.skip("needs a C compiler and a processor with fused multiply-add")
    out = tmp_path / "libccb_law_fma.so"
    src = str(C_SOURCE_DIR / "ccb_law.c")
    flags = ["-O2", "-march=native", "-ffp-contract=fast", "-fPIC", "-shared"]
    proc = subprocess.run([cc, *STRICT_FLAGS, *flags, src, "-o", str(out), "-lm"], check=False)
    if proc.returncode != 0:
        pytest.skip("the compiler does not build -march=native")
    (case,) = [c for c in VECTORS["cases"] if c["name"] == "no_fused_multiply_add"]
    bf, bi, _, _, table = GEN.case_arrays(case)
    got = _run_case(CBoard(LawLibrary(out), bf, bi, table), case)
    assert all(g != e for g, e in zip(got, _expected(case), strict=True))


# ------------------------------------------------- independent evaluation ---
AMP0 = {
    "vm_mV_per_V": 100.0,
    "vm_offset_mV": 0.0,
    "command_pA_per_V": 400.0,
    "command_offset_pA": 0.0,
    "liquid_junction_mV": 0.0,
}
CONV0 = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, AMP0)
TABLE_1MM, SHIFT_1MM = block_table(CONV0, 1.0)


def _float32_x(law, adc, table, shift, tr=None):
    """x by PROTOCOL/boardlaw's operation order, one numpy float32 rounding per operation."""
    f = np.float32
    a = f(adc)
    x = f(law[0]) - f(law[1]) * a
    if shift >= 0:
        i = adc >> shift
        frac = f(adc & ((1 << shift) - 1)) * f(1.0 / (1 << shift))
        b = table[i] + frac * (table[i + 1] - table[i])
        x = x + b * (f(law[2]) - f(law[3]) * a)
    if tr is not None:
        x = x + (f(tr[0]) - f(tr[1]) * a)
    return x


def _float64_x_and_scale(law, adc, table, shift, tr=None):
    """The same x in float64 from the float32 inputs, and the sum of |terms| it rounds."""
    c = [float(v) for v in law]
    x, mag = c[0] - c[1] * adc, abs(c[0]) + abs(c[1] * adc)
    if shift >= 0:
        i = adc >> shift
        t = (adc - (i << shift)) / (1 << shift)
        b = float(table[i]) + t * (float(table[i + 1]) - float(table[i]))
        x += b * (c[2] - c[3] * adc)
        # the interpolated B errs relative to its end points, not to B itself
        b_mag = max(abs(float(table[i])), abs(float(table[i + 1])))
        mag += b_mag * (abs(c[2]) + abs(c[3] * adc))
    if tr is not None:
        x += float(tr[0]) - float(tr[1]) * adc
        mag += abs(float(tr[0])) + abs(float(tr[1]) * adc)
    return x, mag


def _f32s(lo: float, hi: float) -> st.SearchStrategy[float]:
    return st.floats(lo, hi, width=32, allow_nan=False, allow_infinity=False)


@st.composite
def _arith_case(draw):
    shift = draw(st.sampled_from([-1, SHIFT_1MM]))
    law = [draw(_f32s(-1e7, 1e7)), draw(_f32s(-1e3, 1e3))]
    law += [draw(_f32s(-1e7, 1e7)), draw(_f32s(-1e3, 1e3))]
    tr = draw(st.one_of(st.none(), st.tuples(_f32s(-1e7, 1e7), _f32s(-1e3, 1e3))))
    lo = draw(_f32s(-10.0, 65545.0))
    hi = draw(_f32s(lo, 65545.0))
    adc = draw(st.integers(0, 65535))
    return shift, law, tr, lo, hi, adc


def _arith_arrays(shift, tr, lo, hi):
    bf, bi, _, _, _ = bl.new_board_arrays()
    bf[bl.BF_LIMIT_LO], bf[bl.BF_LIMIT_HI] = lo, hi
    if tr is not None:
        bf[bl.BF_TR_ALPHA], bf[bl.BF_TR_BETA] = tr
    bi[bl.BI_DAC_TOP], bi[bl.BI_FAULT_COUNTS] = 65535, 32768
    bi[bl.BI_ADC_OK_LO], bi[bl.BI_ADC_OK_HI] = 0, 65535
    bi[bl.BI_SPIKE_ADC] = bi[bl.BI_TR_ADC] = 65536  # detection and threshold-and-reset off
    bi[bl.BI_LIFETIME] = 10
    bi[bl.BI_BLOCK_SHIFT] = shift
    table = TABLE_1MM if shift >= 0 else np.ones(0, np.float32)
    return bf, bi, table


@_SETTINGS
@given(_arith_case())
@example((-1, [0.49999997, 0.0, 0.0, 0.0], None, -4.0, 65539.0, 30000))  # x + 0.5f rounds up
@example((-1, [15000.0, 0.5, 0.0, 0.0], None, -4.0, 65539.0, 30001))  # x = -0.5 exactly
@example((-1, [65535.5, 0.0, 0.0, 0.0], None, -4.0, 65539.0, 1))  # beyond the DAC's top
def test_counts_are_floor_x_plus_half_of_the_float32_law(c_lib: LawLibrary, case) -> None:
    shift, law, tr, lo, hi, adc = case
    bf, bi, table = _arith_arrays(shift, tr, lo, hi)
    law32 = np.array(law, dtype=np.float32)
    x = _float32_x(law32, adc, table, shift, None if tr is None else bf[2:4])
    # Documented order (boardlaw/ccb_law: x, clip to [limit_lo, limit_hi], round, clip to
    # the DAC); rounding by PROTOCOL.md §6: floor(x + 1/2), here exact in float64.
    limited = bool(x < bf[0] or x > bf[1])
    xc = float(min(max(x, bf[0]), bf[1]))
    want = (min(max(math.floor(xc + 0.5), 0), 65535), bl.BF_FLAG_LIMITED if limited else 0)
    # The same x within float32 rounding of the float64 value: error of a short chain of
    # sums and products <= n·u·Σ|terms| (Higham 2002, Accuracy and Stability of Numerical
    # Algorithms, §3.1; n = 8 covers the longest chain here, from memory of its form).
    x64, mag = _float64_x_and_scale(law32, adc, table, shift, None if tr is None else bf[2:4])
    assert abs(float(x) - x64) <= 8 * U32 * mag
    reset = bl.BF_FLAG_RESET if tr is not None else 0
    boards = [MirrorBoard(bf, bi, table), CBoard(c_lib, bf, bi, table)]
    for board in boards:
        board.set(law32, 7)
        board.poke(tr_remain=1 if tr is not None else 0)
        assert board.eval(adc, 7) == (want[0], want[1] | reset), type(board).__name__


# ------------------------------------------------- the current limit ---
def _experiment(max_current_pA: float, amplifier: dict, mg_mM: float = 0.0, tr: bool = False):
    elements = [{"kind": "leak", "name": "leak", "g_nS": 5.0, "e_mV": -70.0}]
    if mg_mM > 0:
        elements.append({"kind": "synapse", "name": "nmda", "mg_mM": mg_mM})
    if tr:
        elements.append({"kind": "threshold_reset", "name": "tr", "refractory_ms": 0.5})
    return {
        "loop": {"rate_hz": 10_000.0, "max_current_pA": max_current_pA},
        "amplifier": amplifier,
        "element": elements,
    }


AMP_OFFSETS = {  # non-zero offsets: a calibration as an experimenter would enter it
    "vm_mV_per_V": 50.0,
    "vm_offset_mV": 3.5,
    "command_pA_per_V": 2000.0,
    "command_offset_pA": -17.25,
    "liquid_junction_mV": 12.0,
}
LIMIT_SETUPS = []
for _mx, _amp, _mg, _tr in [
    (500.0, AMP0, 0.0, False),
    (50.0, AMP0, 1.0, True),
    (3999.0, AMP0, 1.0, True),
    (300.0, AMP_OFFSETS, 2.0, True),
    (19000.0, AMP_OFFSETS, 0.0, False),
]:
    _conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, _amp)
    _arrs = board_arrays(build_program(_experiment(_mx, _amp, _mg, _tr)), _conv, LAW_MODE, 20)
    LIMIT_SETUPS.append((_mx, _conv, _arrs))

_any_f32 = st.integers(0, 2**32 - 1).map(lambda b: np.uint32(b).view(np.float32))


@_SETTINGS
@given(
    setup=st.sampled_from(range(len(LIMIT_SETUPS))),
    law=st.lists(st.one_of(_any_f32, _f32s(-1e6, 1e6)), min_size=4, max_size=4),
    adc=st.integers(0, 65535),
    age=st.integers(0, 25),
    zero=st.booleans(),
    tr_remain=st.integers(0, 3),
)
def test_the_current_limit_is_never_exceeded(
    c_lib: LawLibrary, setup, law, adc, age, zero, tr_remain
) -> None:
    max_pA, conv, (bf, bi, _, _, table) = LIMIT_SETUPS[setup]
    law32 = np.array(law, dtype=np.float32)
    results = []
    for board in (MirrorBoard(bf, bi, table), CBoard(c_lib, bf, bi, table)):
        board.set(law32, 100)
        board.poke(zero=zero, tr_remain=tr_remain)
        results.append(board.eval(adc, 100 + age))
    assert results[0] == results[1]  # C and numba agree on arbitrary input too
    counts, flags = results[0]
    if flags & bl.BF_FLAG_FAULT:
        assert counts == bi[bl.BI_FAULT_COUNTS]
        return
    # The amplifier's current for the count (PROTOCOL.md §6: DAC count -> volts -> pA).
    step_pA = abs(counts_to_pA(conv, 1.0) - counts_to_pA(conv, 0.0))
    assert abs(counts_to_pA(conv, float(counts))) <= max_pA + step_pA


_step = st.tuples(
    st.integers(0, 65535),
    st.integers(0, 30),  # samples since the previous step
    st.one_of(st.none(), st.lists(st.one_of(_any_f32, _f32s(-1e5, 1e5)), min_size=4, max_size=4)),
    st.booleans(),
)


@_SETTINGS
@given(setup=st.sampled_from(range(len(LIMIT_SETUPS))), steps=st.lists(_step, max_size=80))
def test_c_and_mirror_agree_on_any_sequence(c_lib: LawLibrary, setup, steps) -> None:
    # The two implementations side by side on arbitrary input (the shared vectors'
    # promise, beyond the listed cases): same counts, same flags, every sample.
    _, _, (bf, bi, _, _, table) = LIMIT_SETUPS[setup]
    boards = (MirrorBoard(bf, bi, table), CBoard(c_lib, bf, bi, table))
    k = 0
    for adc, gap, law, zero in steps:
        k += gap
        results = []
        for board in boards:
            if law is not None:
                board.set(np.array(law, dtype=np.float32), k)
            board.hold_zero(zero)
            results.append(board.eval(adc, k))
        assert results[0] == results[1], (k, adc, law, zero)


# ------------------------------------------------- the Mg2+ block table ---
@pytest.mark.parametrize("mg_mM", [0.5, 1.0, 2.0])
def test_block_table_follows_jahr_stevens_within_the_interpolation_bound(mg_mM: float) -> None:
    table, shift = block_table(CONV0, mg_mM)
    adc = np.arange(65536)
    # V(adc) by PROTOCOL.md §6 for the 16-bit ±10 V ADC and 100 mV/V.
    v_mV = (-10.0 + adc * 20.0 / 65535.0) * 100.0
    # Jahr & Stevens (1990), J Neurosci 10:3178: B(V) = 1/(1 + [Mg]/3.57 mM · exp(-0.062 V/mV)).
    closed = 1.0 / (1.0 + mg_mM / 3.57 * np.exp(-0.062 * v_mV))
    board = np.array([bl._block(table, int(a), shift) for a in adc], dtype=np.float64)
    # Linear interpolation over h: |error| <= h²/8·max|B''| (the remainder of linear
    # interpolation); B is a logistic in 0.062·V, whose second derivative is at most
    # 1/(6√3) in its own variable; plus the float32 rounding of table and arithmetic.
    h_mV = (1 << shift) * 20.0 / 65535.0 * 100.0
    bound = h_mV**2 / 8.0 * 0.062**2 / (6.0 * math.sqrt(3.0)) + 4 * U32
    err = np.abs(board - closed)
    assert shift == 6  # 1024 intervals over the 16-bit ADC (law.py, _BLOCK_INTERVALS)
    assert err.max() <= bound
    assert err.max() <= 1.8e-4  # the bound stated beside _BLOCK_INTERVALS in clampcore/law.py
    assert err.max() > bound / 4  # the bound is the right size, not a loose one
    assert np.all(board[adc % (1 << shift) == 0] == table[: 65536 >> shift])  # exact at points


# ------------------------------------------------- law_to_counts algebra ---
@_SETTINGS
@given(
    vm_offset=st.floats(-20.0, 20.0),
    ljp=st.floats(-20.0, 20.0),
    cmd_offset=st.floats(-100.0, 100.0),
    vm_scale=st.sampled_from([10.0, 50.0, 100.0]),
    cmd_scale=st.sampled_from([400.0, 2000.0]),
    a=st.floats(-2000.0, 2000.0),
    g=st.floats(-20.0, 50.0),
    ab=st.floats(-2000.0, 2000.0),
    gb=st.floats(0.0, 50.0),
    adc=st.integers(0, 65535),
)
def test_law_to_counts_gives_the_law_in_pA(
    vm_offset, ljp, cmd_offset, vm_scale, cmd_scale, a, g, ab, gb, adc
) -> None:
    amp = {
        "vm_mV_per_V": vm_scale,
        "vm_offset_mV": vm_offset,
        "command_pA_per_V": cmd_scale,
        "command_offset_pA": cmd_offset,
        "liquid_junction_mV": ljp,
    }
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, amp)
    table, shift = block_table(conv, 1.0)
    law = np.zeros(4, np.float32)
    law_to_counts(law_scale(conv), a, g, ab, gb, law)
    x = float(_float32_x(law, adc, table, shift))
    # PROTOCOL.md §6 by hand: the ADC count's V (junction potential subtracted, Neher 1992)
    # and the current the unrounded DAC value x commands.
    v = (-10.0 + adc * 20.0 / 65535.0) * vm_scale + vm_offset - ljp
    i_pA = (-10.0 + x * 20.0 / 65535.0) * cmd_scale + cmd_offset
    b = float(bl._block(table, adc, shift))
    want = a - g * v + b * (ab - gb * v)
    # float32 rounding: each coefficient once, then the evaluation (Higham 2002 §3.1),
    # on the terms' magnitudes in counts, back to pA by the DAC's pA per count.
    k = 65535.0 / (20.0 * cmd_scale)
    _, mag = _float64_x_and_scale(law, adc, table, shift)
    assert abs(i_pA - want) <= 10 * U32 * mag / k + 1e-9 * (abs(a) + abs(ab))


# ------------------------------------------- threshold-and-reset and spikes ---
def _tr_experiment(threshold_mV: float, spike_mV: float, refractory_ms: float) -> dict:
    exp = _experiment(500.0, AMP0)
    exp["loop"].update({"spike_threshold_mV": spike_mV, "spike_hysteresis_mV": 5.0})
    exp["element"].append(
        {"kind": "threshold_reset", "name": "tr", "threshold_mV": threshold_mV,
         "reset_mV": -65.0, "refractory_ms": refractory_ms, "g_nS": 40.0}
    )  # fmt: skip
    return exp


TR_SETUPS = [
    _tr_experiment(-50.0, -20.0, 0.5),  # detector above the imposed threshold
    _tr_experiment(-40.0, -55.0, 0.3),  # detector below it: crossings during a reset
    _tr_experiment(-50.0, -50.0, 0.1),  # the same threshold, one-sample reset
]


@st.composite
def _v_sequence(draw):
    setup = draw(st.sampled_from(range(len(TR_SETUPS))))
    program = build_program(TR_SETUPS[setup])
    bi = board_arrays(program, CONV0, LAW_MODE, 10**6)[1]
    # The counts where a decision changes (each rule's first count and the one below),
    # often, and any count now and then.
    edges = [bi[bl.BI_TR_ADC], bi[bl.BI_SPIKE_ADC], bi[bl.BI_REARM_ADC], bi[bl.BI_ADC_OK_LO]]
    edges = [int(c) + d for c in edges for d in (-1, 0)] + [
        int(bi[bl.BI_ADC_OK_HI]) + d for d in (0, 1)
    ]
    count = st.one_of(
        st.sampled_from(edges),
        st.integers(bi[bl.BI_ADC_OK_LO], bi[bl.BI_ADC_OK_HI]),
        st.integers(0, 65535),
    )
    return setup, draw(st.lists(count, min_size=1, max_size=150))


@_SETTINGS
@given(_v_sequence())
def test_board_spikes_and_resets_decide_as_the_host_step(c_lib: LawLibrary, case) -> None:
    setup, adcs = case
    program = build_program(TR_SETUPS[setup])
    bf, bi, _, _, table = board_arrays(program, CONV0, LAW_MODE, 10**6)
    host = copy.deepcopy(program)  # the host's step, current mode, on the same experiment
    loop_s, g_out = host.loop_s, host.g_out
    tr_row = host.row("tr")
    boards = [MirrorBoard(bf, bi, table), CBoard(c_lib, bf, bi, table)]
    for board in boards:
        board.set(np.array([1000.0, 0.0, 0.0, 0.0], np.float32), 0)
    for n, adc in enumerate(adcs):
        v = counts_to_mV(CONV0, float(adc))  # the quantised V both sides see
        step(v, n, host.arrays())
        host_spike = bool(loop_s[0]["cell_spiked"])
        host_reset = g_out[tr_row] != 0.0  # the reset conductance is on at this sample
        for board in boards:
            _, flags = board.eval(adc, n)
            got = (bool(flags & bl.BF_FLAG_SPIKE), bool(flags & bl.BF_FLAG_RESET))
            assert got == (host_spike, host_reset), (type(board).__name__, n, adc, v)


# ------------------------------------------------- the law's lifetime ---
@_SETTINGS
@given(
    lifetime=st.integers(0, 500),
    s=st.integers(0, 2**40),
    law=st.lists(_f32s(-1e4, 1e4), min_size=4, max_size=4),
)
def test_a_law_lasts_its_lifetime_and_then_the_fault_value_goes_out(
    c_lib: LawLibrary, lifetime, s, law
) -> None:
    _, _, (bf, bi, _, _, table) = LIMIT_SETUPS[0]
    bi = bi.copy()
    bi[bl.BI_LIFETIME] = lifetime
    adc = 30000
    law32 = np.array(law, dtype=np.float32)
    for board in (MirrorBoard(bf, bi, table), CBoard(c_lib, bf, bi, table)):
        # Before any law: the fault value, STALE.
        counts, flags = board.eval(adc, s)
        assert (counts, flags) == (bi[bl.BI_FAULT_COUNTS], bl.BF_FLAG_FAULT | bl.BF_FLAG_STALE)
        board.set(law32, s)
        first = board.eval(adc, s)
        assert not first[1] & bl.BF_FLAG_FAULT
        # In force through s + lifetime (the same adc gives the same answer) ...
        for k in sorted({s + min(1, lifetime), s + lifetime // 2, s + lifetime}):
            assert board.eval(adc, k) == first
        # ... and the fault value, flagged STALE, at s + lifetime + 1.
        counts, flags = board.eval(adc, s + lifetime + 1)
        assert counts == bi[bl.BI_FAULT_COUNTS]
        assert flags == bl.BF_FLAG_FAULT | bl.BF_FLAG_STALE
