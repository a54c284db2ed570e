"""Law mode end to end (PROTOCOL.md §10): host law loop <-> pseudo-terminal <-> simulated rig.

Behaviour only: the serial run equals the ideal clamp of the sample-time simulation,
a stalled host gets 0 pA from the board after the look-ahead and the lifetime, the
zero request acts at once, and a board that ignores the law falls back to current mode.
"""

from __future__ import annotations

import copy
import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import lawmsg
from clampcore.firmware_protocol.boardlaw import BF_FLAG_SPIKE
from clampcore.firmware_protocol.codec import MAX_WIRE
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import read_log

import clampcore
from clampcore import linksim
from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    pA_to_counts,
)
from clampcore.engine import Engine, RunOptions
from clampcore.experiment import load_experiment
from clampcore.health import loop_health
from clampcore.lawloop import new_law_link, process_rx_law, top_up_laws
from clampcore.nwb import read_nwb_summary, validate_nwb
from clampcore.preflight import law_lead_samples
from clampcore.program import build_program
from clampcore.shared import CTRL_WRITTEN, ST_LATE_SPIKES, RingLayout, SharedRun

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "imposed_lif.toml"

SUBTHRESHOLD = {
    "loop": {"rate_hz": 10000, "max_current_pA": 800.0, "mode": "law"},
    "cell": {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0,
             "noise_pA": 2.0, "seed": 1},
    "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},
    "element": [
        {"kind": "leak", "name": "extra_leak", "g_nS": 5.0, "e_mV": -70.0},
        {"kind": "synapse", "name": "exc", "g_max_nS": 2.0, "e_mV": 0.0, "tau_decay_ms": 3.0,
         "source": "poisson", "rate_hz": 200.0, "seed": 1},
        {"kind": "synapse", "name": "nmda", "g_max_nS": 1.0, "e_mV": 0.0, "tau_decay_ms": 50.0,
         "mg_mM": 1.0, "source": "poisson", "rate_hz": 50.0, "seed": 2},
        {"kind": "noise", "name": "bg", "g_mean_nS": 3.0, "g_sd_nS": 1.0, "tau_ms": 2.7,
         "e_mV": 0.0, "seed": 3},
    ],
}  # fmt: skip


def _run(engine: Engine, duration_s: float, out: Path):
    engine.start(duration_s=duration_s, out=out)
    assert engine.wait(120.0), "the run did not end"
    result = engine.finish()
    assert result.error is None, result.error
    assert validate_nwb(result.nwb_path) == []  # pynwb's validator: a list of problems
    return read_nwb_summary(result.nwb_path)


def _zero_counts(experiment) -> int:
    amplifier = load_experiment(experiment).amplifier
    return pA_to_counts(conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, amplifier), 0.0)


def test_lockstep_law_mode_equals_the_ideal_clamp(tmp_path):
    """Two paths that must agree sample for sample: the host law loop and the rig over a
    pseudo-terminal, and the sample-time simulation of every law on time (with the Mg
    block table on the board)."""
    options = RunOptions(rig_clock="lockstep", watchdog_ms=5000)
    rec = _run(
        Engine(SUBTHRESHOLD, "sim", options, rig_factory=start_rig), 0.3, tmp_path / "law.nwb"
    )
    ideal = linksim.run(SUBTHRESHOLD, 0.3, mode="ideal")
    np.testing.assert_array_equal(rec["i_pA"], ideal.i_pA)
    # Conductances are recorded as float32 (clampcore.nwb): equal after that rounding.
    np.testing.assert_array_equal(rec["columns"]["g_nS/nmda"], ideal.g_nS[:, 2].astype(np.float32))
    offline = clampcore.simulate(SUBTHRESHOLD, 0.3)  # [loop] mode = "law": the same split
    np.testing.assert_array_equal(rec["v_mV"], offline.v_mV)
    np.testing.assert_array_equal(rec["i_pA"], offline.i_pA)
    # Element currents are recorded to float32 precision (stored, or derived on reading).
    np.testing.assert_allclose(
        rec["columns"]["i_pA/nmda"], offline.i_element_pA["nmda"], rtol=1e-6, atol=1e-9
    )


