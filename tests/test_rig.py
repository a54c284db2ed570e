"""Tests of the simulated rig (simulated_rig/board.py and friends) through its pseudo-terminal.

A tiny raw client written here talks to a rig started with ``start_rig``.  It
decodes what the rig sends with implementations from outside the project: the
``cobs`` package (Cheshire & Baker 1999 COBS) for the framing and the standard
library's ``binascii.crc_hqx`` with initial value 0xFFFF, which is
CRC-16/CCITT-FALSE (the CRC catalogue's parameters: poly 0x1021, init 0xFFFF, no
reflection), for the checksum; only the message bodies are parsed with the
project's codec dataclasses.  Physics is checked against closed forms written out
here: the converter mapping of PROTOCOL.md (count c of an N-bit converter spanning
[min, max] volts is min + c (max - min) / (2^N - 1) volts), the amplifier's linear
scaling, and the exact solution of the RC membrane for a constant current.  The
lockstep run is checked against a second, independent path that must agree:
``clampcore.simulate``.  No assertion is about timing; behaviour on the wall
clock is judged by the board's own sample counter and clock.
"""

from __future__ import annotations

import binascii
import json
import math
import os
import select
import signal
import subprocess
import sys
import termios
import textwrap
import time
import tty
from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import codec
from clampcore.simulated_rig import start_rig
from clampcore.simulated_rig.groundtruth import (
    LOG_BEHIND,
    LOG_DTYPE,
    LOG_FAULT_OUTPUT,
    LOG_TX_CORRUPTED,
    LOG_TX_DROPPED,
    LOG_WATCHDOG,
    NO_COMMAND,
    read_log,
)
from cobs import cobs

ROOT = Path(__file__).resolve().parent.parent

# The experiment's amplifier and cell, written out so that the checks below can
# compute what the rig must do without the project's code.
VM_MV_PER_V = 100.0
CMD_PA_PER_V = 400.0
C_PF, G_L_NS, E_L_MV = 100.0, 5.0, -70.0
EXPERIMENT = f"""
[loop]
rate_hz = 10000

[cell]
model = "passive"
capacitance_pF = {C_PF}
leak_nS = {G_L_NS}
rest_mV = {E_L_MV}

[amplifier]
vm_mV_per_V = {VM_MV_PER_V}
command_pA_per_V = {CMD_PA_PER_V}
"""
TOP = 65535  # 2**16 - 1: the rig's 16-bit converters
V_MIN, V_MAX = -10.0, 10.0  # their range in volts


def dac_pA(counts: int | np.ndarray) -> float | np.ndarray:
    """DAC count -> injected pA: PROTOCOL.md's converter mapping, then the amplifier's pA/V."""
    return (V_MIN + np.asarray(counts, dtype=float) * (V_MAX - V_MIN) / TOP) * CMD_PA_PER_V


def adc_counts(v_mV: float) -> int:
    """Membrane mV -> the ADC count: the amplifier's mV/V, then PROTOCOL.md §6's rounding,
    floor(x + 1/2) (half up), clipped."""
    volts = v_mV / VM_MV_PER_V
    return int(min(max(math.floor((volts - V_MIN) / (V_MAX - V_MIN) * TOP + 0.5), 0), TOP))


# The DAC count for 0 pA: 0 V is count 32767.5, rounded to 32768 (PROTOCOL.md §6, worked numbers).
ZERO_PA_COUNTS = 32768


