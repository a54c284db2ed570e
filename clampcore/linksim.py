"""One experiment over one link model, three ways: ideal, current mode, law mode.

Time is the board's: sample k is taken at k·dt. A ``clampcore.links.Schedule``
says when the host handles which samples and when what it sends reaches the board.
Per tick k the board advances the model cell over (t_{k-1}, t_k] with the current
its DAC holds, reads V_k through its ADC, and writes its DAC:

- **law mode** (protocol v2): the host computed the law for sample k ahead (at its
  wake-up for some newest sample m, all laws up to m + lead); if that law has
  arrived by t_k, the board puts it in force; it evaluates the law in force at its
  fresh ADC count (``firmware_protocol.boardlaw.board_eval``: threshold-and-reset,
  spike detection, limit, lifetime) and the DAC holds the result over (t_k, t_{k+1}].
  A cell-driven synapse hears the board's spike flag of sample s - delay; a spike
  heard after that law was made is delivered with the next law made, and counted.
- **current mode** (protocol v1's split, kept for comparison): the host runs
  ``clampcore.step.step`` (threshold_reset and detection included) on every sample
  it receives and sends the current for the newest; a command that arrives within
  (t_k, t_{k+1}] is in force over that interval (the simulated rig's convention);
  the board only limits it and applies the lifetime.
- **ideal**: law mode over the ``ideal`` link with a lead of one sample: every law
  on time, the zero-latency clamp with the board's arithmetic.

With the same seed every element draws the same random numbers in every mode, so
the runs differ only by what the link does. ``run`` returns a ``LinkRun``.

Public names: ``LinkRun``, ``run``, ``link_loop``, ``LinkHost``, ``LinkTrace``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    counts_to_mV,
    counts_to_pA,
    mV_to_counts,
)
from clampcore.elements.neuron import S_SPIKED as NEURON_S_SPIKED
from clampcore.firmware_protocol.boardlaw import (
    BF_FLAG_RESET,
    BF_FLAG_SPIKE,
    BI_FAULT_COUNTS,
    board_eval,
    board_set_law,
)
from clampcore.jit import kernel
from clampcore.law import (
    CURRENT_MODE,
    LAW_MODE,
    BoardArrays,
    board_arrays,
    current_to_law,
    law_scale,
    make_law,
)
from clampcore.lawloop import board_reset_current
from clampcore.links import LINKS, Link, Schedule, schedule
from clampcore.program import ProgramArrays, build_program
from clampcore.simulated_rig.cells import (
    CellArrays,
    cell_advance,
    cell_measure_mV,
    cell_v_true_mV,
    make_cell,
)
from clampcore.step import (
    cell_currents,
    hist_record_cell_spike,
    queue_late_cell_spike,
    step,
)

_US_PER_MS = 1000.0


class LinkHost(NamedTuple):
    """The host's side of a link run: converters, the laws it made and when each arrives."""

    conv: np.ndarray  # the board's converters and the amplifier (clampcore.calibration)
    scale: np.ndarray  # the law's units for conv (clampcore.law.law_scale)
    laws: np.ndarray  # float32 (n + lead + 1, 4): the law of every sample
    law_arrive_us: np.ndarray  # when each law reaches the board (inf: never sent)
    cmd_pA: np.ndarray  # current mode: the command of each wake-up
    new_law: np.ndarray  # float32[4]: scratch
    neuron_rows: np.ndarray  # int64: program rows of the virtual neurons
    counters: np.ndarray  # int64[2]: [0] late spikes, [1] the newest sample laws exist for


# What a link run records per sample: ``LinkRun``'s arrays (described there), in order.
TRACE_FIELDS = ("adc", "v_true_mV", "i_pA", "flags", "g_nS", "i_element_pA", "neuron_spikes")
LinkTrace = NamedTuple("LinkTrace", [(f, np.ndarray) for f in TRACE_FIELDS])  # type: ignore[misc]


