"""The pseudo-terminal board (firmware_protocol/c/ports/pty_board.c) with a raw client.

Handshake, configure, start, a few hundred samples answered by commands, then the
commands stop and the watchdog trip is reported.  The cell behind the converters is
checked against the passive-membrane steady state V = E_L + I/g_L (Ohm's law for
the leak; any physiology text) through the count <-> volt <-> mV/pA rules of
PROTOCOL.md §6, implemented here from the text.  No timing is asserted.
"""

from __future__ import annotations

import math
import os
import select
import termios
import tty
from pathlib import Path

import numpy as np
import pytest
from clampcore.firmware_protocol import codec
from clampcore.firmware_protocol.cboard import (
    PtyBoard,
    build_pty_board,
    start_pty_board,
)

LIVENESS_S = 5.0  # give up waiting for a frame after this long (a hang, not a timing check)

# A non-default amplifier scaling, so that the options are seen to be used.
VM_MV_PER_V = 50.0
VM_OFFSET_MV = -10.0
CMD_PA_PER_V = 2000.0
CMD_OFFSET_PA = 20.0
OPTIONS = (
    "--identity", "rig-under-test",
    "--vm-mV-per-V", str(VM_MV_PER_V),
    "--vm-offset-mV", str(VM_OFFSET_MV),
    "--cmd-pA-per-V", str(CMD_PA_PER_V),
    "--cmd-offset-pA", str(CMD_OFFSET_PA),
)  # fmt: skip
C_PF, G_NS, E_MV = 100.0, 5.0, -70.0  # the board's default cell


def counts_to_volts(c: int, bits: int, lo_uV: int, hi_uV: int) -> float:
    """PROTOCOL.md §6: v = min + c*(max - min)/(2^N - 1)."""
    return (lo_uV + c * (hi_uV - lo_uV) / (2**bits - 1)) * 1e-6


def volts_to_counts(v: float, bits: int, lo_uV: int, hi_uV: int) -> int:
    """PROTOCOL.md §6: c = floor(x + 1/2) of x = (v - min)/(max - min)*(2^N - 1), clipped."""
    x = (v * 1e6 - lo_uV) / (hi_uV - lo_uV) * (2**bits - 1)
    return int(min(max(math.floor(x + 0.5), 0), 2**bits - 1))


class RawClient:
    """Just enough of a host: raw pty, frames in and out, no timing."""

    def __init__(self, path: str) -> None:
        self.fd = os.open(path, os.O_RDWR | os.O_NOCTTY)
        tty.setraw(self.fd)
        termios.tcflush(self.fd, termios.TCIOFLUSH)
        self.dstate, self.dbuf = codec.new_deframer()
        self.frame = np.zeros(codec.MAX_PAYLOAD, dtype=np.uint8)
        self.chunk = np.zeros(4096, dtype=np.uint8)
        self.n = 0
        self.seq = 0
        self.answered: dict[int, int] = {}

    def send(self, message: codec.Message) -> int:
        self.seq = (self.seq + 1) & 0xFFFF
        if isinstance(message, codec.Command):
            self.answered[self.seq] = message.answers_counter
        os.write(self.fd, codec.encode_message(message, self.seq))
        return self.seq

    def recv(self) -> codec.Message:
        while True:
            m = codec.deframe_next(self.dstate, self.dbuf, self.chunk, self.n, self.frame)
            if m > 0:
                return codec.parse_payload(self.frame[:m])[1]
            ready, _, _ = select.select([self.fd], [], [], LIVENESS_S)
            assert ready, "the board went silent"
            data = os.read(self.fd, self.chunk.shape[0])
            self.n = len(data)
            self.chunk[: self.n] = np.frombuffer(data, dtype=np.uint8)

    def recv_a(self, cls: type) -> codec.Message:
        while not isinstance(m := self.recv(), cls):
            pass
        return m

    def close(self) -> None:
        os.close(self.fd)


