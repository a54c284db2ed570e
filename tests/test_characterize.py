"""Characterisation and fitting against known model cells.

Truths: the passive cell's own parameters (R = 1/g_L, tau = C/g_L; the RC membrane);
for the Hodgkin–Huxley cell, the steady states of the HH 1952 equations solved here
independently (input resistance: the same regression over the exact steady states;
rest: where the steady ionic current is zero) and its capacitance (measured at the
onset of short pulses, where only the capacitor charges); rheobase and f–I: the
model's own noise-free simulation; spike features: eFEL.
"""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

import clampcore
from clampcore.cellfeatures import (
    analyse_active,
    analyse_passive,
    detect_spikes,
    isi_stats,
    spike_features,
)
from clampcore.cellfit import fit_neurons, neuron_toml, simulate_fi
from clampcore.characterize import (
    DEFAULT_EXPERIMENT,
    characterize,
    reanalyse,
    reanalyse_recordings,
)
from clampcore.cli import main
from clampcore.nwb import read_nwb_summary, validate_nwb
from clampcore.protocols import active_protocol, dac_quantiser, passive_protocol, run_protocol
from clampcore.stability import cell_conductance

efel = pytest.importorskip("efel")

ROOT_FIXTURES = Path(__file__).resolve().parent / "fixtures"

# A passive cell made integrate-and-fire by a virtual threshold_reset (noise on). Its
# threshold sits so that the rheobase, g_L (theta - E_L) = 5 nS x 21 mV = 105 pA, falls
# between two steps of the family rather than on one.
IMPOSED = {
    "loop": {"rate_hz": 10000, "max_current_pA": 800, "spike_threshold_mV": -49},
    "cell": {
        "model": "passive",
        "capacitance_pF": 100,
        "leak_nS": 5,
        "rest_mV": -70,
        "noise_pA": 3,
        "measurement_noise_mV": 0.05,
        "seed": 1,
    },
    "amplifier": {"vm_mV_per_V": 100, "command_pA_per_V": 400},
    "element": [
        # g 500 nS: a quarter of the loop's stable limit at 10 kHz (clampcore.stability).
        # The clamp asks for 8 nA and gets the 800 pA limit (the limit applies to the whole
        # command): V falls about 9 mV/ms and reaches the reset as the 2 ms run out
        # (measured here: 8.8 mV/ms in the spike-aligned mean).
        {
            "kind": "threshold_reset",
            "name": "imposed",
            "threshold_mV": -49,
            "reset_mV": -65,
            "refractory_ms": 2,
            "g_nS": 500,
        }
    ],
}


def _quiet(*_args):
    pass


@pytest.fixture(scope="module")
def imposed(tmp_path_factory):
    out = tmp_path_factory.mktemp("imposed")
    return characterize(IMPOSED, None, out, log=_quiet), out


@pytest.fixture(scope="module")
def hh(tmp_path_factory):
    out = tmp_path_factory.mktemp("hh")
    return characterize(DEFAULT_EXPERIMENT, None, out, log=_quiet), out


def _val(doc, name):
    return doc["values"][name]["value"]


# ------------------------------------------------------------- HH truth, independently
# Hodgkin & Huxley 1952 rate functions in the modern convention (rest near -65 mV),
# conductances in mS/cm^2, as written in Dayan & Abbott 2001, ch. 5, and the example cell.
def _hh_rates(v):
    am = 0.1 * (v + 40) / (1 - math.exp(-(v + 40) / 10)) if abs(v + 40) > 1e-9 else 1.0
    bm = 4 * math.exp(-(v + 65) / 18)
    ah = 0.07 * math.exp(-(v + 65) / 20)
    bh = 1 / (1 + math.exp(-(v + 35) / 10))
    an = 0.01 * (v + 55) / (1 - math.exp(-(v + 55) / 10)) if abs(v + 55) > 1e-9 else 0.1
    bn = 0.125 * math.exp(-(v + 65) / 80)
    return am / (am + bm), ah / (ah + bh), an / (an + bn)


def _hh_steady_current_pA(v, c_pF):
    m, h, n = _hh_rates(v)
    i_uA_cm2 = 120 * m**3 * h * (v - 50) + 36 * n**4 * (v + 77) + 0.3 * (v + 54.4)
    area_cm2 = c_pF * 1e-6  # 1 uF/cm^2
    return i_uA_cm2 * area_cm2 * 1e6  # uA -> pA