def test_lockstep_law_mode_with_threshold_reset_and_a_delayed_cell_synapse(tmp_path):
    exp = load_experiment(EXAMPLE)
    options = RunOptions(rig_clock="lockstep", watchdog_ms=5000, mode="law")
    rec = _run(Engine(EXAMPLE, "sim", options, rig_factory=start_rig), 0.5, tmp_path / "lif.nwb")
    ideal = linksim.run(EXAMPLE, 0.5, mode="ideal")
    np.testing.assert_array_equal(rec["i_pA"], ideal.i_pA)
    spikes = np.flatnonzero(rec["columns"]["spike/cell"])
    assert spikes.size >= 3
    np.testing.assert_array_equal(spikes, np.flatnonzero(ideal.spikes))
    # The recurrent synapse hears each spike exactly delay_ms later (3 ms = 30 samples).
    delay = round(3.0 * exp.loop["rate_hz"] / 1000)
    g = rec["columns"]["g_nS/recurrent"]
    onsets = np.flatnonzero((g[1:] > 0) & (g[:-1] == 0)) + 1
    assert onsets[0] == spikes[0] + delay + 1  # alpha kinetics: g rises from the next sample


def test_a_stalled_host_gets_zero_current_after_lead_and_lifetime(tmp_path):
    """Board-side safety: the host (loop process) stopped; the board uses the laws it has,
    holds the last one for its lifetime, then outputs 0 pA until laws come again."""
    exp = copy.deepcopy(SUBTHRESHOLD)
    exp["loop"]["lead_ms"] = 5.0
    log = tmp_path / "rig.log"
    engine = Engine(
        exp,
        "sim",
        RunOptions(rig_clock="wall", rig_log=log, watchdog_ms=10_000),
        rig_factory=start_rig,
    )
    engine.start(duration_s=None, out=tmp_path / "stall.nwb")
    deadline = time.monotonic() + 60
    while engine.status().get("samples", 0) < 3000:
        assert time.monotonic() < deadline and engine.running
        time.sleep(0.02)
    os.kill(engine.loop_pid, signal.SIGSTOP)
    time.sleep(0.05)
    seen = int(engine.shared.ctrl[CTRL_WRITTEN]) - 1  # the newest sample the host handled
    time.sleep(0.4)
    os.kill(engine.loop_pid, signal.SIGCONT)
    time.sleep(0.3)
    result = engine.finish()
    assert result.error is None, result.error
    gt = read_log(log).for_run(1)
    program = build_program(exp)
    lead = law_lead_samples(program)
    lifetime = round(2.0 * 10000 / 1000)  # the default lifetime_ms, in samples
    zero = _zero_counts(exp)
    counter = gt.counter
    # dac_counts of record k is what drove the cell over (t_k-1, t_k], computed at tick k-1.
    drove = {int(c) - 1: int(d) for c, d in zip(counter, gt.dac_counts, strict=True)}
    last_law = seen + lead  # at most this far were laws sent before the stop
    first_zero = last_law + lifetime + 1
    assert all(drove[k] == zero for k in range(first_zero, first_zero + 1000))
    # Before that the board still used laws: not the fault value (the cell is driven).
    assert any(drove[k] != zero for k in range(seen, last_law - 1))


def test_zero_request_acts_at_once_and_teardown_leaves_zero(tmp_path):
    log = tmp_path / "rig.log"
    engine = Engine(
        SUBTHRESHOLD, "sim", RunOptions(rig_clock="wall", rig_log=log), rig_factory=start_rig
    )
    engine.start(duration_s=None, out=tmp_path / "zero.nwb")
    deadline = time.monotonic() + 60
    while engine.status().get("samples", 0) < 2000:
        assert time.monotonic() < deadline and engine.running
        time.sleep(0.02)
    engine.set_zero_current(True)
    time.sleep(0.3)
    engine.set_zero_current(False)
    time.sleep(0.3)
    result = engine.finish()
    assert result.error is None, result.error
    rec = read_nwb_summary(result.nwb_path)
    zeroed = (rec["columns"]["flags"].astype(np.int64) & 8) != 0  # FLAG_ZEROED
    assert zeroed.sum() > 1000  # about 0.3 s at 10 kHz
    zero_pA = rec["i_pA"][zeroed]
    conv = conversion_array(
        DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, load_experiment(SUBTHRESHOLD).amplifier
    )
    assert np.all(np.abs(zero_pA) <= 400.0 * 20.0 / 65535)  # the 0 pA count: within one step
    gt = read_log(log).for_run(1)
    zero = pA_to_counts(conv, 0.0)
    assert gt.dac_counts[-1] == zero  # the host's ZERO came before STOP
    assert np.count_nonzero(gt.dac_counts != zero) > 1000  # it was driving the cell before


