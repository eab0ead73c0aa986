"""The fit's result object and its one solver path: the direct scipy optimiser against the same
optimiser driven through lmfit, frozen results, the views of a result (text, table, JSON,
lmfit, detector file), the bootstrap through the shared solver, and profile intervals.

Scans: the bundled demo scan (array:8+dark+crosstalk) and scans simulated here with fixed
seeds (tests/simulated.py).
"""
from __future__ import annotations

import dataclasses
import json
import math

import lmfit
import numpy as np
import pytest
from scipy import optimize

from povmfit.fitting.data.demo import demo_scan_path
from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.data.scan import load_scan, scan_from_arrays
from povmfit.fitting.inference.bootstrap import parametric_bootstrap
from povmfit.fitting.inference.fit import CHI2_95, _starting_point, _TOLERANCES, fit_scan
from povmfit.fitting.inference.objective import FitProblem, fit_cutoff
from povmfit.fitting.inference.solver import solve
from povmfit.models import parse_model_spec

from simulated import Experiment

DEMO_MODEL = "array:8+dark+crosstalk"


@pytest.fixture(scope="module")
def demo_scan():
    return load_scan(demo_scan_path())


@pytest.fixture(scope="module")
def demo_fit(demo_scan):
    return fit_scan(demo_scan, DEMO_MODEL, calibration_uncertainty=0.03, bootstrap=20, seed=4)


def _lmfit_path(scan, model, calibration_uncertainty, intervals=True):
    """The optimiser as the fitter ran it before: lmfit's ``minimize(method="least_squares")``
    with the same residuals, Jacobian, start, bounds and tolerances (lmfit passes them on to
    scipy's least squares, doubling max_nfev)."""
    n_photons = fit_cutoff(scan, calibration_uncertainty)
    problem = FitProblem(scan, model, model, n_photons, "deviance", calibration_uncertainty)
    start = _starting_point(problem, {})
    params = lmfit.Parameters()
    for name in problem.names:
        lo, hi = problem.bounds[name]
        params.add(name, value=float(np.clip(start[name], lo, hi)), min=lo, max=hi)

    def vector(p):
        return np.array([p[n].value for n in problem.names])

    with np.errstate(invalid="ignore", divide="ignore"):
        result = lmfit.minimize(
            lambda p: problem.residuals_and_jacobian(vector(p))[0], params, method="least_squares",
            Dfun=lambda p: problem.residuals_and_jacobian(vector(p))[1], scale_covar=False, calc_covar=False,
            xtol=_TOLERANCES[intervals], ftol=_TOLERANCES[intervals], gtol=1e-10, max_nfev=2000,
        )
    x = vector(result.params)
    return dict(zip(problem.names, x)), problem.deviance(x)


# --------------------------------------------------------------------- one optimiser, two drivers


@pytest.mark.parametrize("calibration_uncertainty", [None, 0.03])
def test_direct_least_squares_equals_the_lmfit_path(demo_scan, calibration_uncertainty):
    # Cross-check: the same scipy optimiser driven through lmfit (same settings) reaches the
    # same point; 1e-10 relative allows for nothing but rounding.
    model = parse_model_spec(DEMO_MODEL)
    values, deviance = _lmfit_path(demo_scan, model, calibration_uncertainty)
    result = fit_scan(demo_scan, model, calibration_uncertainty)
    assert result.converged
    for name, value in values.items():
        assert result.values[name] == pytest.approx(value, rel=1e-10, abs=1e-15), name
    prior = ((values["probe_scale"] - 1) / calibration_uncertainty) ** 2 if calibration_uncertainty else 0.0
    assert result.deviance == pytest.approx(deviance - prior, rel=1e-10)


