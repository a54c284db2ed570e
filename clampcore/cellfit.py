"""``clampcore fit``: a virtual neuron that behaves like the characterised cell.

    clampcore fit CHARACTERIZATION.json [--out NEURON.toml] [--name NAME] [--from-recordings]
    clampcore fit DIR/active.nwb [DIR/passive.nwb] [--out NEURON.toml] ...

From the values ``clampcore characterize`` measured (its JSON; with
``--from-recordings``, analysed again from the NWB recordings it names), or from its
NWB recordings alone (analysed again: ``clampcore.characterize.reanalyse_recordings``;
one recording finds the other beside it):

- **LIF** (``neuron`` element, ``model = "lif"``): ``C``, ``g_L = 1/R`` and
  ``E_L`` = resting potential from the passive values (``C = τ/R`` when one
  exponential describes the step response, mean R² >= 0.9; otherwise — a
  Hodgkin–Huxley-like response — the onset capacitance); threshold = the spike
  threshold, reset = the trough after the spike; the refractory period is measured
  where the spikes are imposed by a ``threshold_reset`` rule (the release from its
  clamp, ``refractory_period`` of the characterisation), else it is the one free
  parameter, fitted (``scipy.optimize.minimize_scalar``, bounded) to the f–I curve
  with the LIF's closed-form rate for a step ``I`` from rest::

      f(I) = 1 / (t_ref + τ·ln((V∞ − V_reset)/(V∞ − θ))),  V∞ = E_L + R·I > θ; else 0

  (the first interval starts from E_L, not V_reset: the count over the step is
  simulated exactly when the error is stated). The rheobase follows from the
  passive values and the threshold: ``g_L·(θ − E_L)``.
- **AdEx** (``model = "adex"``, Brette & Gerstner 2005): the same C, g_L, E_L,
  reset and refractory period; ``V_T``, ``ΔT``, ``a``, ``b``, ``τ_w`` fitted
  (Nelder–Mead, ``scipy.optimize.minimize``) to the spike counts of every step
  and to the intervals of the step with the most spikes (the adaptation), each
  evaluation simulating the candidate with clampcore's own neuron kernel
  (``clampcore.simulate``: one virtual neuron per step current, held from rest).

The fit error is stated for both: RMS and largest f–I error over the steps (Hz),
and for AdEx the RMS relative error of the intervals, all from simulating the
fitted neuron with clampcore's kernel.

Public names: ``fit_lif``, ``fit_adex``, ``fit_neurons``, ``simulate_fi``,
``neuron_toml``, ``add_parser``.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

# A single exponential describes the step response when its fits reach this mean R².
SINGLE_EXPONENTIAL_R2 = 0.9
# AdEx v_peak when the cell's spikes have no measurable peak (imposed spikes): 0 mV, as in
# Naud, Marcille, Clopath & Gerstner 2008 (Biol Cybern 99:335).
DEFAULT_V_PEAK_MV = 0.0
_INVALID_COST = 1e6  # a candidate the neuron element would refuse (V_T outside reset..peak)
_ADEX_MAX_EVALS = 400  # Nelder–Mead evaluations: enough to settle 5 parameters here


def _v(values: dict[str, Any], name: str) -> float:
    entry = values.get(name)
    v = None if entry is None else entry.get("value")
    if v is None:
        raise ValueError(f"characterisation value '{name}' is missing: cannot fit")
    return float(v)


def passive_parameters(values: dict[str, Any]) -> dict[str, float]:
    """C (pF), g_L (nS), E_L (mV) and tau (ms) from the passive values."""
    r_MOhm = _v(values, "input_resistance")
    r2 = values["membrane_time_constant"]["quality"].get("r_squared_mean", 0.0) or 0.0
    if r2 >= SINGLE_EXPONENTIAL_R2:
        c_pF, source = _v(values, "capacitance"), "tau/R"
    else:
        c_pF, source = _v(values, "capacitance_onset"), "onset"
    g_nS = 1000.0 / r_MOhm
    return {
        "capacitance_pF": c_pF,
        "leak_nS": g_nS,
        "rest_mV": _v(values, "resting_potential"),
        "tau_ms": c_pF / g_nS,
        "capacitance_from": source,
    }


def lif_rate_hz(i_pA: np.ndarray, p: dict[str, float]) -> np.ndarray:
    """Closed-form steady firing rate of the LIF for constant currents (see docstring)."""
    v_inf = p["rest_mV"] + np.asarray(i_pA, dtype=float) / p["leak_nS"]
    out = np.zeros_like(v_inf)
    ok = v_inf > p["threshold_mV"]
    ratio = (v_inf[ok] - p["reset_mV"]) / (v_inf[ok] - p["threshold_mV"])
    out[ok] = 1000.0 / (p["refractory_ms"] + p["tau_ms"] * np.log(np.maximum(ratio, 1.0)))
    return out


def simulate_fi(
    neuron: dict[str, Any], currents_pA: np.ndarray, duration_ms: float, rate_hz: float
) -> tuple[np.ndarray, list[np.ndarray]]:
    """Spike count and spike times (ms) of ``neuron`` held at each current from rest.

    One virtual neuron per current in one offline run (clampcore's neuron kernel).
    """
    from clampcore.offline import simulate

    elements = []
    for k, i_pA in enumerate(currents_pA):
        el = {key: val for key, val in neuron.items() if key not in ("kind", "name")}
        el.update(kind="neuron", name=f"n{k}", bias_pA=float(i_pA))
        elements.append(el)
    exp = {"loop": {"rate_hz": rate_hz}, "element": elements}
    rec = simulate(exp, duration_ms / 1000.0, quantise=False)
    times = [rec.neuron_spike_times_s(f"n{k}") * 1000.0 for k in range(len(currents_pA))]
    return np.array([t.size for t in times]), times


def _fi_data(values: dict[str, Any]) -> tuple[np.ndarray, np.ndarray, float]:
    curve = values.get("fi_curve", {}).get("value")
    if not curve:
        raise ValueError("characterisation value 'fi_curve' is missing: cannot fit")
    arr = np.asarray(curve, dtype=float)
    step_ms = float(values["fi_curve"]["quality"].get("step_ms") or 500.0)
    return arr[:, 0], arr[:, 1], step_ms


def _errors(rates_model: np.ndarray, rates: np.ndarray) -> dict[str, float]:
    err = rates_model - rates
    return {"fi_rms_hz": float(np.sqrt(np.mean(err**2))), "fi_max_hz": float(np.max(np.abs(err)))}


def fit_lif(values: dict[str, Any], rate_hz: float) -> dict[str, Any]:
    """The LIF neuron element and its fit error (see the module docstring)."""
    p = passive_parameters(values)
    p["threshold_mV"] = _v(values, "spike_threshold")
    p["reset_mV"] = min(_v(values, "spike_trough"), p["threshold_mV"] - 0.5)
    from scipy import optimize

    amps, rates, step_ms = _fi_data(values)
    fired = rates > 0
    dt_ms = 1000.0 / rate_hz

    def loss(t_ref: float) -> float:
        q = dict(p, refractory_ms=t_ref)
        return float(np.sum((lif_rate_hz(amps[fired], q) - rates[fired]) ** 2))

    measured = values.get("refractory_period", {}).get("value")
    if measured is not None:  # imposed spikes: the clamp's own period, measured
        t_ref = float(measured)
    elif fired.any():
        res = optimize.minimize_scalar(loss, bounds=(dt_ms, 100.0), method="bounded")
        t_ref = float(res.x)
    else:
        t_ref = 2.0  # no spikes to fit: a typical absolute refractory period (common practice)
    neuron = {
        "kind": "neuron",
        "model": "lif",
        "capacitance_pF": p["capacitance_pF"],
        "leak_nS": p["leak_nS"],
        "rest_mV": p["rest_mV"],
        "threshold_mV": p["threshold_mV"],
        "reset_mV": p["reset_mV"],
        "refractory_ms": max(t_ref, dt_ms),
    }
    counts, _ = simulate_fi(neuron, amps, step_ms, rate_hz)
    errors = _errors(counts / (step_ms / 1000.0), rates)
    return {"neuron": neuron, "errors": errors, "capacitance_from": p["capacitance_from"]}


def fit_adex(values: dict[str, Any], rate_hz: float, lif: dict[str, Any]) -> dict[str, Any]:
    """The AdEx neuron element fitted to the f–I curve and the adaptation."""
    from scipy import optimize

    amps, rates, step_ms = _fi_data(values)
    base = dict(lif["neuron"])
    base["model"] = "adex"
    height = values.get("spike_height", {}).get("value")
    threshold = base["threshold_mV"]
    base["v_peak_mV"] = threshold + float(height) if height else DEFAULT_V_PEAK_MV
    train = values.get("isi_train", {})
    isi = np.asarray(train.get("value") or [], dtype=float)
    train_pA = train.get("quality", {}).get("step_pA")
    sim_amps = np.append(amps, train_pA) if isi.size and train_pA is not None else amps
    scale_hz = max(1.0, float(np.max(rates)))

    def neuron_of(x: np.ndarray) -> dict[str, Any]:
        v_t, log_dt, a, b, log_tw = x
        return dict(
            base,
            threshold_mV=float(v_t),
            delta_t_mV=float(np.clip(math.exp(log_dt), 0.2, 10.0)),
            a_nS=float(a),
            b_pA=float(max(b, 0.0)),
            tau_w_ms=float(np.clip(math.exp(log_tw), 5.0, 2000.0)),
        )

    def evaluate(x: np.ndarray) -> tuple[float, dict[str, float]]:
        neuron = neuron_of(x)
        if not neuron["v_peak_mV"] > neuron["threshold_mV"] > neuron["reset_mV"]:
            return _INVALID_COST, {}
        counts, times = simulate_fi(neuron, sim_amps, step_ms, rate_hz)
        model_rates = counts[: amps.size] / (step_ms / 1000.0)
        cost = float(np.mean(((model_rates - rates) / scale_hz) ** 2))
        errs = _errors(model_rates, rates)
        if isi.size:
            m_isi = np.diff(times[-1])
            n = min(m_isi.size, isi.size)
            if n < isi.size:  # too few spikes: penalise each missing interval fully
                cost += (isi.size - n) / isi.size
            if n:
                rel = (m_isi[:n] - isi[:n]) / isi[:n]
                cost += float(np.mean(rel**2))
                errs["isi_rms_relative"] = float(np.sqrt(np.mean(rel**2)))
        return cost, errs

    # Start: spike initiation a slope factor below the measured threshold, little adaptation
    # (Brette & Gerstner 2005 values for a, b, tau_w: 4 nS, 80.5 pA, 144 ms).
    x0 = np.array([threshold - 2.0, math.log(2.0), 4.0, 80.5, math.log(144.0)])
    res = optimize.minimize(
        lambda x: evaluate(x)[0],
        x0,
        method="Nelder-Mead",
        options={"maxfev": _ADEX_MAX_EVALS, "xatol": 1e-2, "fatol": 1e-4},
    )
    neuron = neuron_of(res.x)
    cost, errors = evaluate(res.x)
    errors["cost"] = cost
    return {"neuron": neuron, "errors": errors, "evaluations": int(res.nfev)}


def fit_neurons(doc: dict[str, Any], adex: bool = True) -> dict[str, Any]:
    """LIF (and AdEx) fits from a characterisation document (``characterization.json``)."""
    values = doc["values"]
    rate_hz = float(doc.get("rate_hz", 10000.0))
    out = {"lif": fit_lif(values, rate_hz)}
    if adex:
        out["adex"] = fit_adex(values, rate_hz, out["lif"])
    return out


def neuron_toml(fits: dict[str, Any], name: str, source: str) -> str:
    """``[[element]]`` blocks for an experiment file, with the fit errors as comments."""
    lines = [f"# Virtual neurons fitted by clampcore fit to {source}."]
    for model, fit in fits.items():
        e = fit["errors"]
        lines.append(
            f"# {model}: f-I error RMS {e['fi_rms_hz']:.3g} Hz, largest {e['fi_max_hz']:.3g} Hz"
            + (
                f"; intervals RMS {100 * e['isi_rms_relative']:.3g}%"
                if "isi_rms_relative" in e
                else ""
            )
        )
        lines.append("[[element]]")
        neuron = dict(fit["neuron"], name=f"{name}_{model}")
        for key in (
            "kind",
            "name",
            "model",
            *[k for k in neuron if k not in ("kind", "name", "model")],
        ):
            val = neuron[key]
            lines.append(f"{key} = " + (f'"{val}"' if isinstance(val, str) else f"{val:.6g}"))
        lines.append("")
    return "\n".join(lines)


def _command(args: argparse.Namespace) -> int:
    from clampcore.characterize import require_analysis

    require_analysis("fit")
    paths = [Path(p) for p in args.characterization]
    if any(p.suffix.lower() == ".nwb" for p in paths):
        from clampcore.characterize import reanalyse_recordings

        if len(paths) > 2 or not all(p.suffix.lower() == ".nwb" for p in paths):
            raise ValueError("give one characterization.json, or one or two NWB recordings")
        doc = reanalyse_recordings(paths)
        return _write_fits(doc, args, " and ".join(p.name for p in paths))
    if len(paths) != 1:
        raise ValueError("give one characterization.json, or one or two NWB recordings")
    path = paths[0]
    if not path.is_file():
        raise ValueError(
            f"{path}: not found (give the characterization.json of a characterize run)"
        )
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise ValueError(f"{path}: not JSON ({exc})") from exc
    if not isinstance(doc, dict) or "values" not in doc:
        raise ValueError(f"{path}: not a characterisation (no 'values')")
    if args.from_recordings:
        from clampcore.characterize import reanalyse

        doc["values"] = reanalyse(doc)[0]["values"]
    return _write_fits(doc, args, path.name)


def _write_fits(doc: dict[str, Any], args: argparse.Namespace, source: str) -> int:
    fits = fit_neurons(doc, adex=not args.lif_only)
    text = neuron_toml(fits, args.name, source)
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
        print(f"wrote {args.out}")
    print(text)
    return 0


def add_parser(sub: Any, name: str) -> None:
    p = sub.add_parser(name, help="fit LIF and AdEx neurons to a characterisation")
    p.add_argument(
        "characterization",
        nargs="+",
        help="characterization.json from clampcore characterize, or its NWB recordings "
        "(passive.nwb and active.nwb; one finds the other beside it)",
    )
    p.add_argument("--out", help="write the [[element]] blocks to this TOML file")
    p.add_argument("--name", default="fitted", help="element name prefix (default: fitted)")
    p.add_argument("--lif-only", action="store_true", help="skip the AdEx fit")
    p.add_argument(
        "--from-recordings",
        action="store_true",
        help="analyse the NWB recordings the JSON names again instead of reading its values",
    )
    p.set_defaults(func=_command)
