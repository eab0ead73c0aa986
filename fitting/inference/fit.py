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
from scipy import optimize
from scipy.special import chdtrc, chdtri

from povmfit.models import DetectorModel, dark_parameter_names, null_value

from povmfit.fitting.data.errors import ArgumentError, NotIdentifiable
from povmfit.fitting.inference.objective import (
    PROBABILITY_FLOOR, SCALE_SPAN, cell_residual_derivative, cell_residuals, compiled, fit_cutoff,
    fixed_probe_distributions, povm_and_jacobian,
)

__all__ = ["fit_scan", "FitResult", "FitNotConverged", "CHI2_95"]

CHI2_95 = chdtri(1, 0.05)  # 3.841: deviance rise of a 95 % profile interval


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
        bounds: {name: (lo, hi)} of every fitted parameter, as the optimiser used them.
        compute_model: the model whose compiled code computed the fit (``model`` itself or a
            larger model of its family with the missing features switched off).
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
    bounds: dict
    compute_model: DetectorModel | None = None
    bootstrap: dict | None = field(default=None)

    @property
    def parameter_vector(self) -> np.ndarray:
        return np.array([self.values[n] for n in self.model.parameter_names])

    def povm_and_jacobian(self, n_photons: int):
        """Fitted POVM theta[k, n] and d theta / d (model parameters), shapes (K, N) and
        (K, N, P), from the compiled code the fit used."""
        compute = self.compute_model or self.model
        names = list(compute.parameter_names)
        full = np.array([self.values[n] if n in self.values else null_value(n) for n in names])
        theta, jac = povm_and_jacobian(compute, n_photons)(full)
        own = [names.index(n) for n in self.model.parameter_names]
        return np.asarray(theta), np.asarray(jac)[..., own]


def check_identifiable(scan, model: DetectorModel) -> None:
    """Refuse scans that cannot determine the model (NotIdentifiable)."""
    if scan.n_outcomes != model.n_outcomes:
        raise NotIdentifiable(
            f"{scan.source}: the scan has {scan.n_outcomes} outcomes (count_0..count_{scan.max_outcome}) "
            f"but model {model.spec} has {model.n_outcomes}"
        )
    light = (scan.coherent_photons + scan.thermal_photons) > 0
    if not light.any():
        raise NotIdentifiable(f"{scan.source}: cannot identify a detector: no probe has light")
    settings = {(a, t) for a, t in zip(scan.coherent_photons, scan.thermal_photons)}
    if len(settings) * (model.n_outcomes - 1) < len(model.parameter_names):
        raise NotIdentifiable(
            f"{scan.source}: {len(settings)} distinct probe setting(s) cannot identify the "
            f"{len(model.parameter_names)} parameters of {model.spec}"
        )
    dark_like = [n for n in model.parameter_names if n in dark_parameter_names()]
    if dark_like and len(settings) < 2:
        raise NotIdentifiable(f"{scan.source}: a model with dark counts needs probes at two or more light levels")


# optimiser tolerances (relative change of parameters and deviance): tight for the reported
# fit, looser for the many fits of a model ranking, where deviance differences of order 0.1
# matter (on the demo scan 1e-8 and 1e-9 give the same deviances to 1e-6)
_TOLERANCES = {True: 1e-12, False: 1e-8}


