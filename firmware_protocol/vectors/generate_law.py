"""Write law_v2.json, the shared vectors of the board's per-sample arithmetic.

    python firmware_protocol/vectors/generate_law.py            # rewrites law_v2.json beside it
    python firmware_protocol/vectors/generate_law.py --replay   # prints the mirror's answers

Each case is one board: its parameters (``ccb_law_params``, the columns of
``firmware_protocol.boardlaw``), its Mg2+ block table, and a sequence of steps
(sample ``k``, ADC count, optionally a new law put in force at ``k``, the zero
request on or off) with the expected DAC count and flags of every step. The
parameters come from ``clampcore.law.board_arrays`` on small experiments (the
default 16-bit ±10 V converters, an amplifier of 100 mV/V and 400 pA/V) or are
written by hand where a case needs the DAC's ends; the expected answers are the
numba mirror's (``boardlaw.board_eval``), which the C core (``c/ccb_law.c``) and
the mirror under ``NUMBA_DISABLE_JIT=1`` must reproduce bit for bit
(``tests/test_boardlaw.py``, which also checks that this script rewrites the file
unchanged).

Floats are stored as the float32 bit pattern in hex (``"f32"``, big-endian digits
as ``struct.pack(">f")``), which round-trips exactly, beside a readable ``"value"``
(``repr`` of the float: ``"0.5"``, ``"inf"``, ``"nan"``). The table holds hex only.

Public names: ``build_vectors() -> dict``, ``case_arrays(case)``, ``replay(case)``,
``main() -> None``.
"""

from __future__ import annotations

import json
import math
import struct
import sys
from pathlib import Path
from typing import Any

import numpy as np
from clampcore.firmware_protocol import boardlaw as bl

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
)
from clampcore.law import LAW_MODE, board_arrays, law_scale, law_to_counts
from clampcore.program import build_program

OUT = Path(__file__).resolve().parent / "law_v2.json"

# The C struct's fields, in order (``ccb_law_params`` in c/ccb_law.h).
FLOAT_FIELDS = ("limit_lo", "limit_hi", "tr_alpha", "tr_beta")
INT_FIELDS = (
    "dac_top",
    "fault_counts",
    "adc_ok_lo",
    "adc_ok_hi",
    "spike_adc",
    "rearm_adc",
    "tr_adc",
    "tr_samples",
    "lifetime",
    "block_shift",
)
LAW_FIELDS = ("alpha", "beta", "alpha_b", "beta_b")

# The amplifier of the vectors: Vm x10 (100 mV per V) and 400 pA/V, the project's defaults.
AMPLIFIER = {
    "vm_mV_per_V": 100.0,
    "vm_offset_mV": 0.0,
    "command_pA_per_V": 400.0,
    "command_offset_pA": 0.0,
    "liquid_junction_mV": 0.0,
}
CONV = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, AMPLIFIER)
SCALE = law_scale(CONV)
RATE_HZ = 10_000.0  # 0.1 ms samples: a 2 ms refractory period is 20 samples


def f32_hex(x: float) -> str:
    """The float32 bit pattern of ``x`` as 8 hex digits."""
    return struct.pack(">f", np.float32(x)).hex()


def from_hex(h: str) -> np.float32:
    """The float32 whose bit pattern is ``h``."""
    return np.float32(struct.unpack(">f", bytes.fromhex(h))[0])


def _f32(x: float) -> dict[str, str]:
    v = np.float32(x)
    return {"f32": f32_hex(v), "value": repr(float(v))}


def _experiment(
    elements: list[dict[str, Any]], lifetime: int, **loop: float
) -> tuple[np.ndarray, ...]:
    """``board_arrays`` of a small experiment on the vectors' converters and amplifier."""
    exp = {
        "loop": {"rate_hz": RATE_HZ, **loop},
        "amplifier": AMPLIFIER,
        "element": elements,
    }
    return board_arrays(build_program(exp), CONV, LAW_MODE, lifetime)


def _law(a_pA: float, g_nS: float, ab_pA: float = 0.0, gb_nS: float = 0.0) -> np.ndarray:
    """The host's law I = a - gV + B(V)(a_b - g_b V) in counts (``law_to_counts``)."""
    out = np.zeros(bl.N_LAW, dtype=np.float32)
    law_to_counts(SCALE, a_pA, g_nS, ab_pA, gb_nS, out)
    return out


def _raw(alpha: float, beta: float = 0.0, alpha_b: float = 0.0, beta_b: float = 0.0) -> np.ndarray:
    return np.array([alpha, beta, alpha_b, beta_b], dtype=np.float32)


