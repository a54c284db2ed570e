"""The real-time loop end to end: host engine <-> serial line <-> board (simulated or C).

Behaviour only (timing figures belong in bench/): the run through the serial path
equals the offline simulation, passive physics still holds, the C board core
works with the host, and every fault leaves the cell at 0 pA and the recording
intact. Every NWB file written here passes pynwb's validator.
"""

from __future__ import annotations

import os
import select
import signal
import socket
import subprocess
import sys
import threading
import time
import tty
from pathlib import Path

import numpy as np
import pytest
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import NO_COMMAND, read_log

import clampcore
from clampcore.board_link import BoardLink
from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_pA,
    pA_to_counts,
)
from clampcore.engine import Engine, RunOptions
from clampcore.experiment import load_experiment
from clampcore.nwb import journal_to_nwb, read_nwb_summary, validate_nwb
from clampcore.realtime import LOOP_FIFO_PRIORITY, fifo_scheduling

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"

PASSIVE_STEP = """
[loop]
rate_hz = 10000
max_current_pA = 400

[cell]
model = "passive"
capacitance_pF = 100
leak_nS = 5
rest_mV = -70

[amplifier]
vm_mV_per_V = 100
command_pA_per_V = 400

[[element]]
kind = "leak"
name = "virtual_leak"
g_nS = 5.0
e_mV = -70.0

[[element]]
kind = "current"
name = "step"
waveform = "step"
amplitude_pA = 100
start_ms = 20
"""


def _run(engine: Engine, duration_s: float | None, out: Path, timeout_s: float = 120.0):
    engine.start(duration_s=duration_s, out=out)
    assert engine.wait(timeout_s), "the run did not end"
    return engine.finish()


def _as_sent(offline) -> list[float]:
    """The offline command as the board received it: recordings keep the DAC counts sent
    (through the loop's own per-sample kernels, clampcore.calibration)."""
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, offline.experiment.amplifier)
    return [counts_to_pA(conv, pA_to_counts(conv, x)) for x in offline.i_pA]


def _valid(path: Path) -> dict:
    # pynwb's validator returns a list of problems (empty = valid); read what it returns.
    assert validate_nwb(path) == []
    return read_nwb_summary(path)


def test_lockstep_run_equals_offline_simulation(tmp_path, in_thread):
    """Same experiment and seed: the serial path equals clampcore.simulate sample for sample."""
    exp = EXAMPLES / "slice_background.toml"  # HH cell, noise, Poisson synapses: all seeded
    options = RunOptions(rig_clock="lockstep", seed=3, realtime_priority=LOOP_FIFO_PRIORITY)
    result = _run(Engine(exp, "sim", options, rig_factory=start_rig), 0.5, tmp_path / "run.nwb")
    assert result.error is None, result.error
    rec = _valid(result.nwb_path)
    offline = clampcore.simulate(exp, 0.5, seed=3)
    np.testing.assert_array_equal(rec["v_mV"], offline.v_mV)
    # The recording keeps the command as the DAC counts sent, and conductances as float32.
    np.testing.assert_array_equal(rec["i_pA"], _as_sent(offline))
    np.testing.assert_array_equal(
        rec["columns"]["g_nS/background_exc"],
        offline.g_nS["background_exc"].astype(np.float32),
    )
    np.testing.assert_allclose(rec["spike_times_s"].get("cell", []), offline.spike_times_s)
    # In lockstep every command is in force at the very next sample.
    lat = rec["columns"]["latency_samples"]
    assert np.all(lat[np.isfinite(lat)] == 1)
    # The loop process got the real-time settings exactly where this system permits them.
    assert result.scheduling["cpu_dma_latency_held"] == os.access("/dev/cpu_dma_latency", os.W_OK)
    fifo_permitted = in_thread(lambda: fifo_scheduling(1))
    assert result.scheduling["fifo_priority"] == (LOOP_FIFO_PRIORITY if fifo_permitted else 0)


