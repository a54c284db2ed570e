"""Current-clamp characterisation protocols, run through the normal loop and recording path.

Two protocols, each one run (one NWB recording):

- ``passive``: a baseline, then a family of hyperpolarising steps (300 ms on, 200 ms
  off, the family three times), from 40% to 100% of a step that moves V by about
  −4 mV according to an estimate of the input resistance; small enough to keep a cell
  near rest, where it is close to linear, and out of anode-break spikes (the
  Hodgkin–Huxley model cell fires a rebound spike after 300 ms at −5 mV: measured
  here), large enough to stand above the noise; then 100 short hyperpolarising pulses
  (50 of 1 ms, 50 of 5 ms, every 30 ms, each worth −10 mV at steady state) for the
  capacitance from the onset slope.
- ``active``: a family of depolarising steps (500 ms on, 300 ms off, equal increments
  up to a top step worth about +40 mV of passive depolarisation: typical neurons fire
  15–25 mV above rest, common practice), a slow ramp (4 s, 0 to 1.25× the top step)
  and a seeded coloured-noise current (4 s, mean at half the top step, SD a fifth
  of it, correlation time 5 ms), each capped at the experiment's current limit.

Each stimulus is a ``current`` element added to the experiment's own elements
(so a virtual ``threshold_reset`` or ``leak`` in the file stays in force), named
``protocol_<segment>``; the recording stores each element's current, so the
analysis reads back exactly what was commanded. Total protocol time with the
default sizes: about 10.9 s + 16.8 s.

Amplitudes are put on the DAC's grid (``dac_quantiser``: the simulated rig's 16-bit
converters; a hardware board with other converters rounds them again, by at most half
its step) and each segment knows the board's own 0 pA, so the analysis uses the
current change the cell really received: at 400 pA/V a DAC step is 0.12 pA, 10% of
the smallest passive step of a 500 MΩ cell.

A protocol runs on a port through ``clampcore.engine.Engine`` (``"sim"``: the
simulated rig) or, with ``port=None``, offline through ``clampcore.simulate``
against the experiment's model cell. Its recording says what it is: the metadata
key ``characterization`` (``PROTOCOL_META_KEY``) holds the protocol's name and
segments and the file names of the other recordings of the same characterisation,
so that ``read_protocol_recording`` reads a recording back with no other file.

Public names: ``Segment``, ``Protocol``, ``ProtocolRun``, ``passive_protocol``,
``active_protocol``, ``protocol_experiment``, ``run_protocol``, ``read_protocol_run``,
``read_protocol_recording``, ``protocol_meta``, ``dac_quantiser``, ``ELEMENT_PREFIX``,
``PROTOCOL_META_KEY``.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_pA,
    pA_to_counts,
)
from clampcore.experiment import Experiment, load_experiment
from clampcore.simulated_rig import start_rig

ELEMENT_PREFIX = "protocol_"
# Passive steps: the largest moves V by this much (see the module docstring).
PASSIVE_TARGET_MV = -4.0
# The smallest passive step is this share of the largest: small steps sit close to the
# ADC's resolution (0.03 mV of membrane at 100 mV/V, 16 bits over +-10 V).
PASSIVE_SMALLEST_SHARE = 0.4
# The family three times over: its steps are small (above), and a cell's own noise makes
# each point's steady state and each transient uncertain; a single family measured R and
# tau only 5-7% right on a 500 MOhm cell with 0.05 mV of noise (measured here).
PASSIVE_REPEATS = 3
# Short hyperpolarising pulses for the capacitance at the onset, worth -10 mV at steady
# state: 50 of 1 ms, then 50 of 5 ms, every 30 ms (3 s). The onset is measured over 0.2 tau
# (cellfeatures), so a slow cell needs the long ones: its onset slope is 10 mV / tau
# whatever the pulse, and the slope's noise falls as the window's length to the power 1.5
# (1 ms pulses gave 96-104 pF on a noisy 100 pF / 20 ms cell, seeds 1-8, measured here). A
# fast excitable cell needs the short ones: the Hodgkin-Huxley model cell answers a 5 ms
# pulse with an anode-break spike (2 ms pulses at -20 mV already on most; such pulses and
# the ones after them are left out of the onset). 30 ms apart: 12 tau of a fast cell
# (tau 1.5 ms, the HH model cell at 30 pF; a slower cell's relaxation is taken off by the
# onset's baseline line).
PULSE_TARGET_MV = -10.0
PULSE_LENGTHS_MS = (1.0, 5.0)
PULSES_PER_LENGTH = 50
PULSE_PERIOD_MS = 30.0
# Active steps: the top step's passive depolarisation (see the module docstring).
ACTIVE_TARGET_MV = 40.0
# Noise correlation time: a few ms, like synaptic background (common practice).
NOISE_TAU_MS = 5.0
# The recording's metadata key that marks it as a characterisation protocol's.
PROTOCOL_META_KEY = "characterization"


@dataclass(frozen=True)
class Segment:
    """One stimulus: ``kind`` step, pulse (a short step), ramp (0 to amplitude) or noise
    (coloured, SD ``sd_pA``)."""

    name: str
    kind: str
    start_ms: float
    duration_ms: float
    amplitude_pA: float
    sd_pA: float = 0.0
    seed: int = 0
    baseline_pA: float = 0.0  # the command the board applies for 0 pA (DAC rounding)

    @property
    def end_ms(self) -> float:
        return self.start_ms + self.duration_ms

    @property
    def delta_pA(self) -> float:
        """The change of current the cell receives (amplitude minus the board's zero)."""
        return self.amplitude_pA - self.baseline_pA

    def element(self) -> dict[str, Any]:
        """The ``current`` element that plays this segment."""
        el: dict[str, Any] = {
            "kind": "current",
            "name": ELEMENT_PREFIX + self.name,
            "start_ms": self.start_ms,
            "duration_ms": self.duration_ms,
        }
        if self.kind in ("step", "pulse"):
            el.update(waveform="step", amplitude_pA=self.amplitude_pA)
        elif self.kind == "ramp":
            el.update(waveform="ramp", amplitude_pA=self.amplitude_pA)
        elif self.kind == "noise":
            el.update(
                waveform="coloured",
                amplitude_pA=self.sd_pA,
                offset_pA=self.amplitude_pA,
                tau_ms=NOISE_TAU_MS,
                seed=self.seed,
            )
        else:
            raise ValueError(f"segment {self.name!r}: unknown kind {self.kind!r}")
        return el


@dataclass(frozen=True)
class Protocol:
    name: str
    segments: tuple[Segment, ...]
    duration_ms: float

    def of_kind(self, kind: str) -> list[Segment]:
        return [s for s in self.segments if s.kind == kind]


def _identity(i_pA: float) -> float:
    return float(i_pA)


def dac_quantiser(experiment: Any) -> Any:
    """pA -> the current the board really applies (the 16-bit converters of the simulated
    rig and the experiment's ``[amplifier]`` scaling): step amplitudes on the DAC's grid
    make the applied steps exact, and their baseline (the board's 0 pA) known."""
    exp = load_experiment(experiment)
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, exp.amplifier)
    return lambda i_pA: float(counts_to_pA(conv, pA_to_counts(conv, float(i_pA))))


