"""The model defects of issue #11, checked against published sources.

- The ``poisson`` source: a Poisson-distributed count per sample, so that the count over
  T has mean r·T and Fano factor 1, and the samples holding events are a Bernoulli
  sequence whose gaps are geometric (the sample-grid form of the exponential interval),
  with P(n events | at least one) the zero-truncated Poisson law (Cox & Lewis 1966, The
  Statistical Analysis of Series of Events, ch. 2). At 10 Hz, 1 kHz and 5 kHz in a 20 kHz
  loop, as the issue asks.
- Offline ``simulate`` refuses a current limit the converters cannot deliver, by the same
  rule as the live engine, and within range records what the cell received (Ohm's law
  on a passive cell).
- A ramp without a finite duration is refused.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import clampcore
from clampcore.calibration import (
    DEFAULT_BOARD_ADC,
    DEFAULT_BOARD_DAC,
    conversion_array,
    current_limit_problem,
)
from clampcore.elements.synapse import poisson_count
from clampcore.experiment import ExperimentError, load_experiment, model_warnings
from clampcore.jit import kernel
from clampcore.rng import seed_state

LOOP_HZ = 20000.0
DT_S = 1.0 / LOOP_HZ


@kernel
def _draw(rng: np.ndarray, mean: float, out: np.ndarray) -> None:
    for k in range(out.size):
        out[k] = poisson_count(rng, 0, mean)


def _counts(rate_hz: float, n_samples: int, seed: int) -> np.ndarray:
    rng = np.array([seed_state(seed, 1)], dtype=np.uint64)
    out = np.zeros(n_samples, dtype=np.int64)
    _draw(rng, rate_hz * DT_S, out)
    return out


# (rate, seconds): at least ~2000 events at every rate
CASES = [(10.0, 300.0), (1000.0, 20.0), (5000.0, 10.0)]


@pytest.mark.parametrize(("rate_hz", "seconds"), CASES)
def test_poisson_count_mean_and_fano_factor(rate_hz, seconds):
    counts = _counts(rate_hz, round(seconds * LOOP_HZ), seed=3)
    expected = rate_hz * seconds
    # Total over T: Poisson with mean and variance r T (Cox & Lewis 1966); 4.5 SD.
    assert abs(counts.sum() - expected) < 4.5 * math.sqrt(expected), (counts.sum(), expected)
    # Fano factor of counts in windows holding ~1-5 events: 1 for a Poisson process. The
    # sampling SD of a sample variance is sqrt((mu4 - sigma^4) / K) (Kendall & Stuart, The
    # Advanced Theory of Statistics, vol. 1, 10.5); for a Poisson count of mean m,
    # mu4 - sigma^4 = m + 2 m^2, so SD(F) = sqrt((m + 2 m^2) / K) / m.
    window = max(1, round(LOOP_HZ / rate_hz))  # ~1 event per window
    if rate_hz < 100:
        window = round(LOOP_HZ / rate_hz * 0.5)  # 0.5 events, so that there are many windows
    per = counts[: counts.size // window * window].reshape(-1, window).sum(axis=1)
    m = rate_hz * DT_S * window
    fano = per.var(ddof=1) / per.mean()
    sd = math.sqrt((m + 2 * m * m) / per.size) / m
    assert abs(fano - 1.0) < 5 * sd, (fano, sd)


@pytest.mark.parametrize(("rate_hz", "seconds"), CASES)
def test_poisson_intervals_on_the_sample_grid_are_geometric(rate_hz, seconds):
    counts = _counts(rate_hz, round(seconds * LOOP_HZ), seed=11)
    lam = rate_hz * DT_S
    q = -math.expm1(-lam)  # P(a sample holds at least one event)
    occupied = np.flatnonzero(counts)
    gaps = np.diff(occupied)  # samples from one occupied sample to the next: geometric(q)
    edges = np.unique(np.round(stats.geom.ppf(np.linspace(0, 0.98, 12), q)).astype(int))
    edges = np.append(edges[edges >= 1], np.inf)
    observed = np.histogram(gaps, bins=np.append(edges[:-1], gaps.max() + 1))[0]
    cdf = stats.geom.cdf(np.append(edges[:-1] - 1, np.inf), q)
    expected = np.diff(cdf) * gaps.size
    # Pearson's chi-square against the geometric law (scipy.stats.chisquare).
    assert stats.chisquare(observed, expected * observed.sum() / expected.sum()).pvalue > 1e-4
    # Events per occupied sample: zero-truncated Poisson; P(n >= 2 | n >= 1) from the law.
    multi = np.mean(counts[occupied] >= 2)
    p_multi = 1.0 - lam * math.exp(-lam) / q
    sd = math.sqrt(p_multi * (1 - p_multi) / occupied.size)
    assert abs(multi - p_multi) < 5 * sd + 1e-4, (multi, p_multi)


def test_the_synapse_adds_count_times_weight():
    """Through the whole element: each sample's jump of an exp synapse is g_max x count."""
    tau_ms, g_max = 2.0, 1.5
    exp = {
        "loop": {"rate_hz": LOOP_HZ},
        "element": [{"kind": "synapse", "name": "p", "kinetics": "exp", "g_max_nS": g_max,
                     "tau_decay_ms": tau_ms, "source": "poisson", "rate_hz": 5000.0, "seed": 4}],
    }  # fmt: skip
    rec = clampcore.simulate(exp, 4.0, quantise=False)
    g = rec.g_nS["p"]
    decayed = np.concatenate(([0.0], g[:-1])) * math.exp(-DT_S * 1e3 / tau_ms)
    jumps = (g - decayed) / g_max
    counts = np.rint(jumps)
    np.testing.assert_allclose(jumps, counts, atol=1e-6)  # whole multiples of g_max
    assert counts.max() >= 2  # several events in one sample do add up
    expected = 5000.0 * 4.0
    assert abs(counts.sum() - expected) < 4.5 * math.sqrt(expected)


