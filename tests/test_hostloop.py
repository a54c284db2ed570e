"""The host's compiled per-sample path, fed with frames built by the codec (no serial port).

Checks: one command per chunk answering the newest sample; the command current
equals ``step`` of the decoded membrane potential (the same computation the
offline simulation uses); latency from the "command in force" field; missing
counters and bad frames counted; live changes applied at a sample boundary and
logged with that sample's index; the zero-current control.
"""

from __future__ import annotations

import numpy as np
import pytest
from clampcore.firmware_protocol import codec

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_mV,
    pA_to_counts,
)
from clampcore.hostloop import new_link, process_rx
from clampcore.program import MAIL_TARGETS, build_program
from clampcore.shared import (
    COL_FLAGS,
    COL_I,
    COL_LATENCY,
    COL_V,
    CTRL_WRITTEN,
    CTRL_ZERO,
    ST_BAD_FRAMES,
    ST_MISSING,
    ST_UNANSWERED,
    RingLayout,
    SharedRun,
)

EXPERIMENT = {
    "loop": {"rate_hz": 10000.0, "max_current_pA": 1000.0},
    "element": [{"kind": "leak", "name": "extra", "g_nS": 4.0, "e_mV": -60.0}],
}


@pytest.fixture()
def rig():
    program = build_program(EXPERIMENT)
    layout = RingLayout.for_program(program)
    shared = SharedRun.create(layout)
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, program.experiment.amplifier)
    link = new_link(conv)
    yield program, shared, conv, link
    shared.close()


def _feed(program, shared, conv, link, wire: bytes) -> bytes:
    link.io.rx[: len(wire)] = np.frombuffer(wire, dtype=np.uint8)
    n = process_rx(len(wire), link, program.arrays(), shared.loop(np.zeros(0, dtype=np.int64)))
    return link.io.tx[:n].tobytes()


def _sample(counter: int, adc: int, cmd_seq: int = 0, status: int = 0) -> bytes:
    return codec.encode_message(codec.Sample(counter, counter * 100, cmd_seq, status, (adc,)), 7)


def test_command_answers_newest_sample_with_the_leak_current(rig):
    program, shared, conv, link = rig
    out = _feed(program, shared, conv, link, _sample(0, 30000) + _sample(1, 31000))
    _, cmd = codec.decode_message(out)
    assert isinstance(cmd, codec.Command)
    assert cmd.answers_counter == 1  # the newest sample of the chunk
    assert shared.stats[ST_UNANSWERED] == 1  # sample 0 was superseded
    v = counts_to_mV(conv, 31000)
    expected_pA = -4.0 * (v - (-60.0))  # Ohm's law for the virtual leak, I = -g (V - E)
    assert shared.ring[1, COL_V] == pytest.approx(v)
    assert shared.ring[1, COL_I] == pytest.approx(expected_pA)
    assert cmd.dac_counts[0] == pA_to_counts(conv, expected_pA)
    assert shared.ctrl[CTRL_WRITTEN] == 2


def test_latency_missing_and_bad_frames(rig):
    program, shared, conv, link = rig
    first = _feed(program, shared, conv, link, _sample(10, 32768))
    seq, _ = codec.decode_message(first)
    # The board reports that command as in force at sample 11: latency 1 sample.
    _feed(program, shared, conv, link, _sample(11, 32768, cmd_seq=seq))
    assert shared.ring[1, COL_LATENCY] == 1
    # Counter jumps 11 -> 14: two samples never reached the host.
    _feed(program, shared, conv, link, _sample(14, 32768, cmd_seq=seq))
    assert shared.stats[ST_MISSING] == 2
    assert shared.ring[2, COL_LATENCY] == 4  # still the command that answered sample 10
    broken = bytearray(_sample(15, 32768))
    broken[3] ^= 0xFF  # a flipped byte fails the CRC
    assert _feed(program, shared, conv, link, bytes(broken)) == b""
    assert shared.stats[ST_BAD_FRAMES] == 1
    assert shared.ctrl[CTRL_WRITTEN] == 3  # the broken sample was never used


def test_live_change_applies_at_the_next_sample_and_is_logged(rig):
    program, shared, conv, link = rig
    _feed(program, shared, conv, link, _sample(0, 30000))
    slot = program.param_slot("extra", "g_nS")
    shared.post_change(MAIL_TARGETS[slot.array], slot.row, slot.col, 8.0)
    _feed(program, shared, conv, link, _sample(1, 30000))
    v = counts_to_mV(conv, 30000)
    assert shared.ring[0, COL_I] == pytest.approx(-4.0 * (v + 60.0))
    assert shared.ring[1, COL_I] == pytest.approx(-8.0 * (v + 60.0))
    (change,) = shared.applied_changes()
    assert change["sample"] == 1 and change["value"] == 8.0


def test_zero_current_control_commands_zero(rig):
    program, shared, conv, link = rig
    shared.ctrl[CTRL_ZERO] = 1
    out = _feed(program, shared, conv, link, _sample(0, 30000))
    _, cmd = codec.decode_message(out)
    assert cmd.dac_counts[0] == pA_to_counts(conv, 0.0)
    assert shared.ring[0, COL_I] == 0.0
    assert int(shared.ring[0, COL_FLAGS]) & 8  # FLAG_ZEROED


def _scenario_rows() -> list[list[float]]:
    """Ring rows after a fixed scenario (used compiled and as plain Python)."""
    program = build_program(EXPERIMENT)
    shared = SharedRun.create(RingLayout.for_program(program))
    try:
        conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, program.experiment.amplifier)
        link = new_link(conv)
        for k in range(20):
            _feed(program, shared, conv, link, _sample(k, 30000 + 37 * k, cmd_seq=k))
        return shared.ring[:20, :5].tolist()
    finally:
        shared.close()


def test_compiled_equals_plain_python():
    """The same host path under NUMBA_DISABLE_JIT=1 (a child process) gives the same rows."""
    import json
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    code = (
        "import json, numba, sys; sys.path.insert(0, 'tests'); "
        "assert numba.config.DISABLE_JIT; "
        "from test_hostloop import _scenario_rows; print(json.dumps(_scenario_rows()))"
    )
    env = dict(os.environ, NUMBA_DISABLE_JIT="1", PYTHONPATH=str(root))
    out = subprocess.run(
        [sys.executable, "-c", code], cwd=root, env=env, capture_output=True, text=True, check=True
    )
    assert json.loads(out.stdout) == _scenario_rows()
