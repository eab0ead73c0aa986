"""Maximum-likelihood fit of a parametric detector model to raw probe counts.

``fit_scan(scan, model)`` minimises the multinomial deviance (sum of squared deviance
residuals, see ``objective``) with lmfit's bounded trust-region least squares, using the exact
JAX Jacobian. Uncertainties:

- covariance = inverse expected Fisher information at the optimum;
- with a probe-calibration prior (relative 1-sigma width ``calibration_uncertainty``) a probe
  scale factor s ~ N(1, width^2) is fitted too. The *statistical* covariance is the inverse
  Fisher information of the model parameters with s held at its estimate; the *combined* one
  includes s; the calibration part of a standard error is sqrt(combined^2 - statistical^2);
- 95 % intervals: Wald (estimate +- 1.96 stderr) unless that interval crosses a bound of the
  parameter, in which case the profile-likelihood interval (deviance rise 3.841, chi2 with
  one degree of freedom) is used, cut at the bound.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import lmfit
import numpy as np
from scipy import optimize, stats

from povmfit.models import DetectorModel, choose_cutoff

from ._io import InputError
from .objective import compiled

__all__ = ["fit_scan", "FitResult", "FitNotConverged", "CHI2_95"]

CHI2_95 = stats.chi2.ppf(0.95, 1)  # 3.841: deviance rise of a 95 % profile interval
_SCALE_SPAN = 6.0  # calibration scale explored within 1 +- 6 sigma


class FitNotConverged(UserWarning):
    """The optimiser stopped without meeting its convergence criteria."""


@dataclass(frozen=True)
class FitResult:
    """Result of ``fit_scan``. Learned quantities; formatting lives in ``datasheet``.

    Attributes:
        model: the fitted DetectorModel.
        names: fitted parameter names (model parameters, then ``probe_scale`` if calibrated).
        values, stderr: {name: float}; stderr combines statistical and calibration parts.
        stat_stderr, calibration_stderr: {name: float} parts of stderr (calibration 0 when
            the probes are taken as exact).
        ci95: {name: (lo, hi)}; ci_method: {name: "wald" | "profile"}.
        covariance: combined covariance over ``names``; stat_covariance over model parameters.
        correlation: correlation matrix over ``names``.
        deviance, dof, p_value: goodness of fit (chi-square approximation of the deviance).
        n_photons: photon-number cutoff used.
        predicted: q[p, k] at the optimum, shape (n_probes, n_outcomes).
        converged, message: optimiser status.
        calibration_uncertainty: relative 1-sigma probe calibration width, or None.
        weighting: "deviance" or "pearson".
    """

    model: DetectorModel
    names: tuple[str, ...]
    values: dict
    stderr: dict
    stat_stderr: dict
    calibration_stderr: dict
    ci95: dict
    ci_method: dict
    covariance: np.ndarray
    stat_covariance: np.ndarray
    correlation: np.ndarray
    deviance: float
    dof: int
    p_value: float
    n_photons: int
    predicted: np.ndarray
    converged: bool
    message: str
    calibration_uncertainty: float | None
    weighting: str
    bootstrap: dict | None = field(default=None)

    @property
    def parameter_vector(self) -> np.ndarray:
        return np.array([self.values[n] for n in self.model.parameter_names])

    @property
    def n_parameters(self) -> int:
        return len(self.names) - (1 if self.calibration_uncertainty else 0)


def check_identifiable(scan, model: DetectorModel) -> None:
    """Refuse scans that cannot determine the model (InputError)."""
    if scan.n_outcomes != model.n_outcomes:
        raise InputError(
            f"{scan.source}: the scan has {scan.n_outcomes} outcomes (count_0..count_{scan.max_outcome}) "
            f"but model {model.spec} has {model.n_outcomes}"
        )
    light = (scan.coherent_photons + scan.thermal_photons) > 0
    if not light.any():
        raise InputError(f"{scan.source}: cannot identify a detector: no probe has light")
    settings = {(a, t) for a, t in zip(scan.coherent_photons, scan.thermal_photons)}
    if len(settings) * (model.n_outcomes - 1) < len(model.parameter_names):
        raise InputError(
            f"{scan.source}: {len(settings)} distinct probe setting(s) cannot identify the "
            f"{len(model.parameter_names)} parameters of {model.spec}"
        )
    dark_like = [n for n in model.parameter_names if n in ("dark_probability", "dark_mean")]
    if dark_like and len(settings) < 2:
        raise InputError(f"{scan.source}: a model with dark counts needs probes at two or more light levels")


def _cutoff(scan, calibration_uncertainty, tolerance) -> int:
    top = 1.0 + _SCALE_SPAN * calibration_uncertainty if calibration_uncertainty else 1.0
    return choose_cutoff(scan.coherent_photons * top, scan.thermal_photons * top, tolerance)


def _bounds(model, calibrated, width):
    bounds = model.bounds()
    if calibrated:
        bounds = dict(bounds, probe_scale=(max(1.0 - _SCALE_SPAN * width, 0.05), 1.0 + _SCALE_SPAN * width))
    return bounds


def _starting_point(model, fns, data, calibrated):
    """Simple moments: dark level from the darkest probe, efficiency from a coarse scan of the
    deviance (other parameters at their defaults)."""
    start = model.starting_values()
    coherent, thermal, counts, shots, _ = data
    darkest = int(np.argmin(coherent + thermal))
    no_click = max(counts[darkest, 0] / shots[darkest], 1e-12)
    if "dark_probability" in start:
        start["dark_probability"] = float(np.clip(1.0 - no_click ** (1.0 / model.size), 1e-6, 0.5))
    if "dark_mean" in start:
        start["dark_mean"] = float(np.clip(-np.log(no_click), 1e-6, 5.0))
    grid = np.linspace(0.02, 1.0, 50)
    vectors = np.array([[g if n == "efficiency" else start[n] for n in model.parameter_names] for g in grid])
    if calibrated:
        vectors = np.column_stack([vectors, np.ones(len(grid))])
    deviances = np.asarray(fns.batched_deviance(vectors, *data))
    start["efficiency"] = float(grid[int(np.nanargmin(deviances))])
    if calibrated:
        start["probe_scale"] = 1.0
    return start


def _wald_or_profile(name, index, x_hat, se, bounds, profile):
    lo_b, hi_b = bounds[name]
    lo, hi = x_hat[index] - 1.96 * se, x_hat[index] + 1.96 * se
    if np.isfinite(se) and lo >= lo_b and hi <= hi_b:
        return (float(lo), float(hi)), "wald"
    return profile(index), "profile"


def _profile_interval(fns, data, x_hat, dev_min, bounds_list, index, se):
    """95 % profile-likelihood interval for parameter ``index``."""
    others = [i for i in range(len(x_hat)) if i != index]
    lower = np.array([bounds_list[i][0] for i in others])
    upper = np.array([bounds_list[i][1] for i in others])

    def profile_deviance(value):
        def full(y):
            x = np.array(x_hat, dtype=float)
            x[others] = y
            x[index] = value
            return x

        if not others:
            return float(fns.deviance(full([]), *data))
        res = optimize.least_squares(
            lambda y: np.asarray(fns.residuals(full(y), *data)),
            np.clip(x_hat[others], lower, upper),
            jac=lambda y: np.asarray(fns.jacobian(full(y), *data))[:, others],
            bounds=(lower, upper),
            method="trf",
            xtol=1e-10,
            ftol=1e-10,
        )
        return float(2 * res.cost)

    def edge(direction):
        bound = bounds_list[index][0 if direction < 0 else 1]
        step = se if np.isfinite(se) and se > 0 else abs(bound - x_hat[index])
        far = x_hat[index] + direction * 10 * step
        far = max(far, bound) if direction < 0 else min(far, bound)
        if abs(far - x_hat[index]) < 1e-15:
            return float(bound)
        if profile_deviance(far) - dev_min < CHI2_95:
            return float(far)
        return float(optimize.brentq(lambda v: profile_deviance(v) - dev_min - CHI2_95, x_hat[index], far, xtol=1e-10 + 1e-6 * step))

    return edge(-1), edge(+1)


def fit_scan(
    scan,
    model: DetectorModel,
    calibration_uncertainty: float | None = None,
    weighting: str = "deviance",
    tolerance: float = 1e-10,
) -> FitResult:
    """Fit ``model`` to ``scan`` by maximum likelihood (see module docstring).

    Args:
        scan: a validated Scan (see ``scan.load_scan``).
        model: the DetectorModel to fit.
        calibration_uncertainty: relative 1-sigma uncertainty of the probe photon numbers
            (e.g. 0.05 for 5 %), or None to take the probes as exact.
        weighting: "deviance" (maximum likelihood) or "pearson".
        tolerance: neglected photon-number tail mass per probe when choosing the cutoff.
    """
    if calibration_uncertainty is not None and not 0 < calibration_uncertainty < 0.5:
        raise InputError(f"--calibration-uncertainty must be between 0 and 0.5 (relative), got {calibration_uncertainty}")
    check_identifiable(scan, model)
    calibrated = bool(calibration_uncertainty)
    width = float(calibration_uncertainty) if calibrated else 1.0
    n_photons = _cutoff(scan, calibration_uncertainty, tolerance)
    fns = compiled(model, n_photons, weighting, calibrated)
    data = (
        np.asarray(scan.coherent_photons, float),
        np.asarray(scan.thermal_photons, float),
        np.asarray(scan.counts, float),
        np.asarray(scan.shots, float),
        width,
    )
    names = model.parameter_names + (("probe_scale",) if calibrated else ())
    bounds = _bounds(model, calibrated, width)
    start = _starting_point(model, fns, data, calibrated)

    params = lmfit.Parameters()
    for name in names:
        lo, hi = bounds[name]
        params.add(name, value=float(np.clip(start[name], lo, hi)), min=lo, max=hi)

    def vector(p):
        return np.array([p[n].value for n in names])

    result = lmfit.minimize(
        lambda p: np.asarray(fns.residuals(vector(p), *data)),
        params,
        method="least_squares",
        Dfun=lambda p: np.array(fns.jacobian(vector(p), *data)),
        scale_covar=False,
        xtol=1e-12,
        ftol=1e-12,
        gtol=1e-10,
        max_nfev=2000,
    )
    x_hat = vector(result.params)
    converged = bool(result.success)
    message = str(result.message)
    if not converged:
        warnings.warn(f"fit of {model.spec} did not converge: {message}", FitNotConverged, stacklevel=2)

    deviance = float(fns.deviance(x_hat, *data))
    if calibrated:
        deviance_data = deviance - ((x_hat[-1] - 1.0) / width) ** 2
    else:
        deviance_data = deviance
    info = np.asarray(fns.fisher(x_hat, data[0], data[1], data[3], width))
    covariance = _safe_inverse(info)
    n_model = len(model.parameter_names)
    stat_covariance = _safe_inverse(info[:n_model, :n_model])
    se = np.sqrt(np.clip(np.diag(covariance), 0, None))
    stat_se = np.sqrt(np.clip(np.diag(stat_covariance), 0, None))
    bounds_list = [bounds[n] for n in names]

    values, stderr, stat_stderr, cal_stderr, ci95, ci_method = {}, {}, {}, {}, {}, {}
    for i, name in enumerate(names):
        values[name] = float(x_hat[i])
        stderr[name] = float(se[i])
        if i < n_model:
            stat_stderr[name] = float(stat_se[i])
            cal_stderr[name] = float(np.sqrt(max(se[i] ** 2 - stat_se[i] ** 2, 0.0)))
        else:
            stat_stderr[name] = 0.0
            cal_stderr[name] = float(se[i])
        ci95[name], ci_method[name] = _wald_or_profile(
            name, i, x_hat, se[i], bounds,
            lambda idx: _profile_interval(fns, data, x_hat, deviance, bounds_list, idx, se[idx]),
        )

    scale = np.sqrt(np.outer(np.diag(covariance), np.diag(covariance)))
    with np.errstate(invalid="ignore", divide="ignore"):
        correlation = np.where(scale > 0, covariance / scale, 0.0)
    dof = int(scan.n_probes * (scan.n_outcomes - 1) - n_model)
    p_value = float(stats.chi2.sf(deviance_data, dof)) if dof > 0 else float("nan")
    predicted = np.asarray(fns.probabilities(x_hat, data[0], data[1]))
    return FitResult(
        model=model,
        names=names,
        values=values,
        stderr=stderr,
        stat_stderr=stat_stderr,
        calibration_stderr=cal_stderr,
        ci95=ci95,
        ci_method=ci_method,
        covariance=covariance,
        stat_covariance=stat_covariance,
        correlation=correlation,
        deviance=deviance_data,
        dof=dof,
        p_value=p_value,
        n_photons=n_photons,
        predicted=predicted,
        converged=converged,
        message=message,
        calibration_uncertainty=calibration_uncertainty if calibrated else None,
        weighting=weighting,
    )


def _safe_inverse(matrix: np.ndarray) -> np.ndarray:
    """Inverse of a symmetric information matrix; pseudo-inverse if it is singular."""
    try:
        inverse = np.linalg.inv(matrix)
        if np.all(np.isfinite(inverse)) and np.all(np.diag(inverse) >= 0):
            return (inverse + inverse.T) / 2
    except np.linalg.LinAlgError:
        pass
    return np.linalg.pinv(matrix, hermitian=True)