def _passive_pA(dv_mV: float, r_estimate_MOhm: float) -> float:
    """The current that moves a passive membrane of this input resistance by ``dv_mV``."""
    if not r_estimate_MOhm > 0:
        raise ValueError(f"input resistance estimate {r_estimate_MOhm!r} MOhm: must be > 0")
    return dv_mV / r_estimate_MOhm * 1000.0  # mV / MΩ = nA


def _cap(amplitudes: np.ndarray, limit_pA: float) -> np.ndarray:
    return np.clip(amplitudes, -limit_pA, limit_pA)


def passive_protocol(
    r_estimate_MOhm: float,
    limit_pA: float,
    n_steps: int = 5,
    step_ms: float = 300.0,
    gap_ms: float = 200.0,
    lead_ms: float = 200.0,
    pulses_per_length: int = PULSES_PER_LENGTH,
    dac: Any = None,
    repeats: int = PASSIVE_REPEATS,
) -> Protocol:
    """Hyperpolarising steps and short pulses from an input-resistance estimate (MΩ)."""
    top_pA = _passive_pA(PASSIVE_TARGET_MV, r_estimate_MOhm)
    amps = _cap(top_pA * np.linspace(PASSIVE_SMALLEST_SHARE, 1.0, n_steps), limit_pA)
    q = dac or _identity
    segs = []
    t = lead_ms
    for amp in np.tile(amps, repeats):
        name = f"hyper_{len(segs) + 1}"
        segs.append(Segment(name, "step", t, step_ms, q(amp), baseline_pA=q(0.0)))
        t += step_ms + gap_ms
    pulse_pA = q(
        float(_cap(np.array([_passive_pA(PULSE_TARGET_MV, r_estimate_MOhm)]), limit_pA)[0])
    )
    for k, length_ms in enumerate(np.repeat(PULSE_LENGTHS_MS, pulses_per_length)):
        name = f"pulse_{k + 1}"
        segs.append(Segment(name, "pulse", t, float(length_ms), pulse_pA, baseline_pA=q(0.0)))
        t += PULSE_PERIOD_MS
    return Protocol("passive", tuple(segs), t + gap_ms)