@kernel
def link_loop(
    law_mode: bool,
    lead: int,
    sched: Schedule,
    cell: CellArrays,
    pa: ProgramArrays,
    board: BoardArrays,
    host: LinkHost,
    trace: LinkTrace,
) -> None:
    """Run every sample of ``out_adc``; see the module docstring. Outputs in place.

    ``laws`` (n + lead + 1, 4) and ``law_arrive_us`` hold the laws the host computed
    and when each reaches the board; ``cmd_pA`` (one per wake-up) and ``new_law``
    (float32[4]) are scratch space. ``counters``: [0] late spikes (heard after the
    law they should have changed was made; delivered with the next law made,
    ``clampcore.step.queue_late_cell_spike``), [1] the newest sample laws exist for.
    """
    wake_newest, wake_us, arrive_us = sched.wake_newest, sched.wake_us, sched.arrive_us
    cell_kind, cell_p, cell_s, cell_rng = cell
    kind, params, state, g_out, i_out = pa.kind, pa.params, pa.state, pa.g_out, pa.i_out
    loop_p, loop_s = pa.loop_p, pa.loop_s
    bf, bi, bs, law, table = board
    conv, scale, laws, law_arrive_us, cmd_pA, new_law, neuron_rows, counters = host
    out_adc, out_v_true, out_i, out_flags, out_g, out_i_el, out_nspk = trace
    n = out_adc.shape[0]
    dt_ms = loop_p[0]
    dt_us = dt_ms * _US_PER_MS
    hi = -1  # laws exist for samples 0..hi
    seen = -1  # the host has samples 0..seen
    w = 0  # next wake-up
    delivered = 0  # current mode: next command to deliver
    if law_mode:
        for s in range(min(lead + 1, n)):  # sent before the start
            make_law(s, scale, pa, laws[s])
            law_arrive_us[s] = 0.0
            _put_row(out_g, s, g_out)
            _put_row(out_i_el, s, i_out)
            _neuron_spikes(state, neuron_rows, out_nspk, s)
            hi = s
    i_applied = counts_to_pA(conv, bi[BI_FAULT_COUNTS])
    for k in range(n):
        t_us = k * dt_us
        if k > 0:
            cell_advance(cell_kind, cell_p, cell_s, cell_rng, i_applied, dt_ms)
        v = cell_measure_mV(cell_kind, cell_p, cell_s, cell_rng, i_applied)
        out_v_true[k] = cell_v_true_mV(cell_kind, cell_p, cell_s)
        adc = mV_to_counts(conv, v)
        out_adc[k] = adc
        if law_mode:
            if k <= hi and law_arrive_us[k] <= t_us:
                board_set_law(bs, law, laws[k], k)
            packed = board_eval(adc, k, bf, bi, bs, law, table)
            out_flags[k] = packed >> 16
            i_applied = counts_to_pA(conv, packed & 0xFFFF)
        # The host's wake-ups before the next tick.
        while w < wake_us.shape[0] and wake_us[w] < t_us + dt_us:
            newest = wake_newest[w]
            for m in range(seen + 1, newest + 1):
                spiked = law_mode and (out_flags[m] & BF_FLAG_SPIKE) != 0
                if law_mode:
                    hist_record_cell_spike(m, spiked, pa.spike_ring)
                    if spiked:
                        counters[0] += queue_late_cell_spike(m, hi, pa)
                else:
                    v_host = counts_to_mV(conv, float(out_adc[m]))
                    cmd_pA[w] = step(v_host, m, pa)
                    # In current mode the host detects the cell's spikes (and runs
                    # threshold_reset): its decision replaces the board's.
                    out_flags[m] &= ~BF_FLAG_SPIKE
                    if loop_s[0]["cell_spiked"]:
                        out_flags[m] |= BF_FLAG_SPIKE
                    _put_row(out_g, m, g_out)
                    _put_row(out_i_el, m, i_out)
                    _neuron_spikes(state, neuron_rows, out_nspk, m)
            seen = max(seen, newest)
            if law_mode:
                for s in range(hi + 1, min(newest + lead, n - 1) + 1):
                    make_law(s, scale, pa, laws[s])
                    law_arrive_us[s] = arrive_us[w]
                    _put_row(out_g, s, g_out)
                    _put_row(out_i_el, s, i_out)
                    _neuron_spikes(state, neuron_rows, out_nspk, s)
                    hi = s
            w += 1
        if not law_mode:
            # Commands that arrive within (t_k, t_k+1] drive that interval.
            newest_cmd = -1
            while delivered < w and arrive_us[delivered] <= t_us + dt_us:
                newest_cmd = delivered
                delivered += 1
            if newest_cmd >= 0:
                current_to_law(scale, cmd_pA[newest_cmd], new_law)
                board_set_law(bs, law, new_law, k)
            packed = board_eval(adc, k, bf, bi, bs, law, table)
            # The host's spike decision for sample k may already be in (see above).
            out_flags[k] = ((packed >> 16) & ~BF_FLAG_SPIKE) | (out_flags[k] & BF_FLAG_SPIKE)
            i_applied = counts_to_pA(conv, packed & 0xFFFF)
        out_i[k] = i_applied
    if law_mode:
        # Each sample's element currents at the V the cell had (the host keeps g until V comes).
        for k in range(min(n, hi + 1)):
            v_k = counts_to_mV(conv, float(out_adc[k]))
            # (No live changes here: every law's reversal potentials are the same, pa.e_out.)
            cell_currents(v_k, kind, params, out_g[k], out_i_el[k], pa.e_out)
            reset_on = (out_flags[k] & BF_FLAG_RESET) != 0
            board_reset_current(v_k, reset_on, kind, out_g[k], out_i_el[k], pa.e_out)
    counters[1] = hi


