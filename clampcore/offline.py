"""Offline closed loop: the experiment's step against a model cell, faster than real time.

For every sample n the model cell is advanced over (t_{n-1}, t_n] with the
command in force at sample n, its membrane potential is read through the same
ADC and amplifier scaling as on the simulated rig, ``step`` computes the
command, and that command is in force from sample n + 1 + extra_delay_samples
on (through the DAC and amplifier scaling). This is the timing model of the
real loop (DEVELOPERS.md), and the same ``step`` the serial loop calls.

Public names: ``simulate``, ``Recording``, ``closed_loop``, ``ClosedLoopTrace``,
``recording_from_arrays``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_mV,
    counts_to_pA,
    current_limit_problem,
    pA_to_counts,
)
from clampcore.elements import CONDUCTANCE_KINDS
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.experiment import Experiment
from clampcore.jit import kernel
from clampcore.law import LAW_MODE
from clampcore.lawloop import host_flags_of
from clampcore.program import Program, ProgramArrays, build_program
from clampcore.roundtrip import RoundTrip, adc_round_trip_mV, dac_round_trip_pA, round_trip_arrays
from clampcore.simulated_rig.cells import CellArrays, cell_advance, cell_measure_mV, make_cell
from clampcore.step import (
    FAULT_BAD_V,
    FAULT_NONFINITE,
    FLAG_LIMITED,
    step,
)


class ClosedLoopTrace(NamedTuple):
    """What ``closed_loop`` writes, per sample, and its scratch space."""

    spike_rows: np.ndarray  # int64: neuron/threshold rows whose spike flags follow the cell's
    commands_pA: np.ndarray  # (delay_samples,): the commands still on their way to the cell
    v_mV: np.ndarray
    i_pA: np.ndarray
    g_nS: np.ndarray  # (n, elements)
    i_element_pA: np.ndarray  # (n, elements)
    spikes: np.ndarray  # bool (n, 1 + spike rows): the cell's, then spike_rows'
    flags: np.ndarray  # int64 (n,)


@kernel
def closed_loop(
    n_samples: int,
    delay_samples: int,
    quantise: bool,
    conv: np.ndarray,
    rt: RoundTrip,
    cell: CellArrays,
    pa: ProgramArrays,
    out: ClosedLoopTrace,
) -> None:
    """Run ``n_samples`` of the closed loop, writing every output array in place.

    ``commands_pA`` (length ``delay_samples``) holds the commands still on their
    way to the cell; ``rt`` makes the converter round trips of ``conv`` (exactly, in
    fewer steps: ``clampcore.roundtrip``); ``spike_rows`` lists the neuron rows whose
    spike flag is recorded after the cell's (column 0 of ``out_spikes``).
    """
    cell_kind, cell_p, cell_s, cell_rng = cell
    state, g_out, i_out, loop_p, loop_s = pa.state, pa.g_out, pa.i_out, pa.loop_p, pa.loop_s
    spike_rows, commands_pA, out_v, out_i, out_g, out_i_el, out_spikes, out_flags = out
    dt_ms = loop_p[0]
    zero_counts = pA_to_counts(conv, 0.0)
    applied_pA = counts_to_pA(conv, zero_counts) if quantise else 0.0
    slot = 0  # commands_pA[slot]: the command sent delay_samples ago, replaced by this one
    for n in range(n_samples):
        if n >= delay_samples:
            applied_pA = commands_pA[slot]
        if n > 0:
            cell_advance(cell_kind, cell_p, cell_s, cell_rng, applied_pA, dt_ms)
        v_mV = cell_measure_mV(cell_kind, cell_p, cell_s, cell_rng, applied_pA)
        if quantise:
            v_mV = adc_round_trip_mV(conv, rt.coef, rt.adc_mV, v_mV)
        # step writes every element's g and i of this sample straight into the recording.
        kind, params, state, rng, trains = pa.kind, pa.params, pa.state, pa.rng, pa.trains
        row = ProgramArrays(
            kind, params, state, rng, trains, out_g[n], out_i_el[n], pa.e_out, loop_p, loop_s,
            pa.spike_ring,
        )  # fmt: skip
        i_pA = step(v_mV, n, row)
        commands_pA[slot] = dac_round_trip_pA(conv, rt.coef, rt.dac_pA, i_pA) if quantise else i_pA
        slot = slot + 1 if slot + 1 < delay_samples else 0
        out_v[n] = v_mV
        out_i[n] = i_pA
        out_spikes[n, 0] = loop_s[0]["cell_spiked"]
        for j in range(spike_rows.shape[0]):
            out_spikes[n, j + 1] = state[spike_rows[j], NEURON_S_SPIKED] != 0.0
        out_flags[n] = loop_s[0]["flags"]
    for r in range(g_out.shape[0] if n_samples > 0 else 0):  # the last sample, as after a run
        g_out[r] = out_g[n_samples - 1, r]
        i_out[r] = out_i_el[n_samples - 1, r]


@dataclass
class Recording:
    """What a run recorded: traces per sample, spikes, faults, and what ran."""

    rate_hz: float
    v_mV: np.ndarray
    i_pA: np.ndarray
    g_nS: dict[str, np.ndarray]
    i_element_pA: dict[str, np.ndarray]
    spikes: dict[str, np.ndarray]  # source name -> bool per sample ("cell" first)
    flags: np.ndarray
    faults: dict[str, int]
    experiment: Experiment
    seed: int = 0
    source: str = "offline simulation"
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def t_s(self) -> np.ndarray:
        return np.arange(self.v_mV.size) / self.rate_hz

    @property
    def duration_s(self) -> float:
        return self.v_mV.size / self.rate_hz

    @property
    def spike_times_s(self) -> np.ndarray:
        """The recorded cell's spike times, s."""
        return np.flatnonzero(self.spikes["cell"]) / self.rate_hz

    def neuron_spike_times_s(self, name: str) -> np.ndarray:
        return np.flatnonzero(self.spikes[name]) / self.rate_hz

    def summary(self) -> dict[str, float]:
        n_spikes = int(self.spikes["cell"].sum())
        return {
            "duration_s": self.duration_s,
            "spikes": n_spikes,
            "rate_hz": n_spikes / self.duration_s if self.duration_s else 0.0,
            "mean_current_pA": float(np.mean(self.i_pA)) if self.i_pA.size else 0.0,
            "peak_current_pA": float(np.max(np.abs(self.i_pA))) if self.i_pA.size else 0.0,
            "mean_v_mV": float(np.mean(self.v_mV)) if self.v_mV.size else 0.0,
            "fault_samples": self.faults["fault_samples"],
            "limited_samples": self.faults["limited_samples"],
        }

    def summary_text(self) -> str:
        s = self.summary()
        return (
            f"{s['duration_s']:.3g} s: {s['spikes']} spikes ({s['rate_hz']:.2f} Hz), "
            f"mean V {s['mean_v_mV']:.2f} mV, current mean {s['mean_current_pA']:.1f} pA "
            f"peak {s['peak_current_pA']:.1f} pA, faults {s['fault_samples']}, "
            f"samples at the current limit {s['limited_samples']}"
        )

    def columns(self) -> dict[str, np.ndarray]:
        """Per-sample columns named as the journal and NWB writer expect."""
        cols: dict[str, np.ndarray] = {"v_mV": self.v_mV, "i_pA": self.i_pA}
        for name, g in self.g_nS.items():
            cols[f"g_nS/{name}"] = g
        for name, i in self.i_element_pA.items():
            cols[f"i_pA/{name}"] = i
        for name, s in self.spikes.items():
            cols[f"spike/{name}"] = s.astype(np.float64)
        return cols

    def save(self, path: str | Path, overwrite: bool = False) -> Path:
        """Write ``.npz`` or, for a ``.nwb`` path, NWB (an existing NWB only if ``overwrite``)."""
        path = Path(path)
        if path.suffix == ".nwb":
            from clampcore.recorder import write_recording_nwb

            return write_recording_nwb(self, path, overwrite=overwrite)
        np.savez_compressed(path, t_s=self.t_s, **self.columns())
        return path if path.suffix == ".npz" else path.with_suffix(path.suffix + ".npz")