def _hh_truth(c_pF, amps_pA):
    rest = optimize.brentq(lambda v: _hh_steady_current_pA(v, c_pF), -70, -60)

    def excess(v, i_pA):
        return _hh_steady_current_pA(v, c_pF) - i_pA

    v_ss = [optimize.brentq(excess, -90, rest, args=(i,)) for i in amps_pA]
    r_MOhm = stats.linregress(amps_pA, np.array(v_ss) - rest).slope * 1000.0
    return rest, r_MOhm


def _noise_free(exp):
    exp = copy.deepcopy(exp)
    exp["cell"]["noise_pA"] = 0.0
    exp["cell"]["measurement_noise_mV"] = 0.0
    return exp


def _model_counts(exp, amps, step_ms):
    """The model's own spike counts for steps from rest, noise off (offline simulation)."""
    counts = []
    for a in amps:
        e = _noise_free(exp)
        e.setdefault("element", [])
        e["element"] = [*e["element"], {"kind": "current", "name": "s", "waveform": "step",
                                         "amplitude_pA": float(a), "start_ms": 50.0,
                                         "duration_ms": step_ms}]  # fmt: skip
        rec = clampcore.simulate(e, (step_ms + 100.0) / 1000.0)
        t_ms = rec.spike_times_s * 1000.0
        counts.append(int(np.sum((t_ms >= 50.0) & (t_ms < 50.0 + step_ms))))
    return np.array(counts)


def _check_fi(doc, exp):
    fi = np.array(_val(doc, "fi_curve"))
    step_ms = doc["values"]["fi_curve"]["quality"]["step_ms"]
    counts = _model_counts(exp, fi[:, 0], step_ms)
    measured = fi[:, 1] * step_ms / 1000.0
    # within 5% or one spike of the model's own values (the criterion)
    assert np.all(np.abs(measured - counts) <= np.maximum(0.05 * counts, 1.0)), (measured, counts)


def _rheobase_truth(exp, step_ms, hi_pA):
    lo, hi = 0.0, hi_pA
    for _ in range(12):
        mid = 0.5 * (lo + hi)
        if _model_counts(exp, [mid], step_ms)[0] > 0:
            hi = mid
        else:
            lo = mid
    return hi


# --------------------------------------------------------------------------- passive
def test_passive_cell_values_within_five_percent(imposed):
    doc, out = imposed
    # RC membrane: R = 1/g_L = 200 MOhm, tau = C/g_L = 20 ms, C = 100 pF, rest -70 mV.
    assert _val(doc, "resting_potential") == pytest.approx(-70.0, abs=0.2)
    assert _val(doc, "input_resistance") == pytest.approx(200.0, rel=0.05)
    assert _val(doc, "membrane_time_constant") == pytest.approx(20.0, rel=0.05)
    assert _val(doc, "capacitance") == pytest.approx(100.0, rel=0.05)
    assert _val(doc, "capacitance_onset") == pytest.approx(100.0, rel=0.05)
    for name, entry in doc["values"].items():
        assert entry["unit"] and "quality" in entry and "method" in entry, name
    assert (out / "characterization.png").stat().st_size > 10_000
    assert (out / "characterization.pdf").stat().st_size > 10_000
    assert json.loads((out / "characterization.json").read_text())["values"] == doc["values"]
    assert validate_nwb(out / "active.nwb") == []


def test_imposed_rheobase_and_fi(imposed):
    doc, _ = imposed
    step = doc["values"]["rheobase"]["quality"]["resolution_pA"]
    truth = 5.0 * 21.0  # g_L (theta - E_L): the LIF's rheobase (Gerstner & Kistler 2002)
    assert truth <= _val(doc, "rheobase") <= truth + step
    # the slow ramp: its first spike at the rheobase, within the ramp's noise
    assert _val(doc, "rheobase_ramp") == pytest.approx(truth, abs=5.0)
    _check_fi(doc, IMPOSED)


