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
  quadratic fitted to the short pulses' summed responses over their summed current
  (the least-squares response per pA) over the first 0.3 ms or 0.1·τ, whichever is
  longer (at least 3 samples, at most the pulse):
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
- **ISI CV and adaptation**: over the step with the most spikes (at least 4): CV =
  sample SD/mean of the intervals; adaptation index = mean of (ISI_{i+1} − ISI_i)/
  (ISI_{i+1} + ISI_i) over consecutive pairs from the second interval on (the first is
  shaped by the onset; the definition of eFEL's ``adaptation_index2``).
  The noise segment's rate and ISI CV are reported too.

Public names: ``characterise``, ``analyse_passive``, ``analyse_active``,
``detect_spikes``, ``spike_features``, ``isi_stats``, ``value``, ``DVDT_THRESHOLD_MV_PER_MS``.
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
MIN_ONSET_SAMPLES = 3  # the onset quadratic: its 3 parameters and the sample before
# Onset window: short against the fastest membrane expected (tau 1.5 ms, the HH model cell
# at 30 pF): on that cell, noise-free, 0.2/0.3/0.5/1 ms windows gave C within 0.5/0.9/1.6/
# 3.7% of the truth (measured here), the error growing with the gates' contribution.
ONSET_MS = 0.3
# ... or a tenth of the fitted tau where that is longer (less noise; the quadratic's
# error at 0.1 tau is below 0.2% for one exponential: the cubic term, (t/tau)^2/6).
ONSET_TAU_SHARE = 0.1
TROUGH_WINDOW_MS = 50.0
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


def analyse_passive(run: ProtocolRun) -> dict[str, Any]:
    """Rest, input resistance, τ and capacitance from the hyperpolarising steps."""
    dt = run.dt_ms
    v = run.v_mV
    steps = run.protocol.of_kind("step")
    n_base = round(BASELINE_MS / dt)
    amps, dv_ss, taus, r2s, fits = [], [], [], [], []
    onsets, step_onset_amps = [], []
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
        onsets.append(v[on:off] - base)
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
    pulses = [
        p
        for p in run.protocol.of_kind("pulse")
        if run.on_time(run.index(p.start_ms), run.index(p.end_ms) - run.index(p.start_ms))
    ]
    if pulses:
        onsets = [v[run.index(p.start_ms) : run.index(p.end_ms) + 1] for p in pulses]
        onsets = [o - o[0] for o in onsets]
        amps_on = [p.delta_pA for p in pulses]
    else:
        amps_on = step_onset_amps
    if not onsets:
        raise ValueError(
            "no step or pulse began on time (late commands or lost samples at every onset): "
            "the loop cannot keep up; try a lower rate_hz"
        )
    tau_for_window = tau if math.isfinite(tau) else 0.0
    n_on = max(MIN_ONSET_SAMPLES, round(max(ONSET_MS, ONSET_TAU_SHARE * tau_for_window) / dt))
    n_on = min(n_on, min(o.size for o in onsets) - 1)  # within the pulse
    mean_resp = np.sum([o[: n_on + 1] for o in onsets], axis=0) / float(np.sum(amps_on))
    t_on = np.arange(n_on + 1) * dt
    coef, cov = np.polyfit(t_on, mean_resp, 2, cov="unscaled" if n_on < 3 else True)
    c_onset_pF = 1.0 / coef[1]  # (mV/ms)/pA -> pF
    slope_rel_se = float(np.sqrt(cov[1, 1]) / abs(coef[1])) if n_on >= 3 else float("nan")
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
            n_pulses=len(onsets),
            relative_se=slope_rel_se,
        ),
    }
    figure = {
        "amps_pA": amps_a,
        "dv_mV": dv_a,
        "intercept_mV": reg.intercept,
        "fits": fits,
        "steps": [(s.start_ms, s.end_ms, s.delta_pA) for s in steps],
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