def simulate(
    experiment: Any,
    duration_s: float,
    seed: int = 0,
    quantise: bool = True,
    mode: str | None = None,
) -> Recording:
    """Run ``experiment`` (path, TOML text, dict or Experiment) for ``duration_s`` offline.

    ``quantise`` passes V and I through the simulated rig's 16-bit converters and
    the ``[amplifier]`` scaling, as a run on the simulated rig does. ``mode`` ("current"
    or "law"; None: the experiment's ``[loop] mode``) chooses the split: in law mode the
    board's arithmetic evaluates every law on time at its own V (``clampcore.linksim``'s
    ideal clamp), which a lockstep run in law mode equals sample for sample; law mode is
    always quantised (the board deals in counts).
    """
    program = build_program(experiment, seed=seed)
    exp = program.experiment
    if (mode or exp.loop["mode"]) == LAW_MODE:
        return _simulate_law(program, duration_s, seed)
    n_samples = round(duration_s * exp.loop["rate_hz"])
    if n_samples < 1:
        raise ValueError(f"duration_s = {duration_s!r}: shorter than one sample")
    cell_cfg = dict(exp.cell)
    cell_cfg["seed"] = int(cell_cfg["seed"]) + (int(seed) << 20)
    cell = make_cell(cell_cfg, exp.dt_ms)
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, exp.amplifier)
    problem = current_limit_problem(conv, exp.loop["max_current_pA"]) if quantise else None
    if problem:  # the live engine's rule (clampcore.calibration)
        raise ValueError(f"refusing to simulate: {problem}")
    n_el = len(program.names)
    rows = program.spike_rows()
    delay = 1 + int(exp.loop["extra_delay_samples"])
    # Every entry is written by the loop (out_g and out_i_el row by row by step itself).
    out_v = np.empty(n_samples)
    out_i = np.empty(n_samples)
    out_g = np.empty((n_samples, n_el))
    out_i_el = np.empty((n_samples, n_el))
    out_spikes = np.empty((n_samples, 1 + rows.size), dtype=np.bool_)
    out_flags = np.empty(n_samples, dtype=np.int64)
    trace = ClosedLoopTrace(
        rows, np.zeros(delay), out_v, out_i, out_g, out_i_el, out_spikes, out_flags
    )
    closed_loop(
        n_samples, delay, quantise, conv, round_trip_arrays(conv), cell, program.arrays(), trace
    )
    return recording_from_arrays(
        program, out_v, out_i, out_g, out_i_el, out_spikes, out_flags, seed=seed
    )