class _Problem:
    """The least-squares problem of one candidate model on one scan.

    The POVM is computed by ``compute_model`` (a model with the same family and size and a
    superset of the features); parameters of features the candidate lacks are held at
    values that switch the feature off. Only the free parameters are fitted.
    """

    def __init__(self, scan, model, compute_model, n_photons, weighting, calibration_uncertainty, active=None):
        self.model = model
        self.calibrated = calibration_uncertainty is not None
        self.width = float(calibration_uncertainty) if self.calibrated else 1.0
        self.weighting = weighting
        full = list(compute_model.parameter_names) + (["probe_scale"] if self.calibrated else [])
        self.names = tuple(model.parameter_names) + (("probe_scale",) if self.calibrated else ())
        missing = [n for n in self.names if n not in full]
        if missing or compute_model.family != model.family or compute_model.n_outcomes != model.n_outcomes:
            raise ValueError(f"{compute_model.spec} cannot stand in for {model.spec}")
        self.free_index = np.array([full.index(n) for n in self.names])
        self.template = np.array([0.0 if n in self.names else null_value(n) for n in full])
        self.coherent = np.asarray(scan.coherent_photons, float)
        self.thermal = np.asarray(scan.thermal_photons, float)
        self._probabilities_and_jacobian = self._compiled_predictions(compute_model, n_photons)
        # probes outside ``active`` are predicted but not fitted (cross-validation keeps the
        # compiled shapes of the whole scan)
        self.active = np.ones(scan.n_probes, bool) if active is None else np.asarray(active, bool)
        self.counts = np.asarray(scan.counts, float)[self.active]
        self.shots = np.asarray(scan.shots, float)[self.active]
        bounds = model.bounds()
        if self.calibrated:
            bounds["probe_scale"] = (max(1.0 - SCALE_SPAN * self.width, 0.05), 1.0 + SCALE_SPAN * self.width)
        self.bounds = bounds
        self.bounds_list = [bounds[n] for n in self.names]

    def _compiled_predictions(self, compute_model, n_photons):
        """full parameter vector -> (q[p, k], dq/dx[p, k, i]) for every probe."""
        if self.calibrated:  # the probe distributions move with the fitted probe scale
            fns = compiled(compute_model, n_photons, "deviance", True)
            return lambda full: fns.probabilities_and_jacobian(full, self.coherent, self.thermal)
        # exact probes: constant distributions times the compiled POVM and its Jacobian
        povm = povm_and_jacobian(compute_model, n_photons)
        distributions = fixed_probe_distributions(self.coherent, self.thermal, n_photons)

        def predictions(full):
            theta, jac = povm(full)
            return distributions @ np.asarray(theta).T, np.tensordot(distributions, np.asarray(jac), axes=(1, 1))

        return predictions

    def full_vector(self, x):
        full = self.template.copy()
        full[self.free_index] = x
        return full

    def _evaluate(self, x):
        q, jac = self._probabilities_and_jacobian(self.full_vector(x))
        return np.asarray(q)[self.active], np.asarray(jac)[self.active][..., self.free_index]

    def all_probabilities(self, x):
        """q[p, k] for every probe of the scan, fitted or not."""
        # the probability+Jacobian function is the one compiled: reuse it rather than compile twice
        q, _ = self._probabilities_and_jacobian(self.full_vector(x))
        return np.asarray(q)

    def probabilities(self, x):
        return self.all_probabilities(x)[self.active]

    def residuals(self, x):
        r = cell_residuals(self.probabilities(x), self.counts, self.shots, self.weighting).ravel()
        if self.calibrated:
            r = np.append(r, (x[-1] - 1.0) / self.width)
        return r

    def residuals_and_jacobian(self, x):
        q, jac = self._evaluate(x)
        r = cell_residuals(q, self.counts, self.shots, self.weighting)
        dr_dq = cell_residual_derivative(q, r, self.counts, self.shots, self.weighting)
        rjac = (dr_dq[..., None] * jac).reshape(-1, len(x))
        r = r.ravel()
        if self.calibrated:
            r = np.append(r, (x[-1] - 1.0) / self.width)
            prior_row = np.zeros(len(x))
            prior_row[-1] = 1.0 / self.width
            rjac = np.vstack([rjac, prior_row])
        return r, rjac

    def jacobian(self, x):
        return self.residuals_and_jacobian(x)[1]

    def deviance(self, x):
        return float(np.sum(self.residuals(x) ** 2))

    def fisher(self, x):
        """Expected Fisher information of the multinomial counts, plus the prior."""
        q, jac = self._evaluate(x)
        q = np.maximum(q, PROBABILITY_FLOOR)
        info = np.einsum("p,pki,pkj->ij", self.shots, jac / q[..., None], jac)
        if self.calibrated:
            info[-1, -1] += 1.0 / self.width**2
        return info


def _starting_point(problem, initial: dict):
    """Simple moments: dark level from the darkest probe, efficiency from a coarse scan of the
    deviance (other parameters at their defaults). Values in ``initial`` take precedence; the
    efficiency scan is skipped when ``initial`` gives the efficiency."""
    model = problem.model
    start = model.starting_values()
    if "efficiency" in initial:
        start.update({k: v for k, v in initial.items() if k in start})
        if problem.calibrated:
            start.setdefault("probe_scale", initial.get("probe_scale", 1.0))
        return start
    total = (problem.coherent + problem.thermal)[problem.active]
    darkest = int(np.argmin(total))
    no_click = max(problem.counts[darkest, 0] / problem.shots[darkest], 1e-12)
    if "dark_probability" in start:
        start["dark_probability"] = float(np.clip(1.0 - no_click ** (1.0 / model.size), 1e-6, 0.5))
    if "dark_mean" in start:
        start["dark_mean"] = float(np.clip(-np.log(no_click), 1e-6, 5.0))
    if problem.calibrated:
        start["probe_scale"] = 1.0
    eta = _efficiency_from_no_click(problem, no_click if total[darkest] == 0 else 1.0)
    if eta is None:  # no probe in the useful range: coarse scan of the deviance instead
        deviances = []
        grid = np.linspace(0.02, 1.0, 11)
        for value in grid:
            deviances.append(problem.deviance(np.array([value if n == "efficiency" else start[n] for n in problem.names])))
        eta = float(grid[int(np.nanargmin(deviances))])
    start["efficiency"] = eta
    return start


