"""The engine around the loop, without the window: live changes into the recording, the
refusals before a start, the recorder's lost rows, the timing summary, the loop delay.

Anchors: Ohm's law for a conductance, I = -g (V - E), before and after a change; a ring
buffer's arithmetic and percentiles of small distributions worked by hand; the passive
membrane's first response to a step, at the sample the timing model of DEVELOPERS.md
names.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest
from clampcore.simulated_rig import start_rig

import clampcore
from clampcore.engine import Engine, RunOptions
from clampcore.journal import read_journal
from clampcore.nwb import read_nwb_summary, validate_nwb
from clampcore.program import build_program
from clampcore.recorder import Recorder, recording_meta, timing_summary
from clampcore.shared import CTRL_WRITTEN, RingLayout, SharedRun

RATE_HZ = 10_000.0
LEAK_EXPERIMENT = {
    "loop": {"rate_hz": RATE_HZ, "max_current_pA": 2000.0},
    "cell": {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0},
    "amplifier": {"vm_mV_per_V": 100.0, "command_pA_per_V": 400.0},
    "element": [{"kind": "leak", "name": "extra_leak", "g_nS": 2.0, "e_mV": -40.0}],
}


def _wait_for(engine: Engine, samples: int, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while engine.status().get("samples", 0) < samples:
        assert time.monotonic() < deadline and engine.running, "the loop did not get there"
        time.sleep(0.02)


def test_a_live_change_reaches_the_cell_and_the_recording(tmp_path: Path) -> None:
    engine = Engine(LEAK_EXPERIMENT, "sim", RunOptions(rig_clock="lockstep"), rig_factory=start_rig)
    engine.start(out=tmp_path / "change.nwb")
    try:
        _wait_for(engine, 2000)
        engine.change("extra_leak", "g_nS", 6.0)
        n = engine.status()["samples"]
        _wait_for(engine, n + 2000)
    finally:
        result = engine.finish()
    assert result.error is None, result.error
    assert validate_nwb(result.nwb_path) == []
    rec = read_nwb_summary(result.nwb_path)
    changes = rec["param_changes"]
    assert [(c["element"], c["field"], c["new"]) for c in changes] == [("extra_leak", "g_nS", 6.0)]
    s = changes[0]["sample"] - rec["first_sample"]
    v, i = rec["columns"]["v_mV"], rec["columns"]["i_pA"]
    assert 1000 < s < v.size - 1000
    # I = -g (V - E) with the old g before the logged sample and the new g from it on; the
    # recording holds the DAC count sent, within half a step of 400 pA/V over 16 bits and
    # 20 V (PROTOCOL.md §6).
    half_step = 400.0 * 20.0 / 65535 / 2 + 1e-9
    np.testing.assert_allclose(i[:s], -2.0 * (v[:s] + 40.0), rtol=0, atol=half_step)
    np.testing.assert_allclose(i[s:], -6.0 * (v[s:] + 40.0), rtol=0, atol=half_step)
    assert i[s] > 2.5 * i[s - 1] > 0  # and the current really changed there
    # The engine's copy of the experiment (what a save writes) has the new value.
    assert engine.experiment.element("extra_leak")["g_nS"] == 6.0


def test_a_change_that_is_not_live_is_refused_before_the_mailbox(tmp_path: Path) -> None:
    engine = Engine(LEAK_EXPERIMENT, "sim", RunOptions(rig_clock="lockstep"), rig_factory=start_rig)
    engine.start(out=tmp_path / "refused.nwb")
    try:
        _wait_for(engine, 100)
        with pytest.raises(clampcore.ExperimentError, match=r"'extra_leak'.*'e_mV' = nan"):
            engine.change("extra_leak", "e_mV", float("nan"))
        with pytest.raises(KeyError, match="rate_hz cannot change while running"):
            engine.change("loop", "rate_hz", 5000.0)
        with pytest.raises(KeyError, match="no element named 'nowhere'"):
            engine.change("nowhere", "g_nS", 1.0)
    finally:
        result = engine.finish()
    assert read_nwb_summary(result.nwb_path)["param_changes"] == []


def test_refuses_a_rate_above_the_boards_maximum(tmp_path: Path) -> None:
    """PROTOCOL.md §4.1: HELLO.max_rate_hz is the board's highest rate; the host refuses
    more before configuring (the C board on a pty, told its maximum is 5 kHz)."""
    from clampcore.firmware_protocol.cboard import build_pty_board, start_pty_board

    binary = build_pty_board(tmp_path)
    with start_pty_board(binary, "--max-rate-hz", "5000") as board:
        engine = Engine(LEAK_EXPERIMENT, board.slave_path)
        engine.start(duration_s=0.1, out=tmp_path / "too_fast.nwb")
        assert engine.wait(30.0)
        result = engine.finish()
    assert result.error == (
        "refusing to start: [loop] rate_hz = 10000 is above this board's maximum, 5000 Hz"
    )
    assert result.samples == 0 and result.nwb_path is None


def test_timing_summary_of_distributions_worked_by_hand() -> None:
    # 100 latencies: 90 of 1, 9 of 2, 1 of 5, and two NaN (no command in force) left out.
    lat = np.array([1.0] * 90 + [2.0] * 9 + [5.0] + [np.nan] * 2)
    turn = np.array([10.0] * 50 + [20.0] * 50 + [np.nan])
    t = timing_summary({"v_mV": np.zeros(102), "latency_samples": lat, "turnaround_us": turn})
    assert t["samples"] == 102
    assert t["share_within_1_samples"] == 0.90
    assert t["share_within_2_samples"] == t["share_within_3_samples"] == 0.99
    assert t["latency_p50_samples"] == 1.0 and t["latency_max_samples"] == 5.0
    # Linear interpolation between order statistics (Hyndman & Fan 1996, type 7): the 99th
    # percentile of 100 values sits at rank 0.99 * 99 = 98.01, between 2 and 5: 2.03.
    assert t["latency_p99_samples"] == pytest.approx(2.03)
    # 50 of 10 and 50 of 20 µs: the median at rank 49.5 is halfway, 15 µs.
    assert t["turnaround_p50_us"] == pytest.approx(15.0) and t["turnaround_max_us"] == 20.0


def test_recorder_counts_the_rows_the_ring_lapped(tmp_path: Path) -> None:
    """An 8-row ring that received 20 rows before the recorder looked: rows 0-11 were
    overwritten (20 - 8 = 12 lost) and rows 12-19 are copied; later rows follow on."""
    program = build_program(LEAK_EXPERIMENT)
    layout = RingLayout(names=RingLayout.for_program(program).names, rows=8)
    shared = SharedRun.create(layout)
    try:
        col = layout.index("sample_counter")

        def write(upto: int) -> None:
            for n in range(int(shared.ctrl[CTRL_WRITTEN]), upto):
                shared.ring[n % layout.rows, :] = 0.0
                shared.ring[n % layout.rows, col] = n
            shared.ctrl[CTRL_WRITTEN] = upto

        meta = recording_meta(program.experiment, "test")
        recorder = Recorder(shared, program, tmp_path / "lapped.journal", meta)
        write(20)
        recorder.drain()
        assert recorder.lost_rows == 12
        write(25)
        recorder.drain()
        assert recorder.lost_rows == 12
        recorder.stop(keep_journal=True)
        assert recorder.final_meta["lost_rows"] == 12
        counters = read_journal(tmp_path / "lapped.journal").columns["sample_counter"]
        np.testing.assert_array_equal(counters, np.arange(12, 25))
    finally:
        shared.close()


def test_extra_delay_samples_put_the_command_in_force_later() -> None:
    """DEVELOPERS.md, the loop's timing model: the command computed from sample n is in force
    from sample n + 1 + extra_delay_samples on. A step computed from sample 200 therefore
    first moves the passive membrane at sample 201 + d."""
    base = {
        "loop": {"rate_hz": RATE_HZ},
        "cell": {"model": "passive", "capacitance_pF": 100.0, "leak_nS": 5.0, "rest_mV": -70.0},
        "element": [
            {"kind": "current", "name": "step", "waveform": "step", "amplitude_pA": 100.0,
             "start_ms": 20.0}
        ],
    }  # fmt: skip
    for d in (0, 1, 3):
        exp = {**base, "loop": {**base["loop"], "extra_delay_samples": d}}
        rec = clampcore.simulate(exp, 0.03, quantise=False)
        assert np.flatnonzero(rec.i_pA)[0] == 200  # 20 ms at 10 kHz
        moved = np.flatnonzero(np.abs(rec.v_mV + 70.0) > 1e-9)
        assert moved[0] == 201 + d, d
