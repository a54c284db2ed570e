"""Every command a user types, end to end: what it prints, what it writes, how it fails.

The anchors are outside the project: the passive membrane's closed form (an RC
circuit charging towards E + I/g with tau = C/g), pynwb's validator, the PNG
signature (ISO/IEC 15948), the TOML file read with the standard library's tomllib,
and the arithmetic of a ring buffer done by hand.
"""

from __future__ import annotations

import math
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

from clampcore.cli import main
from clampcore.nwb import read_nwb_summary, validate_nwb

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"

# A passive cell (C 100 pF, g_L 5 nS, E_L -70 mV) and a constant 100 pA from the first sample:
# V(t) = -70 + (100/5)(1 - exp(-t/20 ms)) mV, settling at -50 mV (RC closed form).
RATE_HZ, C_PF, G_L_NS, E_L_MV, I_PA = 10_000, 100.0, 5.0, -70.0, 100.0
TAU_MS, V_INF_MV = C_PF / G_L_NS, E_L_MV + I_PA / G_L_NS
CONSTANT_CURRENT = f"""
[loop]
rate_hz = {RATE_HZ}
max_current_pA = 400

[cell]
model = "passive"
capacitance_pF = {C_PF}
leak_nS = {G_L_NS}
rest_mV = {E_L_MV}

[amplifier]
vm_mV_per_V = 100
command_pA_per_V = 400

[[element]]
kind = "current"
name = "hold"
waveform = "step"
amplitude_pA = {I_PA}
start_ms = 0
"""


def v_rc_mV(t_ms: np.ndarray) -> np.ndarray:
    return E_L_MV + (V_INF_MV - E_L_MV) * (1.0 - np.exp(-t_ms / TAU_MS))


def mean_v_rc_mV(duration_ms: float) -> float:
    """The closed form's mean over 0 .. T: E + dV (1 - tau/T (1 - exp(-T/tau)))."""
    frac = TAU_MS / duration_ms * (1.0 - math.exp(-duration_ms / TAU_MS))
    return E_L_MV + (V_INF_MV - E_L_MV) * (1.0 - frac)


@pytest.fixture
def experiment(tmp_path: Path) -> Path:
    path = tmp_path / "constant.toml"
    path.write_text(CONSTANT_CURRENT)
    return path


def _one_line_error(err: str, *needles: str) -> None:
    """A clear one-line error naming what is wrong, and no traceback."""
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])


def test_check_summarises_what_the_file_says(capsys) -> None:
    path = EXAMPLES / "imposed_lif.toml"
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    raw = tomllib.loads(path.read_text())  # the file read independently
    first = out.splitlines()[0]
    assert "valid" in first
    assert f"Loop {raw['loop']['rate_hz']:g} Hz" in first
    assert f"±{raw['loop']['max_current_pA']:g} pA" in first
    assert f"model cell: {raw['cell']['model']}" in first
    listed = [line.split()[:2] for line in out.splitlines()[1:] if line.startswith("  ")]
    assert listed == [[el["kind"], el["name"]] for el in raw["element"]]


def test_check_refuses_a_bad_field_in_one_line(tmp_path: Path, capsys) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(CONSTANT_CURRENT.replace("amplitude_pA = 100.0", "amplitude_pA = 'lots'"))
    assert main(["check", str(bad)]) == 2
    _one_line_error(capsys.readouterr().err, "hold", "amplitude_pA", "lots")
    assert main(["check", str(tmp_path / "missing.toml")]) == 2
    _one_line_error(capsys.readouterr().err, "missing.toml")


def test_simulate_prints_the_closed_form_and_writes_nwb_and_npz(
    experiment: Path, tmp_path: Path, capsys
) -> None:
    assert main(["simulate", str(experiment), "--duration", "0.2"]) == 0
    out = capsys.readouterr().out
    mean = float(re.search(r"mean V (-?[\d.]+) mV", out).group(1))
    # Tolerance: the printed two decimals and the 16-bit ADC (0.03 mV).
    assert mean == pytest.approx(mean_v_rc_mV(200.0), abs=0.05)
    assert " 0 spikes" in out and "faults 0" in out

    nwb = tmp_path / "offline.nwb"
    assert main(["simulate", str(experiment), "--duration", "0.2", "--out", str(nwb)]) == 0
    assert f"wrote {nwb}" in capsys.readouterr().out
    assert validate_nwb(nwb) == []  # pynwb's validator
    rec = read_nwb_summary(nwb)
    assert rec["n_samples"] == 0.2 * RATE_HZ and rec["rate_hz"] == RATE_HZ
    t_ms = np.arange(rec["n_samples"]) * 1000.0 / RATE_HZ
    # The command computed at sample 0 is in force over (t_0, t_1] (DEVELOPERS.md, the loop's
    # timing model), so V(t_k) is the closed form at t_k, to the ADC's half step (0.015 mV)
    # plus the DAC's 100.04 pA for 100 (PROTOCOL.md §6 worked numbers: 0.008 mV at 5 nS).
    np.testing.assert_allclose(rec["v_mV"], v_rc_mV(t_ms), atol=0.03)
    # The recording holds the DAC count the command became (clampcore.nwb): within half a
    # DAC step of 400 pA/V over a 16-bit, 20 V range (PROTOCOL.md §6).
    np.testing.assert_allclose(rec["i_pA"], I_PA, atol=400.0 * 20.0 / 65535 / 2 + 1e-9)

    npz = tmp_path / "offline.npz"
    assert main(["simulate", str(experiment), "--duration", "0.05", "--out", str(npz)]) == 0
    assert f"wrote {npz}" in capsys.readouterr().out
    with np.load(npz) as data:
        np.testing.assert_allclose(data["t_s"], np.arange(500) / RATE_HZ)
        np.testing.assert_allclose(data["v_mV"], rec["v_mV"][:500])