def active_protocol(
    r_estimate_MOhm: float,
    limit_pA: float,
    n_steps: int = 10,
    step_ms: float = 500.0,
    gap_ms: float = 300.0,
    lead_ms: float = 200.0,
    ramp_ms: float = 4000.0,
    noise_ms: float = 4000.0,
    seed: int = 0,
    dac: Any = None,
) -> Protocol:
    """Depolarising steps, a slow ramp and a seeded noise current."""
    top_pA = min(_passive_pA(ACTIVE_TARGET_MV, r_estimate_MOhm), limit_pA)
    # equal increments, rounded to 1 pA so the family reads well
    inc_pA = max(1.0, math.floor(top_pA / n_steps))
    segs = []
    t = lead_ms
    q = dac or _identity
    for i in range(n_steps):
        amp = q(inc_pA * (i + 1))
        segs.append(Segment(f"depol_{i + 1}", "step", t, step_ms, amp, baseline_pA=q(0.0)))
        t += step_ms + gap_ms
    ramp_top = min(1.25 * inc_pA * n_steps, limit_pA)
    segs.append(Segment("ramp", "ramp", t, ramp_ms, ramp_top))
    t += ramp_ms + gap_ms
    mean = 0.5 * inc_pA * n_steps
    sd = min(0.2 * inc_pA * n_steps, (limit_pA - mean) / 4)  # 4 SD inside the limit
    segs.append(Segment("noise", "noise", t, noise_ms, mean, sd_pA=sd, seed=seed))
    t += noise_ms + gap_ms
    return Protocol("active", tuple(segs), t)


def protocol_meta(protocol: Protocol, recordings: dict[str, str] | None = None) -> dict[str, Any]:
    """What a protocol's recording keeps about it (under ``PROTOCOL_META_KEY``):
    ``recordings`` names the recordings of the same characterisation (file names)."""
    return {
        "protocol": protocol.name,
        "duration_ms": float(protocol.duration_ms),
        "segments": [asdict(s) for s in protocol.segments],
        "recordings": dict(recordings or {}),
    }


def protocol_experiment(base: Any, protocol: Protocol) -> Experiment:
    """The base experiment with the protocol's current elements added."""
    exp = load_experiment(base)
    data = exp.to_dict()
    taken = {el["name"] for el in data["element"]}
    for seg in protocol.segments:
        el = seg.element()
        if el["name"] in taken:
            raise ValueError(f"element {el['name']!r}: the name is reserved for the protocol")
        data["element"].append(el)
    return load_experiment(data)


@dataclass
class ProtocolRun:
    """What a protocol recorded: V, the protocol's own current, and where it is stored."""

    protocol: Protocol
    rate_hz: float
    v_mV: np.ndarray
    stimulus_pA: np.ndarray
    i_total_pA: np.ndarray
    spike_threshold_mV: float
    nwb_path: Path | None = None
    experiment: Experiment | None = field(default=None, repr=False)
    # On a port: the board's sample number of each recorded row (a sample the host never
    # received leaves a gap) and the latency of the command in force there, in samples.
    sample_n: np.ndarray | None = None
    latency_samples: np.ndarray | None = None
    # Read back from a recording: the file names of its characterisation's recordings.
    companions: dict[str, str] = field(default_factory=dict)

    @property
    def dt_ms(self) -> float:
        return 1000.0 / self.rate_hz

    def index(self, t_ms: float) -> int:
        """First recorded row at or after ``t_ms`` (a current element is on from there)."""
        n = math.ceil(t_ms / self.dt_ms - 1e-9)
        if self.sample_n is None:
            return n
        return int(np.searchsorted(self.sample_n, n))

    def on_time(self, row: int, n_rows: int) -> bool:
        """Whether rows ``row + 1 .. row + n_rows`` each follow the one before (no sample
        missing) under the command of the sample before (latency 1: the timing model)."""
        if self.sample_n is None:
            return True
        lo, hi = row + 1, row + n_rows + 1
        if hi > self.v_mV.size:
            return False
        gaps_ok = bool(np.all(np.diff(self.sample_n[row:hi]) == 1))
        lat = self.latency_samples
        return gaps_ok and (lat is None or bool(np.all(lat[lo:hi] == 1)))