class RawClient:
    """A host as small as it gets: os.open on the pty, COBS from the ``cobs`` package."""

    def __init__(self, path: str) -> None:
        self.fd = os.open(path, os.O_RDWR | os.O_NOCTTY)
        tty.setraw(self.fd)
        termios.tcflush(self.fd, termios.TCIOFLUSH)
        self.buf = b""
        self.seq = 0
        self.bad_frames = 0

    def close(self) -> None:
        os.close(self.fd)

    def send(self, message: object, seq: int | None = None) -> int:
        seq = self.seq if seq is None else seq
        self.seq = (seq + 1) & 0xFFFF
        os.write(self.fd, codec.encode_message(message, seq))  # type: ignore[arg-type]
        return seq

    def recv(self, timeout_s: float = 10.0) -> tuple[int, object]:
        deadline = time.monotonic() + timeout_s
        while True:
            while b"\0" in self.buf:
                wire, self.buf = self.buf.split(b"\0", 1)
                if not wire:
                    continue
                try:
                    payload = cobs.decode(wire)
                except cobs.DecodeError:
                    self.bad_frames += 1
                    continue
                crc = binascii.crc_hqx(payload[:-2], 0xFFFF)  # CRC-16/CCITT-FALSE
                if len(payload) < 5 or crc != int.from_bytes(payload[-2:], "little"):
                    self.bad_frames += 1
                    continue
                return codec.parse_payload(payload)
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("nothing from the rig")
            ready, _, _ = select.select([self.fd], [], [], left)
            if ready:
                self.buf += os.read(self.fd, 65536)

    def expect(self, cls: type, timeout_s: float = 10.0, ack: int | None = None) -> object:
        """The next message of type ``cls`` (and ``ack_seq``), skipping others."""
        while True:
            _, message = self.recv(timeout_s)
            if isinstance(message, cls) and (ack is None or message.ack_seq == ack):  # type: ignore[attr-defined]
                return message

    def request(self, message: object, timeout_s: float = 10.0) -> codec.Status:
        """Send a message answered by STATUS and return that STATUS."""
        seq = self.send(message)
        return self.expect(codec.Status, timeout_s, ack=seq)  # type: ignore[return-value]

    def start(self, rate_hz: int, watchdog_us: int, fault: int = ZERO_PA_COUNTS) -> None:
        st = self.request(codec.Configure(rate_hz, 1, watchdog_us, (fault,)))
        assert st.result == codec.RESULT_OK and st.state == codec.STATE_READY
        st = self.request(codec.Start())
        assert st.result == codec.RESULT_OK and st.state == codec.STATE_RUNNING


@pytest.fixture
def exp_path(tmp_path: Path) -> Path:
    path = tmp_path / "rig_test.toml"
    path.write_text(EXPERIMENT)
    return path


def _rc_solution(applied_pA: np.ndarray, dt_ms: float) -> np.ndarray:
    """V at each sample of a passive RC membrane from rest under piecewise-constant current.

    Exact solution of C dV/dt = -g_L (V - E_L) + I for constant I over one interval:
    V(t+dt) = V_inf + (V(t) - V_inf) exp(-dt/tau), V_inf = E_L + I/g_L, tau = C/g_L.
    applied_pA[k] is the current over (t_{k-1}, t_k]; sample 0 is at rest.
    """
    v = np.empty(applied_pA.size)
    v[0] = E_L_MV
    decay = math.exp(-dt_ms * G_L_NS / C_PF)
    for k in range(1, applied_pA.size):
        v_inf = E_L_MV + applied_pA[k] / G_L_NS
        v[k] = v_inf + (v[k - 1] - v_inf) * decay
    return v


# ---------------------------------------------------------------------------
def test_hello_status_and_configure_rules(exp_path: Path) -> None:
    with start_rig(exp_path, clock="lockstep", rate_hz=40000) as rig:
        c = RawClient(rig.path)
        c.send(codec.GetHello())
        hello = c.expect(codec.Hello)
        # The brief's capabilities: 16-bit converters over +-10 V (= +-10,000,000 µV).
        assert hello.identity == "clampcore-simrig"
        assert (hello.adc_bits, hello.dac_bits) == (16, 16)
        assert (hello.adc_min_uV, hello.adc_max_uV) == (-10_000_000, 10_000_000)
        assert (hello.dac_min_uV, hello.dac_max_uV) == (-10_000_000, 10_000_000)
        assert (hello.n_inputs, hello.n_outputs) == (1, 1)
        assert hello.max_rate_hz == 40000  # --rate sets the highest rate accepted
        assert 0 < hello.watchdog_min_us <= hello.watchdog_max_us
        assert hello.version == codec.PROTOCOL_VERSION

        st = c.request(codec.GetStatus())
        assert st.state == codec.STATE_UNCONFIGURED and st.result == codec.RESULT_OK
        assert c.request(codec.Start()).result == codec.RESULT_BAD_STATE
        bad = [
            (codec.Configure(40001, 1, 100_000, (ZERO_PA_COUNTS,)), codec.RESULT_BAD_RATE),
            (codec.Configure(0, 1, 100_000, (ZERO_PA_COUNTS,)), codec.RESULT_BAD_RATE),
            (codec.Configure(1000, 2, 100_000, (ZERO_PA_COUNTS,)), codec.RESULT_BAD_INPUTS),
            (codec.Configure(1000, 1, hello.watchdog_min_us - 1, (1,)), codec.RESULT_BAD_WATCHDOG),
        ]
        for message, result in bad:
            st = c.request(message)
            assert (st.result, st.state) == (result, codec.STATE_UNCONFIGURED)
        # A CONFIGURE for two outputs does not fit this board: ignored (no reply) and counted.
        c.send(codec.Configure(1000, 1, 100_000, (1, 2)))
        st = c.request(codec.GetStatus())
        assert (st.rejected, st.unknown_messages) == (1 + len(bad), 1)

        c.start(rate_hz=1000, watchdog_us=1_000_000)
        sample = c.expect(codec.Sample)
        assert sample.counter == 0 and sample.cmd_seq == 0
        assert sample.status == codec.STATUS_FAULT_OUTPUT  # no command yet: fault value out
        assert sample.adc_counts == (adc_counts(E_L_MV),)  # the cell at rest
        st = c.request(codec.Configure(1000, 1, 100_000, (ZERO_PA_COUNTS,)))
        assert (st.result, st.state) == (codec.RESULT_BAD_STATE, codec.STATE_RUNNING)
        st = c.request(codec.Stop())
        assert (st.result, st.state) == (codec.RESULT_OK, codec.STATE_READY)
        c.close()


