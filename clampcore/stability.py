"""Loop-stability guard: how much virtual conductance a sampled, delayed loop can feed back.

Two limits.

**Static.** The membrane's total conductance — the cell's own ``g_cell`` plus every
virtual conductance, a negative leak included — must stay positive; otherwise the
fixed point is repelling and V runs away whatever the loop's speed.

**Dynamic.** A conductance ``g`` (nS) computed from V measured ``D`` samples earlier
is fed back with a delay. Between samples the board holds the command (zero-order
hold) and the passive membrane integrates exactly, so the deviation ``x`` of V from
its fixed point obeys, sample to sample (the loop's timing model, DEVELOPERS.md:
the command computed from sample n is in force over the interval ending at sample
n + D)::

    x_n = r·x_{n-1} − q·x_{n-D},    r = exp(−g_cell·dt/C),    q = (1 − r)·g/g_cell

(for ``g_cell`` → 0, ``q`` → ``a = g·dt/C``). With ``k = D − 1`` this is
``x_{n+1} = r·x_n − q·x_{n−k}``, whose characteristic polynomial is
``z^{k+1} − r·z^k + q``; the loop is stable when all its roots lie inside the unit
circle. Without the cell's own leak (``r = 1``) it is the equation of Levin & May
(1976, Math. Biosci. 31:367, "A note on difference-delay equations")::

    x_{n+1} = x_n − a·x_{n−k}   is asymptotically stable iff   0 < a < 2·cos(k·π/(2k + 1)).

So with ``D = 1`` (the command in force at the next sample: ``k = 0``) the bound
is ``a < 2``, i.e. ``g < 2·C/dt``, the forward-Euler limit; every extra sample of
delay lowers it. For large ``k``, ``2·cos(kπ/(2k+1)) = 2·sin(π/(2(2k+1))) ≈
π/(2k+1)``, i.e. ``(g/C)·(k + ½)·dt < π/2``: the continuous bound ``a·d < π/2`` of
``dx/dt = −a·x(t − d)`` (Hayes 1950, J. London Math. Soc. 25:226) with the
effective delay ``d = (D − ½)·dt`` (the pure delay plus half a sample of hold);
with ``d = k·dt`` the ratio of the two bounds tends to 1 as ``k`` grows
(``stability_bound`` returns both; tests/test_stability.py checks them against the
roots and against the simulated difference equation).

With the cell's own leak (``r < 1``) no closed form is used: the largest stable
``q`` is found by bisection on the spectral radius of the polynomial (the stable
set is the interval ``(r − 1, q*)``: its lower end, a root at ``z = 1``, is exactly
the static limit ``g = −g_cell``). The largest stable total virtual conductance is
then ``g* = q*·g_cell/(1 − r)``.

**Delay.** ``D`` depends on where the current is computed. The host computing it
(current mode): ``D`` is the link latency in samples — 1 on the simulated rig (in
lockstep the command is in force at the next sample; offline ``1 +
extra_delay_samples``), the measured latency on hardware (``clampcore run``
prints it after each run). The board evaluating the current law from its own V
(protocol v2, ``[loop] mode = "law"``): ``D`` is the board's ADC-to-DAC step,
``delay_samples`` (default 1: the board writes the DAC in the tick of its ADC reading,
PROTOCOL.md §10.3), whatever the link's latency.

Which conductances count: every enabled element acting on the recorded cell —
``leak`` with its signed ``g_nS`` (always on: it also sets the static limit),
``threshold_reset`` its clamp ``g_nS`` (fed back during the refractory period),
``synapse`` onto the cell its ``g_max_nS`` (one event's peak; overlapping events
can sum above it), ``noise`` ``g_mean_nS + 3·g_sd_nS`` (exceeded 0.13% of the time
by a Gaussian: common practice). Cell values: the passive cell's ``leak_nS``; for
the Hodgkin–Huxley cell its instantaneous (chord) conductance at rest — at the
loop's oscillation frequency (a fraction of the sample rate) the gates cannot
follow, so the instantaneous conductance is the relevant one — or measured values.

Public names: ``StabilityError``, ``StabilityReport``, ``levin_may_bound``,
``largest_stable_q``, ``stability_bound``, ``max_stable_conductance_nS``,
``virtual_conductances_nS``, ``cell_conductance``, ``assess``, ``guard``,
``simulate_difference``, ``default_delay_samples``, ``add_options``, ``from_args``,
``DEFAULT_DELAY_SAMPLES``, ``HARDWARE_DELAY_SAMPLES``, ``WARN_FRACTION``.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from clampcore.elements import SPECS
from clampcore.experiment import Experiment, load_experiment

# On the simulated rig and offline the command computed from sample n is in force at
# sample n + 1 (DEVELOPERS.md, the loop's timing model).
DEFAULT_DELAY_SAMPLES = 1
# Warn above this share of the largest stable conductance (the issue asks for half).
WARN_FRACTION = 0.5
_BISECTION_STEPS = 80  # halves the interval (at most 2) to below 1e-23: past float precision


class StabilityError(ValueError):
    """A loop that would be unstable; the message says which limit and by how much."""


def levin_may_bound(k: int) -> float:
    """Largest ``a`` for which ``x_{n+1} = x_n − a·x_{n−k}`` is stable (Levin & May 1976)."""
    if k < 0:
        raise ValueError(f"k = {k}: must be >= 0")
    return 2.0 * math.cos(k * math.pi / (2 * k + 1))


def _spectral_radius(q: float, k: int, r: float) -> float:
    """Largest root magnitude of ``z^{k+1} − r·z^k + q``."""
    coeffs = np.zeros(k + 2)
    coeffs[0], coeffs[1], coeffs[-1] = 1.0, -r, q
    if k == 0:
        coeffs[1] = q - r
        coeffs = coeffs[:2]
    return float(np.max(np.abs(np.roots(coeffs))))


def largest_stable_q(k: int, r: float = 1.0) -> float:
    """Largest ``q`` for which ``x_{n+1} = r·x_n − q·x_{n−k}`` is stable (0 < r <= 1).

    Bisection on the spectral radius between 0 (stable: the roots are r and 0; for
    r = 1 any small q > 0 is stable, Levin & May) and ``1 + r`` (unstable: for k >= 1
    the roots' product has magnitude q > 1). ``k = 0`` has the closed form ``1 + r``.
    """
    if k < 0:
        raise ValueError(f"k = {k}: must be >= 0")
    if not 0.0 < r <= 1.0:
        raise ValueError(f"r = {r}: must be in (0, 1]")
    if k == 0:
        return 1.0 + r  # x_{n+1} = (r − q)·x_n: stable iff |r − q| < 1
    lo, hi = 0.0, 1.0 + r
    for _ in range(_BISECTION_STEPS):
        mid = 0.5 * (lo + hi)
        # the smallest positive q is stable only in the limit for r = 1; start just above 0
        if _spectral_radius(max(mid, 1e-12), k, r) < 1.0:
            lo = mid
        else:
            hi = mid
    return lo


def max_stable_conductance_nS(
    c_pF: float, g_cell_nS: float, dt_ms: float, delay_samples: int
) -> float:
    """Largest total virtual conductance (nS) the sampled loop keeps stable."""
    if not c_pF > 0 or not dt_ms > 0:
        raise ValueError(f"capacitance {c_pF!r} pF and dt {dt_ms!r} ms must be > 0")
    if int(delay_samples) != delay_samples or delay_samples < 1:
        raise ValueError(f"delay_samples = {delay_samples!r}: must be a whole number >= 1")
    k = int(delay_samples) - 1
    if g_cell_nS <= 0.0:
        return levin_may_bound(k) * c_pF / dt_ms
    r = math.exp(-g_cell_nS * dt_ms / c_pF)
    return largest_stable_q(k, r) * g_cell_nS / -math.expm1(-g_cell_nS * dt_ms / c_pF)


def stability_bound(c_pF: float, dt_ms: float, delay_samples: int) -> dict[str, float]:
    """The bound without the cell's leak, three ways, in nS (for comparison and the README).

    ``levin_may_nS``: the discrete bound; ``continuous_half_sample_nS``: Hayes' a·d < π/2
    with d = (D − ½)·dt; ``continuous_pure_delay_nS``: with d = (D − 1)·dt (inf for D = 1).
    """
    k = int(delay_samples) - 1
    d_pure_ms = k * dt_ms
    return {
        "levin_may_nS": levin_may_bound(k) * c_pF / dt_ms,
        "continuous_half_sample_nS": (math.pi / 2) * c_pF / ((k + 0.5) * dt_ms),
        "continuous_pure_delay_nS": (math.pi / 2) * c_pF / d_pure_ms if k else math.inf,
    }


def simulate_difference(
    q: float, k: int, r: float = 1.0, n_steps: int = 4000, x0: float = 1.0
) -> np.ndarray:
    """Iterate ``x_{n+1} = r·x_n − q·x_{n−k}`` from ``x = x0`` (history included)."""
    x = np.zeros(n_steps + k + 1)
    x[: k + 1] = x0
    for n in range(k, n_steps + k):
        x[n + 1] = r * x[n] - q * x[n - k]
    return x[k:]


def virtual_conductances_nS(exp: Experiment) -> list[tuple[str, str, float, float]]:
    """(name, kind, smallest, largest) conductance each enabled element feeds back onto the cell."""
    out = []
    for el in exp.elements:
        if not el["enabled"]:
            continue
        feedback = SPECS[el["kind"]].feedback_nS
        g_range = feedback(el) if feedback else None
        if g_range is not None:
            out.append((el["name"], el["kind"], *g_range))
    return out


def cell_conductance(cell: dict[str, Any], dt_ms: float) -> tuple[float, float]:
    """(capacitance pF, conductance nS at rest) of a ``[cell]`` table's model cell."""
    from clampcore.simulated_rig.cells import (
        CELL_PASSIVE,
        P_CAPACITANCE_PF,
        P_G_K_NS,
        P_G_LEAK_NS,
        P_G_NA_NS,
        S_H,
        S_M,
        S_N,
        make_cell,
    )

    cell_arrays = make_cell(cell, dt_ms)
    p, s = cell_arrays.params, cell_arrays.state
    g_nS = p[P_G_LEAK_NS]
    if cell_arrays.kind != CELL_PASSIVE:
        g_nS += p[P_G_NA_NS] * s[S_M] ** 3 * s[S_H] + p[P_G_K_NS] * s[S_N] ** 4
    return float(p[P_CAPACITANCE_PF]), float(g_nS)


@dataclass
class StabilityReport:
    """What the guard found for one experiment, delay and cell."""

    c_pF: float
    g_cell_nS: float
    cell_values_from: str
    dt_ms: float
    delay_samples: int
    g_virtual_min_nS: float
    g_virtual_max_nS: float
    g_stable_max_nS: float
    static_ok: bool
    dynamic_ok: bool
    elements: list[tuple[str, str, float, float]] = field(default_factory=list)
    override: bool = False

    @property
    def ok(self) -> bool:
        return self.static_ok and self.dynamic_ok

    @property
    def warn(self) -> bool:
        return self.g_virtual_max_nS > WARN_FRACTION * self.g_stable_max_nS

    def lines(self) -> list[str]:
        """Human-readable summary for ``clampcore check`` and run/simulate."""
        share = self.g_virtual_max_nS / self.g_stable_max_nS
        out = [
            f"loop stability: delay {self.delay_samples} sample(s) at dt {self.dt_ms:g} ms, "
            f"cell C {self.c_pF:.4g} pF, g {self.g_cell_nS:.4g} nS ({self.cell_values_from}); "
            f"largest stable total virtual conductance {self.g_stable_max_nS:.4g} nS; "
            f"this experiment feeds back up to {self.g_virtual_max_nS:.4g} nS ({share:.0%})"
        ]
        if not self.static_ok:
            out.append(
                f"UNSTABLE (static): cell {self.g_cell_nS:.4g} nS + virtual "
                f"{self.g_virtual_min_nS:.4g} nS leaves a total conductance <= 0: V runs away"
            )
        if not self.dynamic_ok:
            out.append(
                f"UNSTABLE (dynamic): {self.g_virtual_max_nS:.4g} nS exceeds the "
                f"{self.g_stable_max_nS:.4g} nS the loop delay allows: the clamp will oscillate"
            )
        elif self.warn:
            out.append(
                f"warning: above half of the stable limit "
                f"({WARN_FRACTION * self.g_stable_max_nS:.4g} nS): expect ringing after changes"
            )
        return out

    def as_meta(self) -> dict[str, Any]:
        """The record kept in a recording's metadata."""
        meta = asdict(self)
        meta["elements"] = [list(e) for e in self.elements]
        meta["ok"] = self.ok
        return meta


def assess(
    experiment: Any,
    delay_samples: int = DEFAULT_DELAY_SAMPLES,
    c_pF: float | None = None,
    g_cell_nS: float | None = None,
) -> StabilityReport:
    """Check an experiment's virtual conductances against both limits.

    ``c_pF`` / ``g_cell_nS``: measured cell values (e.g. from ``clampcore characterize``);
    by default those of the experiment's ``[cell]`` section.
    """
    exp = load_experiment(experiment)
    dt_ms = exp.dt_ms
    c_model, g_model = cell_conductance(exp.cell, dt_ms)
    given = c_pF is not None or g_cell_nS is not None
    c = float(c_pF) if c_pF is not None else c_model
    g = float(g_cell_nS) if g_cell_nS is not None else g_model
    if not c > 0 or not g >= 0 or not math.isfinite(c + g):
        raise ValueError(
            f"cell values: capacitance {c!r} pF must be > 0, conductance {g!r} nS >= 0"
        )
    elements = virtual_conductances_nS(exp)
    # Leaks are always on: the smallest total is every leak plus nothing else.
    g_min = sum(lo for _, kind, lo, _ in elements if kind == "leak")
    g_max = sum(hi for *_, hi in elements)
    g_stable = max_stable_conductance_nS(c, g, dt_ms, delay_samples)
    return StabilityReport(
        c_pF=c,
        g_cell_nS=g,
        cell_values_from="measured" if given else f"[cell] {exp.cell['model']} model",
        dt_ms=dt_ms,
        delay_samples=int(delay_samples),
        g_virtual_min_nS=g_min,
        g_virtual_max_nS=g_max,
        g_stable_max_nS=g_stable,
        static_ok=g + g_min > 0.0,
        dynamic_ok=g_max < g_stable,
        elements=elements,
    )


def guard(report: StabilityReport, override: bool, option: str) -> StabilityReport:
    """Raise ``StabilityError`` for an unstable loop unless ``override``; record the override."""
    if report.ok:
        return report
    if not override:
        problem = "; ".join(line for line in report.lines()[1:] if line.startswith("UNSTABLE"))
        raise StabilityError(f"refusing to start: {problem} (override with {option})")
    report.override = True
    return report


# ----------------------------------------------------------------- command line
OVERRIDE_OPTION = "--override-stability"
# A hardware link: on these machines 93-99% of commands were in force within 2 samples
# (README, Benchmarks, "Loop on the wall clock"); the run's summary prints the measured
# latency, which --delay-samples should then be given.
HARDWARE_DELAY_SAMPLES = 2


def default_delay_samples(experiment: Any, port: str | None) -> int:
    """The loop delay D the guard assumes, in samples (see the module docstring).

    Law mode (the board evaluates the current law): the board's own step, the current of
    sample k driving the cell over (t_k, t_k+1] (PROTOCOL.md §10.3), whatever the link.
    Current mode: offline 1 + extra_delay_samples; the simulated rig 1; hardware
    ``HARDWARE_DELAY_SAMPLES``.
    """
    exp = load_experiment(experiment)
    if exp.loop.get("mode") == "law":
        return DEFAULT_DELAY_SAMPLES
    if port is None:
        return 1 + int(exp.loop["extra_delay_samples"])
    return DEFAULT_DELAY_SAMPLES if port == "sim" else HARDWARE_DELAY_SAMPLES


def add_options(parser: Any, guard_option: bool = True) -> None:
    """The stability options of ``check``, ``run`` and ``simulate``."""
    parser.add_argument(
        "--delay-samples",
        type=int,
        default=None,
        help="loop delay in samples for the stability guard (default: law mode 1, the board's "
        "own step; current mode 1 + extra_delay_samples offline, 1 on the simulated rig, "
        f"{HARDWARE_DELAY_SAMPLES} on hardware)",
    )
    parser.add_argument(
        "--cell-capacitance-pF",
        type=float,
        default=None,
        dest="cell_c_pF",
        help="measured cell capacitance for the guard (default: [cell])",
    )
    parser.add_argument(
        "--cell-conductance-nS",
        type=float,
        default=None,
        dest="cell_g_nS",
        help="measured cell input conductance for the guard (default: [cell])",
    )
    if guard_option:
        parser.add_argument(
            OVERRIDE_OPTION,
            action="store_true",
            help="start even above the largest stable virtual conductance "
            "(the override is logged in the recording)",
        )


def from_args(args: Any, experiment: Any, port: str | None = None) -> StabilityReport:
    """Assess with the command line's options; raise ``StabilityError`` unless overridden.

    ``port`` None: offline simulation; "sim": the simulated rig; else hardware.
    """
    exp = load_experiment(experiment)
    delay = args.delay_samples
    if delay is None:
        delay = default_delay_samples(exp, port)
    if delay < 1:
        raise ValueError(f"--delay-samples {delay}: must be 1 or more")
    report = assess(exp, delay, args.cell_c_pF, args.cell_g_nS)
    if hasattr(args, "override_stability"):
        guard(report, args.override_stability, OVERRIDE_OPTION)
    return report
