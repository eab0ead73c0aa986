"""The ``povmfit.datasheet/1`` JSON document of a fit (figures from ``inference.figures``)."""
from __future__ import annotations

import datetime as _dt

import numpy as np

import povmfit
from povmfit.fitting.inference.figures import CALIBRATION_EXCLUDED, entry, figures

__all__ = ["figures", "datasheet_document", "worst_residuals", "model_block", "SCHEMA"]

SCHEMA = "povmfit.datasheet/1"


def model_block(model) -> dict:
    block = {"family": model.family, "spec": model.spec, "features": model.feature_list}
    if model.family == "pnr":
        block["max_outcome"] = model.size
    else:
        block["pixels"] = model.size
        if model.saturation is not None:
            block["max_outcome"] = model.saturation
    if model.fixed_readout is not None:
        block["max_outcome"] = model.n_outcomes - 1
    return block


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
        block[name] = entry(
            result.values[name], result.stderr[name], result.ci95[name],
            ci_method=result.ci_method[name],
            stat_stderr=result.stat_stderr[name],
            calibration_stderr=result.calibration_stderr[name],
        )
        if result.bootstrap:
            block[name]["bootstrap_stderr"] = result.bootstrap["stderr"][name]
            block[name]["bootstrap_ci95"] = result.bootstrap["ci95"][name]
    return block


def datasheet_document(scan, result, *, options: dict, gate_duration_s=None, comparison=None, verdict=None, cross_check=None,
                       conditions=None) -> dict:
    """The ``povmfit.datasheet/1`` document (plain JSON-able data)."""
    return {
        "schema": SCHEMA,
        "model": model_block(result.model),
        "conditions": dict(conditions or {}),
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