def test_lockstep_applies_each_command_from_the_next_sample(exp_path: Path, tmp_path: Path) -> None:
    log = tmp_path / "truth.log"
    n, rate_hz = 400, 10_000
    rng = np.random.default_rng(7)
    sent = rng.integers(30_000, 36_000, size=n)  # DAC counts: -87 .. +59 pA
    received = []
    with start_rig(exp_path, clock="lockstep", log=log) as rig:
        c = RawClient(rig.path)
        c.start(rate_hz, watchdog_us=1_000_000)
        for k in range(n):
            sample = c.expect(codec.Sample)
            received.append(sample)
            assert sample.counter == k  # lockstep: no sample is taken before the answer
            c.send(codec.Command(k, (int(sent[k]),)), seq=1000 + k)
        st = c.request(codec.Stop())
        c.close()
    assert (st.commands_applied, st.late_commands, st.missing_commands) == (n, 0, 0)
    # PROTOCOL.md's latency rule: sample k reports the command answering k - 1 in force.
    assert [s.cmd_seq for s in received[1:]] == list(range(1000, 1000 + n - 1))
    assert all(s.status == 0 for s in received[1:])

    truth = read_log(log)
    assert truth.events_of("start")[0]["clock"] == "lockstep"
    # The STOP may come before or after the rig took the sample the last command is for.
    assert truth.counter.size in (n, n + 1)
    assert np.array_equal(truth.counter, np.arange(truth.counter.size))
    rows = truth.records[:n]
    # The fault value (the 0-pA count) before any command, then each command one sample later.
    assert rows["dac_counts"][0] == ZERO_PA_COUNTS and rows["cmd_seq"][0] == NO_COMMAND
    assert rows["flags"][0] == LOG_FAULT_OUTPUT
    assert np.array_equal(rows["dac_counts"][1:], sent[:-1])
    assert np.array_equal(rows["cmd_answers"][1:], np.arange(n - 1))
    assert np.array_equal(rows["cmd_seq"][1:], 1000 + np.arange(n - 1))
    assert np.allclose(rows["i_applied_pA"][1:], dac_pA(sent[:-1]), rtol=0, atol=1e-9)
    assert rows["i_applied_pA"][0] == pytest.approx(dac_pA(ZERO_PA_COUNTS), abs=1e-9)
    # The membrane: exact RC solution under the applied currents (closed form above).
    v = _rc_solution(rows["i_applied_pA"], 1000.0 / rate_hz)
    assert np.allclose(rows["v_true_mV"], v, rtol=0, atol=1e-9)
    assert [s.adc_counts[0] for s in received] == [adc_counts(x) for x in v]
    assert np.array_equal(rows["adc_counts"], [s.adc_counts[0] for s in received])
    assert not np.any(rows["flags"][1:])