def test_a_board_that_ignores_the_law_runs_in_current_mode(tmp_path):
    """A version-1 board ignores BOARD_RULES (PROTOCOL.md §5.5): the host falls back to
    current mode and says so. The C core built without law mode (CCB_LAW_QUEUE=0) is one."""
    from clampcore.firmware_protocol.cboard import BUILD_VARIANTS, build_pty_board, start_pty_board

    binary = build_pty_board(tmp_path, BUILD_VARIANTS["no-law"])
    exp = copy.deepcopy(SUBTHRESHOLD)
    exp["element"] = exp["element"][:1]
    with start_pty_board(binary) as board:
        engine = Engine(exp, board.slave_path, RunOptions(watchdog_ms=200))
        engine.start(duration_s=0.2, out=tmp_path / "v1.nwb")
        assert engine.wait(60.0)
        result = engine.finish()
    assert result.error is None, result.error
    assert result.samples >= 1000
    assert result.mode == "current"
    assert "current mode" in (result.notice or "")


def test_live_changes_in_law_mode_reach_the_law_and_the_boards_rules(tmp_path):
    """A conductance change is part of the law: applied from the sample the host is making
    laws for, and logged with it; so is a reversal potential's, in the recorded currents
    too. A rule the board applies itself (the current limit) goes to the board as RULES_AT
    naming that sample (PROTOCOL.md §10.4): the board clips from exactly the logged sample
    on."""
    engine = Engine(SUBTHRESHOLD, "sim", RunOptions(rig_clock="wall"), rig_factory=start_rig)
    engine.start(duration_s=None, out=tmp_path / "live.nwb")
    deadline = time.monotonic() + 60
    while engine.status().get("samples", 0) < 2000:
        assert time.monotonic() < deadline and engine.running
        time.sleep(0.02)
    engine.change("extra_leak", "g_nS", 12.0)
    time.sleep(0.2)
    engine.change("extra_leak", "e_mV", -50.0)
    time.sleep(0.2)
    # The background conductance (3 nS at 0 mV, the cell near -70 mV) injects about
    # 3 nS x 70 mV = 210 pA: a 100 pA limit clips it.
    engine.change("loop", "max_current_pA", 100.0)
    time.sleep(0.3)
    result = engine.finish()
    assert result.error is None, result.error
    rec = read_nwb_summary(result.nwb_path)
    (change,) = [c for c in rec["param_changes"] if c.get("field") == "g_nS"]
    g = rec["columns"]["g_nS/extra_leak"]
    counters = rec["columns"]["sample_counter"].astype(np.int64)
    first = int(np.flatnonzero(g == 12.0)[0])
    assert np.all(g[:first] == 5.0) and np.all(g[first:] == 12.0)
    assert counters[first] == change["sample"]
    # Each sample's recorded current is the leak's at the V the board read, with the
    # reversal potential of the law it ran (Ohm's law for a conductance, I = -g (V - E)):
    # the samples already in flight when the change came keep the old E.
    (moved,) = [c for c in rec["param_changes"] if c.get("field") == "e_mV"]
    at_e = int(np.flatnonzero(counters == moved["sample"])[0])
    e_mV = np.where(np.arange(g.size) < at_e, -70.0, -50.0)
    np.testing.assert_allclose(
        rec["columns"]["i_pA/extra_leak"], -g * (rec["v_mV"] - e_mV), rtol=1e-6, atol=1e-3
    )
    assert at_e > first + 1000  # 0.2 s later at 10 kHz, well past the look-ahead (100 samples)
    (limit,) = [c for c in rec["param_changes"] if c.get("field") == "max_current_pA"]
    at = int(np.flatnonzero(counters == limit["sample"])[0])
    step_pA = 400.0 * 20.0 / 65535  # one DAC count through 400 pA/V (PROTOCOL.md §6)
    i_pA = rec["i_pA"]
    assert np.all(np.abs(i_pA[at:]) <= 100.0 + step_pA / 2)  # the board's new limit
    assert np.max(np.abs(i_pA[at - 200 : at])) > 100.0 + step_pA  # not before it