def test_passive_physics_through_the_serial_path(tmp_path):
    """RC step response with a virtual leak: V(t) = E + R I (1 - exp(-t/tau)),
    R = 1/(g_L + g_v), tau = C/(g_L + g_v) (closed form of the RC membrane)."""
    result = _run(
        Engine(PASSIVE_STEP, "sim", RunOptions(rig_clock="lockstep"), rig_factory=start_rig),
        0.12,
        tmp_path / "rc.nwb",
    )
    assert result.error is None, result.error
    rec = _valid(result.nwb_path)
    v = rec["v_mV"]
    t_ms = np.arange(v.size) / 10.0
    g_total_nS, c_pF = 5.0 + 5.0, 100.0
    tau_ms = c_pF / g_total_nS
    on = t_ms > 20.2
    expected = -70.0 + 100.0 / g_total_nS * (1 - np.exp(-(t_ms[on] - 20.0) / tau_ms))
    # Tolerance: the command is in force one sample (0.1 ms) after it is computed, which shifts
    # the curve by at most (dV/dt)max * 0.1 ms = (10 mV / 10 ms) * 0.1 ms = 0.1 mV; the 16-bit
    # ADC step is 0.03 mV of membrane at 100 mV/V.
    np.testing.assert_allclose(v[on], expected, atol=0.15)
    # Steady state: the input resistance is 1/(g_L + g_v) = 100 MOhm.
    assert np.mean(v[t_ms > 100]) + 70.0 == pytest.approx(100.0 / g_total_nS, abs=0.1)


@pytest.fixture(scope="module")
def c_board_binary(tmp_path_factory):
    from clampcore.firmware_protocol.cboard import build_pty_board

    return build_pty_board(tmp_path_factory.mktemp("cboard"))


def test_host_against_the_c_board_core(tmp_path, c_board_binary):
    """Handshake, samples and commands with the portable C core on a pty, then its watchdog."""
    from clampcore.firmware_protocol.cboard import start_pty_board

    # The C board's own passive cell: C 100 pF, g_L 5 nS, E_L -70 mV; the same amplifier scaling.
    exp = PASSIVE_STEP.replace(
        'name = "virtual_leak"\ng_nS = 5.0', 'name = "virtual_leak"\ng_nS = 0.0'
    )
    with start_pty_board(c_board_binary, "--vm-mV-per-V", "100", "--cmd-pA-per-V", "400") as board:
        # A generous watchdog here: a trip must mean the host stopped answering, not that the
        # shared machine stalled for 20 ms (behaviour, not timing; the trip itself is below).
        options = RunOptions(watchdog_ms=500)
        result = _run(Engine(exp, board.slave_path, options), 2.0, tmp_path / "c.nwb")
        assert result.error is None, result.error
        rec = _valid(result.nwb_path)
        # The duration is checked once per read, and one read holds at most 4096 bytes,
        # i.e. about 200 sample frames of 20 bytes (PROTOCOL.md), so a few more may come.
        assert 20000 <= rec["n_samples"] <= 20000 + 4096 // 20
        # 100 pA into 5 nS: the C cell settles at E_L + I/g_L = -50 mV (Ohm's law).
        assert np.mean(rec["v_mV"][-2000:]) == pytest.approx(-50.0, abs=0.5)
        lat = rec["columns"]["latency_samples"]
        assert np.isfinite(lat).sum() > 19000  # the board reported which command was in force
        assert result.board_status["watchdog_trips"] == 0
        # The 0 pA command before STOP (README, Safety) was applied by the C core, which
        # follows PROTOCOL.md §5.2: it rejected nothing, and applied one command more than
        # the loop sent.
        assert result.board_status["rejected"] == 0, result.board_status
        assert result.board_status["commands_applied"] == result.summary["commands"] + 1

        # Now kill the host's loop process mid-run: the C board's watchdog must trip.
        engine = Engine(exp, board.slave_path, RunOptions(watchdog_ms=20))
        engine.start(duration_s=None, out=tmp_path / "c_killed.nwb")
        _wait_for_samples(engine, 2000)
        os.kill(engine.loop_pid, signal.SIGKILL)
        killed = engine.finish()
        assert killed.error and "ended without reporting" in killed.error
        time.sleep(0.1)  # > 20 ms watchdog
        link = BoardLink(board.slave_path)
        try:
            status = link.status()
        finally:
            link.close()
        assert status is not None and status.watchdog_trips >= 1
        _valid(killed.nwb_path)