def _simulate_law(program: Program, duration_s: float, seed: int) -> Recording:
    from clampcore.linksim import run as run_link  # linksim builds on this module's layer

    run = run_link(program.experiment, duration_s, mode="ideal", seed=seed)
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, program.experiment.amplifier)
    v_mV = np.array([counts_to_mV(conv, float(c)) for c in run.adc])
    flags = np.zeros(run.flags.size, dtype=np.int64)
    host_flags_of(run.flags, flags)
    spikes = np.column_stack([run.spikes, run.neuron_spikes])
    return recording_from_arrays(
        program, v_mV, run.i_pA, run.g_nS, run.i_element_pA, spikes, flags, seed=seed,
        source="offline simulation, law mode",
    )  # fmt: skip


def recording_from_arrays(
    program: Program,
    v_mV: np.ndarray,
    i_pA: np.ndarray,
    g: np.ndarray,
    i_el: np.ndarray,
    spikes: np.ndarray,
    flags: np.ndarray,
    seed: int = 0,
    source: str = "offline simulation",
) -> Recording:
    """Name the columns of a run's arrays (shared by simulation and the serial loop)."""
    names, kinds = program.names, program.kinds
    spike_names = program.spike_sources()
    return Recording(
        rate_hz=float(program.experiment.loop["rate_hz"]),
        v_mV=v_mV,
        i_pA=i_pA,
        g_nS={
            n: g[:, r]
            for r, (n, k) in enumerate(zip(names, kinds, strict=True))
            if k in CONDUCTANCE_KINDS
        },
        i_element_pA={
            n: i_el[:, r]
            for r, (n, k) in enumerate(zip(names, kinds, strict=True))
            if k != "neuron"
        },
        spikes={n: spikes[:, j] for j, n in enumerate(spike_names)},
        flags=flags,
        faults={
            "fault_samples": int(np.count_nonzero(flags & (FAULT_BAD_V | FAULT_NONFINITE))),
            "limited_samples": int(np.count_nonzero(flags & FLAG_LIMITED)),
        },
        experiment=program.experiment,
        seed=seed,
        source=source,
    )