def test_lockstep_run_equals_offline_simulation() -> None:
    """The same experiment and seed through the rig and through clampcore.simulate agree."""
    from clampcore.calibration import (
        DEFAULT_BOARD_ADC,
        DEFAULT_BOARD_DAC,
        conversion_array,
        counts_to_mV,
        pA_to_counts,
    )
    from clampcore.offline import simulate
    from clampcore.program import build_program
    from clampcore.step import step

    path, seed, n = ROOT / "examples" / "imposed_lif.toml", 3, 4000  # 0.2 s at 20 kHz
    program = build_program(path, seed=seed)
    exp = program.experiment
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, exp.amplifier)
    arrays = program.arrays()
    v_mV, i_pA = np.zeros(n), np.zeros(n)
    with start_rig(path, clock="lockstep", seed=seed) as rig:
        c = RawClient(rig.path)
        c.start(int(exp.loop["rate_hz"]), 1_000_000, fault=pA_to_counts(conv, 0.0))
        for k in range(n):
            sample = c.expect(codec.Sample)
            assert sample.counter == k
            v_mV[k] = counts_to_mV(conv, sample.adc_counts[0])
            i_pA[k] = step(v_mV[k], k, arrays)
            c.send(codec.Command(k, (pA_to_counts(conv, i_pA[k]),)))
        c.request(codec.Stop())
        c.close()
    offline = simulate(path, n / exp.loop["rate_hz"], seed=seed)
    assert np.array_equal(v_mV, offline.v_mV)  # sample for sample, bit for bit
    assert np.array_equal(i_pA, offline.i_pA)
    assert offline.spikes["cell"].sum() > 0  # the comparison covers spikes and resets


def test_watchdog_on_the_wall_clock_trips_reports_and_recovers(
    exp_path: Path, tmp_path: Path
) -> None:
    log = tmp_path / "truth.log"
    rate_hz, watchdog_us = 1000, 200_000
    with start_rig(exp_path, clock="wall", log=log) as rig:
        c = RawClient(rig.path)
        c.start(rate_hz, watchdog_us)
        for _ in range(100):  # answer samples as they come, then fall silent
            sample = c.expect(codec.Sample)
            c.send(codec.Command(sample.counter, (33_000,)))
        report = c.expect(codec.Status)  # unsolicited: the watchdog's report
        assert report.result == codec.RESULT_REPORT and report.ack_seq == 0
        assert report.watchdog_trips >= 1
        assert report.status & codec.STATUS_WATCHDOG and report.status & codec.STATUS_FAULT_OUTPUT
        while not c.expect(codec.Sample).status & codec.STATUS_WATCHDOG:
            pass  # (a trip while this busy machine kept the client from answering is cleared)
        st = c.request(codec.GetStatus())
        assert st.watchdog_trips >= 1 and st.state == codec.STATE_RUNNING
        assert st.status & codec.STATUS_WATCHDOG
        # One command: it is applied and the watchdog bit clears.
        resume_seq = c.send(codec.Command(c.expect(codec.Sample).counter, (34_000,)))
        while (sample := c.expect(codec.Sample)).cmd_seq != resume_seq:
            assert sample.status & codec.STATUS_WATCHDOG
        assert not sample.status & (codec.STATUS_WATCHDOG | codec.STATUS_FAULT_OUTPUT)
        st = c.request(codec.Stop())
        c.close()

    truth = read_log(log)
    trips, clears = truth.events_of("watchdog_trip"), truth.events_of("watchdog_clear")
    assert len(trips) == st.watchdog_trips >= 1
    assert clears[-1]["seq"] == resume_seq
    rows = truth.records
    assert np.array_equal(rows["counter"], np.arange(rows.size))
    assert not np.any(rows["flags"][1 : trips[0]["counter"]] & LOG_WATCHDOG)  # commands before
    assert len(clears) == len(trips)
    for trip, clear in zip(trips, clears, strict=True):
        k, k_clear = trip["counter"], clear["counter"]
        assert k < k_clear
        # From the trip until the command that cleared it: the 0-pA fault value.
        held = rows[k:k_clear]
        assert np.all(held["dac_counts"] == ZERO_PA_COUNTS)
        assert np.all(held["flags"] & LOG_WATCHDOG)
        assert np.all(held["cmd_seq"] == NO_COMMAND)
        assert np.allclose(held["i_applied_pA"], dac_pA(ZERO_PA_COUNTS), rtol=0, atol=1e-9)
        assert not rows["flags"][k_clear] & LOG_WATCHDOG
        # Timeout plus at most one sample, on the board's own clock: the sample before the
        # trip was taken before the timeout ran out, the trip sample at or after it.
        limit_us = trip["last_rx_clock_us"] + watchdog_us
        assert rows["clock_us"][k - 1] <= limit_us <= rows["clock_us"][k] == trip["clock_us"]
    assert rows["cmd_seq"][clears[-1]["counter"]] == resume_seq