def test_lif_fit_recovers_the_imposed_rule(imposed):
    doc, _ = imposed
    fits = fit_neurons(doc)
    lif = fits["lif"]["neuron"]
    assert lif["threshold_mV"] == pytest.approx(-49.0, abs=0.3)
    # reset: where the 500 nS clamp holds V against the drive, reset + I/(g + g_L) at most
    # 200 pA / 505 nS = 0.4 mV above -65 mV (clamp and leak in parallel)
    assert lif["reset_mV"] == pytest.approx(-65.0, abs=0.5)
    assert lif["refractory_ms"] == pytest.approx(2.0, abs=0.2)
    assert lif["capacitance_pF"] == pytest.approx(100.0, rel=0.05)
    assert lif["leak_nS"] == pytest.approx(5.0, rel=0.05)
    # the stated error is what the fitted neuron, simulated with clampcore's kernel, gives
    fi = np.array(_val(doc, "fi_curve"))
    counts, _ = simulate_fi(lif, fi[:, 0], 500.0, 10000.0)
    err = np.abs(counts * 2.0 - fi[:, 1])
    assert err.max() == pytest.approx(fits["lif"]["errors"]["fi_max_hz"])
    # the AdEx block loads into an experiment file as it is written
    text = neuron_toml(fits, "like_cell", "test")
    exp = clampcore.load_experiment("[loop]\nrate_hz = 10000\n" + text)
    assert [e["model"] for e in exp.elements] == ["lif", "adex"]
    assert fits["adex"]["errors"]["fi_rms_hz"] <= 10.0


def test_fitted_lif_as_a_cell_reproduces_passive_values_and_fi(imposed, tmp_path):
    """The fitted LIF run as a model cell (passive membrane + threshold_reset at the fitted
    values) through the same characterisation gives back its passive values and the
    original f-I curve within the stated error (plus one spike: noise)."""
    doc, _ = imposed
    fit = fit_neurons(doc, adex=False)["lif"]
    lif = fit["neuron"]
    cell = copy.deepcopy(IMPOSED)
    cell["cell"].update(capacitance_pF=lif["capacitance_pF"], leak_nS=lif["leak_nS"],
                        rest_mV=lif["rest_mV"], seed=5)  # fmt: skip
    cell["element"][0].update(threshold_mV=lif["threshold_mV"], reset_mV=lif["reset_mV"],
                              refractory_ms=lif["refractory_ms"])  # fmt: skip
    cell["loop"]["spike_threshold_mV"] = lif["threshold_mV"]
    again = characterize(cell, None, tmp_path, report=False, log=_quiet)
    assert _val(again, "input_resistance") == pytest.approx(1000.0 / lif["leak_nS"], rel=0.05)
    assert _val(again, "capacitance") == pytest.approx(lif["capacitance_pF"], rel=0.05)
    assert _val(again, "resting_potential") == pytest.approx(lif["rest_mV"], abs=0.2)
    fi0, fi1 = np.array(_val(doc, "fi_curve")), np.array(_val(again, "fi_curve"))
    np.testing.assert_allclose(fi1[:, 0], fi0[:, 0], rtol=0.05)
    assert np.all(np.abs(fi1[:, 1] - fi0[:, 1]) <= fit["errors"]["fi_max_hz"] + 2.0 + 1e-9)


# ------------------------------------------------------------------ Hodgkin–Huxley
def test_hh_cell_values(hh):
    doc, _ = hh
    exp = clampcore.load_experiment(DEFAULT_EXPERIMENT)
    c_pF = exp.cell["capacitance_pF"]
    amps = [
        s["amplitude_pA"] - s["baseline_pA"]
        for s in doc["protocols"]["passive"]
        if s["kind"] == "step"
    ]
    rest, r_MOhm = _hh_truth(c_pF, amps)
    assert _val(doc, "resting_potential") == pytest.approx(rest, abs=0.2)
    assert _val(doc, "input_resistance") == pytest.approx(r_MOhm, rel=0.05)
    assert _val(doc, "capacitance_onset") == pytest.approx(c_pF, rel=0.05)
    # a spike at all: the protocol reaches the HH cell's repetitive range
    assert _val(doc, "fi_curve")[-1][1] > 50.0