def test_solver_reports_its_status():
    # A straight line through three points (ordinary least squares, closed form y = x):
    # converged in a few evaluations; with one evaluation allowed, it stops unconverged.
    class Line:
        def residuals_and_jacobian(self, x):
            t = np.array([0.0, 1.0, 2.0])
            return x[0] * t + x[1] - t, np.stack([t, np.ones(3)], axis=1)

    done = solve(Line(), [3.0, 1.0], [-10, -10], [10, 10], 1e-12)
    assert done.converged and done.status > 0 and done.nfev >= 1
    np.testing.assert_allclose(done.x, [1.0, 0.0], atol=1e-9)  # closed form: slope 1, intercept 0
    assert done.deviance == pytest.approx(0.0, abs=1e-15)
    held = solve(Line(), [3.0, 1.0], [-10, -10], [10, 10], 1e-12, fixed={1: 1.0})
    # slope with the intercept held at 1: minimise sum (s t + 1 - t)^2 -> s = 1 - sum t / sum t^2 = 0.4
    assert held.x[1] == 1.0 and held.x[0] == pytest.approx(0.4, rel=1e-9)
    stopped = solve(Line(), [3.0, 1.0], [-10, -10], [10, 10], 1e-12, max_evaluations=1)
    assert not stopped.converged and stopped.status == 0


# --------------------------------------------------------------------- frozen result and its views


def test_result_is_frozen(demo_fit):
    with pytest.raises(dataclasses.FrozenInstanceError):
        demo_fit.bootstrap = None
    with pytest.raises(dataclasses.FrozenInstanceError):
        demo_fit.deviance = 0.0
    with pytest.raises(ValueError):  # arrays are read-only
        demo_fit.covariance[0, 0] = 1.0
    # a changed copy is a new object (dataclasses.replace), the original untouched
    copy = dataclasses.replace(demo_fit, bootstrap=None)
    assert copy.bootstrap is None and demo_fit.bootstrap is not None


def test_summary_lists_every_parameter_with_its_interval(demo_fit):
    text = demo_fit.summary()
    assert DEMO_MODEL in text
    for name in demo_fit.names:
        line = next(row for row in text.splitlines() if row.startswith(name))
        assert "±" in line and demo_fit.ci_method[name] in line
        value, stderr = demo_fit.values[name], demo_fit.stderr[name]
        # rounding rule (common practice, no source): stderr to two significant digits, the
        # value to the same decimal place, so it is off by at most half a unit of that place
        place = 1 - math.floor(math.log10(stderr))
        shown = float(line.split()[1])
        assert abs(shown - value) <= 0.5 * 10.0**-place * (1 + 1e-9), name
    assert f"{demo_fit.deviance:.2f}" in text and str(demo_fit.dof) in text
    assert "converged" in text and "20 resamples" in text
    html = demo_fit._repr_html_()
    assert html.startswith("<div") and "<table>" in html and "efficiency" in html


def test_dataframe_dict_and_params_agree_with_the_fields(demo_fit):
    frame = demo_fit.to_dataframe()
    assert list(frame.index) == list(demo_fit.names)
    payload = json.loads(json.dumps(demo_fit.to_dict(), allow_nan=False))
    params = demo_fit.params
    report = demo_fit.fit_report()
    for i, name in enumerate(demo_fit.names):
        row = frame.loc[name]
        assert row["value"] == demo_fit.values[name] and row["stderr"] == demo_fit.stderr[name]
        assert row["stat_stderr"] == demo_fit.stat_stderr[name]
        assert row["calibration_stderr"] == demo_fit.calibration_stderr[name]
        assert (row["ci95_lo"], row["ci95_hi"]) == tuple(demo_fit.ci95[name])
        assert row["ci_method"] == demo_fit.ci_method[name]
        assert row["bootstrap_stderr"] == demo_fit.bootstrap["stderr"][name]
        assert payload["values"][name] == demo_fit.values[name]
        assert payload["ci95"][name] == list(demo_fit.ci95[name])
        assert params[name].value == demo_fit.values[name] and params[name].stderr == demo_fit.stderr[name]
        assert (params[name].min, params[name].max) == demo_fit.bounds[name]
        for j, other in enumerate(demo_fit.names):
            if j != i:
                assert params[name].correl[other] == demo_fit.correlation[i, j]
        assert name in report
    assert payload["model"] == DEMO_MODEL and payload["deviance"] == demo_fit.deviance
    assert np.array_equal(payload["covariance"], demo_fit.covariance)
    assert set(payload["bootstrap"]) == {"resamples", "seed", "converged", "stderr", "ci95"}


