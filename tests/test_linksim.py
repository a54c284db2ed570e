"""The current law over link models: equality with the ideal, self-limiting, delays, lifetime.

Behaviour, not timing: every check runs in the board's sample time (clampcore.linksim).
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
from clampcore.firmware_protocol import boardlaw as bl
from clampcore.simulated_rig.cells import cell_advance, cell_measure_mV, make_cell

from clampcore import linksim
from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_pA,
    mV_to_counts,
)
from clampcore.law import LAW_MODE, board_arrays, law_scale, law_to_counts
from clampcore.links import LINKS, schedule
from clampcore.offline import simulate
from clampcore.program import build_program

RATE_HZ = 20000
CELL = {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0, "seed": 1}
AMP = {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0}

SUBTHRESHOLD = {
    "loop": {"rate_hz": RATE_HZ, "max_current_pA": 800.0, "spike_threshold_mV": -20.0},
    "cell": CELL,
    "amplifier": AMP,
    "element": [
        {"kind": "leak", "name": "extra_leak", "g_nS": 5.0, "e_mV": -70.0},
        {
            "kind": "synapse",
            "name": "exc",
            "g_max_nS": 2.0,
            "e_mV": 0.0,
            "tau_decay_ms": 3.0,
            "source": "poisson",
            "rate_hz": 200.0,
            "seed": 1,
        },
        {
            "kind": "synapse",
            "name": "inh",
            "g_max_nS": 3.0,
            "e_mV": -75.0,
            "tau_decay_ms": 8.0,
            "source": "poisson",
            "rate_hz": 150.0,
            "seed": 2,
        },
        {
            "kind": "noise",
            "name": "bg",
            "g_mean_nS": 3.0,
            "g_sd_nS": 1.0,
            "tau_ms": 2.7,
            "e_mV": 0.0,
            "seed": 3,
        },
    ],
}


def _conv() -> np.ndarray:
    amplifier = build_program(SUBTHRESHOLD).experiment.amplifier  # with the schema's defaults
    return conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, amplifier)


@pytest.mark.parametrize("link", ["direct", "usb-hs", "usb-fs"])
def test_law_mode_equals_the_ideal_clamp_when_the_lead_covers_the_link(link: str) -> None:
    # Two runs that must agree: laws computed ahead and evaluated at the board's own V are
    # the zero-latency clamp itself, sample for sample, whatever the link's latency.
    ideal = linksim.run(SUBTHRESHOLD, 0.5, mode="ideal")
    run = linksim.run(SUBTHRESHOLD, 0.5, link=link, mode="law", lead_ms=10.0)
    np.testing.assert_array_equal(run.adc, ideal.adc)
    np.testing.assert_array_equal(run.i_pA, ideal.i_pA)
    np.testing.assert_array_equal(run.g_nS, ideal.g_nS)


def test_ideal_clamp_agrees_with_the_offline_simulation_within_quantisation() -> None:
    # Anchor outside the law's own arithmetic: clampcore.simulate computes each current in
    # float64 from V and rounds it half to even; the board computes the same law in float32
    # and rounds half up (PROTOCOL.md §6). The cell must follow the same path within a few
    # DAC steps' worth of current (one step is 20 V / 65535 * 400 pA/V = 0.12 pA).
    ideal = linksim.run(SUBTHRESHOLD, 0.5, mode="ideal")
    rec = simulate(SUBTHRESHOLD, 0.5, seed=0)
    assert np.max(np.abs(ideal.i_pA - rec.i_pA)) < 1.0  # pA
    conv = _conv()
    v_ideal = np.array([linksim.counts_to_mV(conv, float(c)) for c in ideal.adc])
    assert np.max(np.abs(v_ideal - rec.v_mV)) < 0.05  # mV


def test_current_mode_over_full_speed_usb_is_far_from_the_ideal() -> None:
    # The reason for the law: a current computed from a V up to a millisecond old misses
    # every synaptic jump; the error is of the order of the current itself (> 50%).
    ideal = linksim.run(SUBTHRESHOLD, 0.5, mode="ideal")
    cur = linksim.run(SUBTHRESHOLD, 0.5, link="usb-fs", mode="current")
    err = np.linalg.norm(cur.i_pA - ideal.i_pA) / np.linalg.norm(ideal.i_pA)
    assert err > 0.5
    law = linksim.run(SUBTHRESHOLD, 0.5, link="usb-fs", mode="law")
    assert np.linalg.norm(law.i_pA - ideal.i_pA) == 0.0


def test_a_stale_law_is_self_limiting() -> None:
    # Membrane RC theory: a passive membrane (g_m, E_m) with an added law I = a - g V, held
    # indefinitely, settles at V = (g_m E_m + a) / (g_m + g): never beyond the law's own
    # reversal potential a/g, whatever the host does. Board arithmetic, no host at all.
    cell_cfg = {**CELL, "noise_pA": 0.0}
    dt_ms = 1000.0 / RATE_HZ
    cell = make_cell(cell_cfg, dt_ms)
    conv = _conv()
    exp = {
        "loop": {"rate_hz": RATE_HZ, "max_current_pA": 2000.0},
        "cell": cell_cfg,
        "amplifier": AMP,
        "element": [],
    }
    program = build_program(exp)
    bf, bi, bs, law, table = board_arrays(program, conv, LAW_MODE, lifetime_samples=10**9)
    g_nS, e_mV = 20.0, -40.0  # a large conductance with a depolarised reversal potential
    stale = np.zeros(4, np.float32)
    law_to_counts(law_scale(conv), g_nS * e_mV, g_nS, 0.0, 0.0, stale)
    bl.board_set_law(bs, law, stale, 0)
    i_pA = counts_to_pA(conv, bi[bl.BI_FAULT_COUNTS])
    for k in range(int(0.2 * RATE_HZ)):  # 200 ms: more than 20 membrane time constants
        if k:
            cell_advance(cell.kind, cell.params, cell.state, cell.rng, i_pA, dt_ms)
        adc = mV_to_counts(
            conv, cell_measure_mV(cell.kind, cell.params, cell.state, cell.rng, i_pA)
        )
        i_pA = counts_to_pA(conv, bl.board_eval(adc, k, bf, bi, bs, law, table) & 0xFFFF)
    v_end = cell_measure_mV(cell.kind, cell.params, cell.state, cell.rng, i_pA)
    expected = (5.0 * -70.0 + g_nS * e_mV) / (5.0 + g_nS)
    # Within the ADC's and DAC's resolution (0.03 mV and 0.12 pA / 25 nS).
    assert v_end == pytest.approx(expected, abs=0.1)


def _cell_driven(delay_ms: float) -> dict:
    exp = {
        "loop": {"rate_hz": RATE_HZ, "max_current_pA": 800.0, "spike_threshold_mV": -45.0},
        "cell": CELL,
        "amplifier": AMP,
        "element": [
            {
                "kind": "threshold_reset",
                "name": "imposed",
                "threshold_mV": -50.0,
                "reset_mV": -65.0,
                "refractory_ms": 2.0,
                "g_nS": 60.0,
            },
            {"kind": "current", "name": "drive", "waveform": "step", "amplitude_pA": 150.0},
            {
                "kind": "synapse",
                "name": "recurrent",
                "g_max_nS": 1.0,
                "e_mV": -75.0,
                "tau_decay_ms": 5.0,
                "source": "cell",
                "delay_ms": delay_ms,
            },
        ],
    }
    return exp


@pytest.mark.parametrize("link", ["direct", "usb-hs", "usb-fs"])
def test_cell_driven_synapse_hears_each_spike_exactly_one_delay_later(link: str) -> None:
    # The definition of a synaptic delay: the conductance jumps at spike sample + delay. The
    # lead (2 ms = 40 samples) is shorter than the delay (3 ms = 60 samples), the
    # minimum-delay rule, so the host has heard every spike before it computes that law.
    run = linksim.run(_cell_driven(3.0), 0.5, link=link, mode="law", lead_ms=2.0)
    spikes = np.flatnonzero(run.spikes)
    assert spikes.size >= 5
    g = run.g_nS[:, 2]
    jumps = np.flatnonzero(np.diff(g) > 0.5) + 1  # g_max 1 nS added at once
    delay = 60
    np.testing.assert_array_equal(jumps, spikes[spikes + delay < g.size] + delay)
    assert run.late_spikes == 0


def test_a_delay_shorter_than_the_lead_is_counted_late() -> None:
    run = linksim.run(_cell_driven(1.0), 0.3, link="usb-fs", mode="law", lead_ms=2.0)
    assert run.spikes.sum() > 0
    assert run.late_spikes == run.spikes.sum()


def test_a_spike_heard_too_late_is_delivered_once_after_its_delay() -> None:
    # Issue 12: "a spike heard too late anyway is delivered late and counted". The delay (1 ms
    # = 20 samples) is shorter than the lead (2 ms = 40): each spike reaches the synapse with
    # the first law the host makes after hearing it, so after spike + delay and within the
    # lead and the link's delay, and exactly once (the history ring holds only what was heard).
    run = linksim.run(_cell_driven(1.0), 0.5, link="usb-fs", mode="law", lead_ms=2.0)
    spikes = np.flatnonzero(run.spikes)
    g = run.g_nS[:, 2]
    jumps = np.flatnonzero(np.diff(g) > 0.5) + 1  # g_max 1 nS added at once
    delay, lead = 20, 40
    link_samples = 2 * 20  # usb-fs: up to a 1 ms frame each way at 20 kHz (clampcore.links)
    heard = spikes[spikes + lead + link_samples < g.size]
    assert heard.size >= 3
    assert jumps.size in (heard.size, heard.size + 1)  # a spike near the end may land or not
    waited = jumps[: heard.size] - heard
    assert np.all(waited > delay)
    assert np.all(waited <= lead + link_samples)


def test_a_host_stalled_past_lead_and_lifetime_gets_zero_current() -> None:
    # Board-side safety: without new laws, the last law is used for `lifetime` samples past
    # its own and then the fault value (0 pA) goes out, flagged stale.
    exp = copy.deepcopy(SUBTHRESHOLD)
    run = linksim.run(
        exp, 2.0, link="usb-fs", mode="law", lead_ms=2.0, lifetime_ms=1.0, stall_ms=20.0, seed=4
    )
    stale = (run.flags & bl.BF_FLAG_STALE) != 0
    assert stale.any()
    conv = _conv()
    zero_pA = counts_to_pA(conv, 32768)  # PROTOCOL.md §6: the fault count for 0 pA is 32768
    assert np.all(run.i_pA[stale] == zero_pA)
    first = np.flatnonzero(stale)[0]
    # The sample before the first stale one still ran on a law at most 20 samples old.
    assert not stale[first - 1]
    lifetime = 20  # 1 ms at 20 kHz
    assert np.all((run.flags[first - lifetime : first] & bl.BF_FLAG_FAULT) == 0)


def test_law_mode_fits_full_speed_usb_with_twice_the_margin_at_20_khz() -> None:
    # Budget: full-speed USB carries roughly 1 MB/s of bulk data, both directions together
    # (USB 2.0 specification, from memory): law mode must stay within half of it.
    sched = schedule(LINKS["usb-fs"], RATE_HZ, RATE_HZ, 200, law_mode=True)
    assert (sched.up_bytes + sched.down_bytes) <= 0.5 * LINKS["usb-fs"].ceiling_Bps