def test_hh_rheobase_and_fi_against_the_model(hh):
    doc, _ = hh
    base = clampcore.load_experiment(DEFAULT_EXPERIMENT).to_dict()
    base.pop("session", None), base.pop("subject", None)
    step = doc["values"]["rheobase"]["quality"]["resolution_pA"]
    truth = _rheobase_truth(base, 500.0, _val(doc, "rheobase") + step)
    assert abs(_val(doc, "rheobase") - truth) <= step
    _check_fi(doc, base)


def test_spike_features_match_efel(hh):
    doc, out = hh
    rec = read_nwb_summary(out / "active.nwb")
    v, dt = rec["v_mV"], 1000.0 / rec["rate_hz"]
    steps = [s for s in doc["protocols"]["active"] if s["kind"] == "step"]
    efel.reset()
    efel.set_setting("DerivativeThreshold", 20.0)  # the same dV/dt criterion as ours
    efel.set_setting("Threshold", -20.0)  # the loop's spike level
    efel.set_setting("ignore_first_ISI", False)
    for seg in (steps[2], steps[-1]):
        lo = round((seg["start_ms"] - 50.0) / dt)
        hi = round((seg["start_ms"] + seg["duration_ms"] + 50.0) / dt)
        vv = v[lo:hi]
        t = np.arange(vv.size) * dt
        trace = {"T": t, "V": vv, "stim_start": [50.0], "stim_end": [50.0 + seg["duration_ms"]]}
        names = ["spike_count", "AP_begin_indices", "peak_voltage", "AP_duration_half_width",
                 "min_AHP_values", "ISI_CV", "all_ISI_values"]  # fmt: skip
        f = efel.get_feature_values([trace], names)[0]
        peaks = detect_spikes(vv, -20.0)
        ours = spike_features(vv, dt, peaks)
        assert peaks.size == f["spike_count"][0]
        np.testing.assert_allclose(ours["peak_mV"], f["peak_voltage"], atol=1e-6)
        # the last trough: eFEL seeks it up to the stimulus' end, we up to 50 ms after the
        # peak (past the step's end): compare the others
        np.testing.assert_allclose(ours["trough_mV"][:-1], f["min_AHP_values"][:-1], atol=1e-6)
        # eFEL takes the first sample past the criterion, we interpolate: within one sample
        k = np.asarray(f["AP_begin_indices"])
        assert np.all((ours["threshold_mV"] >= vv[k - 1]) & (ours["threshold_mV"] <= vv[k + 1]))
        # eFEL's half width has no interpolation: within one sample
        np.testing.assert_allclose(ours["width_ms"], f["AP_duration_half_width"], atol=dt)
        # intervals within one sample of eFEL's (its peak times come from its own
        # interpolation); our CV formula (sample SD / mean) on its intervals gives its CV
        isi_efel = np.asarray(f["all_ISI_values"])
        np.testing.assert_allclose(np.diff(peaks * dt), isi_efel, atol=dt + 1e-9)
        assert isi_stats(np.concatenate([[0.0], np.cumsum(isi_efel)]))[0] == pytest.approx(
            f["ISI_CV"][0], rel=1e-6
        )


def test_adaptation_index_matches_efel():
    """An adapting cell (HH with a slow inhibitory synapse from its own spikes)."""
    exp = {
        "loop": {"rate_hz": 10000, "max_current_pA": 1000},
        "cell": {"model": "hh", "capacitance_pF": 30},
        "element": [
            {"kind": "current", "name": "s", "waveform": "step", "amplitude_pA": 600,
             "start_ms": 50, "duration_ms": 500},
            {"kind": "synapse", "name": "ahp", "source": "cell", "g_max_nS": 1.0,
             "e_mV": -80.0, "tau_decay_ms": 100.0},
        ],
    }  # fmt: skip
    rec = clampcore.simulate(exp, 0.6)
    v = rec.v_mV
    efel.reset()
    efel.set_setting("ignore_first_ISI", False)
    trace = {"T": np.arange(v.size) * 0.1, "V": v, "stim_start": [50.0], "stim_end": [550.0]}
    f = efel.get_feature_values([trace], ["adaptation_index2"])[0]
    _, adapt = isi_stats(detect_spikes(v, -20.0) * 0.1)
    assert adapt > 0.001  # it does adapt
    assert adapt == pytest.approx(f["adaptation_index2"][0], rel=1e-6)