# An experiment whose every command is far from 0 pA: a constant 100 pA from the first sample.
CONSTANT_100_PA = PASSIVE_STEP.replace("start_ms = 20", "start_ms = 0")
# PROTOCOL.md §6, worked numbers (16-bit ±10 V, 400 pA/V): 0 pA is DAC count 32 768 and 100 pA
# is 33 587; the virtual leak adds a little, so the loop's commands sit near 33 587.
ZERO_PA_COUNTS = 32_768


def test_the_output_is_0_pA_by_the_hosts_command_before_stop(tmp_path):
    """README, Safety: on any stop the host commands 0 pA first, then stops the board. The
    rig's ground truth says what the DAC held when STOP came: the 0 pA count, and from a
    command the board applied (not the fault value STOP itself writes)."""
    for clock in ("lockstep", "wall"):
        log = tmp_path / f"{clock}.log"
        options = RunOptions(rig_clock=clock, rig_log=log, watchdog_ms=500)
        result = _run(
            Engine(CONSTANT_100_PA, "sim", options, rig_factory=start_rig),
            0.05,
            tmp_path / f"{clock}.nwb",
        )
        assert result.error is None, result.error
        truth = read_log(log)
        stop = truth.events_of("stop")[-1]
        assert stop["why"] == "STOP", stop
        assert stop["dac_counts"] == ZERO_PA_COUNTS, (clock, stop)
        assert stop["cmd_seq"] != -1, (clock, stop)  # a command was in force, not the fault value
        # Every command the loop sent was the 100 pA one: 0 pA came from the teardown alone.
        gt = truth.for_run(1)
        applied = gt.dac_counts[gt.cmd_seq != NO_COMMAND]
        zero_rows = np.flatnonzero(applied == ZERO_PA_COUNTS)
        assert applied.size > 100 and np.all(applied[: applied.size - zero_rows.size] > 33_000)
        # A board following PROTOCOL.md §5.2 rejected nothing the host sent.
        assert result.board_status["rejected"] == 0, (clock, result.board_status)


def _wait_for_samples(engine: Engine, n: int, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while engine.status().get("samples", 0) < n:
        assert time.monotonic() < deadline, "no samples arrived"
        assert engine.running, "the loop ended early"
        time.sleep(0.02)


def _zero_counts(experiment) -> int:
    conv = conversion_array(
        DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, load_experiment(experiment).amplifier
    )
    return pA_to_counts(conv, 0.0)


def test_host_killed_midrun_the_rig_goes_to_zero_within_the_watchdog(tmp_path):
    exp = EXAMPLES / "imposed_lif.toml"
    log = tmp_path / "rig.log"
    engine = Engine(
        exp, "sim", RunOptions(rig_clock="wall", rig_log=log, watchdog_ms=20), rig_factory=start_rig
    )
    engine.start(duration_s=None, out=tmp_path / "killed.nwb")
    _wait_for_samples(engine, 10000)
    os.kill(engine.loop_pid, signal.SIGKILL)
    time.sleep(0.3)
    result = engine.finish()  # also stops the rig, which flushes its log
    assert "ended without reporting" in (result.error or "")
    gt = read_log(log).for_run(1)
    commanded = np.flatnonzero(gt.cmd_seq != NO_COMMAND)
    last_cmd = commanded[-1]
    after = np.arange(last_cmd + 1, len(gt))
    fault = after[gt.watchdog[after]]
    assert fault.size, "the watchdog never tripped"
    rate_hz = 20000
    # The rule (PROTOCOL.md): no command for the watchdog timeout -> fault value, checked at
    # every sample tick, so at most timeout + one sample after the last command was applied.
    assert fault[0] - last_cmd <= 20e-3 * rate_hz + 1
    zero = _zero_counts(exp)
    assert np.all(gt.dac_counts[fault[0] :] == zero)
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, load_experiment(exp).amplifier)
    half_step_pA = 400.0 * 20.0 / 65535 / 2  # 400 pA/V over a 16-bit, 20 V range
    assert abs(counts_to_pA(conv, zero)) <= half_step_pA + 1e-12  # 0 pA to the nearest DAC step
    _valid(result.nwb_path)