def test_detector_record_and_povm_errors(demo_fit):
    model = demo_fit.model
    n_model = len(model.parameter_names)
    record = demo_fit.to_detector(gate_duration_s=1e-8, provenance={"note": "test"})
    assert record.model == model and list(record.parameters) == list(model.parameter_names)
    assert "probe_scale" not in record.parameters
    assert np.array_equal(record.covariance, demo_fit.covariance[:n_model, :n_model])
    assert record.gate_duration_s == 1e-8 and record.provenance == {"note": "test"}
    assert record.bounds == model.bounds()
    theta, stderr = demo_fit.povm_with_errors(12)
    # columns of a POVM sum to one (DESIGN.md section 2)
    np.testing.assert_allclose(theta.sum(axis=0), 1.0, atol=1e-12)
    # delta method (common practice, no source) checked by finite differences of the POVM
    # along each parameter: stderr^2 = g^T C g with g from central differences
    x = np.array([demo_fit.values[n] for n in model.parameter_names])
    step = 1e-6
    grads = []
    for i in range(n_model):
        up, down = x.copy(), x.copy()
        up[i] += step
        down[i] -= step
        grads.append((np.asarray(model.povm(up, 12)) - np.asarray(model.povm(down, 12))) / (2 * step))
    grads = np.stack(grads, axis=-1)
    variance = np.einsum("kni,ij,knj->kn", grads, demo_fit.covariance[:n_model, :n_model], grads)
    np.testing.assert_allclose(stderr, np.sqrt(variance), rtol=1e-5, atol=1e-12)


def test_arguments_are_refused_by_name(demo_scan):
    with pytest.raises(ArgumentError, match="^weighting"):
        fit_scan(demo_scan, DEMO_MODEL, weighting="chi2")
    with pytest.raises(ArgumentError, match="^bootstrap"):
        fit_scan(demo_scan, DEMO_MODEL, bootstrap=-1)
    with pytest.raises(ArgumentError, match="^model"):
        fit_scan(demo_scan, "array:8+sparkle")
    with pytest.raises(ArgumentError, match="^calibration_uncertainty"):
        fit_scan(demo_scan, DEMO_MODEL, calibration_uncertainty=0.7)


# --------------------------------------------------------------------- bootstrap, shared solver


def test_bootstrap_agrees_with_fisher_and_counts_converged_refits(demo_scan):
    resamples = 300
    calls = []
    result = fit_scan(demo_scan, DEMO_MODEL, bootstrap=resamples, seed=9, progress=lambda *a: calls.append(a))
    boot = result.bootstrap
    assert boot["resamples"] == resamples and boot["seed"] == 9
    assert boot["converged"] == resamples  # warm-started refits near a well-determined optimum
    assert calls[0] == ("bootstrap", 0, resamples) and calls[-1] == ("bootstrap", resamples, resamples)
    # The sd of B normal draws has relative sd 1/sqrt(2(B-1)) = 4.1 % at B = 300 (sampling
    # theory of the sample variance); 17 % is 4.1 sigma (false failure ~4e-5 per parameter).
    # The inverse Fisher information is the large-sample sd of the same estimator.
    tolerance = 4.1 / math.sqrt(2 * (resamples - 1))
    for name in result.names:
        assert boot["stderr"][name] / result.stderr[name] == pytest.approx(1.0, abs=tolerance), name
        lo, hi = boot["ci95"][name]
        assert lo < result.values[name] < hi