def _efficiency_from_no_click(problem, dark_no_click: float):
    """Moment estimate of the efficiency from the no-click (outcome 0) frequencies.

    Under loss eta a displaced thermal probe (A, nbar) leaves the vacuum with probability
    exp(-eta A/(1 + eta nbar))/(1 + eta nbar); dark counts multiply that by the dark probe's
    no-click frequency. Each usable probe gives eta by bisection; the shot-weighted median
    is returned (None when no probe has a no-click frequency inside 2 %..98 %).
    """
    light = (problem.coherent + problem.thermal)[problem.active] > 0
    coherent = problem.coherent[problem.active][light]
    thermal = problem.thermal[problem.active][light]
    target = problem.counts[light, 0] / problem.shots[light] / max(dark_no_click, 1e-12)
    usable = (target > 0.02) & (target < 0.98)
    if not usable.any():
        return None
    coherent, thermal, target, weight = coherent[usable], thermal[usable], target[usable], problem.shots[light][usable]
    lo, hi = np.full(target.shape, 1e-6), np.ones(target.shape)
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        vacuum = np.exp(-mid * coherent / (1 + mid * thermal)) / (1 + mid * thermal)
        too_dark = vacuum < target  # too much light survives: efficiency lower
        hi = np.where(too_dark, mid, hi)
        lo = np.where(too_dark, lo, mid)
    estimates = 0.5 * (lo + hi)
    order = np.argsort(estimates)
    cumulative = np.cumsum(weight[order])
    return float(np.clip(estimates[order][np.searchsorted(cumulative, cumulative[-1] / 2)], 0.02, 1.0))


def _profile_interval(problem, x_hat, dev_min, index, se):
    """95 % profile-likelihood interval for free parameter ``index``."""
    others = [i for i in range(len(x_hat)) if i != index]
    lower = np.array([problem.bounds_list[i][0] for i in others])
    upper = np.array([problem.bounds_list[i][1] for i in others])

    def profile_deviance(value):
        def full(y):
            x = np.array(x_hat, dtype=float)
            x[others] = y
            x[index] = value
            return x

        if not others:
            return problem.deviance(full([]))
        res = optimize.least_squares(
            lambda y: problem.residuals(full(y)),
            np.clip(x_hat[others], lower, upper),
            jac=lambda y: problem.jacobian(full(y))[:, others],
            bounds=(lower, upper),
            method="trf",
            xtol=1e-10,
            ftol=1e-10,
        )
        return float(2 * res.cost)

    def edge(direction):
        bound = problem.bounds_list[index][0 if direction < 0 else 1]
        step = se if np.isfinite(se) and se > 0 else abs(bound - x_hat[index])
        near = x_hat[index]
        while True:  # widen the bracket tenfold until the deviance has risen enough or the bound is met
            far = x_hat[index] + direction * 10 * step
            far = max(far, bound) if direction < 0 else min(far, bound)
            if abs(far - x_hat[index]) < 1e-15:
                return float(bound)
            if profile_deviance(far) - dev_min >= CHI2_95:
                break
            if far == bound:
                return float(bound)
            near, step = far, step * 10
        return float(optimize.brentq(lambda v: profile_deviance(v) - dev_min - CHI2_95, near, far, xtol=1e-12 + 1e-6 * step))

    return edge(-1), edge(+1)