# ------------------------------------------------------------------ property test
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    # 50-333 MOhm; typical neurons' tau: 10-50 ms (common practice), and a little faster
    g_nS=st.floats(3, 20),
    tau_ms=st.floats(8, 50),
    rest_mV=st.floats(-80, -55),
    # The membrane's own noise as the SD of V at rest it makes: a current noise of SD
    # sigma_I held per sample gives sigma_I * sqrt(dt / (2 C g)) (the variance of an OU
    # process; Gardiner, Handbook of Stochastic Methods, sec. 3.8.4, from memory). Measurement noise
    # from one count of the ADC (0.0305 mV at 100 mV/V, 16 bits over +-10 V) up: a real
    # recording's noise dithers the ADC's rounding; a noise-free model cell repeats the
    # same rounding in every pulse, and the onset's average cannot remove it.
    # The limits are the protocol's (measured here, hypothesis seeds 999 and 4242): with
    # 0.05 mV of each, tau and tau/R came out 5.1-5.5% off on 3 nS cells (the family
    # sized from the 1.5x estimate below has steps of 1.1-2.7 mV); 2 nS or tau 5 ms, 6-9%
    # off. Such a cell needs a better estimate or the characterisation repeated.
    v_noise_mV=st.floats(0, 0.03),
    meas_mV=st.floats(0.03, 0.04),
    seed=st.integers(0, 1000),
)
def test_passive_values_hold_across_cells(g_nS, tau_ms, rest_mV, v_noise_mV, meas_mV, seed):
    c_pF = g_nS * tau_ms
    noise_pA = v_noise_mV / math.sqrt(0.1 / (2.0 * c_pF * g_nS))  # dt 0.1 ms (10 kHz)
    exp = {
        "loop": {"rate_hz": 10000, "max_current_pA": 1000},
        "cell": {"model": "passive", "capacitance_pF": c_pF, "leak_nS": g_nS,
                 "rest_mV": rest_mV, "noise_pA": noise_pA, "seed": seed,
                 "measurement_noise_mV": meas_mV},
    }  # fmt: skip
    # sized from a wrong estimate (x1.5): the analysis must not depend on a good guess
    proto = passive_protocol(1.5 * 1000.0 / g_nS, 1000.0, dac=dac_quantiser(exp))
    run = run_protocol(exp, proto, None, seed=seed)
    v = analyse_passive(run)["values"]
    assert v["resting_potential"]["value"] == pytest.approx(rest_mV, abs=0.2)
    assert v["input_resistance"]["value"] == pytest.approx(1000.0 / g_nS, rel=0.05)
    assert v["membrane_time_constant"]["value"] == pytest.approx(tau_ms, rel=0.05)
    assert v["capacitance"]["value"] == pytest.approx(c_pF, rel=0.05)
    # the onset: only the capacitor charges (C dV/dt = I at t = 0, the RC membrane)
    assert v["capacitance_onset"]["value"] == pytest.approx(c_pF, rel=0.05)


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(c_pF=st.floats(15, 100), noise_pA=st.floats(0, 5), seed=st.integers(0, 1000))
def test_hh_values_hold_across_cells(c_pF, noise_pA, seed):
    exp = {
        "loop": {"rate_hz": 10000, "max_current_pA": 2000},
        "cell": {"model": "hh", "capacitance_pF": c_pF, "noise_pA": noise_pA, "seed": seed},
    }
    # HH's chord conductance at rest is about 0.68 mS/cm^2 (HH 1952 densities)
    r_guess = 1000.0 / (0.68 * c_pF)
    proto = passive_protocol(r_guess, 2000.0, dac=dac_quantiser(exp))
    run = run_protocol(exp, proto, None, seed=seed)
    v = analyse_passive(run)["values"]
    rest, r_MOhm = _hh_truth(c_pF, [s.delta_pA for s in proto.of_kind("step")])
    assert v["resting_potential"]["value"] == pytest.approx(rest, abs=0.2)
    assert v["input_resistance"]["value"] == pytest.approx(r_MOhm, rel=0.05)
    assert v["capacitance_onset"]["value"] == pytest.approx(c_pF, rel=0.05)


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    g_nS=st.floats(3, 12),
    tau_ms=st.floats(8, 25),
    step_below=st.integers(2, 6),
    between=st.floats(0.3, 0.7),
    noise_pA=st.floats(0.1, 0.5),
    seed=st.integers(0, 1000),
    refractory_ms=st.floats(1.0, 5.0),
)
def test_rheobase_and_fi_hold_across_cells(
    g_nS, tau_ms, step_below, between, noise_pA, seed, refractory_ms
):
    """Passive cells made integrate-and-fire (threshold_reset), with noise: the rheobase
    within one step of the LIF's g_L (theta - E_L) (Gerstner & Kistler 2002) and every f-I
    point within 5% or one spike of the model's own noise-free simulation; the refractory
    period measured where V leaves the clamp within 0.1 ms of the one the rule applied
    (ceil(refractory_ms / dt) samples: clampcore/elements/threshold_reset.py).

    The threshold puts the rheobase between two steps of the family, every step at least
    1.2 mV of drive from theta (7 SD of V even if the 0.5 pA noise current held still on
    3 nS): on a step that ends at theta itself noise alone decides whether the cell fires,
    and no noise-free value applies.
    """
    inc_pA = math.floor(4.0 * g_nS)  # active_protocol: 10 steps up to 40 mV of drive
    above_rest_mV = (step_below + between) * inc_pA / g_nS
    exp = copy.deepcopy(IMPOSED)
    theta = -70.0 + above_rest_mV
    c_pF = g_nS * tau_ms
    exp["cell"].update(capacitance_pF=c_pF, leak_nS=g_nS, noise_pA=noise_pA, seed=seed)
    # As in IMPOSED: reset 16 mV below theta (past the detector's 10 mV re-arm hysteresis),
    # the clamp's C/g 0.2 ms (a quarter of the loop's stable limit at 10 kHz), and a current
    # limit that lets it get there within the refractory period: 16 mV x C / 2 ms <= 2400 pA
    # (C <= 300 pF), well inside the 4000 pA that +-10 V at 400 pA/V can command.
    exp["element"][0].update(
        threshold_mV=theta, reset_mV=theta - 16.0, g_nS=c_pF / 0.2, refractory_ms=refractory_ms
    )
    exp["loop"].update(spike_threshold_mV=theta, max_current_pA=3000.0)
    proto = active_protocol(1000.0 / g_nS, 800.0, seed=seed, dac=dac_quantiser(exp))
    values = analyse_active(run_protocol(exp, proto, None, seed=seed))["values"]
    step = values["rheobase"]["quality"]["resolution_pA"]
    assert step == pytest.approx(inc_pA, abs=0.2)  # the DAC grid moves steps by < 0.12 pA
    truth = g_nS * above_rest_mV
    assert truth <= values["rheobase"]["value"] <= truth + step
    _check_fi({"values": values}, exp)
    applied_ms = math.ceil(refractory_ms * 10.0 - 1e-9) / 10.0  # 10 kHz: 0.1 ms samples
    assert values["refractory_period"]["value"] == pytest.approx(applied_ms, abs=0.1)


