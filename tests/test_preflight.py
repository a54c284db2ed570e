"""Whether and how a run starts, decided from HELLO and the experiment without a port
(clampcore.preflight). Each refusal names the value; each figure is worked out here from
the rule written in PROTOCOL.md or the experiment's own numbers, not taken from the code."""

from __future__ import annotations

import copy
import dataclasses

import pytest
from clampcore.firmware_protocol import codec

from clampcore.engine import RunOptions
from clampcore.preflight import PreflightError, preflight

# A 16-bit, +-10 V law-mode board like the simulated rig, with a queue of 1024 laws.
LAW_BOARD = codec.Hello(
    "bench-board", 16, 16, 1, 1, -10_000_000, 10_000_000, -10_000_000, 10_000_000,
    50_000, 100, 60_000_000, capabilities=codec.CAP_LAW, law_queue=1024, mg_groups=1,
    max_samples=1,
)  # fmt: skip
CONVERT_ONLY = dataclasses.replace(LAW_BOARD, capabilities=0, law_queue=0, mg_groups=0)

EXP = {
    "loop": {"rate_hz": 20000, "max_current_pA": 500.0, "mode": "law", "lead_ms": 10.0},
    "cell": {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0},
    "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},
    "element": [
        {"kind": "leak", "name": "extra_leak", "g_nS": 2.0, "e_mV": -70.0},
        {"kind": "synapse", "name": "nmda_a", "g_max_nS": 1.0, "e_mV": 0.0,
         "tau_decay_ms": 50.0, "mg_mM": 1.0, "source": "poisson", "rate_hz": 5.0},
    ],
}  # fmt: skip


def _exp(**loop) -> dict:
    exp = copy.deepcopy(EXP)
    exp["loop"].update(loop)
    return exp


def test_a_law_board_runs_law_mode_with_the_lead_and_lifetime_in_samples() -> None:
    plan = preflight(LAW_BOARD, EXP, RunOptions())
    assert plan.mode == "law" and plan.notice is None
    assert plan.rate_hz == 20000
    assert plan.lead_samples == 200  # 10 ms at 20 kHz
    assert plan.lifetime_samples == 40  # the default lifetime_ms 2 at 20 kHz
    # 0 pA through a 400 pA/V command input and a +-10 V 16-bit DAC: 0 V is count
    # 32767.5 -> 32768 (PROTOCOL.md §6's worked numbers).
    assert plan.zero_counts == 32768
    assert plan.watchdog_us == 20_000  # RunOptions' 20 ms, inside the board's range


def test_a_board_without_the_law_capability_runs_current_mode_and_says_so() -> None:
    plan = preflight(CONVERT_ONLY, EXP, RunOptions())
    assert plan.mode == "current" and plan.lead_samples == 0
    assert "bench-board" in plan.notice and "current mode" in plan.notice


def test_rate_above_the_boards_maximum_is_refused_naming_both() -> None:
    slow = dataclasses.replace(LAW_BOARD, max_rate_hz=10_000)
    with pytest.raises(PreflightError, match=r"rate_hz = 20000 .*maximum, 10000 Hz"):
        preflight(slow, EXP, RunOptions())


def test_more_mg_groups_than_the_board_evaluates_is_refused_naming_the_synapses() -> None:
    no_table = dataclasses.replace(LAW_BOARD, mg_groups=0)
    with pytest.raises(PreflightError, match=r"evaluates 0 Mg-blocked .*1 mM: nmda_a"):
        preflight(no_table, EXP, RunOptions())
    # Current mode needs no board table: the host computes the block itself.
    assert preflight(no_table, EXP, RunOptions(mode="current")).mode == "current"


def test_a_lead_beyond_the_boards_queue_is_refused_with_the_longest_it_allows() -> None:
    short_queue = dataclasses.replace(LAW_BOARD, law_queue=128)
    # 10 ms at 20 kHz is 200 laws ahead; 128 laws at 20 kHz are 6.4 ms.
    with pytest.raises(PreflightError, match=r"lead_ms = 10 is 200 samples.*128 laws.*6\.4"):
        preflight(short_queue, EXP, RunOptions())
    plan = preflight(short_queue, _exp(lead_ms=6.4), RunOptions())
    assert plan.lead_samples == 128  # exactly the queue: the newest law is 127 ahead


