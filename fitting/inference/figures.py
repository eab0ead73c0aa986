"""The model-independent figures of a fitted detector, with their uncertainties.

Figures (all per shot unless a unit says otherwise):

- ``efficiency``: system detection efficiency eta (the loss stage), with ``stat_stderr``,
  ``calibration_stderr`` and the combined ``stderr``.
- ``vacuum_click_probability``: 1 - theta[0, 0], the probability of a non-zero outcome with
  no light (delta-method stderr; interval mapped from the dark parameter's interval).
- ``dark_count_rate_hz`` (with a gate duration tau): R = -ln(1 - p_vac)/tau, the rate of a
  Poisson dark process giving the observed vacuum click probability per gate.
- ``dark_click_probability_per_pixel`` (arrays of two or more pixels with dark counts): the
  fitted per-pixel, per-gate dark click probability d; the whole array's vacuum click
  probability is 1 - (1 - d)^N.
- ``dark_count_rate_per_pixel_hz`` (arrays, with a gate): -ln(1 - d)/tau, so the whole
  array's rate is N times it.
- ``crosstalk_probability``: probability that one fired pixel (or avalanche) fires another.

Each figure carries a ``meaning`` (one sentence, for datasheets and reports).
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from povmfit.models import dark_parameter_names

__all__ = ["figures", "entry", "CALIBRATION_EXCLUDED", "MEANINGS"]

MEANINGS = {
    "efficiency": "system detection efficiency: probability that a photon at the reference plane is detected",
    "vacuum_click_probability": "probability of any click (non-zero outcome) per gate with no light, whole detector",
    "dark_count_rate_hz": "dark count rate of the whole detector: -ln(1 - vacuum click probability) / gate",
    "dark_click_probability_per_pixel": "probability that one pixel clicks in a gate with no light",
    "dark_count_rate_per_pixel_hz": "dark count rate of one pixel: -ln(1 - per-pixel dark click probability) / gate",
    "crosstalk_probability": "probability that a fired pixel (or avalanche) fires another one",
}

CALIBRATION_EXCLUDED = (
    "probe photon numbers taken as exact: the efficiency uncertainty excludes the probe-calibration "
    "uncertainty (give a calibration uncertainty, --calibration-uncertainty, to include it)"
)


def entry(value, stderr, ci95, **extra) -> dict:
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
    out[eff] = entry(result.values[eff], result.stderr[eff], result.ci95[eff], **extra)

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
    out["vacuum_click_probability"] = entry(p_vac, se_vac, ci_vac)
    if dark is None:
        out["vacuum_click_probability"]["note"] = (
            "the model has no dark counts" if result.model.fixed_readout is None
            else "the model has no dark counts: vacuum gives a click only through the fixed readout matrix (1 - M[0, 0])")

    if gate_duration_s:
        def rate(p):
            return -np.log1p(-min(p, 1 - 1e-15)) / gate_duration_s

        se_rate = se_vac / (1 - p_vac) / gate_duration_s
        out["dark_count_rate_hz"] = entry(
            rate(p_vac), se_rate, (rate(ci_vac[0]), rate(ci_vac[1])), gate_duration_s=float(gate_duration_s)
        )
    if dark == "dark_probability" and model.size >= 2:
        d, se_d, ci_d = result.values[dark], result.stderr[dark], result.ci95[dark]
        out["dark_click_probability_per_pixel"] = entry(d, se_d, ci_d, pixels=int(model.size))
        if gate_duration_s:
            out["dark_count_rate_per_pixel_hz"] = entry(
                rate(d), se_d / (1 - d) / gate_duration_s, (rate(ci_d[0]), rate(ci_d[1])),
                gate_duration_s=float(gate_duration_s), pixels=int(model.size))
    if "crosstalk_probability" in result.values:
        name = "crosstalk_probability"
        out[name] = entry(result.values[name], result.stderr[name], result.ci95[name], ci_method=result.ci_method[name])
    for name, figure in out.items():
        figure["meaning"] = MEANINGS[name]
    return out