def _adc(v_mV: float) -> int:
    """The ADC count nearest to ``v_mV`` on the vectors' converters (for readable steps)."""
    volts = v_mV / AMPLIFIER["vm_mV_per_V"]
    return round((volts + 10.0) / 20.0 * 65535)


Step = tuple[int, int, "np.ndarray | None", bool]  # (k, adc, new law or None, zero request)


def _case(
    name: str, about: str, arrays: tuple[np.ndarray, ...], steps: list[Step]
) -> dict[str, Any]:
    bf, bi, _, _, table = arrays
    params: dict[str, Any] = {f: _f32(bf[j]) for j, f in enumerate(FLOAT_FIELDS)}
    params.update({f: int(bi[j]) for j, f in enumerate(INT_FIELDS)})
    case = {
        "name": name,
        "about": about,
        "params": params,
        "table": [f32_hex(t) for t in table] if bi[bl.BI_BLOCK_SHIFT] >= 0 else [],
        "steps": [
            {
                "k": k,
                "adc": adc,
                "law": None if law is None else {f: _f32(law[j]) for j, f in enumerate(LAW_FIELDS)},
                "zero": zero,
            }
            for k, adc, law, zero in steps
        ],
    }
    for step, (counts, flags) in zip(case["steps"], replay(case), strict=True):
        step["counts"], step["flags"] = counts, flags
    return case


def case_arrays(case: dict[str, Any]) -> tuple[np.ndarray, ...]:
    """``(bf, bi, bs, law, table)`` of a stored case, fresh state (as ``new_board_arrays``)."""
    bf, bi, bs, law, _ = bl.new_board_arrays()
    p = case["params"]
    for j, f in enumerate(FLOAT_FIELDS):
        bf[j] = from_hex(p[f]["f32"])
    for j, f in enumerate(INT_FIELDS):
        bi[j] = p[f]
    table = np.array([from_hex(h) for h in case["table"]], dtype=np.float32)
    return bf, bi, bs, law, table


def step_law(step: dict[str, Any]) -> np.ndarray | None:
    """The float32[4] law of a stored step, or None."""
    if step["law"] is None:
        return None
    return np.array([from_hex(step["law"][f]["f32"]) for f in LAW_FIELDS], dtype=np.float32)


def replay(case: dict[str, Any]) -> list[tuple[int, int]]:
    """(counts, flags) of every step of ``case`` by the mirror (compiled unless disabled)."""
    bf, bi, bs, law, table = case_arrays(case)
    out = []
    for step in case["steps"]:
        new = step_law(step)
        if new is not None:
            bl.board_set_law(bs, law, new, step["k"])
        bs[bl.BS_HOLD_ZERO] = 1 if step["zero"] else 0
        packed = bl.board_eval(step["adc"], step["k"], bf, bi, bs, law, table)
        out.append((packed & 0xFFFF, packed >> 16))
    return out


def _steps(
    adcs: list[int], laws: dict[int, np.ndarray], zero: set[int] | None = None
) -> list[Step]:
    zero = zero or set()
    return [(k, adc, laws.get(k), k in zero) for k, adc in enumerate(adcs)]