# ------------------------------------------------------------ simulated rig, CLI
def test_characterize_on_the_simulated_rig_equals_offline(imposed, tmp_path):
    """Through the serial path in lockstep the recordings, hence every value, equal the
    offline simulation's (the lockstep rig and clampcore.simulate share one timing model)."""
    doc, _ = imposed
    rig = characterize(IMPOSED, "sim", tmp_path, rig_clock="lockstep", log=_quiet)
    assert rig["source"] == "simulated rig, lockstep clock"
    for name, entry in doc["values"].items():
        if entry["value"] is None:
            assert rig["values"][name]["value"] is None, name
            continue
        # 1e-6: the recordings keep element currents in float32 (7 digits), which the ramp's
        # rheobase reads back
        np.testing.assert_allclose(rig["values"][name]["value"], entry["value"], rtol=1e-6,
                                   err_msg=name)  # fmt: skip
    for path in rig["recordings"].values():
        assert validate_nwb(path) == []

    # The recordings alone (read with pynwb, no JSON): the same values, hence the same fit.
    again = reanalyse_recordings([tmp_path / "active.nwb"])  # finds passive.nwb beside it
    assert again["values"] == rig["values"]
    assert again["rate_hz"] == rig["rate_hz"]
    texts = []
    for source in ("characterization.json", "active.nwb"):
        out = tmp_path / f"fit-from-{source}.toml"
        assert main(["fit", str(tmp_path / source), "--out", str(out)]) == 0
        texts.append(out.read_text().splitlines()[1:])  # the first line names the source
    assert texts[0] == texts[1] and any('model = "adex"' in line for line in texts[0])