@kernel
def _neuron_spikes(state: np.ndarray, rows: np.ndarray, out: np.ndarray, s: int) -> None:
    for j in range(rows.shape[0]):
        out[s, j] = state[rows[j], NEURON_S_SPIKED] != 0.0


@kernel
def _put_row(dst: np.ndarray, row: int, src: np.ndarray) -> None:
    for j in range(src.shape[0]):
        dst[row, j] = src[j]


@dataclass
class LinkRun:
    """What one run over a link did, per sample: the ADC count, the true membrane
    potential, the current applied over the following interval, the board's flags,
    each element's conductance and current; plus bytes and late spikes."""

    mode: str
    link: str
    rate_hz: float
    lead_samples: int
    adc: np.ndarray
    v_true_mV: np.ndarray
    i_pA: np.ndarray
    flags: np.ndarray
    g_nS: np.ndarray
    i_element_pA: np.ndarray
    up_bytes: int
    down_bytes: int
    late_spikes: int
    neuron_spikes: np.ndarray | None = None  # bool (n, virtual neurons)

    @property
    def spikes(self) -> np.ndarray:
        return (self.flags & BF_FLAG_SPIKE) != 0


def run(
    experiment: Any,
    duration_s: float,
    link: str | Link = "direct",
    mode: str = LAW_MODE,
    lead_ms: float = 10.0,
    lifetime_ms: float = 2.0,
    stall_ms: float = 0.0,
    seed: int = 0,
) -> LinkRun:
    """Run ``experiment`` for ``duration_s`` over ``link`` in ``mode`` ("law", "current"
    or "ideal"). ``lead_ms``: how far ahead the host computes laws; ``lifetime_ms``:
    how long the board holds a law past its own sample."""
    program = build_program(experiment, seed=seed)
    exp = program.experiment
    rate = float(exp.loop["rate_hz"])
    n = round(duration_s * rate)
    if n < 1:
        raise ValueError(f"duration_s = {duration_s!r}: shorter than one sample")
    law_mode = mode in (LAW_MODE, "ideal")
    if mode == "ideal":
        link, lead = LINKS["ideal"], 1
    else:
        lead = max(1, round(lead_ms * rate / 1000.0))
    lk = LINKS[link] if isinstance(link, str) else link
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, exp.amplifier)
    lifetime = round(lifetime_ms * rate / 1000)
    boards = board_arrays(program, conv, LAW_MODE if law_mode else CURRENT_MODE, lifetime)
    sched = schedule(lk, n, rate, lead, law_mode, boards.table.size > 0, stall_ms, seed)
    cell_cfg = dict(exp.cell)
    cell_cfg["seed"] = int(cell_cfg["seed"]) + (int(seed) << 20)
    cell = make_cell(cell_cfg, exp.dt_ms)
    n_el = len(program.names)
    neuron_rows = program.spike_rows()
    trace = LinkTrace(
        adc=np.zeros(n, np.int64),
        v_true_mV=np.zeros(n),
        i_pA=np.zeros(n),
        flags=np.zeros(n, np.int64),
        g_nS=np.zeros((n, n_el)),
        i_element_pA=np.zeros((n, n_el)),
        neuron_spikes=np.zeros((n, neuron_rows.size), dtype=np.bool_),
    )
    counters = np.zeros(2, np.int64)
    host = LinkHost(
        conv,
        law_scale(conv),
        np.zeros((n + lead + 1, 4), np.float32),
        np.full(n + lead + 1, np.inf),
        np.zeros(sched.wake_us.size),
        np.zeros(4, np.float32),
        neuron_rows,
        counters,
    )
    link_loop(law_mode, lead, sched, cell, program.arrays(), boards, host, trace)
    return LinkRun(
        mode=mode,
        link=lk.name,
        rate_hz=rate,
        lead_samples=lead,
        up_bytes=sched.up_bytes,
        down_bytes=sched.down_bytes,
        late_spikes=int(counters[0]),
        **trace._asdict(),
    )