def fit_scan(
    scan,
    model: DetectorModel,
    calibration_uncertainty: float | None = None,
    weighting: str = "deviance",
    tolerance: float = 1e-10,
    compute_model: DetectorModel | None = None,
    intervals: bool = True,
    probe_mask=None,
    initial: dict | None = None,
) -> FitResult:
    """Fit ``model`` to ``scan`` by maximum likelihood (see module docstring).

    Args:
        scan: a validated Scan (see ``scan.load_scan``).
        model: the DetectorModel to fit.
        calibration_uncertainty: relative 1-sigma uncertainty of the probe photon numbers
            (e.g. 0.05 for 5 %), or None to take the probes as exact.
        weighting: "deviance" (maximum likelihood) or "pearson".
        tolerance: neglected photon-number tail mass per probe when choosing the cutoff.
        compute_model: a model with a superset of ``model``'s features whose compiled code is
            reused (model comparison); the extra features are switched off.
        intervals: compute 95 % intervals (profile likelihood where needed); if False the
            Wald intervals are reported.
        probe_mask: boolean array selecting the probes to fit (default all); the others are
            still predicted (``FitResult.predicted`` covers every probe).
        initial: starting values {name: value} that override the moment-based ones (e.g.
            the estimates of a nested model).
    """
    if calibration_uncertainty is not None and not 0 < calibration_uncertainty < 0.5:
        raise ArgumentError(f"calibration_uncertainty: expected a relative width between 0 and 0.5, got {calibration_uncertainty}")
    if weighting not in ("deviance", "pearson"):
        raise ValueError(f"weighting must be 'deviance' or 'pearson', got {weighting!r}")
    check_identifiable(scan if probe_mask is None else scan.subset(np.asarray(probe_mask, bool)), model)
    calibration_uncertainty = calibration_uncertainty or None
    n_photons = fit_cutoff(scan, calibration_uncertainty, tolerance)
    problem = _Problem(scan, model, compute_model or model, n_photons, weighting, calibration_uncertainty, probe_mask)
    names = problem.names
    start = _starting_point(problem, initial or {})

    params = lmfit.Parameters()
    for name in names:
        lo, hi = problem.bounds[name]
        params.add(name, value=float(np.clip(start[name], lo, hi)), min=lo, max=hi)

    def vector(p):
        return np.array([p[n].value for n in names])

    cache = {}

    def residuals(p):
        x = vector(p)
        cache["r"], cache["jac"] = problem.residuals_and_jacobian(x)
        cache["x"] = x
        return cache["r"]

    def jacobian(p):
        x = vector(p)
        if "x" not in cache or not np.array_equal(cache["x"], x):
            residuals(p)
        return np.array(cache["jac"])

    with np.errstate(invalid="ignore", divide="ignore"):  # lmfit's own covariance (unused) may be singular
        result = lmfit.minimize(
            residuals, params, method="least_squares", Dfun=jacobian, scale_covar=False, calc_covar=False,
            xtol=_TOLERANCES[intervals], ftol=_TOLERANCES[intervals], gtol=1e-10, max_nfev=2000,
        )
    x_hat = vector(result.params)
    converged = bool(result.success)
    message = str(result.message)
    if not converged:
        warnings.warn(f"fit of {model.spec} did not converge: {message}", FitNotConverged, stacklevel=2)

    deviance = problem.deviance(x_hat)
    deviance_data = deviance - (((x_hat[-1] - 1.0) / problem.width) ** 2 if problem.calibrated else 0.0)
    info = problem.fisher(x_hat)
    covariance = _safe_inverse(info)
    n_model = len(model.parameter_names)
    stat_covariance = _safe_inverse(info[:n_model, :n_model])
    se = np.sqrt(np.clip(np.diag(covariance), 0, None))
    stat_se = np.sqrt(np.clip(np.diag(stat_covariance), 0, None))

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
        lo_b, hi_b = problem.bounds[name]
        wald = (float(x_hat[i] - 1.96 * se[i]), float(x_hat[i] + 1.96 * se[i]))
        if not intervals or (np.isfinite(se[i]) and wald[0] >= lo_b and wald[1] <= hi_b):
            ci95[name], ci_method[name] = wald, "wald"
        else:
            ci95[name], ci_method[name] = _profile_interval(problem, x_hat, deviance, i, se[i]), "profile"

    scale = np.outer(se, se)
    with np.errstate(invalid="ignore", divide="ignore"):
        correlation = np.where(scale > 0, covariance / scale, 0.0)
    dof = int(problem.active.sum() * (scan.n_outcomes - 1) - n_model)
    p_value = float(chdtrc(dof, deviance_data)) if dof > 0 else float("nan")
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
        deviance=float(deviance_data),
        dof=dof,
        p_value=p_value,
        n_photons=n_photons,
        predicted=problem.all_probabilities(x_hat),
        converged=converged,
        message=message,
        calibration_uncertainty=calibration_uncertainty,
        weighting=weighting,
        bounds={n: tuple(problem.bounds[n]) for n in names},
        compute_model=compute_model or model,
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