def test_hh_passive_values_on_the_simulated_rig_equal_offline(tmp_path):
    """The Hodgkin-Huxley cell (noise on) through the serial path in lockstep: the passive
    protocol's values equal the offline ones, which test_hh_cell_values checks against
    the HH 1952 steady states."""
    exp = clampcore.load_experiment(DEFAULT_EXPERIMENT)
    _, g_nS = cell_conductance(exp.cell, exp.dt_ms)
    proto = passive_protocol(1000.0 / g_nS, exp.loop["max_current_pA"], dac=dac_quantiser(exp))
    offline = analyse_passive(run_protocol(exp, proto, None, seed=2))["values"]
    rig_run = run_protocol(exp, proto, "sim", tmp_path / "hh.nwb", seed=2, rig_clock="lockstep")
    rig = analyse_passive(rig_run)["values"]
    assert offline["input_resistance"]["value"] > 0
    for name, entry in offline.items():
        if entry["value"] is None:
            assert rig[name]["value"] is None, name
            continue
        # float32 element currents in the recording (see above)
        np.testing.assert_allclose(rig[name]["value"], entry["value"], rtol=1e-6, err_msg=name)


def test_cli_errors_are_one_line(tmp_path, capsys):
    assert main(["characterize", "--out", str(tmp_path)]) == 1
    assert capsys.readouterr().err.strip() == "clampcore: --port PORT is required (or --offline)"
    assert main(["fit", str(tmp_path / "none.json")]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("clampcore: ") and "not found" in err and "\n" not in err


def test_fit_from_recordings_says_what_is_wrong_in_one_line(imposed, tmp_path, capsys):
    _, out = imposed
    # A clampcore recording, but not of a characterisation.
    other = ROOT_FIXTURES / "v1_simulate_imposed_lif.nwb"
    assert main(["fit", str(other)]) == 1
    err = capsys.readouterr().err.strip()
    assert "not a characterisation recording" in err and "\n" not in err
    # Not NWB at all.
    fake = tmp_path / "fake.nwb"
    fake.write_text("not a recording")
    assert main(["fit", str(fake)]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("clampcore: ") and "fake.nwb" in err and "\n" not in err
    # One recording without the other beside it.
    alone = tmp_path / "alone"
    alone.mkdir()
    (alone / "active.nwb").write_bytes((out / "active.nwb").read_bytes())
    assert main(["fit", str(alone / "active.nwb")]) == 1
    err = capsys.readouterr().err.strip()
    assert "passive recording of this characterisation is missing" in err and "\n" not in err
    # Both given explicitly works from anywhere; a JSON and an NWB together do not mix.
    both = [str(alone / "active.nwb"), str(out / "passive.nwb")]
    assert main(["fit", *both, "--lif-only"]) == 0
    assert 'model = "lif"' in capsys.readouterr().out
    assert main(["fit", str(out / "characterization.json"), *both]) == 1
    assert "one or two NWB recordings" in capsys.readouterr().err


def test_reanalysis_of_the_recordings_gives_the_same_values(imposed, capsys):
    """The NWB recordings hold everything the analysis needs: read back, same values."""
    doc, out = imposed
    again = reanalyse(doc)[0]["values"]
    for name, entry in doc["values"].items():
        if entry["value"] is None:
            assert again[name]["value"] is None, name
            continue
        # float32 element currents in the recording (see above)
        np.testing.assert_allclose(again[name]["value"], entry["value"], rtol=1e-6, err_msg=name)
    toml_path = out / "neuron.toml"
    argv = ["fit", str(out / "characterization.json"), "--from-recordings", "--lif-only"]
    assert main([*argv, "--out", str(toml_path)]) == 0
    text = toml_path.read_text()
    assert "f-I error RMS" in text and 'model = "lif"' in text
    assert (
        clampcore.load_experiment("[loop]\nrate_hz = 10000\n" + text).elements[0]["kind"]
        == "neuron"
    )
