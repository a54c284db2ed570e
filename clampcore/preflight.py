"""Whether and how a run starts on a board: a pure decision from HELLO and the experiment.

``preflight(hello, experiment, options)`` is everything the loop process decides
before it touches the board beyond the handshake: it needs no port, so every refusal
is tested without one (``tests/test_preflight.py``). It returns a ``Plan`` (the mode,
the rate, the watchdog, the conversion array, the fault value, law mode's look-ahead
and lifetime, the stability report, a notice) or raises ``PreflightError`` with a one-line
reason naming the value, the element or the option.

The rules, in the order they are checked:

1. the amplifier calibration must be given (a simulated rig may use the default);
2. ``rate_hz`` at most the board's ``max_rate_hz`` (HELLO, PROTOCOL.md §4.1);
3. the board's DAC and the amplifier must reach ±``max_current_pA``;
4. the mode: law mode when asked for and the board's HELLO has the law capability;
   otherwise current mode, with a notice when law mode was asked for;
5. law mode: at most the board's number of Mg-blocked groups (the synapses named), at
   most one threshold_reset element (a board evaluates one), every cell-driven synapse's
   delay at least the shortest look-ahead + 1 sample (the minimum-delay rule), and the
   look-ahead within the board's law queue (HELLO ``law_queue``);
6. loop stability (``clampcore.stability``) with the delay of the mode that will run.

Public names: ``preflight``, ``Plan``, ``PreflightError``, ``law_lead_samples``, ``MIN_LEAD_MS``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from clampcore import stability
from clampcore.board_link import board_converters
from clampcore.calibration import conversion_array, current_limit_problem, pA_to_counts
from clampcore.experiment import Experiment, load_experiment
from clampcore.firmware_protocol import codec
from clampcore.law import CURRENT_MODE, LAW_MODE
from clampcore.program import delay_samples, mg_groups

# Law mode's shortest look-ahead: covers a pseudo-terminal's measured turnaround (median
# 2.7 µs, p99.9 33 µs; README, Benchmarks) and a high-speed USB board's 125 µs microframes
# many times over; a full-speed USB board needs about 2 ms (1 ms frames both ways).
MIN_LEAD_MS = 1.0


class PreflightError(RuntimeError):
    """The run cannot start on this board; the message says why, naming the value."""


@dataclass(frozen=True)
class Plan:
    """How the run starts (everything ``preflight`` decided)."""

    mode: str  # LAW_MODE or CURRENT_MODE
    rate_hz: int
    watchdog_us: int
    conv: np.ndarray  # clampcore.calibration.conversion_array for this board and amplifier
    zero_counts: int  # the DAC count of 0 pA: the fault value
    lead_samples: int  # law mode's look-ahead (0 in current mode)
    lifetime_samples: int  # law mode's lifetime of a law (0 in current mode)
    stability: stability.StabilityReport
    notice: str | None = None


def _experiment(experiment: Any) -> Experiment:
    return getattr(experiment, "experiment", None) or load_experiment(experiment)


def law_lead_samples(experiment: Any, law_queue: int | None = None, batch: int = 1) -> int:
    """Law mode's look-ahead in samples: ``lead_ms``, shortened to fit every cell-driven
    synapse's delay (at least lead + 1 samples: the minimum-delay rule of parallel network
    simulation). ``experiment``: anything ``load_experiment`` takes, or a ``Program``.

    Raises ``PreflightError`` naming the synapse when a delay leaves less than ``MIN_LEAD_MS``
    plus the board's batching (a board that sends ``batch`` samples a frame, HELLO
    ``max_samples``, lets the host hear a sample up to batch - 1 samples late), and naming
    ``lead_ms`` when the look-ahead exceeds ``law_queue`` (the laws the board holds ahead,
    from its HELLO; None: no limit).
    """
    exp = _experiment(experiment)
    rate = float(exp.loop["rate_hz"])
    lead = max(1, round(exp.loop["lead_ms"] * rate / 1000.0))
    floor = max(1, math.ceil(MIN_LEAD_MS * rate / 1000.0)) + max(0, batch - 1)
    for e in exp.elements:
        if e["kind"] == "synapse" and e["source"] == "cell":
            d = delay_samples(e["delay_ms"], exp.dt_ms)
            if d - 1 < floor:
                shortest = (floor + 1) * 1000.0 / rate
                raise PreflightError(
                    f"refusing to start: synapse '{e['name']}': delay_ms = {e['delay_ms']:g} is "
                    f"too short for law mode on this link; the shortest it allows is "
                    f"{shortest:g} ms (the look-ahead must cover the link's round trip)"
                )
            lead = min(lead, d - 1)
    return _within_queue(lead, law_queue, rate, f"[loop] lead_ms = {exp.loop['lead_ms']:g}")


def _within_queue(lead: int, law_queue: int | None, rate: float, what: str) -> int:
    """``lead``, or ``PreflightError`` naming ``what`` when it exceeds ``law_queue``."""
    # The board drops a law one queue or more ahead of its next sample (PROTOCOL.md §10.6);
    # the host sends laws up to newest seen + lead, at most lead - 1 ahead of the next one.
    if law_queue is not None and lead > law_queue:
        longest = law_queue * 1000.0 / rate
        raise PreflightError(
            f"refusing to start: {what} is {lead} samples at {rate:g} Hz, but this board "
            f"holds at most {law_queue} laws ahead: set lead_ms to {longest:g} or less "
            "(or lower rate_hz)"
        )
    return lead


def _law_refusals(exp: Experiment, hello: codec.Hello) -> None:
    groups = mg_groups(exp)
    if len(groups) > hello.mg_groups:
        names = "; ".join(f"{mg:g} mM: {', '.join(n)}" for mg, n in sorted(groups.items()))
        raise PreflightError(
            f"refusing to start: the board evaluates {hello.mg_groups} Mg-blocked group(s), "
            f"the experiment has {len(groups)} ({names}); set mg_mM = 0 on those synapses or "
            "run in current mode (--mode current)"
        )
    resets = [e["name"] for e in exp.elements if e["kind"] == "threshold_reset"]
    if len(resets) > 1:
        raise PreflightError(
            f"refusing to start: a board evaluates one threshold_reset element, not "
            f"{len(resets)} ({', '.join(resets)})"
        )


def preflight(hello: codec.Hello, experiment: Any, options: Any, simulated: bool = False) -> Plan:
    """Decide whether and how the run starts (module docstring); raise ``PreflightError`` if not.

    ``options``: a ``clampcore.engine.RunOptions`` (mode, watchdog_ms, override_stability,
    delay_samples, cell_c_pF, cell_g_nS). ``simulated``: the board is the simulated rig,
    which may run with the default calibration and whose current mode has a one-sample loop.
    """
    exp = _experiment(experiment)
    if not exp.amplifier_given and not simulated:
        raise PreflightError(
            "refusing to start: the experiment has no [amplifier] section, so ADC/DAC counts "
            "cannot be converted to mV and pA (give vm_mV_per_V and command_pA_per_V)"
        )
    rate = round(exp.loop["rate_hz"])
    if rate > hello.max_rate_hz:
        raise PreflightError(
            f"refusing to start: [loop] rate_hz = {rate} is above this board's maximum, "
            f"{hello.max_rate_hz} Hz"
        )
    adc, dac = board_converters(hello)
    conv = conversion_array(adc, dac, exp.amplifier)
    problem = current_limit_problem(conv, exp.loop["max_current_pA"])
    if problem:
        raise PreflightError(f"refusing to start: {problem}")
    watchdog_us = int(
        np.clip(options.watchdog_ms * 1000, hello.watchdog_min_us, hello.watchdog_max_us)
    )
    mode, notice = CURRENT_MODE, None
    lead = lifetime = 0
    if (options.mode or exp.loop["mode"]) == LAW_MODE:
        if hello.evaluates_laws:
            mode = LAW_MODE
            _law_refusals(exp, hello)
            lead = law_lead_samples(exp, hello.law_queue, hello.max_samples)
            # An explicit look-ahead (RunOptions.lead_samples) replaces the synapses' bound: a
            # cell-driven synapse whose delay it exceeds gets its spikes late (counted).
            override = getattr(options, "lead_samples", None)
            if override:
                lead = _within_queue(
                    int(override), hello.law_queue, rate, f"lead_samples = {override}"
                )
            lifetime = max(1, round(exp.loop["lifetime_ms"] * rate / 1000.0))
        else:
            notice = (
                f"the board '{hello.identity}' does not evaluate the current law (its HELLO "
                "has no law capability): running in current mode, where every current is "
                "computed from a V one link round trip old (PROTOCOL.md §10)"
            )
    delay = options.delay_samples
    if delay is None:
        delay = _default_delay(mode, simulated)
    report = stability.assess(exp, delay, options.cell_c_pF, options.cell_g_nS)
    try:
        stability.guard(report, options.override_stability, stability.OVERRIDE_OPTION)
    except stability.StabilityError as exc:
        raise PreflightError(str(exc)) from None
    return Plan(
        mode=mode,
        rate_hz=rate,
        watchdog_us=watchdog_us,
        conv=conv,
        zero_counts=pA_to_counts(conv, 0.0),
        lead_samples=lead,
        lifetime_samples=lifetime,
        stability=report,
        notice=notice,
    )


def _default_delay(mode: str, simulated: bool) -> int:
    """The loop delay the stability guard assumes for the mode that will run."""
    if mode == LAW_MODE:
        return stability.DEFAULT_DELAY_SAMPLES  # the board's own step (PROTOCOL.md §10.3)
    return stability.DEFAULT_DELAY_SAMPLES if simulated else stability.HARDWARE_DELAY_SAMPLES