def test_bootstrap_refits_are_the_fits_of_the_documented_resamples(demo_scan):
    # Independent: draw the tables as documented (numpy multinomial from the fitted, renormalised
    # probabilities, one seeded generator, one table after another) and fit each from scratch.
    result = fit_scan(demo_scan, DEMO_MODEL)
    boot = parametric_bootstrap(demo_scan, result, 3, seed=21)
    rng = np.random.default_rng(21)
    q = np.clip(result.predicted, 0, None)
    q /= q.sum(axis=1, keepdims=True)
    for i in range(3):
        counts = rng.multinomial(demo_scan.shots, q)
        scan = scan_from_arrays(demo_scan.coherent_photons, demo_scan.thermal_photons, counts)
        direct = fit_scan(scan, DEMO_MODEL, intervals=False)
        # both stop at relative tolerance 1e-8 from different starts: agree to 1e-3 stderr
        for j, name in enumerate(result.names):
            assert abs(boot["estimates"][i, j] - direct.values[name]) < 1e-3 * result.stderr[name], name
    assert boot["refit_converged"].all()


# --------------------------------------------------------------------- profile intervals


def _plain_scipy_profile_upper(scan, model, index):
    """Upper end of the 95 % profile interval of parameter ``index`` as the fitter computed it
    before the shared solver: scipy's least squares on the other parameters (xtol = ftol =
    1e-10, scipy's other defaults), brentq on the deviance rise 3.841 (chi2_1 95 % quantile)."""
    problem = FitProblem(scan, model, model, fit_cutoff(scan), "deviance", None)
    fit = fit_scan(scan, model)
    x_hat = np.array([fit.values[n] for n in problem.names])
    others = [i for i in range(len(x_hat)) if i != index]
    best = problem.deviance(x_hat)

    def profile(value):
        def full(y):
            x = x_hat.copy()
            x[others], x[index] = y, value
            return x

        res = optimize.least_squares(
            lambda y: problem.residuals_and_jacobian(full(y))[0], x_hat[others],
            jac=lambda y: problem.residuals_and_jacobian(full(y))[1][:, others],
            bounds=(problem.lower[others], problem.upper[others]), method="trf", xtol=1e-10, ftol=1e-10,
        )
        return 2 * res.cost

    far = x_hat[index] + 10 * fit.stderr[problem.names[index]]
    while profile(far) - best < CHI2_95:
        far = x_hat[index] + 10 * (far - x_hat[index])
    return optimize.brentq(lambda v: profile(v) - best - CHI2_95, x_hat[index], far, xtol=1e-14)


@pytest.mark.parametrize("spec, truth, seed", [
    ("threshold+dark", {"efficiency": 0.6, "dark_probability": 0.0}, 71),
    ("array:4+dark+crosstalk", {"efficiency": 0.7, "dark_probability": 0.0, "crosstalk_probability": 0.03}, 5),
])
def test_profile_intervals_from_the_shared_solver_match_plain_scipy(spec, truth, seed):
    # A dark parameter at 0: the Wald interval would cross the bound, so the profile is used.
    coherent = np.array([0.0, 0.1, 0.3, 0.6, 1.0, 1.5, 2.0, 3.0]) if spec.startswith("threshold") else \
        np.array([0.0, 0.5, 1.0, 2.0, 4.0])
    experiment = Experiment(spec, truth, coherent, shots=10_000 if spec.startswith("threshold") else 5_000)
    scan = experiment.scan(np.random.default_rng(seed))
    result = fit_scan(scan, experiment.model)
    name = "dark_probability"
    assert result.ci_method[name] == "profile" and result.ci95[name][0] == 0.0
    expected = _plain_scipy_profile_upper(scan, experiment.model, result.names.index(name))
    # two root finders on the same profile: brentq tolerance 1e-6 of the bracket step
    assert result.ci95[name][1] == pytest.approx(expected, rel=1e-5)
