"""The portable C board core (firmware_protocol/c/): build rules, shared vectors, board rules.

The core is compiled here with the strict flags into a temporary directory and
driven through ctypes (firmware_protocol/cbinding.py) on the in-memory port.  Outside
references: the shared vector file (built from struct, binascii and the `cobs`
package), the `cobs` package and binascii.crc_hqx directly, and the rules written in
PROTOCOL.md, quoted by section beside each check.
"""

from __future__ import annotations

import binascii
import dataclasses
import json
import shutil
import subprocess
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from clampcore.firmware_protocol import codec
from clampcore.firmware_protocol.cbinding import CoreLibrary, MemoryRig, fnv1a_digest
from clampcore.firmware_protocol.cboard import (
    BUILD_VARIANTS,
    C_SOURCE_DIR,
    LAW_FLAGS,
    STRICT_FLAGS,
    build_core_library,
    find_c_compiler,
)
from clampcore.firmware_protocol.fuzz import reference_deframe
from cobs import cobs
from hypothesis import given, settings
from hypothesis import strategies as st

VECTORS = json.loads((C_SOURCE_DIR.parent / "vectors" / "protocol_v2.json").read_text())
_SETTINGS = settings(derandomize=True, deadline=None, max_examples=150)
_REASONS = {
    "cobs": codec.FRAME_ERR_COBS,
    "short": codec.FRAME_ERR_SHORT,
    "long": codec.FRAME_ERR_LONG,
    "crc": codec.FRAME_ERR_CRC,
}

# A 12-bit, 2-input, 1-output board running at up to 20 kHz, watchdog 1 ms .. 1 s.
BOARD = codec.Hello(
    "test-board", 12, 12, 2, 1, -10_000_000, 10_000_000, -10_000_000, 10_000_000,
    20_000, 1_000, 1_000_000,
)  # fmt: skip
FAULT = 2048  # the count the host would compute for 0 pA (PROTOCOL.md §6)