def test_a_batching_board_needs_longer_cell_driven_delays() -> None:
    """A board that sends 20 samples a frame (PROTOCOL.md §10.4) lets the host hear a spike up
    to 19 samples late, so the shortest look-ahead grows by 19 samples: at 20 kHz 1 ms
    (MIN_LEAD_MS, 20 samples) + 19 = 39 samples, and a cell-driven delay must be at least
    40 samples, 2 ms (the minimum-delay rule: delay >= lead + 1)."""
    exp = copy.deepcopy(EXP)
    exp["element"].append(
        {"kind": "synapse", "name": "from_cell", "g_max_nS": 1.0, "e_mV": 0.0,
         "tau_decay_ms": 5.0, "source": "cell", "delay_ms": 1.5}
    )  # fmt: skip
    # One sample a frame: 1.5 ms (30 samples) allows a look-ahead of 29 samples.
    assert preflight(LAW_BOARD, exp, RunOptions()).lead_samples == 29
    batching = dataclasses.replace(LAW_BOARD, max_samples=20)
    with pytest.raises(
        PreflightError, match=r"'from_cell': delay_ms = 1\.5 .*shortest it allows is 2 ms"
    ):
        preflight(batching, exp, RunOptions())
    exp["element"][-1]["delay_ms"] = 2.0
    assert preflight(batching, exp, RunOptions()).lead_samples == 39


def test_a_missing_calibration_is_refused_except_on_the_simulated_rig() -> None:
    exp = copy.deepcopy(EXP)
    del exp["amplifier"]
    with pytest.raises(PreflightError, match=r"no \[amplifier\] section"):
        preflight(LAW_BOARD, exp, RunOptions())
    assert preflight(LAW_BOARD, exp, RunOptions(), simulated=True).mode == "law"


def test_a_current_limit_the_dac_cannot_reach_is_refused() -> None:
    # +-10 V at 400 pA/V reaches +-4000 pA: a 5000 pA limit would be clipped silently.
    with pytest.raises(PreflightError, match="5000"):
        preflight(LAW_BOARD, _exp(max_current_pA=5000.0), RunOptions())


def test_two_threshold_resets_are_refused_in_law_mode_only() -> None:
    exp = copy.deepcopy(EXP)
    for name in ("tr_a", "tr_b"):
        exp["element"].append(
            {"kind": "threshold_reset", "name": name, "threshold_mV": -50.0, "reset_mV": -65.0,
             "refractory_ms": 2.0, "g_nS": 20.0}
        )  # fmt: skip
    with pytest.raises(PreflightError, match=r"one threshold_reset element, not 2 \(tr_a, tr_b\)"):
        preflight(LAW_BOARD, exp, RunOptions())
    assert preflight(LAW_BOARD, exp, RunOptions(mode="current")).mode == "current"


def test_stability_is_judged_with_the_delay_of_the_mode_that_runs() -> None:
    """A negative leak the one-sample loop of law mode holds, but not the two-sample loop of
    current mode on hardware: a board without law mode turns the run into a refusal."""
    exp = copy.deepcopy(EXP)
    # A sampled loop with delay D samples holds a virtual conductance below roughly
    # C/(D·dt)·q(D) (clampcore.stability, checked against the closed form in
    # tests/test_stability.py); pick a leak between the limits for D = 1 and D = 2.
    from clampcore import stability

    g1 = stability.max_stable_conductance_nS(100.0, 5.0, 0.05, 1)
    g2 = stability.max_stable_conductance_nS(100.0, 5.0, 0.05, 2)
    assert g2 < g1
    exp["element"][0]["g_nS"] = (g1 + g2) / 2 - 1.0  # the synapse adds up to 1 nS
    assert preflight(LAW_BOARD, exp, RunOptions()).stability.ok
    with pytest.raises(PreflightError, match="UNSTABLE"):
        preflight(CONVERT_ONLY, exp, RunOptions())
    plan = preflight(CONVERT_ONLY, exp, RunOptions(override_stability=True))
    assert plan.stability.override and plan.mode == "current"
