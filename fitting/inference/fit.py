"""Maximum-likelihood fit of a parametric detector model to raw probe counts.

``fit_scan(scan, model)`` minimises the multinomial deviance (sum of squared deviance
residuals, see ``objective``) with scipy's bounded trust-region least squares on the exact
JAX Jacobian (``solver.solve``, the solver of the profiles and the bootstrap too).
Uncertainties:

- covariance = inverse expected Fisher information at the optimum;
- with a probe-calibration prior (relative 1-sigma width ``calibration_uncertainty``) a probe
  scale factor s ~ N(1, width^2) is fitted too. The *statistical* covariance is the inverse
  Fisher information of the model parameters with s held at its estimate; the *combined* one
  includes s; the calibration part of a standard error is sqrt(combined^2 - statistical^2);
- 95 % intervals: Wald (estimate +- 1.96 stderr) unless that interval crosses a bound of the
  parameter, in which case the profile-likelihood interval (deviance rise 3.841, chi2 with
  one degree of freedom) is used, cut at the bound;
- optionally a parametric bootstrap (``bootstrap=N``, seeded by ``seed``; see ``bootstrap``).

The result is a frozen :class:`FitResult`; the bootstrap is part of the call that makes it.
"""
from __future__ import annotations

import warnings

import numpy as np
from scipy import optimize
from scipy.special import chdtrc, chdtri

from povmfit.models import DetectorModel, dark_parameter_names

from povmfit.fitting.data.arguments import as_model
from povmfit.fitting.data.errors import ArgumentError, FitError, NotIdentifiable
from povmfit.fitting.inference.bootstrap import bootstrap_problem
from povmfit.fitting.inference.objective import FitProblem, fit_cutoff
from povmfit.fitting.inference.result import FitNotConverged, FitResult
from povmfit.fitting.inference.solver import solve

__all__ = ["fit_scan", "check_identifiable", "FitResult", "FitNotConverged", "CHI2_95"]

CHI2_95 = chdtri(1, 0.05)  # 3.841: deviance rise of a 95 % profile interval


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
_PROFILE_TOLERANCE = 1e-10  # each point of a profile is a refit with one parameter fixed


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
    """95 % profile-likelihood interval for free parameter ``index``: the values where the
    deviance, minimised over the other parameters (``solve`` with this one fixed), rises by
    3.841 above its minimum ``dev_min``; cut at the parameter's bounds."""
    lower, upper = problem.lower, problem.upper
    failed = []  # (value, message) of the refits that did not converge

    def profile_deviance(value):
        solution = solve(problem, x_hat, lower, upper, _PROFILE_TOLERANCE, fixed={index: value})
        if not solution.converged:
            failed.append((value, solution.message))
        return solution.deviance  # infinite where the objective is not finite: above any threshold

    def excess(value):
        rise = profile_deviance(value) - dev_min - CHI2_95
        return rise if np.isfinite(rise) else 1e300  # keeps brentq's interpolation finite

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
        return float(optimize.brentq(excess, near, far, xtol=1e-12 + 1e-6 * step))

    interval = edge(-1), edge(+1)
    if failed:  # one line per parameter
        warnings.warn(f"profile of {problem.names[index]}: {len(failed)} refit(s) did not converge, first at "
                      f"{failed[0][0]:.6g}: {failed[0][1]}", FitNotConverged, stacklevel=3)
    return interval