def test_a_live_reset_change_is_recorded_with_the_rule_each_sample_ran(tmp_path):
    """threshold_reset in law mode is the board's rule (PROTOCOL.md §10.4 RULES_AT): a live
    change of reset_mV acts from the sample the host was making laws for, and each sample's
    recorded current is the rule's at the V the board read, I = -g (V - E_reset) while it
    clamps (Ohm's law for a conductance), with the reset potential that sample ran."""
    exp = load_experiment(EXAMPLE).to_dict()
    # No cell-driven synapse (the look-ahead stays lead_ms, 10 ms); a steady 400 pA drive
    # and a 30 ms clamp: the cell (5 nS, tau 20 ms) climbs from -65 to -50 mV in 4.5 ms,
    # so the rule clamps within any 10 ms, and within the samples in flight at the change.
    exp["element"] = [e for e in exp["element"] if e["name"] != "recurrent"]
    tr, drive = exp["element"]
    tr["refractory_ms"] = 30.0
    drive.update(amplitude_pA=400.0, start_ms=0.0, period_ms=100_000.0, pulse_ms=100_000.0)
    engine = Engine(exp, "sim", RunOptions(rig_clock="wall", mode="law"), rig_factory=start_rig)
    engine.start(duration_s=None, out=tmp_path / "reset.nwb")
    deadline = time.monotonic() + 60
    while engine.status().get("samples", 0) < 3000:
        assert time.monotonic() < deadline and engine.running
        time.sleep(0.02)
    engine.change("imposed_spike", "reset_mV", -60.0)
    time.sleep(0.3)
    result = engine.finish()
    assert result.error is None, result.error
    rec = read_nwb_summary(result.nwb_path)
    (change,) = [c for c in rec["param_changes"] if c.get("field") == "reset_mV"]
    counters = rec["columns"]["sample_counter"].astype(np.int64)
    at = int(np.flatnonzero(counters == change["sample"])[0])
    g = rec["columns"]["g_nS/imposed_spike"]
    clamping = g > 0
    assert np.all(g[clamping] == 60.0)
    # The cell fired (the rule clamped) both before and after the change.
    assert clamping[:at].sum() >= 20 and clamping[at:].sum() >= 20
    lead = law_lead_samples(build_program(exp))
    assert lead == 100 and clamping[at - lead : at].any()  # laws in flight at the change
    e_reset = np.where(np.arange(g.size) < at, -65.0, -60.0)
    np.testing.assert_allclose(
        rec["columns"]["i_pA/imposed_spike"], -g * (rec["v_mV"] - e_reset), rtol=1e-6, atol=1e-3
    )