def test_run_on_the_simulated_rig_prints_status_and_writes_a_recording(
    experiment: Path, tmp_path: Path, capsys
) -> None:
    out_path = tmp_path / "run.nwb"
    argv = ["run", str(experiment), "--port", "sim", "--duration", "0.3", "--out", str(out_path)]
    argv.append("--keep-journal")  # recover is tried on it below
    assert main([*argv, "--rig-clock", "lockstep"]) == 0
    out = capsys.readouterr().out
    # The status line, then the end-of-run summary.
    status = [line for line in out.splitlines() if line.startswith("t ")][-1]
    assert f"| {RATE_HZ / 1000:g} kHz |" in status and "faults 0 limit 0" in status
    assert re.search(r"late \d+ missing \d+", status)
    assert "spikes 0 (0.0 Hz)" in status
    assert "ended: " in out
    # Lockstep: every command is in force at the next sample, so all latencies are 1.
    assert "latency p50 1 / p99 1 samples; within 1/2/3 samples 100.00%" in out
    assert f"recording: {out_path}" in out
    assert validate_nwb(out_path) == []
    rec = read_nwb_summary(out_path)
    assert rec["n_samples"] >= 0.3 * RATE_HZ
    t_ms = np.arange(rec["n_samples"]) * 1000.0 / RATE_HZ
    np.testing.assert_allclose(rec["v_mV"], v_rc_mV(t_ms), atol=0.03)
    # With --keep-journal the journal stays beside the recording; `recover` makes the same
    # recording from it.
    journal = out_path.with_suffix(".journal")
    recovered = tmp_path / "recovered.nwb"
    assert main(["recover", str(journal), "--out", str(recovered)]) == 0
    assert f"wrote {recovered}" in capsys.readouterr().out
    assert validate_nwb(recovered) == []
    again = read_nwb_summary(recovered)
    np.testing.assert_array_equal(again["v_mV"], rec["v_mV"])
    np.testing.assert_array_equal(again["i_pA"], rec["i_pA"])


def test_run_and_recover_refuse_bad_input_in_one_line(
    experiment: Path, tmp_path: Path, capsys
) -> None:
    argv = ["run", str(experiment), "--port", str(tmp_path / "no-such-port")]
    assert main([*argv, "--duration", "0.1", "--out", str(tmp_path / "x.nwb")]) == 1
    err = capsys.readouterr().err
    assert "no-such-port" in err and "Traceback" not in err
    assert main(["recover", str(tmp_path / "nothing.journal")]) == 1
    _one_line_error(capsys.readouterr().err, "nothing.journal")


def test_ports_lists_the_usb_identity(monkeypatch, capsys) -> None:
    from serial.tools import list_ports_common

    port = list_ports_common.ListPortInfo("/dev/ttyACM7")
    port.vid, port.pid, port.serial_number = 0x2E8A, 0x000A, "E66138"
    port.manufacturer, port.description = "Raspberry Pi", "Pico"
    monkeypatch.setattr("serial.tools.list_ports.comports", lambda: [port])
    assert main(["ports"]) == 0
    line = capsys.readouterr().out.strip()
    assert line.split()[:4] == ["/dev/ttyACM7", "2e8a:000a", "Raspberry", "Pi"]
    assert "E66138" in line and line.endswith("Pico")
    monkeypatch.setattr("serial.tools.list_ports.comports", lambda: [])
    assert main(["ports"]) == 0
    assert "no serial ports found" in capsys.readouterr().out


def test_demo_writes_a_valid_recording_and_a_plot(tmp_path: Path, capsys) -> None:
    assert main(["demo", "--out-dir", str(tmp_path), "--duration", "0.5"]) == 0
    out = capsys.readouterr().out
    assert "NWB validator: no problems" in out
    assert f"plot: {tmp_path / 'demo.png'}" in out
    assert validate_nwb(tmp_path / "demo.nwb") == []
    png = (tmp_path / "demo.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature
    import matplotlib.image

    pixels = matplotlib.image.imread(tmp_path / "demo.png")
    assert pixels.shape[0] > 200 and pixels.shape[1] > 200
    assert np.unique(pixels.reshape(-1, pixels.shape[-1]), axis=0).shape[0] > 10  # drawn on


def test_rig_serves_a_board_that_answers_the_handshake(tmp_path: Path) -> None:
    from clampcore.simulated_rig.board import BOARD_IDENTITY, MAX_RATE_HZ

    from clampcore.board_link import BoardLink

    proc = subprocess.Popen(
        [sys.executable, "-m", "clampcore", "rig", str(EXAMPLES / "imposed_lif.toml")],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        path = proc.stdout.readline().strip()
        assert path.startswith("/dev/"), path
        link = BoardLink(path)
        try:
            hello = link.handshake()
        finally:
            link.close()
        assert hello.identity == BOARD_IDENTITY and hello.max_rate_hz == MAX_RATE_HZ
    finally:
        proc.stdin.close()  # the rig ends when its standard input closes
        proc.wait(30)
        err = proc.stderr.read()
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == 0, err
    assert "Traceback" not in err