@pytest.fixture(scope="module")
def binary(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_pty_board(tmp_path_factory.mktemp("pty"))


def test_pty_board_serves_a_run_and_trips_its_watchdog(binary: Path) -> None:
    with start_pty_board(binary, *OPTIONS) as board:
        client = RawClient(board.slave_path)
        try:
            _run(client)
        finally:
            client.close()
        assert board.proc.stdin is not None
        board.proc.stdin.close()  # closing stdin ends the board
        assert board.proc.wait(LIVENESS_S) == 0


def _run(client: RawClient) -> None:
    client.send(codec.GetHello())
    hello = client.recv_a(codec.Hello)
    assert hello.identity == "rig-under-test" and hello.version == codec.PROTOCOL_VERSION
    assert (hello.adc_bits, hello.dac_bits, hello.n_inputs, hello.n_outputs) == (16, 16, 1, 1)
    adc = (hello.adc_bits, hello.adc_min_uV, hello.adc_max_uV)
    dac = (hello.dac_bits, hello.dac_min_uV, hello.dac_max_uV)

    def v_mV(count: int) -> float:  # §6: v_mV = vm_mV_per_V * volts + vm_offset_mV
        return VM_MV_PER_V * counts_to_volts(count, *adc) + VM_OFFSET_MV

    def dac_count(i_pA: float) -> int:  # §6: volts = (i_pA - cmd_offset_pA) / cmd_pA_per_V
        return volts_to_counts((i_pA - CMD_OFFSET_PA) / CMD_PA_PER_V, *dac)

    def i_pA(count: int) -> float:
        return CMD_PA_PER_V * counts_to_volts(count, *dac) + CMD_OFFSET_PA

    fault = dac_count(0.0)
    # A generous watchdog (0.5 s): a trip must mean the host fell silent on purpose, not
    # that the shared machine stalled this test for a few tens of milliseconds.
    seq = client.send(codec.Configure(1_000, 1, 500_000, (fault,)))
    reply = client.recv_a(codec.Status)
    assert (reply.ack_seq, reply.result, reply.state) == (seq, codec.RESULT_OK, codec.STATE_READY)
    client.send(codec.Start())
    assert client.recv_a(codec.Status).state == codec.STATE_RUNNING

    step = dac_count(100.0)
    samples: list[codec.Sample] = []
    while len(samples) < 300:
        s = client.recv_a(codec.Sample)
        samples.append(s)
        client.send(codec.Command(s.counter, (step,)))
    counters = [s.counter for s in samples]
    assert counters == list(range(300))  # no sample lost on the way
    assert samples[0].status & codec.STATUS_FAULT_OUTPUT
    assert abs(v_mV(samples[0].adc_counts[0]) - E_MV) < 0.1  # at rest before any current
    with_command = [s for s in samples if not s.status & codec.STATUS_FAULT_OUTPUT]
    assert len(with_command) > 250
    assert all(s.counter - client.answered[s.cmd_seq] >= 1 for s in with_command)  # causal
    # 300 ms of I = 100 pA is 15 membrane time constants (tau = C/g_L = 20 ms):
    # V = E_L + I/g_L (passive membrane steady state), with I as the DAC really put it.
    v_inf_mV = E_MV + i_pA(step) / G_NS
    assert abs(v_inf_mV - (-50.0)) < 0.1  # one DAC count is 0.61 pA here, 0.12 mV at 5 nS
    assert abs(v_mV(samples[-1].adc_counts[0]) - v_inf_mV) < 0.1

    # the host falls silent: the watchdog must trip and say so
    report = client.recv_a(codec.Status)
    assert report.result == codec.RESULT_REPORT and report.watchdog_trips == 1
    assert report.status & codec.STATUS_WATCHDOG
    after = [client.recv_a(codec.Sample) for _ in range(200)]
    assert all(
        s.status & codec.STATUS_WATCHDOG and s.status & codec.STATUS_FAULT_OUTPUT for s in after
    )
    assert abs(v_mV(after[-1].adc_counts[0]) - E_MV) < 0.1  # 0 pA again: back to rest

    seq = client.send(codec.Stop())
    while (r := client.recv_a(codec.Status)).ack_seq != seq:
        pass
    assert r.state == codec.STATE_READY and r.watchdog_trips == 1
    assert r.commands_applied >= 250 and r.bad_frames == 0 and r.unknown_messages == 0


def test_pty_board_stops_on_sigterm(binary: Path) -> None:
    board = start_pty_board(binary)
    assert Path(board.slave_path).exists()
    assert board.stop() == 0


@pytest.mark.parametrize("options", [("--inputs", "17"), ("--adc-bits", "1.5"), ("--nope", "1")])
def test_pty_board_refuses_bad_options(binary: Path, options: tuple[str, ...]) -> None:
    with pytest.raises(RuntimeError, match="slave path"):
        start_pty_board(binary, *options)


def test_ptyboard_object_is_reusable_for_the_lead(binary: Path) -> None:
    board = start_pty_board(binary, "--inputs", "2", "--outputs", "2")
    assert isinstance(board, PtyBoard)
    client = RawClient(board.slave_path)
    try:
        client.send(codec.GetHello())
        hello = client.recv_a(codec.Hello)
        assert (hello.n_inputs, hello.n_outputs) == (2, 2)
    finally:
        client.close()
        board.stop()