def test_run_command_in_law_mode_says_so(tmp_path, capsys):
    """`clampcore run --mode law` on the simulated rig: the end of the run says how much of
    it the board evaluated the law itself; the recording passes pynwb's validator."""
    from clampcore.cli import main

    out = tmp_path / "cli.nwb"
    argv = ["run", str(EXAMPLE), "--port", "sim", "--duration", "0.3", "--mode", "law"]
    assert main([*argv, "--rig-clock", "lockstep", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "law mode: the board evaluated the law at its own V on 100.00% of samples" in text
    assert validate_nwb(out) == []


def _cell_synapse(delay_ms: float) -> dict:
    """One exp-kinetics synapse driven by the cell: its conductance jumps by g_max at the
    sample that delivers a spike (first-order kinetics; clampcore.elements.synapse)."""
    return {
        "loop": {"rate_hz": 10000.0, "max_current_pA": 500.0, "mode": "law"},
        "element": [
            {"kind": "synapse", "name": "fb", "source": "cell", "delay_ms": delay_ms,
             "kinetics": "exp", "tau_decay_ms": 5.0, "g_max_nS": 2.0, "e_mV": 0.0},
        ],
    }  # fmt: skip


@pytest.mark.parametrize(
    ("delay_ms", "delivered_at", "late"),
    [
        (1.5, 15, 0),  # 15 samples > the lead of 10: heard in time, delivered at 0 + delay
        (0.3, 10, 1),  # 3 samples: laws 0..9 were made when the spike came; the next is 10
    ],
)
def test_a_spike_heard_too_late_is_delivered_with_the_next_law_and_counted(
    delay_ms: float, delivered_at: int, late: int
) -> None:
    """The host's law loop without a port: laws for samples 0..9 (lead 10) are made before
    the board's sample 0, which carries a spike; then samples 0..5 come in one frame. A
    synapse whose delivery sample (0 + delay) already has its law hears the spike with the
    first law still to be made and the loop counts it (issue 12: "a spike heard too late
    anyway is delivered late and counted"); one in time hears it exactly one delay later
    (the definition of a synaptic delay). Either way it hears it exactly once."""
    program = build_program(_cell_synapse(delay_ms))
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, program.experiment.amplifier)
    shared = SharedRun.create(RingLayout.for_program(program))
    try:
        sh = shared.loop(np.zeros(0, dtype=np.int64))
        pa = program.arrays()
        lead = 10
        ll = new_law_link(lead, False, 1, 0, conv)
        top_up_laws(ll, 0, pa, sh)  # samples 0 .. lead - 1, before the board starts
        count = 6
        flags = np.zeros(count, dtype=np.int64)
        flags[0] = BF_FLAG_SPIKE
        adc = np.full(count, 30000, dtype=np.int64)
        wire = np.zeros(MAX_WIRE, dtype=np.uint8)
        n = lawmsg.encode_samples(1, 0, 0, 0, adc, adc, flags, wire)
        ll.io.rx[:n] = wire[:n]
        process_rx_law(n, ll, pa, sh)
        made = count - 1 + lead  # laws now exist up to the newest sample seen + lead
        assert ll.lw[0]["hi"] == made
        mask = ll.laws.shape[0] - 1
        g = np.array([ll.ghist[s & mask, 0] for s in range(made + 1)])
        jumps = np.flatnonzero(np.diff(g) > 1.0) + 1
        np.testing.assert_array_equal(jumps, [delivered_at])
        assert g[delivered_at] == pytest.approx(2.0)  # g_max, added at once
        assert shared.stats[ST_LATE_SPIKES] == late
        assert loop_health(shared.stats, 10000.0)["late_spikes"] == late
    finally:
        shared.close()


def test_lockstep_law_mode_delivers_late_spikes_at_the_next_law_and_counts_them(tmp_path):
    """The whole chain with a look-ahead longer than the recurrent synapse's delay (3 ms =
    30 samples at 10 kHz, lead forced to 50): every spike of the cell is heard after the law
    of spike + 30 was made, so the synapse hears it with the first law still to be made.
    On the lockstep rig the host has seen sample m - 1 when sample m comes, so laws exist
    up to m - 1 + 50: delivery at m + 50, and the alpha conductance rises from the sample
    after (as in the test above with the delay the link allows). The run counts every one
    and says so in its summary and in the recording's metadata."""
    lead = 50
    options = RunOptions(rig_clock="lockstep", watchdog_ms=5000, mode="law", lead_samples=lead)
    engine = Engine(EXAMPLE, "sim", options, rig_factory=start_rig)
    engine.start(duration_s=0.5, out=tmp_path / "late.nwb")
    assert engine.wait(120.0), "the run did not end"
    result = engine.finish()
    assert result.error is None, result.error
    rec = read_nwb_summary(result.nwb_path)
    spikes = np.flatnonzero(rec["columns"]["spike/cell"])
    assert spikes.size >= 3
    g = rec["columns"]["g_nS/recurrent"]
    onsets = np.flatnonzero((g[1:] > 0) & (g[:-1] == 0)) + 1
    assert onsets[0] == spikes[0] + lead + 1
    assert result.summary["late_spikes"] == spikes.size
    assert rec["summary"]["late_spikes"] == spikes.size  # kept in the recording