def fit_scan(
    scan,
    model: DetectorModel | str,
    calibration_uncertainty: float | None = None,
    weighting: str = "deviance",
    tolerance: float = 1e-10,
    compute_model: DetectorModel | None = None,
    intervals: bool = True,
    probe_mask=None,
    initial: dict | None = None,
    bootstrap: int = 0,
    seed: int = 0,
    progress=None,
) -> FitResult:
    """Fit ``model`` to ``scan`` by maximum likelihood (see module docstring).

    Args:
        scan: a validated Scan (see ``scan.load_scan``).
        model: the DetectorModel to fit, or its spec (``"array:8+dark+crosstalk"``); a model
            with a fixed readout matrix (``DetectorModel.with_fixed_readout``) is fitted
            through it: the residuals compare the counts with M @ theta_registered.
        calibration_uncertainty: relative 1-sigma uncertainty of the probe photon numbers
            (e.g. 0.05 for 5 %), or None to take the probes as exact.
        weighting: "deviance" (maximum likelihood) or "pearson".
        tolerance: neglected photon-number tail mass per probe when choosing the cutoff.
        compute_model: a model with a superset of ``model``'s features whose compiled code is
            reused (model comparison); the extra features are switched off.
        intervals: compute 95 % intervals (profile likelihood where needed); if False the
            Wald intervals are reported and the optimiser stops at the looser tolerance of
            a model ranking.
        probe_mask: boolean array selecting the probes to fit (default all); the others are
            still predicted (``FitResult.predicted`` covers every probe).
        initial: starting values {name: value} that override the moment-based ones (e.g.
            the estimates of a nested model).
        bootstrap: number of parametric-bootstrap resamples (0: none; else at least 2),
            reported in ``FitResult.bootstrap``.
        seed: seed of the bootstrap resamples.
        progress: optional ``progress(task, done, total)`` callback (the bootstrap reports
            through it); nothing is printed.

    Raises:
        ArgumentError: an argument is out of range (the message names it).
        NotIdentifiable: the scan cannot determine the model.

    Warns:
        FitNotConverged: the optimiser stopped without meeting its criteria.
    """
    model = as_model(model)
    if calibration_uncertainty is not None and not 0 < calibration_uncertainty < 0.5:
        raise ArgumentError(f"calibration_uncertainty: expected a relative width between 0 and 0.5, got {calibration_uncertainty}")
    if weighting not in ("deviance", "pearson"):
        raise ArgumentError(f"weighting: expected 'deviance' or 'pearson', got {weighting!r}")
    if isinstance(bootstrap, bool) or int(bootstrap) != bootstrap or bootstrap < 0 or bootstrap == 1:
        raise ArgumentError(f"bootstrap: expected 0 or a whole number of resamples >= 2, got {bootstrap!r}")
    if bootstrap and probe_mask is not None:
        raise ArgumentError("bootstrap: resamples cover every probe; not available with probe_mask")
    check_identifiable(scan if probe_mask is None else scan.subset(np.asarray(probe_mask, bool)), model)
    calibration_uncertainty = calibration_uncertainty or None
    n_photons = fit_cutoff(scan, calibration_uncertainty, tolerance)
    problem = FitProblem(scan, model, compute_model or model, n_photons, weighting, calibration_uncertainty, probe_mask)
    names = problem.names
    start = _starting_point(problem, initial or {})
    x0 = np.array([float(np.clip(start[n], *problem.bounds[n])) for n in names])

    solution = solve(problem, x0, problem.lower, problem.upper, _TOLERANCES[intervals])
    x_hat = solution.x
    if not np.isfinite(solution.deviance):  # not finite even at the start: no point to report
        raise FitError(f"{scan.source}: cannot fit {model.spec}: {solution.message}")
    if not solution.converged:
        warnings.warn(f"{scan.source}: fit of {model.spec} did not converge: {solution.message}", FitNotConverged,
                      stacklevel=2)

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
    predicted = problem.all_probabilities(x_hat)
    boot = None
    if bootstrap:
        boot = bootstrap_problem(problem, x_hat, predicted, scan.shots, bootstrap, seed, progress=progress)
        boot = {key: boot[key] for key in ("resamples", "seed", "converged", "stderr", "ci95")}
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
        predicted=predicted,
        converged=solution.converged,
        message=solution.message,
        calibration_uncertainty=calibration_uncertainty,
        weighting=weighting,
        bounds={n: tuple(problem.bounds[n]) for n in names},
        compute_model=compute_model or model,
        bootstrap=boot,
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