def test_corrupted_and_dropped_frames_are_counted_and_never_applied(tmp_path):
    exp = EXAMPLES / "imposed_lif.toml"
    log = tmp_path / "rig.log"
    faults = {"corrupt_rx": 0.01, "drop_rx": 0.01, "corrupt_tx": 0.01, "drop_tx": 0.01}
    engine = Engine(
        exp,
        "sim",
        RunOptions(rig_clock="wall", rig_log=log, rig_faults=faults, seed=1),
        rig_factory=start_rig,
    )
    result = _run(engine, 1.0, tmp_path / "faulty.nwb")
    assert result.error is None, result.error  # the run goes on
    assert result.summary["bad_frames"] > 0  # corrupted samples reached the host and were dropped
    assert result.summary["missing"] > 0  # dropped samples show as gaps in the counter
    rec = _valid(result.nwb_path)
    gt = read_log(log).for_run(1)
    # Every command the rig applied is one the host sent for the sample it answers: its DAC count
    # is the host's recorded command for that sample. A corrupted command would break this.
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, load_experiment(exp).amplifier)
    counters = rec["columns"]["sample_counter"].astype(np.int64)
    host_i = dict(zip(counters.tolist(), rec["i_pA"].tolist(), strict=True))
    applied = gt.records[(gt.cmd_seq != NO_COMMAND) & ~gt.watchdog]
    # The teardown's 0 pA command answers a sample newer than the loop's last (the board
    # rejects any other, PROTOCOL.md section 5.2), one the recording does not hold.
    teardown = applied["cmd_answers"] > counters.max()
    assert np.all(applied["dac_counts"][teardown] == pA_to_counts(conv, 0.0))
    applied = applied[~teardown]
    assert applied.size > 10000
    sent = np.array([pA_to_counts(conv, host_i[int(c)]) for c in applied["cmd_answers"]])
    np.testing.assert_array_equal(applied["dac_counts"], sent)
    board_events = read_log(log).events
    assert (
        any("rx" in str(e.get("event", "")) for e in board_events)
        or result.board_status["bad_frames"] > 0
    )


def test_vanished_port_stops_cleanly_and_keeps_the_recording(tmp_path):
    exp = EXAMPLES / "imposed_lif.toml"
    engine = Engine(exp, "sim", RunOptions(rig_clock="wall"), rig_factory=start_rig)
    engine.start(duration_s=None, out=tmp_path / "vanished.nwb")
    _wait_for_samples(engine, 5000)
    engine._rig.kill()  # the board disappears (USB unplugged)
    assert engine.wait(10.0), "the loop did not notice the port vanishing"
    result = engine.finish()
    assert result.error is not None
    assert "port" in result.error or "board" in result.error
    rec = _valid(result.nwb_path)
    assert rec["n_samples"] >= 5000