CLIENT_SCRIPT = textwrap.dedent(
    """
    import os, sys, tty
    from clampcore.firmware_protocol import codec
    codec.decode_message(codec.encode_message(codec.Command(0, (1,)), 0))  # load the codec now
    fd = os.open(sys.argv[1], os.O_RDWR | os.O_NOCTTY)
    tty.setraw(fd)
    def send(m, seq):
        os.write(fd, codec.encode_message(m, seq))
    send(codec.Configure(2000, 1, int(sys.argv[2]), (32768,)), 1)
    send(codec.Start(), 2)
    buf, seq = b"", 10
    while True:
        buf += os.read(fd, 4096)
        while b"\\0" in buf:
            wire, buf = buf.split(b"\\0", 1)
            if not wire:
                continue
            _, m = codec.decode_message(wire)
            if isinstance(m, codec.Sample):
                send(codec.Command(m.counter, (33000,)), seq)
                seq += 1
                if m.counter == 300:
                    print("running", flush=True)
    """
)


@pytest.mark.parametrize("clock", ["wall", "lockstep"])
def test_sigkill_of_the_host_hands_over_to_the_watchdog(
    clock: str, exp_path: Path, tmp_path: Path
) -> None:
    log = tmp_path / "truth.log"
    watchdog_us = 200_000
    # Lockstep: patience 0, so that the watchdog timeout alone decides when the host is gone.
    with start_rig(exp_path, clock=clock, log=log, lockstep_patience_s=0) as rig:
        host = subprocess.Popen(
            [sys.executable, "-c", CLIENT_SCRIPT, rig.path, str(watchdog_us)],
            stdout=subprocess.PIPE,
            cwd=ROOT,
        )
        try:
            assert host.stdout is not None
            assert host.stdout.readline() == b"running\n"
        finally:
            host.kill()  # SIGKILL mid-run
            host.wait()
        c = RawClient(rig.path)
        deadline = time.monotonic() + 30
        # Everything the host sent was read before this request: the bit is the final state.
        while not (st := c.request(codec.GetStatus())).status & codec.STATUS_WATCHDOG:
            assert time.monotonic() < deadline, "the watchdog did not trip"
            time.sleep(0.05)
        assert st.state == codec.STATE_RUNNING and st.watchdog_trips >= 1
        st = c.request(codec.Stop())
        c.close()
    truth = read_log(log)
    trips = truth.events_of("watchdog_trip")
    assert len(trips) == st.watchdog_trips
    rows = truth.records
    k = trips[-1]["counter"]
    assert k > 300
    # From the trip on the fault value (0 pA) is out, until the STOP.
    after = rows[k:]
    assert after.size > 1
    assert np.all(after["flags"] & LOG_WATCHDOG)
    assert np.all(after["dac_counts"] == ZERO_PA_COUNTS)
    assert np.all(after["cmd_seq"] == NO_COMMAND)
    commanded = np.flatnonzero(rows["cmd_seq"] != NO_COMMAND)
    if clock == "lockstep":
        # The sample after the last one answered already has the fault output, and the rig
        # samples on its own from then on.
        assert commanded[-1] == k - 1
    else:
        # Timeout plus at most one sample on the board's clock (as in the test above).
        limit_us = trips[-1]["last_rx_clock_us"] + watchdog_us
        assert rows["clock_us"][k - 1] <= limit_us <= rows["clock_us"][k]


def test_corrupted_and_dropped_commands_are_counted_and_never_applied(
    exp_path: Path, tmp_path: Path
) -> None:
    log = tmp_path / "truth.log"
    n = 2000
    with start_rig(
        exp_path, clock="lockstep", log=log, seed=11, corrupt_rx=0.05, drop_rx=0.05
    ) as rig:
        c = RawClient(rig.path)
        c.start(10_000, 1_000_000)
        rx_error_after = set()
        for k in range(n):
            sample = c.expect(codec.Sample)
            assert sample.counter == k  # the run goes on, one sample after another
            if sample.status & codec.STATUS_RX_ERROR:
                rx_error_after.add(k)
            c.send(codec.Command(k, (30_000 + k,)), seq=k)  # seq = answered counter
        st = c.request(codec.Stop())
        c.close()
    truth = read_log(log)
    corrupted = {e["seq"] for e in truth.events_of("rx_corrupted")}
    dropped = {e["seq"] for e in truth.events_of("rx_dropped")}
    assert corrupted and dropped and not corrupted & dropped
    applied = set(truth.cmd_seq[truth.cmd_seq != NO_COMMAND].tolist())
    assert not applied & (corrupted | dropped)  # never applied
    lost = corrupted | dropped
    # Every other command was applied (the last one may be applied after the last sample).
    assert applied | lost >= set(range(max(applied) + 1))
    assert st.commands_applied == n - len(lost)
    assert st.bad_frames == len(corrupted)  # the CRC caught every corrupted frame
    assert st.rejected == 0 and st.unknown_messages == 0
    last_applied = max(set(range(n)) - lost)
    assert st.missing_commands == len({s for s in lost if s < last_applied})
    # The sample after a corrupted command reports the receive error.
    assert {s + 1 for s in corrupted if s + 1 < n} <= rx_error_after
    # Applied current: always the newest command that arrived intact.
    rows = truth.records
    answers = rows["cmd_answers"][1:]
    assert np.array_equal(rows["dac_counts"][1:][answers >= 0], 30_000 + answers[answers >= 0])