@pytest.fixture(scope="module", params=["default", "crc-bitwise"])
def core(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> CoreLibrary:
    """The core as built by default and with the bit-by-bit CRC (ccb.h build options): every
    test below runs against both."""
    defines = BUILD_VARIANTS[request.param]
    return CoreLibrary(build_core_library(tmp_path_factory.mktemp("ccb"), defines))


def _frames(rig: MemoryRig) -> list[tuple[int, codec.Message]]:
    """Everything the board sent, decoded with the reference deframer (cobs + binascii)."""
    data = rig.take_tx()
    payloads, bad = reference_deframe(data)
    assert bad == 0 and (data.endswith(b"\x00") or not data)
    return [codec.parse_payload(p) for p in payloads]


def _only(rig: MemoryRig, cls: type) -> list:
    return [m for _, m in _frames(rig) if isinstance(m, cls)]


class Host:
    """A tiny host: numbers its frames, remembers which sample each command answered."""

    def __init__(self, rig: MemoryRig) -> None:
        self.rig = rig
        self.seq = 0
        self.answered: dict[int, int] = {}

    def send(self, message: codec.Message) -> int:
        self.seq = (self.seq + 1) & 0xFFFF
        if isinstance(message, codec.Command):
            self.answered[self.seq] = message.answers_counter
        self.rig.feed(codec.encode_message(message, self.seq))
        return self.seq


def _running(core: CoreLibrary, hello: codec.Hello = BOARD, watchdog_us: int = 50_000):
    rig = core.rig(hello)
    host = Host(rig)
    fault = (FAULT,) * hello.n_outputs
    host.send(codec.Configure(1_000, hello.n_inputs, watchdog_us, fault))
    host.send(codec.Start())
    replies = _only(rig, codec.Status)
    assert [r.result for r in replies] == [codec.RESULT_OK, codec.RESULT_OK]
    assert rig.state() == codec.STATE_RUNNING
    return rig, host


# ------------------------------------------------------------ build rules ---
def test_every_c_file_compiles_with_the_strict_flags(tmp_path: Path) -> None:
    cc = find_c_compiler()  # present: tests/conftest.py stops the run otherwise
    files = [
        "ccb_core.c",
        "ccb_law.c",
        "ports/memory_port.c",
        "ports/fuzz_main.c",
        "ports/pty_board.c",
    ]
    for f in files:
        for extra in BUILD_VARIANTS.values():
            args = [cc, *STRICT_FLAGS, *LAW_FLAGS, "-O2", *extra, "-c", str(C_SOURCE_DIR / f)]
            proc = subprocess.run(
                [*args, "-o", str(tmp_path / "x.o")], capture_output=True, text=True, check=False
            )
            assert proc.returncode == 0, f"{f} {extra}:\n{proc.stderr}"


def test_the_core_needs_nothing_from_libc_but_memcpy_memset_and_floorf(tmp_path: Path) -> None:
    cc, nm = find_c_compiler(), shutil.which("nm")  # both checked by tests/conftest.py
    law_api = {"ccb_law_reset", "ccb_law_set", "ccb_law_eval"}  # ccb_law.c, beside the core
    allowed = {"ccb_core.c": {"memcpy", "memset"} | law_api, "ccb_law.c": {"floorf"}}
    for opt in ("-O0", "-O2", "-Os"):
        for src, ok in allowed.items():
            obj = tmp_path / f"{src}{opt}.o"
            subprocess.run(
                [cc, *STRICT_FLAGS, *LAW_FLAGS, opt, "-c", str(C_SOURCE_DIR / src), "-o", str(obj)],
                check=True,
            )
            out = subprocess.run([nm, "-u", str(obj)], capture_output=True, text=True).stdout
            names = {line.split()[-1] for line in out.splitlines() if line.strip()}
            assert names <= ok, (src, opt, names)


def test_the_header_is_usable_from_cplusplus(tmp_path: Path) -> None:
    cxx = shutil.which("c++") or shutil.which("g++") or shutil.which("clang++")  # conftest
    src = tmp_path / "use.cpp"
    src.write_text(
        '#include "ccb.h"\nint main() { return ccb_crc16(nullptr, 0) == 0xFFFF ? 0 : 1; }\n'
    )
    proc = subprocess.run(
        [cxx, "-Wall", "-Wextra", "-Werror", "-pedantic", f"-I{C_SOURCE_DIR}", "-c", str(src),
         "-o", str(tmp_path / "use.o")],
        capture_output=True, text=True, check=False,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    # With the guards the C++ object refers to the unmangled C name.
    syms = subprocess.run(["nm", "-u", str(tmp_path / "use.o")], capture_output=True, text=True)
    assert "ccb_crc16" in syms.stdout.split()


# ------------------------------------------------------------ shared vectors
def test_the_small_buffer_build_against_the_shared_vectors(tmp_path: Path) -> None:
    """The small-board build (64-byte receive buffer, 4 inputs) computes the same CRC, COBS
    and frames, deframes every vector stream whose frames fit its buffer, and counts a
    longer frame as too long (PROTOCOL.md §2.4, rule 3)."""
    small = CoreLibrary(build_core_library(tmp_path, BUILD_VARIANTS["small-buffers"]))
    for v in VECTORS["crc16_ccitt_false"]:
        assert small.crc16(bytes.fromhex(v["data"])) == v["crc"]
    for v in VECTORS["cobs"]:
        decoded, encoded = bytes.fromhex(v["decoded"]), bytes.fromhex(v["encoded"])
        assert small.cobs_encode(decoded) == encoded and small.cobs_decode(encoded) == decoded
    for v in VECTORS["messages"]:
        payload = bytes.fromhex(v["payload"])
        assert small.frame_encode(v["type"], v["seq"], payload[3:-2]) == bytes.fromhex(v["wire"])
    fitting = [
        v
        for v in VECTORS["streams"]
        if all(len(piece) <= 65 for piece in bytes.fromhex(v["wire"]).split(b"\x00"))
    ]
    assert len(fitting) >= 5
    for v in fitting:
        r = small.deframe_stream(bytes.fromhex(v["wire"]), 5)
        assert [p.hex() for p in r.payloads] == v["payloads"], v["name"]
        assert r.bad == v["bad"], v["name"]

    def frame(n: int) -> bytes:  # a good frame with an n-byte payload (cobs, binascii)
        body = bytes(range(1, n - 1))
        return cobs.encode(body + binascii.crc_hqx(body, 0xFFFF).to_bytes(2, "little")) + b"\0"

    r = small.deframe_stream(frame(64) + frame(65), 5)
    assert [len(p) for p in r.payloads] == [64] and r.bad_by_reason[codec.FRAME_ERR_LONG] == 1


@pytest.mark.parametrize("v", VECTORS["crc16_ccitt_false"], ids=lambda v: v["data"][:12])
def test_crc_vectors(core: CoreLibrary, v: dict) -> None:
    assert core.crc16(bytes.fromhex(v["data"])) == v["crc"]


@pytest.mark.parametrize("v", VECTORS["cobs"], ids=lambda v: v["decoded"][:12] or "empty")
def test_cobs_vectors(core: CoreLibrary, v: dict) -> None:
    decoded, encoded = bytes.fromhex(v["decoded"]), bytes.fromhex(v["encoded"])
    assert core.cobs_encode(decoded) == encoded
    assert core.cobs_decode(encoded) == decoded


@pytest.mark.parametrize("v", VECTORS["messages"], ids=lambda v: v["name"])
def test_message_vectors(core: CoreLibrary, v: dict) -> None:
    wire = bytes.fromhex(v["wire"])
    payload = bytes.fromhex(v["payload"])
    body = payload[3:-2]
    assert core.frame_encode(v["type"], v["seq"], body) == wire
    message = getattr(codec, v["message"])(**v["fields"])
    if v["message"] == "Hello":
        assert core.encode_hello(v["seq"], message) == wire
    if v["message"] == "Status":
        assert core.encode_status(v["seq"], message) == wire
    if v["message"] == "Sample":
        assert core.encode_sample(v["seq"], message) == wire
    if v["message"] == "Configure":
        assert core.parse_configure(payload) == message
    if v["message"] == "Command":
        assert core.parse_command(payload) == (v["seq"], message)


@pytest.mark.parametrize("chunk", [1, 5, 4096])
@pytest.mark.parametrize("v", VECTORS["streams"], ids=lambda v: v["name"])
def test_stream_vectors(core: CoreLibrary, v: dict, chunk: int) -> None:
    r = core.deframe_stream(bytes.fromhex(v["wire"]), chunk)
    assert [p.hex() for p in r.payloads] == v["payloads"]
    assert r.bad == v["bad"]
    for name, e in _REASONS.items():
        assert r.bad_by_reason[e] == v["bad_by_reason"][name], name
    assert r.digest == fnv1a_digest(r.payloads)


@pytest.mark.parametrize("v", VECTORS["board_ignores"], ids=lambda v: v["name"])
def test_board_ignores_and_counts(core: CoreLibrary, v: dict) -> None:
    # PROTOCOL.md §5: unknown type, other version, wrong length: ignore and count, never act.
    for state in ("ready", "running"):
        rig, host = _running(core)
        if state == "ready":
            host.send(codec.Stop())
            _frames(rig)
        writes = rig.dac_writes()
        rig.feed(bytes.fromhex(v["wire"]))
        assert rig.take_tx() == b""  # no reply
        assert rig.dac_writes() == writes
        st = rig.status()
        assert st.unknown_messages == 1 and st.rejected == 0 and st.bad_frames == 0
        assert st.rate_hz == 1_000 and st.n_inputs == 2 and st.watchdog_us == 50_000


def test_parsers_refuse_what_is_not_theirs(core: CoreLibrary) -> None:
    cmd = codec.decode_wire(codec.encode_message(codec.Command(1, (2,)), 3))
    with pytest.raises(codec.FrameError, match="status 4"):  # CCB_E_TYPE
        core.parse_configure(cmd)
    cfg = codec.decode_wire(codec.encode_message(codec.Configure(1, 1, 1, (1,), version=1), 3))
    with pytest.raises(codec.FrameError, match="status 6"):  # CCB_E_VERSION
        core.parse_configure(cfg)
    with pytest.raises(codec.FrameError, match="status 5"):  # CCB_E_LENGTH
        core.parse_command(cmd[:-3] + cmd[-2:])


def test_bad_board_descriptions_are_refused(core: CoreLibrary) -> None:
    good = {f: getattr(BOARD, f) for f in BOARD.__dataclass_fields__}
    for change in (
        {"n_inputs": 0},
        {"n_inputs": 17},
        {"n_outputs": 0},
        {"adc_bits": 0},
        {"dac_bits": 17},
        {"adc_min_uV": 10_000_000},
        {"watchdog_min_us": 2_000_000},
        {"max_rate_hz": 0},
    ):
        with pytest.raises(codec.FrameError, match="refused"):
            MemoryRig(core, SimpleNamespace(**{**good, **change}))  # type: ignore[arg-type]


# ------------------------------------------------------------ deframer ------
_streams = st.lists(
    st.one_of(
        st.builds(
            lambda a, s: codec.encode_message(codec.Command(a, (a & 0xFFF,)), s),
            st.integers(0, 2**32 - 1),
            st.integers(0, 0xFFFF),
        ),
        st.binary(max_size=30),
        st.just(b"\x00"),
    ),
    max_size=10,
).map(b"".join)


@_SETTINGS
@given(_streams, st.integers(1, 40))
def test_c_deframer_equals_the_reference_on_any_stream(
    core: CoreLibrary, data: bytes, chunk: int
) -> None:
    r = core.deframe_stream(data, chunk)
    expected, bad = reference_deframe(data)  # cobs package + binascii.crc_hqx
    assert r.payloads == expected
    assert r.bad == bad and sum(r.bad_by_reason.values()) == bad
    assert r.good == len(expected)


@_SETTINGS
@given(st.binary(max_size=300), st.integers(0, 0xFFFF))
def test_c_deframer_resynchronises_at_the_next_delimiter(
    core: CoreLibrary, junk: bytes, seq: int
) -> None:
    wire = codec.encode_message(codec.Sample(seq, 7, 1, 0, (1, 2)), seq)
    r = core.deframe_stream(junk + b"\x00" + wire, 13)
    assert r.payloads[-1] == cobs.decode(wire[:-1])


# ------------------------------------------------------------ board rules ---
def test_hello_handshake(core: CoreLibrary) -> None:
    rig = core.rig(BOARD)
    assert rig.state() == codec.STATE_UNCONFIGURED and rig.rate_hz() == 0
    Host(rig).send(codec.GetHello())
    frames = _frames(rig)
    # The board's own frame counter starts at 0; HELLO states what the build can do
    # (PROTOCOL.md §4.1): law mode, the default queue of ccb.h, one Mg group, one sample
    # per SAMPLES frame.
    build = {"capabilities": codec.CAP_LAW, "law_queue": 1024, "mg_groups": 1, "max_samples": 1}
    assert frames == [(0, dataclasses.replace(BOARD, **build))]
    assert rig.dac_writes() == 0  # nothing is written before CONFIGURE (§5)


@pytest.mark.parametrize(
    ("variant", "build"),
    [
        ("no-law", {"capabilities": 0, "law_queue": 0, "mg_groups": 0, "max_samples": 0}),
        ("small-law", {"capabilities": codec.CAP_LAW, "law_queue": 8, "mg_groups": 1}),
    ],
)
def test_hello_states_what_each_build_can_do(tmp_path: Path, variant: str, build: dict) -> None:
    """PROTOCOL.md §4.1: a build without law mode is still a version-2 board, with the law
    capability off and no queue; a small law build states its own queue depth."""
    small = CoreLibrary(build_core_library(tmp_path, BUILD_VARIANTS[variant]))
    rig = small.rig(BOARD)
    Host(rig).send(codec.GetHello())
    ((_, hello),) = _frames(rig)
    assert hello.version == 2 and hello.evaluates_laws == bool(build["capabilities"])
    assert {k: getattr(hello, k) for k in build} == build


@pytest.mark.parametrize(
    ("configure", "result"),
    [
        (codec.Configure(0, 1, 50_000, (FAULT,)), codec.RESULT_BAD_RATE),
        (codec.Configure(20_001, 1, 50_000, (FAULT,)), codec.RESULT_BAD_RATE),
        (codec.Configure(1_000, 0, 50_000, (FAULT,)), codec.RESULT_BAD_INPUTS),
        (codec.Configure(1_000, 3, 50_000, (FAULT,)), codec.RESULT_BAD_INPUTS),
        (codec.Configure(1_000, 1, 999, (FAULT,)), codec.RESULT_BAD_WATCHDOG),
        (codec.Configure(1_000, 1, 1_000_001, (FAULT,)), codec.RESULT_BAD_WATCHDOG),
        (codec.Configure(1_000, 1, 50_000, (4096,)), codec.RESULT_BAD_FAULT_VALUE),
        (codec.Configure(20_000, 2, 1_000, (4095,)), codec.RESULT_OK),
    ],
)
def test_configure_is_checked_against_the_capabilities(
    core: CoreLibrary, configure: codec.Configure, result: int
) -> None:
    rig = core.rig(BOARD)
    seq = Host(rig).send(configure)
    (reply,) = _only(rig, codec.Status)
    assert (reply.ack_seq, reply.result) == (seq, result)
    if result == codec.RESULT_OK:
        assert reply.state == codec.STATE_READY and rig.rate_hz() == 20_000
        assert rig.dac(0) == 4095  # the fault value goes out at once (§5)
        assert reply.status == codec.STATUS_FAULT_OUTPUT
    else:
        assert reply.state == codec.STATE_UNCONFIGURED and rig.dac_writes() == 0
        assert reply.rejected == 1


def test_start_needs_configure_and_configure_needs_stop(core: CoreLibrary) -> None:
    rig = core.rig(BOARD)
    host = Host(rig)
    host.send(codec.Start())
    assert _only(rig, codec.Status)[0].result == codec.RESULT_BAD_STATE
    rig, host = _running(core)
    host.send(codec.Configure(2_000, 1, 50_000, (FAULT,)))
    host.send(codec.Start())
    replies = _only(rig, codec.Status)
    assert [r.result for r in replies] == [codec.RESULT_BAD_STATE] * 2
    assert rig.rate_hz() == 1_000 and rig.state() == codec.STATE_RUNNING


def test_closed_loop_samples_commands_and_latency(core: CoreLibrary) -> None:
    """Host answers every sample at once: latency is 1 sample (PROTOCOL.md §5.3)."""
    rig, host = _running(core)
    period_us = 1_000
    latencies = []
    for k in range(50):
        rig.set_clock(period_us * (k + 1))
        rig.set_adc(0, 100 + k)
        rig.set_adc(1, 4000 - k)
        rig.tick()
        (sample,) = _only(rig, codec.Sample)
        assert sample.counter == k and sample.clock_us == period_us * (k + 1)
        assert sample.adc_counts == (100 + k, 4000 - k)
        if k == 0:  # no command yet: fault value in force (§4.2)
            assert sample.status == codec.STATUS_FAULT_OUTPUT and rig.dac(0) == FAULT
        else:
            assert sample.status == 0
            latencies.append(k - host.answered[sample.cmd_seq])
        host.send(codec.Command(sample.counter, ((37 * k) % 4096,)))
        assert rig.dac(0) == (37 * k) % 4096  # applied on arrival (§5.2)
    assert latencies == [1] * 49
    st = rig.status()
    assert (st.commands_applied, st.late_commands, st.missing_commands) == (50, 0, 0)
    assert st.counter == 50


def test_late_and_missing_commands_are_counted(core: CoreLibrary) -> None:
    rig, host = _running(core)
    samples = []
    for k in range(6):
        rig.set_clock(1_000 * (k + 1))
        rig.tick()
        samples += _only(rig, codec.Sample)
        if k >= 1:  # answer sample k-1 only after sample k was taken: late by one
            host.send(codec.Command(k - 1, (k,)))
    st = rig.status()
    # commands answering 0..4 each arrived after sample a+1 was taken (§5.2)
    assert st.late_commands == 5 and st.missing_commands == 0
    rig.set_clock(7_000)
    rig.tick()
    (s6,) = _only(rig, codec.Sample)
    assert s6.status & codec.STATUS_LATE
    assert s6.counter - host.answered[s6.cmd_seq] == 2  # latency 2 samples
    host.send(codec.Command(6, (9,)))  # skips 5: one missing
    assert rig.status().missing_commands == 1


@pytest.mark.parametrize(
    ("answers", "why"),
    [(3, "duplicate"), (2, "older"), (5, "future sample"), (4, "not yet taken")],
)
def test_stale_and_future_commands_are_rejected(core: CoreLibrary, answers: int, why: str) -> None:
    rig, host = _running(core)
    for k in range(4):  # samples 0..3 taken
        rig.set_clock(1_000 * (k + 1))
        rig.tick()
    host.send(codec.Command(3, (111,)))
    _frames(rig)
    host.send(codec.Command(answers, (222,)))
    assert rig.dac(0) == 111, why
    st = rig.status()
    assert st.rejected == 1 and st.commands_applied == 1
    rig.tick()
    (s,) = _only(rig, codec.Sample)
    assert s.status & codec.STATUS_RX_ERROR


def test_out_of_range_counts_and_commands_when_stopped_are_rejected(core: CoreLibrary) -> None:
    rig, host = _running(core)
    rig.tick()
    host.send(codec.Command(0, (4096,)))  # 12-bit DAC: 4095 is the largest count
    assert rig.dac(0) == FAULT and rig.status().rejected == 1
    host.send(codec.Stop())
    host.send(codec.Command(0, (5,)))
    assert rig.dac(0) == FAULT and rig.status().rejected == 2
    assert rig.take_tx().count(b"\x00") == 2  # one SAMPLE, one STATUS reply to STOP


def test_bad_frames_are_counted_and_flagged(core: CoreLibrary) -> None:
    rig, _ = _running(core)
    rig.feed(b"\x05\x01\x02\x03\x00")  # COBS block runs past the delimiter
    payload = bytearray(codec.decode_wire(codec.encode_message(codec.Command(0, (5,)), 77)))
    payload[4] ^= 0x01
    rig.feed(cobs.encode(bytes(payload)) + b"\x00")  # CRC mismatch
    rig.tick()
    (s,) = _only(rig, codec.Sample)
    assert s.status & codec.STATUS_RX_ERROR
    assert rig.status().bad_frames == 2
    rig.tick()
    (s,) = _only(rig, codec.Sample)
    assert not s.status & codec.STATUS_RX_ERROR  # reported once, then cleared


def test_stop_outputs_the_fault_value_and_status_reports_counters(core: CoreLibrary) -> None:
    rig, host = _running(core)
    rig.tick()
    host.send(codec.Command(0, (7,)))
    assert rig.dac(0) == 7
    seq = host.send(codec.Stop())
    (reply,) = _only(rig, codec.Status)
    assert (reply.state, reply.ack_seq, reply.result) == (codec.STATE_READY, seq, codec.RESULT_OK)
    assert rig.dac(0) == FAULT and reply.commands_applied == 1 and reply.counter == 1
    rig.tick()  # ticks do nothing unless running
    assert rig.take_tx() == b""
    seq = host.send(codec.GetStatus())
    (again,) = _only(rig, codec.Status)
    assert again.ack_seq == seq and again.commands_applied == 1
    host.send(codec.Start())  # counters cover one run (§4.3)
    assert _only(rig, codec.Status)[0].commands_applied == 0


def test_two_outputs(core: CoreLibrary) -> None:
    hello = codec.Hello("two", 16, 16, 1, 2, -1, 1, -1, 1, 1_000, 1_000, 1_000_000)
    rig, host = _running(core, hello)
    assert (rig.dac(0), rig.dac(1)) == (FAULT, FAULT)
    rig.tick()
    host.send(codec.Command(0, (0, 65535)))
    assert (rig.dac(0), rig.dac(1)) == (0, 65535)


# ------------------------------------------------------------ watchdog ------
@pytest.mark.parametrize(
    ("period_us", "timeout_us", "phase_us"),
    [(1_000, 5_000, 0), (1_000, 5_000, 999), (50, 1_000, 17), (1_000, 2_500, 400), (333, 1_000, 1)],
)
def test_watchdog_outputs_the_fault_value_within_timeout_plus_one_sample(
    core: CoreLibrary, period_us: int, timeout_us: int, phase_us: int
) -> None:
    """PROTOCOL.md §5.4: no COMMAND/KEEPALIVE for the timeout while running -> fault value,
    no later than timeout + one sample period, reported by STATUS and the sample bits."""
    rig, host = _running(core, watchdog_us=timeout_us)
    t = 0
    for k in range(10):  # a healthy loop first
        t = period_us * (k + 1)
        rig.set_clock(t)
        rig.tick()
        rig.set_clock(t + phase_us % period_us)
        host.send(codec.Command(k, (100 + k,)))
    last_command_us = t + phase_us % period_us
    _frames(rig)
    assert rig.dac(0) == 109
    fault_at_us = None
    reports: list[codec.Status] = []
    samples: list[codec.Sample] = []
    k = 10
    while fault_at_us is None and k < 10 + 4 * timeout_us // period_us + 10:
        t = period_us * (k + 1)
        rig.set_clock(t)
        rig.tick()
        k += 1
        for _, m in _frames(rig):
            (reports if isinstance(m, codec.Status) else samples).append(m)
        if rig.dac(0) == FAULT:
            fault_at_us = t
    assert fault_at_us is not None
    assert timeout_us <= fault_at_us - last_command_us <= timeout_us + period_us
    assert len(reports) == 1
    assert reports[0].result == codec.RESULT_REPORT and reports[0].watchdog_trips == 1
    assert reports[0].status == codec.STATUS_FAULT_OUTPUT | codec.STATUS_WATCHDOG
    assert samples[-1].status & codec.STATUS_WATCHDOG
    assert samples[-1].status & codec.STATUS_FAULT_OUTPUT
    assert all(not s.status & codec.STATUS_WATCHDOG for s in samples[:-1])
    # a KEEPALIVE does not lift the fault; the next COMMAND does (§5.4)
    host.send(codec.KeepAlive())
    rig.tick()
    assert rig.dac(0) == FAULT and _only(rig, codec.Sample)[0].status & codec.STATUS_WATCHDOG
    host.send(codec.Command(k, (5,)))
    assert rig.dac(0) == 5
    rig.tick()
    assert _only(rig, codec.Sample)[0].status == 0
    assert rig.status().watchdog_trips == 1


def test_keepalive_holds_the_output_and_the_watchdog(core: CoreLibrary) -> None:
    rig, host = _running(core, watchdog_us=3_000)
    rig.tick()
    host.send(codec.Command(0, (42,)))
    for k in range(1, 40):
        rig.set_clock(1_000 * k)
        rig.tick()
        host.send(codec.KeepAlive())
    assert rig.dac(0) == 42 and rig.status().watchdog_trips == 0


def test_watchdog_trips_when_no_command_ever_comes(core: CoreLibrary) -> None:
    rig, _ = _running(core, watchdog_us=3_000)
    for k in range(1, 6):
        rig.set_clock(1_000 * k)
        rig.tick()
    assert rig.status().watchdog_trips == 1
    assert any(isinstance(m, codec.Status) for _, m in _frames(rig))


def test_watchdog_survives_the_clock_wrapping(core: CoreLibrary) -> None:
    rig = core.rig(BOARD)
    host = Host(rig)
    start = 2**32 - 5_500  # the µs clock wraps every 71.6 min (§4.2)
    rig.set_clock(start)
    host.send(codec.Configure(1_000, 1, 3_000, (FAULT,)))
    host.send(codec.Start())
    for k in range(12):  # across the wrap, commands keep coming: no trip
        rig.set_clock(start + 1_000 * (k + 1))
        rig.tick()
        host.send(codec.Command(k, (k,)))
    assert rig.status().watchdog_trips == 0
    for k in range(12, 17):
        rig.set_clock(start + 1_000 * (k + 1))
        rig.tick()
    assert rig.status().watchdog_trips == 1 and rig.dac(0) == FAULT
    clocks = [m.clock_us for _, m in _frames(rig) if isinstance(m, codec.Sample)]
    assert clocks[4] == 2**32 - 500 and clocks[5] == 500


def test_board_output_is_always_well_formed(core: CoreLibrary) -> None:
    """Every byte the board writes parses as good frames (reference deframer)."""
    rig, host = _running(core)
    rng = np.random.default_rng(20261201)  # fixed seed
    for k in range(200):
        rig.set_clock(1_000 * (k + 1))
        rig.set_adc(0, int(rng.integers(0, 4096)))
        rig.tick()
        rig.feed(rng.integers(0, 256, size=int(rng.integers(0, 20)), dtype=np.uint8).tobytes())
        if k % 3:
            host.send(codec.Command(k, (int(rng.integers(0, 4096)),)))
    data = rig.take_tx()
    payloads, bad = reference_deframe(data)
    assert bad == 0 and len(payloads) >= 200
    seqs = [p[1] | p[2] << 8 for p in payloads]
    # the board numbers its frames 0, 1, 2, ... (two STATUS replies came first)
    assert seqs == list(range(2, 2 + len(seqs)))
    crcs_ok = all(
        binascii.crc_hqx(p[:-2], 0xFFFF) == int.from_bytes(p[-2:], "little") for p in payloads
    )
    assert crcs_ok


# ------------------------------------------------------------ settled rules (§5.7) ---
def _tick_at(rig: MemoryRig, t_us: int) -> None:
    rig.set_clock(t_us)
    rig.tick()


def test_only_commands_laws_and_keepalives_restart_the_watchdog(core: CoreLibrary) -> None:
    """§5.7 rule 1: GET_STATUS (an empty body, answered) does not hold the watchdog off."""
    rig, host = _running(core, watchdog_us=3_000)
    _tick_at(rig, 1_000)
    host.send(codec.Command(0, (42,)))
    for k in range(2, 8):
        _tick_at(rig, 1_000 * k)
        host.send(codec.GetStatus())
    assert rig.status().watchdog_trips == 1 and rig.dac(0) == FAULT


def test_a_silent_host_trips_the_watchdog_once_per_silence(core: CoreLibrary) -> None:
    """§5.7 rule 2: one trip and one REPORT per silence, however many timeouts it lasts;
    the next applied COMMAND lifts it, and a new silence trips it again."""
    rig, host = _running(core, watchdog_us=2_000)
    _tick_at(rig, 1_000)
    host.send(codec.Command(0, (42,)))
    _frames(rig)
    for k in range(2, 12):  # 10 ms of silence: five timeouts
        _tick_at(rig, 1_000 * k)
    reports = _only(rig, codec.Status)
    assert len(reports) == 1 and rig.status().watchdog_trips == 1
    host.send(codec.Command(10, (43,)))
    for k in range(12, 16):
        _tick_at(rig, 1_000 * k)
    assert rig.status().watchdog_trips == 2


def test_after_a_trip_cmd_seq_names_the_last_command_and_missing_counts_from_it(
    core: CoreLibrary,
) -> None:
    """§5.7 rules 3 and 4: while tripped, SAMPLE.cmd_seq still names the last applied
    COMMAND (no longer in force: FAULT_OUTPUT is set); the next COMMAND's missing samples
    are counted from the one that last answered."""
    rig, host = _running(core, watchdog_us=2_000)
    _tick_at(rig, 1_000)
    seq = host.send(codec.Command(0, (42,)))
    _frames(rig)
    for k in range(2, 7):  # samples 1..5, the watchdog trips at sample 3
        _tick_at(rig, 1_000 * k)
    last = _only(rig, codec.Sample)[-1]
    assert last.cmd_seq == seq and last.status & codec.STATUS_FAULT_OUTPUT
    host.send(codec.Command(5, (43,)))  # samples 1..4 were never answered
    assert rig.status().missing_commands == 4 and rig.dac(0) == 43


@pytest.mark.parametrize(
    ("back", "applied"), [(2**31, False), (2**31 - 1, True)], ids=["2^31 back", "2^31-1 back"]
)
def test_the_modulo_window_of_answers(core: CoreLibrary, back: int, applied: bool) -> None:
    """§5.7 rule 5: `answers` is a sample already sent when (next − answers) mod 2^32 lies in
    1 .. 2^31 − 1 (serial-number arithmetic, RFC 1982); 2^31 back reads as the future."""
    rig, host = _running(core)
    for k in range(4):
        _tick_at(rig, 1_000 * (k + 1))
    host.send(codec.Command((4 - back) % 2**32, (77,)))
    assert (rig.dac(0) == 77) == applied
    assert rig.status().rejected == (0 if applied else 1)


def test_start_and_stop_clear_the_watchdog_bit(core: CoreLibrary) -> None:
    """§5.7 rule 6: STATUS carries FAULT_OUTPUT and WATCHDOG only; STOP and START clear
    WATCHDOG (and the trip), FAULT_OUTPUT stays until a COMMAND is applied."""
    rig, host = _running(core, watchdog_us=2_000)
    for k in range(1, 5):
        _tick_at(rig, 1_000 * k)
    assert rig.status().status == codec.STATUS_FAULT_OUTPUT | codec.STATUS_WATCHDOG
    _frames(rig)  # the samples and the trip's REPORT
    host.send(codec.Stop())
    (stopped,) = _only(rig, codec.Status)
    assert stopped.status == codec.STATUS_FAULT_OUTPUT
    host.send(codec.Start())
    (started,) = _only(rig, codec.Status)
    assert started.status == codec.STATUS_FAULT_OUTPUT and started.watchdog_trips == 0