@pytest.mark.slow
def test_recover_after_the_host_process_is_killed(tmp_path):
    """SIGKILL of the whole host program: `recover` gives a valid NWB file holding every
    sample up to at most 0.5 s before the kill (the journal is flushed 4x a second)."""
    exp = EXAMPLES / "imposed_lif.toml"
    log = tmp_path / "rig.log"
    out = tmp_path / "crash.nwb"
    with start_rig(exp, clock="wall", log=log) as rig:
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        host = subprocess.Popen(
            [sys.executable, "-m", "clampcore", "run", str(exp), "--port", rig.path,
             "--out", str(out)],
            env=env, stdout=subprocess.DEVNULL, stderr=(tmp_path / "host.err").open("w"),
        )  # fmt: skip
        journal = out.with_suffix(".journal")
        deadline = time.monotonic() + 60
        while (
            not (journal / "samples.f64").exists() or (journal / "samples.f64").stat().st_size < 4e6
        ):
            assert host.poll() is None, (tmp_path / "host.err").read_text()
            assert time.monotonic() < deadline, "the journal did not grow"
            time.sleep(0.05)
        time.sleep(1.0)
        host.send_signal(signal.SIGKILL)
        host.wait()
        time.sleep(0.8)  # the rig flushes its log at least every 0.5 s
        rig.stop()
    recovered = journal_to_nwb(journal, tmp_path / "recovered.nwb")
    rec = _valid(recovered)
    gt = read_log(log).for_run(1)
    answered = gt.cmd_answers[gt.cmd_seq != NO_COMMAND]
    host_samples = int(answered.max()) + 1  # the host had processed at least this many
    rate_hz = load_experiment(exp).loop["rate_hz"]
    assert rec["n_samples"] >= host_samples - 0.5 * rate_hz
    counters = rec["columns"]["sample_counter"]
    assert np.all(np.diff(counters) >= 1)


def test_refuses_to_start_without_calibration_on_a_real_port(tmp_path):
    exp = {"loop": {"rate_hz": 10000.0}, "element": []}  # no [amplifier]
    with start_rig(None, clock="lockstep") as rig:
        result = _run(Engine(exp, rig.path), 1.0, tmp_path / "nocal.nwb")
    assert result.error and "[amplifier]" in result.error
    assert result.samples == 0


def test_refuses_a_limit_the_board_cannot_represent(tmp_path):
    # 400 pA/V over +-10 V reaches +-4000 pA; ask for 5000.
    exp = PASSIVE_STEP.replace("max_current_pA = 400", "max_current_pA = 5000")
    result = _run(
        Engine(exp, "sim", RunOptions(rig_clock="lockstep"), rig_factory=start_rig),
        1.0,
        tmp_path / "lim.nwb",
    )
    assert result.error and "cannot represent" in result.error
    assert result.samples == 0


def _bridge_tcp_to_pty(pty_path: str) -> int:
    """A loopback TCP port whose one client is joined to the pty (a board on a network URL)."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(1)
    port = server.getsockname()[1]

    def serve() -> None:
        client, _ = server.accept()
        pty = os.open(pty_path, os.O_RDWR | os.O_NOCTTY)
        tty.setraw(pty)
        try:
            while True:
                ready, _, _ = select.select([client, pty], [], [], 5.0)
                if not ready:
                    return
                for src in ready:
                    if src is client:
                        data = client.recv(4096)
                        if not data:
                            return
                        os.write(pty, data)
                    else:
                        client.sendall(os.read(pty, 4096))
        except OSError:
            return
        finally:
            client.close()
            os.close(pty)
            server.close()

    threading.Thread(target=serve, daemon=True).start()
    return port


def test_pyserial_url_with_python_io_equals_offline_simulation(tmp_path):
    """A board reached through a pyserial URL (socket://), the I/O done by pyserial in
    Python: the same samples as the offline simulation (same per-sample path)."""
    exp = EXAMPLES / "imposed_lif.toml"
    with start_rig(exp, clock="lockstep") as rig:
        tcp_port = _bridge_tcp_to_pty(rig.path)
        engine = Engine(exp, f"socket://127.0.0.1:{tcp_port}", RunOptions(python_io=True))
        result = _run(engine, 0.2, tmp_path / "url.nwb")
    assert result.error is None, result.error
    rec = _valid(result.nwb_path)
    offline = clampcore.simulate(exp, 0.2)
    np.testing.assert_array_equal(rec["v_mV"], offline.v_mV)
    np.testing.assert_array_equal(rec["i_pA"], _as_sent(offline))