def test_corrupted_and_dropped_samples(exp_path: Path, tmp_path: Path) -> None:
    log = tmp_path / "truth.log"
    seen = {}
    with start_rig(
        exp_path, clock="lockstep", log=log, seed=5, corrupt_tx=0.05, drop_tx=0.05
    ) as rig:
        c = RawClient(rig.path)
        c.start(10_000, 1_000_000)
        while len(seen) < 1000:
            sample = c.expect(codec.Sample)
            seen[sample.counter] = sample.adc_counts[0]
            c.send(codec.Command(sample.counter, (33_000,)))
        seq = c.send(codec.Stop())
        while True:  # everything sent before the STOP's reply
            _, message = c.recv()
            if isinstance(message, codec.Sample):
                seen[message.counter] = message.adc_counts[0]
            elif isinstance(message, codec.Status) and message.ack_seq == seq:
                break
        c.close()
    rows = read_log(log).records
    lost = (rows["flags"] & (LOG_TX_DROPPED | LOG_TX_CORRUPTED)) != 0
    assert np.count_nonzero(rows["flags"] & LOG_TX_DROPPED) > 0
    # Each corrupted sample failed the client's own CRC check; each dropped one never came.
    assert c.bad_frames == np.count_nonzero(rows["flags"] & LOG_TX_CORRUPTED) > 0
    assert set(seen) == set(rows["counter"][~lost].tolist())
    assert all(
        seen[k] == a for k, a in zip(rows["counter"], rows["adc_counts"], strict=True) if k in seen
    )


def test_unknown_messages_and_bad_frames_are_counted_and_ignored(exp_path: Path) -> None:
    with start_rig(exp_path, clock="lockstep") as rig:
        c = RawClient(rig.path)
        c.start(10_000, 1_000_000)
        sample = c.expect(codec.Sample)
        body = np.zeros(8, dtype=np.uint8)
        out = np.zeros(codec.MAX_WIRE, dtype=np.uint8)
        unknown_type = out[: codec.encode_frame(0x55, 77, body, 0, out)].tobytes()
        long_status = out[: codec.encode_frame(codec.MSG_GET_STATUS, 78, body, 1, out)].tobytes()
        # A COMMAND with its CRC's last byte changed, framed again with the cobs package.
        good = cobs.decode(codec.encode_message(codec.Command(0, (40_000,)), 79)[:-1])
        bad_crc = cobs.encode(good[:-1] + bytes([good[-1] ^ 0x5A])) + b"\0"
        garbage = b"\x07\x01\x02" + b"\0"  # a COBS block running past its delimiter
        c.send(codec.Command(sample.counter, (33_000,)))
        os.write(c.fd, unknown_type + long_status + bad_crc + garbage)
        for _ in range(50):
            sample = c.expect(codec.Sample)
            c.send(codec.Command(sample.counter, (33_000,)))
        st = c.request(codec.GetStatus())
        assert st.unknown_messages == 2 and st.bad_frames == 2
        assert st.state == codec.STATE_RUNNING and st.commands_applied >= 50
        assert st.rejected == 0  # the bad COMMAND was never taken for one
        c.request(codec.Stop())
        c.close()


def test_frames_a_board_must_ignore_from_the_shared_vectors(exp_path: Path) -> None:
    """firmware_protocol/vectors/protocol_v2.json's ``board_ignores``: counted, never acted on."""
    vectors = json.loads((ROOT / "firmware_protocol" / "vectors" / "protocol_v2.json").read_text())
    frames = [bytes.fromhex(v["wire"]) for v in vectors["board_ignores"]]
    assert frames
    with start_rig(exp_path, clock="lockstep") as rig:
        c = RawClient(rig.path)
        c.start(10_000, 1_000_000)
        k = c.expect(codec.Sample).counter
        for wire in frames:  # one at a time: each must change nothing
            os.write(c.fd, wire)
            st = c.request(codec.GetStatus())
            assert st.state == codec.STATE_RUNNING and st.rate_hz == 10_000
        assert st.unknown_messages == len(frames)
        assert (st.rejected, st.bad_frames, st.commands_applied) == (0, 0, 0)
        c.send(codec.Command(k, (33_000,)))  # the run goes on
        sample = c.expect(codec.Sample)
        assert sample.counter == k + 1 and sample.status & codec.STATUS_RX_ERROR
        c.request(codec.Stop())
        c.close()