def test_dense_poisson_input_is_warned_naming_the_synapse(capsys, tmp_path):
    from clampcore.cli import main

    def exp(rate_hz: float) -> dict:
        return {"loop": {"rate_hz": LOOP_HZ},
                "element": [{"kind": "synapse", "name": "dense", "rate_hz": rate_hz}]}  # fmt: skip

    assert model_warnings(load_experiment(exp(1000.0))) == []  # r dt = 0.05
    (warning,) = model_warnings(load_experiment(exp(5000.0)))  # r dt = 0.25
    assert "element 'dense'" in warning and "rate_hz" in warning and "0.25" in warning
    path = tmp_path / "dense.toml"
    path.write_text(load_experiment(exp(5000.0)).to_toml(), encoding="utf-8")
    assert main(["check", str(path)]) == 0
    assert "warning: element 'dense'" in capsys.readouterr().err


def test_ramp_without_a_finite_duration_is_refused():
    ramp = {"kind": "current", "name": "r", "waveform": "ramp", "amplitude_pA": 50}
    with pytest.raises(ExperimentError) as err:
        load_experiment({"loop": {"rate_hz": LOOP_HZ}, "element": [ramp]})
    assert err.value.where == "element 'r'" and err.value.field == "duration_ms"
    load_experiment({"loop": {"rate_hz": LOOP_HZ}, "element": [{**ramp, "duration_ms": 100}]})


PASSIVE = """
[loop]
rate_hz = 10000
max_current_pA = {limit}

[cell]
model = "passive"
capacitance_pF = 100
leak_nS = 20
rest_mV = -70
noise_pA = 0
measurement_noise_mV = 0
electrode_MOhm = 0

[amplifier]
vm_mV_per_V = 100
command_pA_per_V = 400

[[element]]
kind = "current"
name = "step"
waveform = "step"
amplitude_pA = {amplitude}
"""


def test_offline_refuses_a_limit_the_converters_cannot_deliver():
    # 400 pA/V over the rig's +-10 V DAC reaches +-4000 pA (minus one step at the top).
    exp = load_experiment(PASSIVE.format(limit=5000, amplitude=4500))
    conv = conversion_array(DEFAULT_BOARD_ADC, DEFAULT_BOARD_DAC, exp.amplifier)
    problem = current_limit_problem(conv, 5000.0)
    assert problem and "cannot represent max_current_pA = ±5000" in problem
    with pytest.raises(ValueError, match="refusing to simulate") as err:
        clampcore.simulate(exp, 0.1)
    assert problem in str(err.value)  # the engine's words exactly (test_loop_e2e checks it)


def test_offline_records_what_the_cell_received():
    """Within range the recorded command is the current the cell got: at steady state a
    passive cell sits at E_L + I / g_L (Ohm's law), I from the recording."""
    g_leak_nS = 20.0  # 3500 pA -> +175 mV, inside the |V| < 200 mV fault bound
    rec = clampcore.simulate(PASSIVE.format(limit=3900, amplitude=3500), 0.5)
    i_pA = rec.i_pA[-1]
    dv_mV = rec.v_mV[-1] - (-70.0)
    step_pA = 400.0 * 20.0 / 65535  # one DAC step: 400 pA/V over a 16-bit, 20 V range
    assert abs(i_pA - 3500.0) <= step_pA
    # nS x mV = pA; the ADC step (100 mV/V over 20 V, 16 bits: 0.03 mV) bounds the reading.
    assert abs(dv_mV * g_leak_nS - i_pA) <= 0.031 * g_leak_nS + step_pA
    assert rec.summary()["limited_samples"] == 0