def _cases() -> list[dict[str, Any]]:
    cases = []
    leak = [{"kind": "leak", "name": "leak", "g_nS": 5.0, "e_mV": -70.0}]

    # 1. No block: leak-like laws over the plausible range, a new law every few samples.
    arr = _experiment(leak, lifetime=50)
    vs = [-199.9, -120.0, -90.0, -70.0, -65.3, -50.0, -20.0, 0.0, 33.3, 120.0, 199.9]
    adcs = [_adc(v) for v in vs for _ in range(2)]
    laws = {0: _law(-350.0, 5.0), 6: _law(120.0, 0.0), 10: _law(-2.5, -3.0), 16: _law(0.0, 12.5)}
    cases.append(_case("no_block", "leak-like laws, no Mg block", arr, _steps(adcs, laws)))

    # 2. Mg block for 1 mM: the table from clampcore.law.block_table, an NMDA-type law.
    nmda = {"kind": "synapse", "name": "nmda", "mg_mM": 1.0, "g_max_nS": 2.0}
    arr = _experiment([*leak, nmda], lifetime=50, max_current_pA=3000.0)
    shift = int(arr[1][bl.BI_BLOCK_SHIFT])
    ok_lo, ok_hi = int(arr[1][bl.BI_ADC_OK_LO]), int(arr[1][bl.BI_ADC_OK_HI])
    on_point = (ok_lo >> shift << shift) + (1 << shift)  # a table point
    adcs = [ok_lo, ok_hi, on_point, on_point + 1, on_point + (1 << (shift - 1)), on_point - 1]
    adcs += [_adc(v) for v in (-100.0, -80.0, -60.0, -40.0, -20.0, 0.0, 20.0, 60.0)]
    laws = {0: _law(-350.0, 5.0, 0.0, 10.0), 7: _law(10.0, 1.0, -150.0, 20.0)}
    laws[11] = _law(0.0, 0.0, 0.0, 40.0)
    cases.append(_case("mg_block_1mM", "[Mg2+] 1 mM block table", arr, _steps(adcs, laws)))

    # 3. Threshold-and-reset at -50 mV (reset -65 mV, 0.5 ms = 5 samples, 60 nS) with
    # spike detection at -20 mV (hysteresis 10 mV): a crossing during the reset is the same
    # spike; V held above threshold fires again when the reset ends.
    tr = {"kind": "threshold_reset", "name": "tr", "threshold_mV": -50.0, "reset_mV": -65.0}
    tr.update({"refractory_ms": 0.5, "g_nS": 60.0})
    arr = _experiment([*leak, tr], lifetime=100)
    mv = [-70, -55, -50.5, -50.5, -30, -10, -40, -62, -66, -60, -49, -51, -20, -35, -25, -15]
    mv += [-40, -45, -48, -49.99, -20, -20, -20, -20, -20, -20, -31, -70, -10, -70]
    adcs = [_adc(v) for v in mv]
    adcs[2], adcs[3] = int(arr[1][bl.BI_TR_ADC]) - 1, int(arr[1][bl.BI_TR_ADC])  # just below, at
    laws = {0: _law(-350.0, 5.0), 20: _law(100.0, 2.0)}
    cases.append(_case("threshold_reset", "reset law and spike flags", arr, _steps(adcs, laws)))

    # 3b. A run that starts above the detector's threshold (-20 mV, re-arm below -30 mV):
    # no spike until V has been below the re-arm level (the host's step does the same).
    arr = _experiment(leak, lifetime=100)
    adcs = [_adc(v) for v in (-10.0, -10.0, -25.0, -10.0, -35.0, -10.0, -10.0, -31.0, -19.0)]
    steps = _steps(adcs, {0: _law(0.0, 1.0)})
    cases.append(_case("starts_above_threshold", "detector disarmed at start", arr, steps))

    # 4. A short lifetime: a law set at s is in force through s + 3, stale at s + 4.
    arr = _experiment(leak, lifetime=3)
    adcs = [_adc(-70.0)] * 16
    laws = {2: _law(50.0, 1.0), 9: _law(-50.0, 1.0), 11: _law(0.0, 0.5)}
    cases.append(_case("short_lifetime", "lifetime 3 samples", arr, _steps(adcs, laws)))

    # 5. The zero request: the fault value while it is on, the law in force after it.
    arr = _experiment([*leak, tr], lifetime=100)
    adcs = [_adc(v) for v in (-70, -60, -45, -60, -70, -70, -45, -70, -70, -70)]
    laws = {0: _law(200.0, 1.0), 5: _law(-100.0, 0.0)}
    cases.append(
        _case("zero_request", "zero request on/off", arr, _steps(adcs, laws, {2, 3, 6, 7}))
    )

    # 6. ADC counts outside the plausible range (|V| > v_fault_mV = 200 mV).
    arr = _experiment([*leak, tr], lifetime=100)
    ok_lo, ok_hi = int(arr[1][bl.BI_ADC_OK_LO]), int(arr[1][bl.BI_ADC_OK_HI])
    adcs = [ok_lo - 1, ok_lo, _adc(-45.0), ok_hi, ok_hi + 1, 0, 65535, _adc(-45.0), _adc(-70.0)]
    adcs += [ok_hi + 1, _adc(-70.0)]
    cases.append(
        _case("adc_out_of_range", "implausible V", arr, _steps(adcs, {0: _law(10.0, 2.0)}, {10}))
    )

    # 7. Non-finite laws: inf and NaN coefficients, and finite ones that overflow.
    nmda_arr = _experiment([*leak, nmda], lifetime=100)
    inf, nan = math.inf, math.nan
    bad = [
        _raw(inf),
        _raw(-inf),
        _raw(nan),
        _raw(0.0, inf),
        _raw(inf, inf),
        _raw(3e38, -3e38),
        _raw(0.0, 0.0, nan, 0.0),
        _raw(0.0, 0.0, 0.0, -inf),
        _raw(1000.0, 0.0, 3e38, -3e38),
        _law(10.0, 1.0),
    ]
    adc = _adc(-40.0)
    steps = [(k, adc, law, False) for k, law in enumerate(bad)]
    cases.append(_case("non_finite", "inf and NaN laws", nmda_arr, steps))

    # 8. Laws beyond the current limit (500 pA) both ways, and just inside it.
    arr = _experiment(leak, lifetime=100)
    big = [_law(499.9, 0.0), _law(500.1, 0.0), _law(-500.1, 0.0), _law(1e6, 0.0)]
    big += [_law(-1e6, 0.0), _raw(3e38), _raw(-3e38), _law(0.0, 1e4), _law(0.0, -1e4)]
    steps = [(k, _adc(-60.0), law, False) for k, law in enumerate(big)]
    cases.append(_case("beyond_limit", "clipped to max_current_pA", arr, steps))

    # 9. Exact halves x = n + 1/2 (floor(x + 1/2) = n + 1), negative ones and the DAC's ends,
    # with the limit set wide by hand so that only the DAC's clip acts.
    bf, bi, bs, law, table = _experiment(leak, lifetime=1000)
    bf[bl.BF_LIMIT_LO], bf[bl.BF_LIMIT_HI] = -4.0, 65539.0
    arr = (bf, bi, bs, law, table)
    halves = [0.5, 1.5, 2.5, -0.5, -1.5, -2.5, 32766.5, 32767.5, 65533.5, 65534.5, 65535.5]
    # 0.49999997 is the float32 just below 1/2, where x + 0.5 in float32 rounds up to 1.
    halves += [65536.5, float(np.nextafter(np.float32(0.5), np.float32(0))), 1.4999999]
    halves += [-0.49999997, 65534.49, 65534.51, 0.0, -0.0]
    steps = [(k, _adc(-70.0), _raw(h), False) for k, h in enumerate(halves)]
    # Halves made by the product: alpha - 0.5·adc for an odd count a is n + 1/2.
    for a in (_adc(-70.0) | 1, (_adc(50.0) | 1)):
        for alpha in ((a + 1) // 2, (a - 1) // 2, (a - 3) // 2, 40000):
            steps.append((len(steps), a, _raw(alpha, 0.5), False))
    cases.append(_case("exact_halves", "rounding x = n + 1/2", arr, steps))

    # 10. Laws whose x is exactly n + 1/2 when every product is rounded on its own, and
    # falls below it when a product is fused into the next sum (a multiply-add): a
    # board compiled with contraction gives n instead of n + 1. Found by a random search
    # (numpy float32 against exact fractions); the last four go through the block term.
    bf, bi, bs, law, table = _experiment([*leak, nmda], lifetime=1000)
    bf[bl.BF_LIMIT_LO], bf[bl.BF_LIMIT_HI] = -4.0, 65539.0
    arr = (bf, bi, bs, law, table)
    fused = [
        (32416, _raw(120930.8828125, 2.702782154083252)),
        (31815, _raw(8126.904296875, 0.17153558135032654)),
        (34307, _raw(-83575.703125, -2.957448959350586)),
        (38836, _raw(126921.3125, 2.9293134212493896)),
        (37661, _raw(-63496.7890625, 0.0, -18520.564453125, -2.5106842517852783)),
        (34307, _raw(53861.30078125, 0.0, 8743.25390625, 1.3194563388824463)),
        (35367, _raw(100603.625, 0.0, -16086.0068359375, 2.047368049621582)),
        (38836, _raw(-35011.60546875, 0.0, 15498.3515625, -0.8412784337997437)),
    ]
    steps = [(k, adc, law, False) for k, (adc, law) in enumerate(fused)]
    cases.append(_case("no_fused_multiply_add", "rounding per operation", arr, steps))
    return cases


def build_vectors() -> dict[str, Any]:
    """The whole file's content."""
    return {
        "about": (
            "Board per-sample arithmetic of protocol v2 (firmware_protocol/boardlaw.py, "
            "c/ccb_law.c). Per case: params (ccb_law_params), table (float32 hex), steps: "
            "at sample k, if law is set put it in force (made for k), hold_zero = zero, "
            "then eval(adc, k) must give counts and flags exactly."
        ),
        "flags": {
            "SPIKE": bl.BF_FLAG_SPIKE,
            "RESET": bl.BF_FLAG_RESET,
            "LIMITED": bl.BF_FLAG_LIMITED,
            "FAULT": bl.BF_FLAG_FAULT,
            "BAD_V": bl.BF_FLAG_BAD_V,
            "STALE": bl.BF_FLAG_STALE,
            "ZERO": bl.BF_FLAG_ZERO,
            "NONFINITE": bl.BF_FLAG_NONFINITE,
        },
        "cases": _cases(),
    }


def dumps(vectors: dict[str, Any]) -> str:
    """The file's text (one step per line keeps diffs readable)."""
    return json.dumps(vectors, indent=1) + "\n"


def main() -> None:
    if "--replay" in sys.argv[1:]:
        stored = json.loads(OUT.read_text())
        print(json.dumps({c["name"]: replay(c) for c in stored["cases"]}))
        return
    OUT.write_text(dumps(build_vectors()))
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