def run_protocol(
    base: Any,
    protocol: Protocol,
    port: str | None,
    out: Path | None = None,
    seed: int = 0,
    rig_clock: str = "wall",
    quantise: bool = True,
    recordings: dict[str, str] | None = None,
) -> ProtocolRun:
    """Run ``protocol`` on ``port`` (None: offline) and read back what it recorded
    (``recordings``: the file names of the characterisation's recordings, kept in each)."""
    exp = protocol_experiment(base, protocol)
    meta = {PROTOCOL_META_KEY: protocol_meta(protocol, recordings)}
    duration_s = protocol.duration_ms / 1000.0
    names = [ELEMENT_PREFIX + s.name for s in protocol.segments]
    if port is None:
        from clampcore.offline import simulate

        rec = simulate(exp, duration_s, seed=seed, quantise=quantise)
        v, i_total = rec.v_mV, rec.i_pA
        stim = np.sum([rec.i_element_pA[n] for n in names], axis=0)
        rec.extra.update(meta)
        nwb = rec.save(out) if out is not None else None
        sample_n = latency = None
    else:
        from clampcore.engine import Engine, RunOptions

        if out is None:
            raise ValueError("a run on a port needs an output path for its recording")
        options = RunOptions(seed=seed, rig_clock=rig_clock, extra_meta=meta)
        engine = Engine(exp, port, options, rig_factory=start_rig)
        engine.start(duration_s=duration_s, out=out)
        try:
            while not engine.wait(0.5):
                pass
        except KeyboardInterrupt:
            pass
        result = engine.finish()
        if result.error or result.nwb_path is None:
            raise RuntimeError(
                f"protocol {protocol.name!r} failed: {result.error or 'no recording'}"
            )
        run = read_protocol_run(result.nwb_path, protocol)
        expected = round(duration_s * exp.loop["rate_hz"])
        if run.sample_n is None or run.sample_n[-1] + 1 < expected:
            raise RuntimeError(
                f"protocol {protocol.name!r} ended early ({result.exit_reason}): "
                f"{run.v_mV.size} of {expected} samples"
            )
        run.experiment = exp
        return run
    return ProtocolRun(
        protocol=protocol,
        rate_hz=float(exp.loop["rate_hz"]),
        v_mV=np.asarray(v, dtype=float),
        stimulus_pA=np.asarray(stim, dtype=float),
        i_total_pA=np.asarray(i_total, dtype=float),
        spike_threshold_mV=float(exp.loop["spike_threshold_mV"]),
        nwb_path=Path(nwb) if nwb is not None else None,
        experiment=exp,
        sample_n=sample_n,
        latency_samples=latency,
    )


def read_protocol_run(nwb_path: Path, protocol: Protocol) -> ProtocolRun:
    """A protocol's recording read back from its NWB file (the protocol's own currents from
    its elements' recorded currents; the loop's settings from the stored experiment)."""
    from clampcore.nwb import read_nwb_summary

    return _run_of(read_nwb_summary(Path(nwb_path)), protocol, Path(nwb_path))


def read_protocol_recording(nwb_path: Path) -> ProtocolRun:
    """A characterisation protocol's recording read back with no other file: the protocol
    from its metadata (``PROTOCOL_META_KEY``); ``ValueError`` for any other recording."""
    from clampcore.nwb import read_nwb_summary

    rec = read_nwb_summary(Path(nwb_path))
    meta = rec["meta"].get(PROTOCOL_META_KEY)
    if not isinstance(meta, dict) or "segments" not in meta:
        raise ValueError(
            f"{nwb_path}: not a characterisation recording (no protocol in its metadata; "
            "clampcore characterize writes passive.nwb and active.nwb)"
        )
    segs = tuple(Segment(**seg) for seg in meta["segments"])
    protocol = Protocol(str(meta["protocol"]), segs, float(meta["duration_ms"]))
    run = _run_of(rec, protocol, Path(nwb_path))
    run.companions = {k: str(v) for k, v in meta.get("recordings", {}).items()}
    return run


def _run_of(rec: dict[str, Any], protocol: Protocol, nwb_path: Path) -> ProtocolRun:
    """The ``ProtocolRun`` of a recording read back by ``clampcore.nwb.read_nwb_summary``."""
    cols = rec["columns"]
    names = [f"i_pA/{ELEMENT_PREFIX}{s.name}" for s in protocol.segments]
    missing = [n for n in names if n not in cols]
    if missing:
        raise ValueError(
            f"{nwb_path}: not a recording of protocol {protocol.name!r} ({missing[0]})"
        )
    exp = load_experiment(rec["experiment_text"])
    counter = cols.get("sample_counter")
    sample_n = None
    if counter is not None:
        counter = np.asarray(counter, dtype=np.int64)
        sample_n = counter - counter[0]
    return ProtocolRun(
        protocol=protocol,
        rate_hz=float(rec["rate_hz"]),
        v_mV=np.asarray(rec["v_mV"], dtype=float),
        stimulus_pA=np.sum([cols[n] for n in names], axis=0),
        i_total_pA=np.asarray(rec["i_pA"], dtype=float),
        spike_threshold_mV=float(exp.loop["spike_threshold_mV"]),
        nwb_path=Path(nwb_path),
        experiment=exp,
        sample_n=sample_n,
        latency_samples=cols.get("latency_samples"),
    )
