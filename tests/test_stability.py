"""The loop-stability guard: the bound against its published forms, a simulated
difference equation, the offline closed loop and the simulated rig in lockstep,
and the guard on the command line (refusal, warning, override in the recording)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from clampcore.simulated_rig import start_rig

import clampcore
from clampcore.cli import main
from clampcore.engine import Engine, RunOptions
from clampcore.nwb import read_nwb_summary
from clampcore.stability import (
    assess,
    default_delay_samples,
    largest_stable_q,
    levin_may_bound,
    max_stable_conductance_nS,
    simulate_difference,
    stability_bound,
)

C_PF, G_CELL_NS, RATE_HZ, E_REST_MV = 100.0, 5.0, 10000.0, -70.0
DT_MS = 1000.0 / RATE_HZ


def _feedback_experiment(g_nS: float, delay_samples: int = 1, e_mV: float = -69.0) -> dict:
    """A passive cell with one virtual leak whose reversal sits 1 mV off rest (the probe)."""
    return {
        "loop": {
            "rate_hz": RATE_HZ,
            # The probe needs the unclipped linear loop: up to 2 nS x 1 mV per step.
            "max_current_pA": 1e5,
            "extra_delay_samples": delay_samples - 1,
        },
        "cell": {"model": "passive", "capacitance_pF": C_PF, "leak_nS": G_CELL_NS},
        # The rig's DAC must represent the limit: 16 bits over +-10 V at 1e4 pA/V.
        "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 1e4},
        "element": [{"kind": "leak", "name": "feedback", "g_nS": g_nS, "e_mV": e_mV}],
    }


def _deviation(v_mV: np.ndarray, g_nS: float, e_mV: float = -69.0) -> np.ndarray:
    v_fixed = (G_CELL_NS * E_REST_MV + g_nS * e_mV) / (G_CELL_NS + g_nS)
    return np.abs(v_mV - v_fixed)


@pytest.mark.parametrize("k", [0, 1, 2, 3, 5, 10, 30])
def test_roots_bisection_equals_levin_may(k):
    # Levin & May 1976: x_{n+1} = x_n - a x_{n-k} stable iff 0 < a < 2 cos(k pi / (2k + 1)).
    # k = 1 gives 1 and k = 2 gives (sqrt(5) - 1)/2 (cos(pi/3), cos(2 pi/5): handbook values).
    assert largest_stable_q(k, 1.0) == pytest.approx(levin_may_bound(k), rel=1e-9)
    if k == 1:
        assert levin_may_bound(k) == pytest.approx(1.0)
    if k == 2:
        assert levin_may_bound(k) == pytest.approx((math.sqrt(5) - 1) / 2)


@pytest.mark.parametrize("k", [0, 1, 4, 12])
@pytest.mark.parametrize("r", [1.0, 0.99, 0.9])
def test_difference_equation_settles_below_and_grows_above(k, r):
    q = largest_stable_q(k, r)
    below = simulate_difference(0.97 * q, k, r, n_steps=6000)
    above = simulate_difference(1.03 * q, k, r, n_steps=6000)
    assert np.max(np.abs(below[-500:])) < 1e-3 * np.max(np.abs(below[:50]))
    assert np.max(np.abs(above[-500:])) > 10 * np.max(np.abs(above[:50]))


def test_discrete_bound_approaches_the_continuous_one():
    # Hayes 1950: dx/dt = -a x(t - d) stable iff a d < pi/2. With the effective delay of a
    # zero-order hold, d = (k + 1/2) dt, the discrete bound tends to it from below; with the
    # pure delay d = k dt the ratio tends to 1.
    errors = []
    for k in (5, 20, 100, 1000):
        forms = stability_bound(C_PF, DT_MS, k + 1)
        ratio = forms["levin_may_nS"] / forms["continuous_half_sample_nS"]
        assert ratio < 1.0
        errors.append(1.0 - ratio)
        assert forms["levin_may_nS"] / forms["continuous_pure_delay_nS"] == pytest.approx(
            1.0, abs=1.5 / k
        )
    assert errors == sorted(errors, reverse=True) and errors[-1] < 1e-6


@pytest.mark.parametrize("delay", [1, 2, 5, 11])
def test_offline_closed_loop_within_ten_percent(delay):
    """Below 0.9x the bound the clamp settles; above 1.1x it oscillates or runs away."""
    g_max = max_stable_conductance_nS(C_PF, G_CELL_NS, DT_MS, delay)
    low = clampcore.simulate(_feedback_experiment(0.9 * g_max, delay), 0.2, quantise=False)
    high = clampcore.simulate(_feedback_experiment(1.1 * g_max, delay), 0.2, quantise=False)
    dev_low = _deviation(low.v_mV, 0.9 * g_max)
    dev_high = _deviation(high.v_mV, 1.1 * g_max)
    assert dev_low[-200:].max() < 1e-3 * dev_low[:20].max()
    assert dev_high[-200:].max() > 10 * dev_high[: delay + 1].max()


def test_negative_leak_static_limit_with_delay():
    """A negative leak beyond the cell's own conductance runs away whatever the delay;
    just inside it, the loop settles (the z = 1 root of the characteristic polynomial)."""
    delay = 5
    ok = assess(_feedback_experiment(-0.9 * G_CELL_NS, delay), delay)
    bad = assess(_feedback_experiment(-1.1 * G_CELL_NS, delay), delay)
    assert ok.ok and not bad.static_ok
    low = clampcore.simulate(_feedback_experiment(-0.9 * G_CELL_NS, delay), 1.0, quantise=False)
    high = clampcore.simulate(_feedback_experiment(-1.1 * G_CELL_NS, delay), 1.0, quantise=False)
    dev_low = _deviation(low.v_mV, -0.9 * G_CELL_NS)
    assert dev_low[-100:].max() < 0.01 * dev_low[:10].max()
    # RC membrane with total conductance g_t < 0: without delay the deviation grows as
    # exp(-g_t t / C) = e over 0.2 s here; the 5-sample delay slows it to the growth of the
    # delayed equation C x' = -g_cell x - g_v x(t - d), d = (D - 1/2) dt, whose real root
    # solves lambda = (-g_cell - g_v exp(-lambda d)) / C (fixed-point iteration below).
    # Later V passes the fault level (200 mV) and the loop commands 0 pA.
    g_v, d_ms, lam = -1.1 * G_CELL_NS, (delay - 0.5) * DT_MS, 0.0
    for _ in range(50):
        lam = (-G_CELL_NS - g_v * math.exp(-lam * d_ms)) / C_PF
    dev_high = _deviation(high.v_mV, g_v)
    growth = dev_high[4000] / dev_high[2000]
    assert growth == pytest.approx(math.exp(lam * 200.0), rel=1e-3)
    assert abs(growth - math.e) > 0.05  # the delay's effect is resolved
    assert high.faults["fault_samples"] > 0


def test_bound_holds_on_the_simulated_rig_in_lockstep(tmp_path):
    """Through the serial path (lockstep: the command is in force at the next sample)."""
    g_max = max_stable_conductance_nS(C_PF, G_CELL_NS, DT_MS, 1)
    devs = {}
    for factor in (0.9, 1.1):
        g = factor * g_max
        # The engine guards stability at start (clampcore.preflight): the unstable case runs
        # only with the override, as `run --override-stability` does.
        options = RunOptions(rig_clock="lockstep", override_stability=True)
        engine = Engine(_feedback_experiment(g, 1), "sim", options, rig_factory=start_rig)
        engine.start(duration_s=0.05, out=tmp_path / f"f{factor}.nwb")
        assert engine.wait(120.0)
        result = engine.finish()
        rec = read_nwb_summary(result.nwb_path)
        devs[factor] = _deviation(rec["v_mV"], g)
    # Settled: within two ADC steps (0.03 mV each at 100 mV/V, 16 bits over +-10 V).
    assert devs[0.9][-100:].max() < 0.07
    assert devs[1.1][-100:].max() > 10 * devs[1.1][:5].max()


def _write(tmp_path, g_nS: float, delay: int = 1):
    exp = clampcore.load_experiment(_feedback_experiment(g_nS, delay))
    path = tmp_path / "exp.toml"
    path.write_text(exp.to_toml(), encoding="utf-8")
    return path


def test_cli_refuses_warns_and_records_the_override(tmp_path, capsys):
    g_max = max_stable_conductance_nS(C_PF, G_CELL_NS, DT_MS, 1)
    path = _write(tmp_path, 0.6 * g_max)
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert f"{g_max:.4g} nS" in out and "warning: above half" in out

    path = _write(tmp_path, 1.2 * g_max)
    out_nwb = tmp_path / "run.nwb"
    assert main(["simulate", str(path), "--duration", "0.01", "--out", str(out_nwb)]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("clampcore: refusing to start: UNSTABLE (dynamic)") and "\n" not in err
    assert "--override-stability" in err and not out_nwb.exists()

    argv = ["simulate", str(path), "--duration", "0.01", "--out", str(out_nwb)]
    assert main([*argv, "--override-stability"]) == 0
    meta = read_nwb_summary(out_nwb)["meta"]["stability"]
    assert meta["override"] is True and meta["ok"] is False
    assert meta["g_stable_max_nS"] == pytest.approx(g_max)

    # A measured cell: the guard uses the given values.
    assert main(["check", str(path), "--cell-capacitance-pF", "400"]) == 0
    assert "C 400 pF" in capsys.readouterr().out


def test_run_refuses_before_touching_the_board(tmp_path, capsys):
    path = _write(tmp_path, -2.0 * G_CELL_NS)
    assert main(["run", str(path), "--port", "sim", "--duration", "0.01"]) == 1
    assert "UNSTABLE (static)" in capsys.readouterr().err


def test_default_delay_follows_where_the_current_is_computed():
    law = _feedback_experiment(10.0)
    law["loop"]["mode"] = "law"
    # the board evaluates the law in the tick of its ADC reading (PROTOCOL.md §10.3)
    assert default_delay_samples(law, "/dev/ttyACM0") == 1
    assert default_delay_samples(_feedback_experiment(10.0), "/dev/ttyACM0") == 2
    assert default_delay_samples(_feedback_experiment(10.0, 4), None) == 4
    assert default_delay_samples(_feedback_experiment(10.0), "sim") == 1


def test_bound_holds_for_the_board_evaluated_law_offline():
    """Law mode: the board's arithmetic (float32, converter counts) with its one-step delay."""
    g_max = max_stable_conductance_nS(C_PF, G_CELL_NS, DT_MS, 1)
    devs = {}
    for factor in (0.9, 1.1):
        exp = _feedback_experiment(factor * g_max)
        exp["loop"]["mode"] = "law"
        rec = clampcore.simulate(exp, 0.05)
        assert "law mode" in rec.source
        devs[factor] = _deviation(rec.v_mV, factor * g_max)
    # settled within a few ADC steps (0.03 mV each): the loop gain turns one step into
    # about g x 0.03 mV = 54 pA, so the quantised clamp keeps a small limit cycle
    assert devs[0.9][-100:].max() < 0.1
    assert devs[1.1][-100:].max() > 10 * devs[1.1][:2].max()
