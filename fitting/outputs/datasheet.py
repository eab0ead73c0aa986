"""Datasheet figures from a fit and the ``povmfit.datasheet/1`` JSON document.

Figures (all per shot unless a unit says otherwise):

- ``efficiency``: system detection efficiency eta (the loss stage), with ``stat_stderr``,
  ``calibration_stderr`` and the combined ``stderr``.
- ``vacuum_click_probability``: 1 - theta[0, 0], the probability of a non-zero outcome with
  no light (delta-method stderr; interval mapped from the dark parameter's interval).
- ``dark_count_rate_hz`` (with a gate duration tau): R = -ln(1 - p_vac)/tau, the rate of a
  Poisson dark process giving the observed vacuum click probability per gate.
- ``crosstalk_probability``: probability that one fired pixel (or avalanche) fires another.
"""
from __future__ import annotations

import datetime as _dt
from dataclasses import replace

import numpy as np

import povmfit
from povmfit.models import dark_parameter_names

__all__ = ["figures", "datasheet_document", "worst_residuals", "model_block", "SCHEMA"]

SCHEMA = "povmfit.datasheet/1"
CALIBRATION_EXCLUDED = (
    "probe photon numbers taken as exact: the efficiency uncertainty excludes the probe-calibration "
    "uncertainty (give --calibration-uncertainty to include it)"
)


def model_block(model) -> dict:
    block = {"family": model.family, "spec": model.spec, "features": model.feature_list}
    if model.family == "pnr":
        block["max_outcome"] = model.size
    else:
        block["pixels"] = model.size
        if model.saturation is not None:
            block["max_outcome"] = model.saturation
    return block


def _entry(value, stderr, ci95, **extra) -> dict:
    return {"value": float(value), "stderr": float(stderr), "ci95": [float(ci95[0]), float(ci95[1])], **extra}


def _dark_name(result):
    return next((name for name in dark_parameter_names() if name in result.values), None)


def figures(result, gate_duration_s: float | None = None) -> dict:
    """The model-independent figures of a fitted detector (see module docstring)."""
    model = result.model
    out = {}
    eff = "efficiency"
    extra = {
        "stat_stderr": result.stat_stderr[eff],
        "calibration_stderr": result.calibration_stderr[eff],
        "ci_method": result.ci_method[eff],
    }
    if result.calibration_uncertainty is None:
        extra["note"] = CALIBRATION_EXCLUDED
    out[eff] = _entry(result.values[eff], result.stderr[eff], result.ci95[eff], **extra)

    theta, jac = result.povm_and_jacobian(result.n_photons)
    p_vac = 1.0 - float(theta[0, 0])
    grad = -jac[0, 0]
    n_model = len(model.parameter_names)
    se_vac = float(np.sqrt(max(grad @ result.covariance[:n_model, :n_model] @ grad, 0.0)))
    dark = _dark_name(result)
    if dark is None:
        ci_vac = (p_vac, p_vac)
    else:
        ends = [1.0 - float(replace(result, values={**result.values, dark: end}).povm_and_jacobian(result.n_photons)[0][0, 0])
                for end in result.ci95[dark]]
        ci_vac = (min(ends), max(ends))
    out["vacuum_click_probability"] = _entry(p_vac, se_vac, ci_vac)
    if dark is None:
        out["vacuum_click_probability"]["note"] = "the model has no dark counts"

    if gate_duration_s:
        def rate(p):
            return -np.log1p(-min(p, 1 - 1e-15)) / gate_duration_s

        se_rate = se_vac / (1 - p_vac) / gate_duration_s
        out["dark_count_rate_hz"] = _entry(
            rate(p_vac), se_rate, (rate(ci_vac[0]), rate(ci_vac[1])), gate_duration_s=float(gate_duration_s)
        )
    if "crosstalk_probability" in result.values:
        name = "crosstalk_probability"
        out[name] = _entry(result.values[name], result.stderr[name], result.ci95[name], ci_method=result.ci_method[name])
    return out


def worst_residuals(scan, result, count: int = 5) -> list[dict]:
    """The probes and outcomes with the largest standardised (Pearson) residuals."""
    expected = scan.shots[:, None] * np.clip(result.predicted, 1e-300, None)
    q = np.clip(result.predicted, 1e-300, 1.0)
    z = (scan.counts - expected) / np.sqrt(expected * (1 - q) + 1e-300)
    order = np.argsort(-np.abs(z), axis=None)[:count]
    rows = []
    for flat in order:
        p, k = np.unravel_index(flat, z.shape)
        rows.append({
            "probe": int(p),
            "label": scan.labels[p] if scan.labels else None,
            "coherent_photons": float(scan.coherent_photons[p]),
            "thermal_photons": float(scan.thermal_photons[p]),
            "outcome": int(k),
            "observed": int(scan.counts[p, k]),
            "expected": float(expected[p, k]),
            "z": float(z[p, k]),
        })
    return rows


def parameters_block(result) -> dict:
    block = {}
    for name in result.names:
        block[name] = _entry(
            result.values[name], result.stderr[name], result.ci95[name],
            ci_method=result.ci_method[name],
            stat_stderr=result.stat_stderr[name],
            calibration_stderr=result.calibration_stderr[name],
        )
        if result.bootstrap:
            block[name]["bootstrap_stderr"] = result.bootstrap["stderr"][name]
            block[name]["bootstrap_ci95"] = result.bootstrap["ci95"][name]
    return block


def datasheet_document(scan, result, *, options: dict, gate_duration_s=None, comparison=None, verdict=None, cross_check=None) -> dict:
    """The ``povmfit.datasheet/1`` document (plain JSON-able data)."""
    return {
        "schema": SCHEMA,
        "model": model_block(result.model),
        "verdict": verdict,
        "parameters": parameters_block(result),
        "correlation": {"names": list(result.names), "matrix": np.round(result.correlation, 6).tolist()},
        "figures": figures(result, gate_duration_s),
        "calibration": {
            "included": result.calibration_uncertainty is not None,
            "relative_uncertainty": result.calibration_uncertainty,
            "note": None if result.calibration_uncertainty is not None else CALIBRATION_EXCLUDED,
        },
        "goodness_of_fit": {
            "deviance": result.deviance,
            "dof": result.dof,
            "p_value": result.p_value,
            "weighting": result.weighting,
            "converged": result.converged,
            "photon_cutoff": result.n_photons,
            "worst_residuals": worst_residuals(scan, result),
        },
        "model_comparison": comparison or [],
        "cross_check": cross_check or {},
        "provenance": {
            "input_file": str(scan.source),
            "input_sha256": scan.sha256,
            "software": f"povmfit {povmfit.__version__}",
            "options": options,
            "created_utc": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        },
    }