def test_stall_then_catch_up_on_the_wall_clock(exp_path: Path, tmp_path: Path) -> None:
    log = tmp_path / "truth.log"
    stall_ms, stall_at = 60, 100
    with start_rig(exp_path, clock="wall", log=log, stall_ms=stall_ms, stall_at=stall_at) as rig:
        c = RawClient(rig.path)
        c.start(1000, 10_000_000)
        counters = []
        while len(counters) < 300:
            sample = c.expect(codec.Sample)
            counters.append(sample.counter)
            c.send(codec.Command(sample.counter, (33_000,)))
        c.request(codec.Stop())
        c.close()
    assert counters == list(range(300))  # late samples are taken, none skipped
    truth = read_log(log)
    (stall,) = truth.events_of("stall")
    assert stall["counter"] == stall_at and stall["ms"] == stall_ms
    rows = truth.records
    # The rig was frozen for stall_ms: the sample due then was taken at least that late.
    assert rows["lag_us"][stall_at] >= stall_ms * 1000
    assert rows["flags"][stall_at] & LOG_BEHIND
    assert np.count_nonzero(rows["flags"] & LOG_BEHIND) == truth.events_of("stop")[0]["behind"]


def test_log_survives_sigkill_of_the_rig(exp_path: Path, tmp_path: Path) -> None:
    log = tmp_path / "truth.log"
    rig = start_rig(exp_path, clock="lockstep", log=log)
    try:
        c = RawClient(rig.path)
        c.start(10_000, 10_000_000)
        for k in range(1000):
            assert c.expect(codec.Sample).counter == k
            c.send(codec.Command(k, (33_000,)))
        time.sleep(1.0)  # twice the log's 0.5 s flush interval
    finally:
        rig.kill()
    c.close()
    truth = read_log(log)
    assert truth.counter.size >= 1000
    assert np.array_equal(truth.counter, np.arange(truth.counter.size))
    assert truth.events_of("start") and not truth.events_of("stop")
    # A file cut in the middle of a record keeps every whole record before the cut.
    data = log.read_bytes()
    cut = tmp_path / "cut.log"
    cut.write_bytes(data[: len(data) - LOG_DTYPE.itemsize // 2])
    assert np.array_equal(read_log(cut).counter, truth.counter[:-1])


def test_stdin_closing_stops_the_rig(exp_path: Path) -> None:
    rig = start_rig(exp_path)
    assert rig.proc.stdin is not None
    rig.proc.stdin.close()
    assert rig.proc.wait(timeout=30) == 0


def test_bad_options_give_a_clear_error(tmp_path: Path) -> None:
    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [sys.executable, "-m", "clampcore.simulated_rig", *args],
            capture_output=True,
            text=True,
            cwd=ROOT,
            timeout=120,
            stdin=subprocess.DEVNULL,
        )

    missing = run(str(tmp_path / "missing.toml"))
    assert missing.returncode == 2 and "no such file" in missing.stderr
    bad = tmp_path / "bad.toml"
    bad.write_text("[cell]\nleak_nS = -1\n")
    result = run(str(bad))
    assert result.returncode == 2 and "leak_nS" in result.stderr
    result = run("--corrupt-rx", "1.5")
    assert result.returncode == 2 and "between 0 and 1" in result.stderr
    result = run("--drop-tx", "0.6", "--corrupt-tx", "0.6")
    assert result.returncode == 2 and "more than 1" in result.stderr
    result = run("--realtime", "100")
    assert result.returncode == 2 and "0 .. 99" in result.stderr
    result = run("--wake-us", "-5")
    assert result.returncode == 2 and "--wake-us" in result.stderr
    assert not any(line.startswith("Traceback") for line in result.stderr.splitlines())


def test_without_a_c_compiler_the_rig_says_so_in_one_line(tmp_path: Path) -> None:
    """The rig runs the C board core, built on first use: no compiler, a clear refusal."""
    env = {k: v for k, v in os.environ.items() if k != "CC"}
    env["PATH"] = str(tmp_path)  # an empty folder: no cc, gcc or clang to find
    result = subprocess.run(
        [sys.executable, "-m", "clampcore.simulated_rig"],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=120,
        stdin=subprocess.DEVNULL,
        env=env,
    )
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "C compiler" in lines[0] and "gcc" in lines[0], result.stderr


def test_clampcore_rig_subcommand_has_the_same_options() -> None:
    result = subprocess.run(
        [sys.executable, "-m", "clampcore", "rig", "--help"],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=120,
    )
    assert result.returncode == 0
    options = ("--rate", "--clock", "--log", "--seed", "--corrupt-rx", "--stall-at", "--wake-us")
    for option in (*options, "--realtime"):
        assert option in result.stdout


def test_compiled_and_plain_python_rigs_agree(exp_path: Path, tmp_path: Path) -> None:
    """The rig's kernels run unchanged under NUMBA_DISABLE_JIT=1 and give the same samples."""
    runs = []
    for disable in ("0", "1"):
        env = dict(os.environ, NUMBA_DISABLE_JIT=disable)
        log = tmp_path / f"truth{disable}.log"
        with start_rig(exp_path, clock="lockstep", log=log, env=env) as rig:
            c = RawClient(rig.path)
            c.start(10_000, 10_000_000)
            adc = []
            for k in range(200):
                adc.append(c.expect(codec.Sample, timeout_s=60).adc_counts[0])
                c.send(codec.Command(k, (30_000 + 50 * k,)))
            c.request(codec.Stop(), timeout_s=60)
            c.close()
        truth = read_log(log)
        assert truth.header["compiled"] is (disable == "0")  # the JIT really was off
        runs.append((adc, truth.records))
    assert runs[0][0] == runs[1][0]
    for field in ("v_true_mV", "dac_counts", "adc_counts"):  # the 200 samples both took
        assert np.array_equal(runs[0][1][field][:200], runs[1][1][field][:200])


def test_sigterm_stops_the_rig_and_closes_the_log(exp_path: Path, tmp_path: Path) -> None:
    log = tmp_path / "truth.log"
    rig = start_rig(exp_path, clock="lockstep", log=log)
    c = RawClient(rig.path)
    c.start(10_000, 10_000_000)
    for k in range(10):
        c.expect(codec.Sample)
        c.send(codec.Command(k, (33_000,)))
    rig.proc.send_signal(signal.SIGTERM)
    assert rig.proc.wait(timeout=30) == 0
    c.close()
    (stop,) = read_log(log).events_of("stop")
    assert stop["why"] == "rig shut down" and stop["samples"] >= 10


def test_the_serial_bridge_on_the_wall_clock_follows_the_sample_time_model() -> None:
    """The rig's wall-clock serial bridge (``simulated_rig.board._link_put``) delivers each
    batch of bytes to the host when the sample-time model of the same link does
    (``clampcore.links._bridge_up``: full 62-byte packets, the 16 ms latency timer, 921,600
    baud, 1 ms USB frames), for batches handed over at 20 kHz and, slower, at 500 Hz.
    Times are given to the kernels, not read from a clock: behaviour, not timing."""
    from clampcore.simulated_rig.board import Q_TAIL, _link_flush, _link_put, new_link_shape

    from clampcore.links import LINKS, _bridge_up

    link = LINKS["bridge"]
    t0_ns = 5_000_000_000  # any board time; the models count from the first batch
    cases = (
        (50.0, [22] * 40),  # 20 kHz: the UART is the bottleneck, full packets
        (2000.0, [22, 27, 22, 40, 22, 22, 90, 22]),  # packets, the timer at the end
        (2000.0, [5] * 30),  # 62 bytes take 26 ms to gather: the timer sends (16 ms)
    )
    for period_us, sizes in cases:
        ln = new_link_shape("bridge", seed=0)
        ready_us = np.arange(len(sizes)) * period_us
        for t_us, n in zip(ready_us, sizes, strict=True):
            _link_put(ln, ln.obuf, ln.oends, ln.oq, np.ones(n, dtype=np.uint8), n,
                      t0_ns + round(t_us * 1000), True)  # fmt: skip
        r, w = os.pipe()
        try:
            _link_flush(w, ln, t0_ns + 10**10)  # long after: the timer sends the rest
        finally:
            os.close(w)
            os.close(r)
        assert ln.oq[Q_TAIL] == len(sizes)
        got_us = (ln.oends[: len(sizes), 1] - t0_ns) / 1000.0
        expected_us = _bridge_up(link, ready_us, np.array(sizes, dtype=float))
        assert np.allclose(got_us, expected_us, rtol=0, atol=1.0), (got_us, expected_us)
        assert len(set(got_us.tolist())) < len(sizes)  # batches went out together in packets
