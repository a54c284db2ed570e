"""The recorded cell's own numbers, from the characterisation protocols.

Every value comes with its unit, how it was measured and a fit quality
(``value(...)`` entries of the result's ``values`` dict). Methods:

- **Resting potential**: mean V over the 100 ms before the first passive step (SD and
  the drift to the protocol's end as quality).
- **Input resistance**: slope of the steady-state V–I relation of the hyperpolarising
  steps (steady state: mean over the last third of each step, from rest; least squares,
  ``scipy.stats.linregress``; R² and the slope's standard error as quality).
- **Membrane time constant**: ``V(t) = A + B·exp(−t/τ)`` fitted to each step's onset
  (``scipy.optimize.curve_fit``) over the whole step; mean over steps (R² of the
  fits, SD over steps). The current of sample n is in force over (t_n, t_{n+1}]
  (DEVELOPERS.md, timing model), so the fit's t = 0 is the step's first sample.
- **Capacitance**: ``C = τ/R``; also ``C_onset = I/(dV/dt at the onset)`` from a
  quadratic through the origin fitted to the short pulses' summed responses over their
  summed current (the least-squares response per pA) over the first 0.3 ms or 0.2·τ,
  whichever is longer (at least 3 samples, at most the longest pulse; the pulses at
  least that long); each response is taken from the line fitted to V over the 3 ms
  before its pulse (the membrane may still be relaxing from the pulse before), and a
  pulse near a spike (one it provoked, or the one before's) is left out:
  the method for a cell whose step response is not one exponential
  (Hodgkin–Huxley), since at the onset only the capacitor charges. On a port, onsets
  during which a command came late or a sample was lost are left out (the recording's
  latency and sample counter say which): a stall of the host turns a 1 ms pulse into
  anything.
- **Spikes**: detected as upward crossings of the loop's ``spike_threshold_mV``
  (re-armed ``spike_hysteresis_mV`` below it); peak = the maximum before re-arming;
  threshold = V where dV/dt reaches 20 mV/ms, going back from the steepest point of
  the upstroke (within 5 ms before the peak) to where it falls below (slopes of
  successive samples taken at their midpoints, the crossing interpolated; a
  dV/dt criterion: 10–20 V/s is customary, common practice; eFEL's default is
  10 mV/ms); height = peak − threshold; width = full width at half height;
  trough = the minimum after the peak (the reset of an imposed threshold–reset rule,
  the afterhyperpolarisation of a real spike). A spike whose rise never reaches the
  criterion (a rule imposed by a virtual threshold_reset) has its peak as threshold,
  no height and no width.
- **f–I**: spikes per depolarising step / step duration; **rheobase**: the smallest
  step with a spike (resolution: the step increment) and, from the ramp, the current
  at its first spike; **f–I slope**: least-squares line through the steps that fired.
- **Refractory period** (only when every spike is imposed, by a ``threshold_reset``
  rule): per step with at least 4 spikes, the spike-aligned mean trace; where it leaves
  the rule's clamp (``release_ms``: the kink of a line, flat from the trace's minimum,
  rising after); the median over steps. The rule lets go ``refractory_ms`` after the
  spike's sample, so this is its refractory period, read from V alone.
- **ISI CV and adaptation**: over the step with the most spikes (at least 4): CV =
  sample SD/mean of the intervals; adaptation index = mean of (ISI_{i+1} − ISI_i)/
  (ISI_{i+1} + ISI_i) over consecutive pairs from the second interval on (the first is
  shaped by the onset; the definition of eFEL's ``adaptation_index2``).
  The noise segment's rate and ISI CV are reported too.

Public names: ``characterise``, ``analyse_passive``, ``analyse_active``,
``detect_spikes``, ``spike_features``, ``isi_stats``, ``release_ms``, ``value``,
``DVDT_THRESHOLD_MV_PER_MS``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import optimize, stats

from clampcore.protocols import ProtocolRun

# dV/dt criterion for spike threshold (see the module docstring).
DVDT_THRESHOLD_MV_PER_MS = 20.0
BASELINE_MS = 100.0  # baseline window before each step
MIN_ONSET_SAMPLES = 3  # the onset quadratic through the origin: 2 parameters and 1 more
# Onset window: short against the fastest membrane expected (tau 1.5 ms, the HH model cell
# at 30 pF): on that cell, noise-free, 0.2/0.3/0.5/1 ms windows gave C within 0.5/0.9/1.6/
# 3.7% of the truth (measured here), the error growing with the gates' contribution.
ONSET_MS = 0.3
# ... or a fifth of the fitted tau where that is longer (less noise). The quadratic then
# reads C about 1.6% low for one exponential (a noise-free 100 pF / 20 ms cell: 98.4 pF,
# measured here); over a tenth of tau the bias is smaller but the slope's noise 2.8 times
# larger, and a 16 pF / 8 ms cell with 0.05 mV of noise came out 6% off.
ONSET_TAU_SHARE = 0.2
# The onset is measured against the line fitted to V over the 3 ms before it: 30 samples at
# 10 kHz average the measurement noise; a longer window lets a slow cell's relaxation from
# the pulse before bend away from the line (its curvature makes the line too steep).
# Measured here on a 100 pF / 20 ms cell (2 ms pulses every 20 ms then), noise free: C_onset
# 98.6 pF with 5 ms, 99.7 with 3 ms, 99.3 with pulses 100 ms apart (the ADC's counts
# then limit it); with noise, seeds 1-8: 98.3-101.0 pF with 3 ms.
ONSET_BASE_MS = 3.0
TROUGH_WINDOW_MS = 50.0
# Imposed spikes: the release from the rule's clamp is sought where the spike-aligned mean
# trace first rises this far above its minimum (0.4 ms of a slow rise, 1.25 mV/ms on the
# 100 pF / 5 nS cell at 150 pA; ten times the mean's noise over 20 spikes at 0.05 mV) ...
RELEASE_RISE_MV = 0.5
# ... then located as the kink of a line, flat from the minimum, rising after, fitted up to
# this long after that point, at RELEASE_GRID of a sample. The minimum: the clamp holds V
# at the reset until the release, or (a clamp held at the current limit, or a weak one)
# is still pulling V down when it lets go.
RELEASE_AFTER_MS = 1.0
RELEASE_GRID = 20
MIN_RELEASE_SPIKES = 3  # spikes of one step averaged for a release time
# A step's onset is fitted only if the first 10 ms came on time (each command in force at
# the next sample, no sample lost); pulses likewise over their whole length.
ON_TIME_MS = 10.0  # where the trough after a spike is sought, at most


def value(v: float | None, unit: str, method: str, **quality: Any) -> dict[str, Any]:
    """One measured value with its unit, method and fit quality (NaN/None: not measurable)."""
    v = None if v is None or not math.isfinite(float(v)) else float(v)
    q = {
        k: (float(x) if isinstance(x, int | float | np.floating) else x) for k, x in quality.items()
    }
    return {"value": v, "unit": unit, "method": method, "quality": q}


def _nan_stat(fn: Any, xs: list[float]) -> float:
    """``fn`` over the finite values of ``xs``; NaN (without a warning) when there are none."""
    finite = [x for x in xs if math.isfinite(x)]
    return float(fn(finite)) if finite else float("nan")


def _exp_model(t: np.ndarray, a: float, b: float, tau: float) -> np.ndarray:
    return a + b * np.exp(-t / tau)


def _r2(y: np.ndarray, fit: np.ndarray) -> float:
    ss = float(np.sum((y - np.mean(y)) ** 2))
    return 1.0 - float(np.sum((y - fit) ** 2)) / ss if ss > 0 else float("nan")


def _onset_response(run: ProtocolRun, on: int, n_after: int) -> np.ndarray:
    """V over rows ``on .. on + n_after`` minus the line fitted to the ``ONSET_BASE_MS``
    before it (row ``on`` included): the response to a current that acts from the row
    after ``on``, freed of the membrane's own drift (a slow cell still relaxing from the
    pulse before)."""
    n_base = max(2, round(ONSET_BASE_MS / run.dt_ms))
    lo = max(0, on - n_base + 1)
    rows = np.arange(lo, on + n_after + 1)
    n = rows if run.sample_n is None else run.sample_n[rows].astype(np.int64)
    t = (n - n[on - lo]) * run.dt_ms
    base = slice(0, on - lo + 1)
    slope, intercept = np.polyfit(t[base], run.v_mV[lo : on + 1], 1)
    return run.v_mV[on : on + n_after + 1] - (intercept + slope * t[on - lo :])


def analyse_passive(run: ProtocolRun) -> dict[str, Any]:
    """Rest, input resistance, τ and capacitance from the hyperpolarising steps."""
    dt = run.dt_ms
    v = run.v_mV
    steps = run.protocol.of_kind("step")
    n_base = round(BASELINE_MS / dt)
    amps, dv_ss, taus, r2s, fits = [], [], [], [], []
    step_onsets, step_onset_amps = [], []
    # Rest: before the first step. Later steps are measured from it too: the gap between
    # steps need not be long enough for a slow membrane to settle (200 ms: 4 tau at 50 ms).
    first = run.index(steps[0].start_ms)
    rest = float(np.mean(v[first - n_base : first]))
    rest_sd = float(np.std(v[first - n_base : first]))
    drift = float(np.mean(v[-n_base:])) - rest  # the protocol's end, long after its last step
    for seg in steps:
        on, off = run.index(seg.start_ms), run.index(seg.end_ms)
        base = float(np.mean(v[max(0, on - 10) : on + 1]))  # V as the step begins
        ss = float(np.mean(v[off - (off - on) // 3 : off]))
        amps.append(seg.delta_pA)
        dv_ss.append(ss - rest)
        t = np.arange(off - on) * dt  # sample on is the last one before the step acts
        y = v[on:off]
        guess_tau = max(dt, float(t[np.argmax(np.abs(y - y[0]) >= 0.63 * abs(ss - base))]))
        if not run.on_time(on, min(off - on - 1, round(ON_TIME_MS / dt))):
            continue  # a late command or a lost sample shapes the onset: no fit
        step_onsets.append(on)
        step_onset_amps.append(seg.delta_pA)
        try:
            popt, _ = optimize.curve_fit(
                _exp_model,
                t,
                y,
                p0=(ss, base - ss, guess_tau),
                bounds=([-np.inf, -np.inf, dt / 10], np.inf),
            )
            taus.append(popt[2])
            r2s.append(_r2(y, _exp_model(t, *popt)))
            fits.append((seg.start_ms + t, _exp_model(t, *popt)))
        except (RuntimeError, ValueError):
            taus.append(float("nan"))
            r2s.append(float("nan"))
    amps_a = np.array(amps)
    dv_a = np.array(dv_ss)
    reg = stats.linregress(amps_a, dv_a)
    r_MOhm = reg.slope * 1000.0  # mV/pA = GΩ
    tau = _nan_stat(np.nanmean, taus)
    c_pF = tau / r_MOhm * 1000.0
    # onset: the pulses' (else the steps') summed response over their summed current,
    # the least-squares mean response per pA
    quiet, n_spiking = [], 0  # (onset row, rows long, pA) of the pulses on time, not near a spike
    prev_start = None
    for p in run.protocol.of_kind("pulse"):
        on, off = run.index(p.start_ms), run.index(p.end_ms)
        # a pulse that made the cell fire (an anode-break spike: the Hodgkin-Huxley model
        # cell does so) leaves the next pulse's baseline still moving: both left out
        lo = on - round(ONSET_BASE_MS / dt) if prev_start is None else prev_start
        prev_start = on
        if np.max(v[max(0, lo) : off + 1]) >= run.spike_threshold_mV:
            n_spiking += 1
        elif run.on_time(on, off - on):
            quiet.append((on, off - on, p.delta_pA))
    if not quiet:  # no pulses: the steps' onsets
        n_step = round(ON_TIME_MS / dt)
        quiet = [(on, n_step, a) for on, a in zip(step_onsets, step_onset_amps, strict=True)]
    if not quiet:
        raise ValueError(
            "no step or pulse began on time (late commands or lost samples at every onset): "
            "the loop cannot keep up; try a lower rate_hz"
        )
    tau_for_window = tau if math.isfinite(tau) else 0.0
    n_on = max(MIN_ONSET_SAMPLES, round(max(ONSET_MS, ONSET_TAU_SHARE * tau_for_window) / dt))
    n_on = int(min(n_on, max(n for _, n, _ in quiet)))  # within the longest pulse
    used = [(on, a) for on, n, a in quiet if n >= n_on]  # the pulses that long
    resp = [_onset_response(run, on, n_on) for on, _ in used]
    mean_resp = np.sum(resp, axis=0) / float(np.sum([a for _, a in used]))
    # through the origin: the baseline line fixes V at the onset sample
    t_on = np.arange(1, n_on + 1) * dt
    design = np.vstack([t_on, t_on**2]).T
    coef, ss_res, *_ = np.linalg.lstsq(design, mean_resp[1:], rcond=None)
    c_onset_pF = 1.0 / coef[0]  # (mV/ms)/pA -> pF
    if n_on > 2 and ss_res.size:
        cov = np.linalg.inv(design.T @ design) * float(ss_res[0]) / (n_on - 2)
        slope_rel_se = float(np.sqrt(cov[0, 0]) / abs(coef[0]))
    else:
        slope_rel_se = float("nan")
    values = {
        "resting_potential": value(
            rest,
            "mV",
            f"mean V over the {BASELINE_MS:g} ms before the first passive step",
            sd_mV=rest_sd,
            drift_mV=drift,
        ),
        "input_resistance": value(
            r_MOhm,
            "MOhm",
            "slope of the steady-state V-I relation (hyperpolarising steps)",
            r_squared=reg.rvalue**2,
            stderr_MOhm=reg.stderr * 1000.0,
            n_points=len(amps),
        ),
        "membrane_time_constant": value(
            tau,
            "ms",
            "single exponential fitted to each step onset (curve_fit), mean",
            r_squared_mean=_nan_stat(np.nanmean, r2s),
            sd_ms=_nan_stat(np.nanstd, taus),
            n_fits=len(taus),
        ),
        "capacitance": value(
            c_pF,
            "pF",
            "tau / input resistance",
            relative_sd=_nan_stat(np.nanstd, taus) / tau if tau else float("nan"),
        ),
        "capacitance_onset": value(
            c_onset_pF,
            "pF",
            f"I / (dV/dt at onset): quadratic over the first {n_on} samples",
            n_samples=n_on,
            n_pulses=len(used),
            n_pulses_near_a_spike=n_spiking,
            relative_se=slope_rel_se,
        ),
    }
    figure = {
        "amps_pA": amps_a,
        "dv_mV": dv_a,
        "intercept_mV": reg.intercept,
        "fits": fits,
        "steps": [(s.start_ms, s.end_ms, s.delta_pA) for s in steps],
        "onsets_per_pA": [r / a for r, (_, a) in zip(resp, used, strict=True)],
    }
    return {"values": values, "figure": figure}


def detect_spikes(v_mV: np.ndarray, level_mV: float, hysteresis_mV: float = 10.0) -> np.ndarray:
    """Sample indices of spike peaks: upward crossings of ``level_mV``, re-armed below it."""
    peaks = []
    armed = True
    start = 0
    for i in range(1, v_mV.size):
        if armed and v_mV[i] >= level_mV and v_mV[i - 1] < level_mV:
            armed, start = False, i
        elif not armed and v_mV[i] < level_mV - hysteresis_mV:
            peaks.append(start + int(np.argmax(v_mV[start:i])))
            armed = True
    if not armed:
        peaks.append(start + int(np.argmax(v_mV[start:])))
    return np.array(peaks, dtype=np.int64)


def spike_features(v_mV: np.ndarray, dt_ms: float, peaks: np.ndarray) -> dict[str, np.ndarray]:
    """Per spike: threshold (mV and sample), peak, height, width (ms), trough (see docstring)."""
    dvdt = np.diff(v_mV) / dt_ms
    n = peaks.size
    out = {
        k: np.full(n, np.nan)
        for k in ("threshold_mV", "peak_mV", "height_mV", "width_ms", "trough_mV", "onset")
    }
    back = round(5.0 / dt_ms)  # an action potential's upstroke lasts under a few ms
    for j, p in enumerate(peaks):
        out["peak_mV"][j] = v_mV[p]
        lo = max(0, p - back)
        steepest = lo + int(np.argmax(dvdt[lo:p])) if p > lo else p
        rises = p > lo and dvdt[steepest] >= DVDT_THRESHOLD_MV_PER_MS
        i = steepest
        while rises and i >= lo and dvdt[i] >= DVDT_THRESHOLD_MV_PER_MS:
            i -= 1
        end = peaks[j + 1] if j + 1 < n else v_mV.size
        end = min(end, p + round(TROUGH_WINDOW_MS / dt_ms))
        out["trough_mV"][j] = float(np.min(v_mV[p:end])) if end > p else np.nan
        if not rises:  # no upstroke: an imposed threshold-and-reset
            out["threshold_mV"][j] = v_mV[p]
            out["onset"][j] = p
            continue
        onset = i + 1
        out["onset"][j] = onset
        # dvdt[i] is the slope over (t_i, t_i+1], i.e. at t_i + dt/2: interpolate the time
        # where it crosses the criterion, and V there
        d0, d1 = dvdt[i], dvdt[onset]
        frac = (DVDT_THRESHOLD_MV_PER_MS - d0) / (d1 - d0) if d1 > d0 else 1.0
        t_cross = i + 0.5 + min(max(frac, 0.0), 1.0)
        thr = float(np.interp(t_cross, np.arange(v_mV.size), v_mV))
        out["threshold_mV"][j] = thr
        out["height_mV"][j] = v_mV[p] - thr
        half = thr + 0.5 * (v_mV[p] - thr)
        up = onset + int(np.argmax(v_mV[onset : p + 1] >= half))
        down_rel = np.flatnonzero(v_mV[p:end] < half)
        if up > 0 and down_rel.size:
            down = p + int(down_rel[0])
            t_up = up - 1 + (half - v_mV[up - 1]) / (v_mV[up] - v_mV[up - 1])
            t_down = down - 1 + (v_mV[down - 1] - half) / (v_mV[down - 1] - v_mV[down])
            out["width_ms"][j] = (t_down - t_up) * dt_ms
    return out


def isi_stats(times_ms: np.ndarray) -> tuple[float, float]:
    """(CV, adaptation index) of the intervals between ``times_ms`` (see the docstring)."""
    isi = np.diff(times_ms)
    if isi.size < 2:
        return float("nan"), float("nan")
    cv = float(np.std(isi, ddof=1) / np.mean(isi))  # sample SD
    later = isi[1:]  # from the second interval on: the first is shaped by the onset
    adapt = (
        float(np.mean(np.diff(later) / (later[1:] + later[:-1])))
        if later.size >= 2
        else float("nan")
    )
    return cv, adapt


def release_ms(trace_mV: np.ndarray, dt_ms: float) -> float:
    """Where a spike-aligned mean trace (sample 0: the spike's) leaves the reset clamp, ms.

    The kink of ``a + s·max(0, t − t_r)`` fitted by least squares from the trace's
    minimum to ``RELEASE_AFTER_MS`` past its first rise of ``RELEASE_RISE_MV`` above it,
    ``t_r`` on a grid of ``dt/RELEASE_GRID``; NaN when the trace never rises that far.
    """
    low = int(np.argmin(trace_mV))
    risen = np.flatnonzero(trace_mV[low:] >= trace_mV[low] + RELEASE_RISE_MV)
    if not risen.size:
        return float("nan")
    coarse = low + int(risen[0])
    hi = min(trace_mV.size, coarse + round(RELEASE_AFTER_MS / dt_ms) + 1)
    t = np.arange(low, hi) * dt_ms
    y = trace_mV[low:hi]
    best, best_sse = float("nan"), math.inf
    for t_r in np.arange(t[0], coarse * dt_ms + 1e-12, dt_ms / RELEASE_GRID):
        design = np.vstack([np.ones_like(t), np.maximum(0.0, t - t_r)]).T
        coef, *_ = np.linalg.lstsq(design, y, rcond=None)
        sse = float(np.sum((design @ coef - y) ** 2))
        if sse < best_sse:
            best, best_sse = float(t_r), sse
    return best


def _refractory(
    v_mV: np.ndarray, dt_ms: float, peaks: np.ndarray, sets: list[np.ndarray]
) -> dict[str, Any]:
    """The refractory period of imposed spikes: the release from the clamp, per step."""
    per_step = []
    for idx in sets:
        if idx.size < MIN_RELEASE_SPIKES + 1:
            continue
        p = peaks[idx]
        n = int(min(np.min(np.diff(p)), round(TROUGH_WINDOW_MS / dt_ms)))
        mean = np.mean([v_mV[a : a + n] for a in p[:-1]], axis=0)  # each followed by the next
        per_step.append(release_ms(mean, dt_ms))
    per_step = [x for x in per_step if math.isfinite(x)]
    return value(
        float(np.median(per_step)) if per_step else None,
        "ms",
        "imposed spikes: from the spike's sample to the release from the reset clamp (the"
        " kink where V starts to rise in the spike-aligned mean of each step), median",
        sd_ms=float(np.std(per_step)) if per_step else None,
        n_steps=len(per_step),
    )


def analyse_active(run: ProtocolRun, hysteresis_mV: float = 10.0) -> dict[str, Any]:
    """Spikes, f–I, rheobase, threshold, height, width, ISI CV and adaptation."""
    dt = run.dt_ms
    v = run.v_mV
    peaks = detect_spikes(v, run.spike_threshold_mV, hysteresis_mV)
    feats = spike_features(v, dt, peaks)
    steps = run.protocol.of_kind("step")
    amps, rates, counts, spike_sets = [], [], [], []
    for seg in steps:
        on, off = run.index(seg.start_ms), run.index(seg.end_ms)
        inside = (peaks >= on) & (peaks < off)
        amps.append(seg.delta_pA)
        counts.append(int(inside.sum()))
        rates.append(inside.sum() / (seg.duration_ms / 1000.0))
        spike_sets.append(np.flatnonzero(inside))
    amps_a, rates_a, counts_a = np.array(amps), np.array(rates), np.array(counts)
    inc = float(np.min(np.diff(amps_a))) if amps_a.size > 1 else float("nan")
    fired = np.flatnonzero(counts_a > 0)
    rheobase = float(amps_a[fired[0]]) if fired.size else float("nan")
    values: dict[str, Any] = {
        "rheobase": value(
            rheobase, "pA", "smallest depolarising step with a spike", resolution_pA=inc
        ),
    }
    if fired.size >= 2:
        reg = stats.linregress(amps_a[fired], rates_a[fired])
        values["fi_slope"] = value(
            reg.slope * 1000.0,
            "Hz/nA",
            "least-squares line through the steps that fired",
            r_squared=reg.rvalue**2,
            n_points=int(fired.size),
        )
    else:
        values["fi_slope"] = value(
            None, "Hz/nA", "needs two steps that fired", n_points=int(fired.size)
        )
    values["fi_curve"] = {
        "value": [[float(a), float(r)] for a, r in zip(amps_a, rates_a, strict=True)],
        "unit": "[pA, Hz]",
        "method": "spikes per step / step duration",
        "quality": {"step_ms": steps[0].duration_ms if steps else None},
    }
    ramp = run.protocol.of_kind("ramp")
    if ramp:
        seg = ramp[0]
        on, off = run.index(seg.start_ms), run.index(seg.end_ms)
        in_ramp = peaks[(peaks >= on) & (peaks < off)]
        first = in_ramp[0] if in_ramp.size else None
        if first is not None:
            onset = int(feats["onset"][np.flatnonzero(peaks == first)[0]])
            i_first = float(run.stimulus_pA[onset])
        else:
            i_first = float("nan")
        values["rheobase_ramp"] = value(
            i_first,
            "pA",
            f"ramp current at its first spike ({seg.duration_ms:g} ms ramp)",
            ramp_slope_pA_per_s=seg.delta_pA / seg.duration_ms * 1000.0,
        )
    spikes_ok = ~np.isnan(feats["height_mV"])
    n_sp = int(peaks.size)
    values["spike_threshold"] = value(
        float(np.nanmedian(feats["threshold_mV"])) if n_sp else None,
        "mV",
        f"V where dV/dt reaches {DVDT_THRESHOLD_MV_PER_MS:g} mV/ms before the peak, median"
        " (imposed spikes: their peak)",
        sd_mV=float(np.nanstd(feats["threshold_mV"])) if n_sp else None,
        n_spikes=n_sp,
    )
    values["spike_height"] = value(
        float(np.nanmedian(feats["height_mV"])) if spikes_ok.any() else None,
        "mV",
        "peak - threshold, median",
        sd_mV=float(np.nanstd(feats["height_mV"])) if spikes_ok.any() else None,
        n_spikes=int(spikes_ok.sum()),
    )
    values["spike_width"] = value(
        float(np.nanmedian(feats["width_ms"])) if spikes_ok.any() else None,
        "ms",
        "full width at half height (threshold to peak), median",
        sd_ms=float(np.nanstd(feats["width_ms"])) if spikes_ok.any() else None,
    )
    if n_sp and not spikes_ok.any():  # every spike imposed by a threshold_reset rule
        values["refractory_period"] = _refractory(v, dt, peaks, spike_sets)
    values["spike_trough"] = value(
        float(np.nanmedian(feats["trough_mV"])) if n_sp else None,
        "mV",
        f"minimum within {TROUGH_WINDOW_MS:g} ms after the peak (or before the next spike), median",
    )
    best = int(np.argmax(counts_a)) if counts_a.size else 0
    train_times_ms = peaks[spike_sets[best]] * dt if counts_a.size else np.zeros(0)
    if train_times_ms.size >= 4:
        cv, adapt = isi_stats(train_times_ms)
        isi = np.diff(train_times_ms)
        values["isi_cv"] = value(
            cv, "1", f"SD/mean of the intervals at {amps_a[best]:g} pA", n_intervals=int(isi.size)
        )
        values["adaptation_index"] = value(
            adapt,
            "1",
            "mean (ISI[i+1]-ISI[i])/(ISI[i+1]+ISI[i]) from the second interval on",
            step_pA=float(amps_a[best]),
            first_isi_ms=float(isi[0]),
            last_isi_ms=float(isi[-1]),
        )
        values["isi_train"] = value(
            None, "ms", f"every interval at {amps_a[best]:g} pA", step_pA=float(amps_a[best])
        )
        values["isi_train"]["value"] = [float(x) for x in isi]
    else:
        values["isi_cv"] = value(None, "1", "needs a step with 4 spikes or more")
        values["adaptation_index"] = value(None, "1", "needs a step with 4 spikes or more")
    noise = run.protocol.of_kind("noise")
    if noise:
        seg = noise[0]
        on, off = run.index(seg.start_ms), run.index(seg.end_ms)
        in_noise = peaks[(peaks >= on) & (peaks < off)] * dt
        cv, _ = isi_stats(in_noise) if in_noise.size >= 3 else (float("nan"), 0.0)
        values["noise_rate"] = value(
            in_noise.size / (seg.duration_ms / 1000.0),
            "Hz",
            f"spikes during the noise current (mean {seg.delta_pA:g} pA, SD {seg.sd_pA:g} pA)",
            n_spikes=int(in_noise.size),
        )
        values["noise_isi_cv"] = value(cv, "1", "SD/mean of the intervals during the noise current")
    figure = {
        "amps_pA": amps_a,
        "rates_hz": rates_a,
        "peaks": peaks,
        "features": feats,
        "steps": [(s.start_ms, s.end_ms, s.delta_pA) for s in steps],
        "train_step": best,
        "train_times_ms": train_times_ms,
    }
    return {"values": values, "figure": figure}


def characterise(passive: ProtocolRun, active: ProtocolRun | None) -> dict[str, Any]:
    """Both analyses; ``values`` is what goes to JSON, ``figure`` what the report draws."""
    p = analyse_passive(passive)
    values = dict(p["values"])
    figure = {"passive": p["figure"]}
    if active is not None:
        a = analyse_active(active)
        values.update(a["values"])
        figure["active"] = a["figure"]
    return {"values": values, "figure": figure}
