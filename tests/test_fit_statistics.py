"""Statistical behaviour of the maximum-likelihood fitter on simulated scans.

Every scan here is drawn by the tests themselves (tests/simulated.py: numpy multinomial
counts from the exact model probabilities, fixed seeds). Tolerances are set from shot noise;
each comment states the chance that a correct fitter fails the check.

Compiling a model's objective takes seconds, so each model is built once per module and
every experiment of a kind shares its probe set (hence its photon-number cutoff and its
compiled code).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from povmfit.fitting.inference.bootstrap import parametric_bootstrap
from povmfit.fitting.inference.fit import CHI2_95, fit_scan

from simulated import Experiment, on_off_fisher_per_shot

SHOTS = 10_000
ON_OFF_PROBES = np.array([0.0, 0.1, 0.3, 0.6, 1.0, 1.5, 2.0, 3.0])  # mean photons, coherent


# ------------------------------------------------------------------------------- experiments


@pytest.fixture(scope="module")
def loss_only():
    """Threshold detector, loss only, no dark clicks (the closed-form Fisher case)."""
    return Experiment("threshold", {"efficiency": 0.5}, ON_OFF_PROBES[1:], shots=SHOTS)


@pytest.fixture(scope="module")
def threshold_dark():
    return Experiment("threshold+dark", {"efficiency": 0.6, "dark_probability": 0.02}, ON_OFF_PROBES, shots=SHOTS)


@pytest.fixture(scope="module")
def threshold_no_dark():
    """Same probes and model as ``threshold_dark`` (shared compiled code), dark truth 0."""
    return Experiment("threshold+dark", {"efficiency": 0.6, "dark_probability": 0.0}, ON_OFF_PROBES, shots=SHOTS)


@pytest.fixture(scope="module")
def pnr_readout():
    coherent = np.array([0.0, 0.5, 1.0, 2.0, 3.0, 0.0, 1.0])
    thermal = np.array([0.0, 0.0, 0.0, 0.0, 0.0, 0.8, 0.5])  # two displaced-thermal probes
    truth = {"efficiency": 0.7, "dark_mean": 0.03, "readout_width": 0.3}
    return Experiment("pnr:6+dark+readout", truth, coherent, thermal, shots=SHOTS)


@pytest.fixture(scope="module")
def array_crosstalk():
    coherent = np.array([0.0, 0.5, 1.0, 2.0, 4.0, 8.0])
    truth = {"efficiency": 0.6, "dark_probability": 0.01, "crosstalk_probability": 0.05}
    return Experiment("array:8+dark+crosstalk", truth, coherent, shots=SHOTS)


def _within_sigmas(result, truth, sigmas=3.0):
    """Names of parameters whose estimate is more than ``sigmas`` standard errors from truth."""
    return [n for n, v in truth.items() if abs(result.values[n] - v) > sigmas * result.stderr[n]]


# ------------------------------------------------------------------------- recovery per family


@pytest.mark.parametrize("name, seed", [("threshold_dark", 11), ("pnr_readout", 12), ("array_crosstalk", 13)])
def test_each_family_recovers_truth_within_three_stderr(name, seed, request):
    experiment = request.getfixturevalue(name)
    result = fit_scan(experiment.scan(np.random.default_rng(seed)), experiment.model)
    assert result.converged
    for n in experiment.truth:
        lo, hi = result.ci95[n]
        # the estimate lies inside its own 95 % interval (property of Wald and profile intervals)
        assert lo <= result.values[n] <= hi, n
        # a Wald interval is estimate +- 1.96 stderr (normal 97.5 % quantile, scipy.stats)
        if result.ci_method[n] == "wald":
            assert hi - lo == pytest.approx(2 * stats.norm.ppf(0.975) * result.stderr[n], rel=1e-3)
    # truth within 3 stderr: a correct fitter fails this with probability 0.27 % per parameter
    # (normal tail, shot noise at 10^4 shots per probe makes the estimates close to normal)
    assert _within_sigmas(result, experiment.truth) == []
    # deviance is chi-square with dof degrees of freedom: p < 1e-3 would flag a wrong model
    assert result.p_value > 1e-3


def test_pearson_weighting_recovers_truth(threshold_dark):
    scan = threshold_dark.scan(np.random.default_rng(21))
    pearson = fit_scan(scan, threshold_dark.model, weighting="pearson")
    deviance = fit_scan(scan, threshold_dark.model)
    assert pearson.weighting == "pearson" and pearson.converged
    # 3 stderr: false failure 0.27 % per parameter (normal tail)
    assert _within_sigmas(pearson, threshold_dark.truth) == []
    # both are consistent estimators from the same data: they differ by far less than the
    # statistical error (the two weightings agree to O(1/sqrt(shots)) relative to stderr)
    for n in threshold_dark.truth:
        assert abs(pearson.values[n] - deviance.values[n]) < 0.2 * deviance.stderr[n]


# ------------------------------------------------------------------------------- Fisher and CRB


def test_on_off_fisher_check_value():
    # REFERENCES.md check value (independent computation): eta=0.5, m=1, d=0 -> 1.54149 per shot
    assert on_off_fisher_per_shot(0.5, 1.0) == pytest.approx(1.54149, abs=5e-6)
    # and sd(eta) >= 8.05e-4 for 10^6 shots (same source)
    assert 1 / np.sqrt(1e6 * on_off_fisher_per_shot(0.5, 1.0)) == pytest.approx(8.05e-4, abs=5e-7)


def test_fisher_stderr_matches_on_off_closed_form(loss_only):
    result = fit_scan(loss_only.scan(np.random.default_rng(31)), loss_only.model)
    eta = result.values["efficiency"]
    # Fisher information of binomial click counts, I = sum_p shots m_p^2 (1-p)/p (REFERENCES.md)
    information = np.sum(SHOTS * on_off_fisher_per_shot(eta, loss_only.coherent))
    # exact up to the photon-number cutoff (tail < 1e-10): rel 1e-6
    assert result.stderr["efficiency"] == pytest.approx(1 / np.sqrt(information), rel=1e-6)


def test_fisher_covariance_with_dark_matches_closed_form(threshold_dark):
    result = fit_scan(threshold_dark.scan(np.random.default_rng(32)), threshold_dark.model)
    eta, d = result.values["efficiency"], result.values["dark_probability"]
    m = threshold_dark.coherent
    # p = 1 - (1-d) exp(-eta m) (REFERENCES.md); dp/deta = m (1-d) e^{-eta m}, dp/dd = e^{-eta m};
    # Bernoulli information (grad p)(grad p)^T / (p (1-p)) per shot
    survive = np.exp(-eta * m)
    p = 1 - (1 - d) * survive
    grad = np.stack([m * (1 - d) * survive, survive])
    information = np.einsum("ip,jp,p->ij", grad, grad, SHOTS / (p * (1 - p)))
    covariance = np.linalg.inv(information)
    assert result.stderr["efficiency"] == pytest.approx(np.sqrt(covariance[0, 0]), rel=1e-6)
    assert result.stderr["dark_probability"] == pytest.approx(np.sqrt(covariance[1, 1]), rel=1e-6)
    assert result.covariance[0, 1] == pytest.approx(covariance[0, 1], rel=1e-6)


def test_efficiency_spread_attains_cramer_rao_bound(loss_only):
    rng = np.random.default_rng(33)
    estimates = np.array([
        fit_scan(loss_only.scan(rng), loss_only.model, intervals=False).values["efficiency"] for _ in range(200)
    ])
    eta = loss_only.truth["efficiency"]
    crb = 1 / np.sqrt(np.sum(SHOTS * on_off_fisher_per_shot(eta, loss_only.coherent)))  # REFERENCES.md formula
    # the sample sd of 200 estimates has relative sd 1/sqrt(2*200) = 5 %: 15 % is 3 sigma
    # (false failure ~0.3 %); the MLE's excess variance at 7 x 10^4 shots is far below that
    assert np.std(estimates, ddof=1) / crb == pytest.approx(1.0, abs=0.15)
    # mean within 3 standard errors of the mean (false failure 0.27 %)
    assert abs(np.mean(estimates) - eta) < 3 * crb / np.sqrt(200)


# ------------------------------------------------------------------------------- interval coverage


def _efficiency_coverage(experiment, n_experiments, seed):
    rng = np.random.default_rng(seed)
    eta = experiment.truth["efficiency"]
    covered = 0
    for _ in range(n_experiments):
        lo, hi = fit_scan(experiment.scan(rng), experiment.model).ci95["efficiency"]
        covered += lo <= eta <= hi
    return covered


def test_efficiency_interval_coverage_quick(threshold_dark):
    covered = _efficiency_coverage(threshold_dark, 40, seed=41)
    # nominal 95 %: covered ~ Binomial(40, 0.95); P(covered <= 33) = 0.34 % (scipy.stats.binom),
    # so requiring >= 34/40 (85 %) fails a correct fitter 0.34 % of the time
    assert covered >= 34


@pytest.mark.slow
def test_efficiency_interval_coverage_400_experiments(threshold_dark):
    covered = _efficiency_coverage(threshold_dark, 400, seed=42)
    # Binomial(400, 0.95): P(outside 368..392, i.e. 92-98 %) = 0.44 % (scipy.stats.binom)
    assert 368 <= covered <= 392


# ------------------------------------------------------------------------------- calibration


def test_calibration_uncertainty_of_loss_only_efficiency(loss_only):
    scan = loss_only.scan(np.random.default_rng(51))
    width = 0.05
    plain = fit_scan(scan, loss_only.model)
    calibrated = fit_scan(scan, loss_only.model, calibration_uncertainty=width)
    eta = calibrated.values["efficiency"]
    # DESIGN.md section 2: the data fix eta*s only, the prior pins s to 1, so eta is unchanged
    assert calibrated.values["probe_scale"] == pytest.approx(1.0, abs=1e-6)
    assert eta == pytest.approx(plain.values["efficiency"], rel=1e-6)
    # linearised (Fisher) algebra of that degeneracy: cal = width * eta / s exactly,
    # stat = stderr of the fit with exact probes
    assert calibrated.calibration_stderr["efficiency"] == pytest.approx(width * eta, rel=1e-4)
    assert calibrated.stat_stderr["efficiency"] == pytest.approx(plain.stderr["efficiency"], rel=1e-4)
    total = calibrated.stderr["efficiency"]
    assert total**2 == pytest.approx(calibrated.stat_stderr["efficiency"] ** 2 + (width * eta) ** 2, rel=1e-4)
    assert plain.calibration_stderr["efficiency"] == 0.0


# ------------------------------------------------------------------------------- bootstrap


def test_bootstrap_stderr_agrees_with_fisher(threshold_dark):
    scan = threshold_dark.scan(np.random.default_rng(61))
    result = fit_scan(scan, threshold_dark.model)
    resamples = 400
    boot = parametric_bootstrap(scan, result, resamples, seed=62)
    # the sd of B resamples has relative sd 1/sqrt(2B) = 3.5 % at B=400: 15 % is 4.2 sigma
    # (false failure ~3e-5); the Fisher stderr is the large-sample sd of the same estimator
    for n in threshold_dark.truth:
        assert boot["stderr"][n] / result.stderr[n] == pytest.approx(1.0, abs=0.15), n
    # the resampled estimates centre on the fitted value (3 standard errors of their mean)
    for i, n in enumerate(result.names):
        centre = np.mean(boot["estimates"][:, i])
        assert abs(centre - result.values[n]) < 3 * result.stderr[n] / np.sqrt(resamples)


# ------------------------------------------------------------------------------- profile intervals


def _independent_dark_profile_upper(scan):
    """Upper end of the 95 % profile interval of the dark probability of a threshold detector,
    by brute force: binomial deviance with p = 1-(1-d) exp(-eta m) (REFERENCES.md), eta
    profiled by scipy's bounded scalar minimiser, root of the rise 3.841 by brentq."""
    m = scan.coherent_photons
    clicks, shots = scan.counts[:, 1].astype(float), scan.shots.astype(float)

    def minus_two_log_likelihood(eta, d):
        p = np.clip(1 - (1 - d) * np.exp(-eta * m), 1e-300, 1 - 1e-16)
        return -2 * np.sum(clicks * np.log(p) + (shots - clicks) * np.log1p(-p))

    def profile(d):
        return optimize.minimize_scalar(lambda e: minus_two_log_likelihood(e, d), bounds=(1e-6, 1.0),
                                        method="bounded", options={"xatol": 1e-12}).fun

    best = optimize.minimize(lambda v: minus_two_log_likelihood(*v), [0.6, 1e-3],
                             bounds=[(1e-6, 1.0), (0.0, 0.5)], method="L-BFGS-B",
                             options={"ftol": 1e-15, "gtol": 1e-12}).fun
    best = min(best, profile(0.0))
    return optimize.brentq(lambda d: profile(d) - best - CHI2_95, 0.0, 0.05, xtol=1e-10)


def test_dark_at_zero_gives_profile_interval_from_zero(threshold_no_dark):
    scan = threshold_no_dark.scan(np.random.default_rng(71))
    result = fit_scan(scan, threshold_no_dark.model)
    lo, hi = result.ci95["dark_probability"]
    assert result.ci_method["dark_probability"] == "profile"
    assert lo == 0.0 and hi > 0.0  # cut at the bound and covers the truth 0
    # upper end agrees with an independent profile-likelihood computation (numerical precision
    # of two root finders: 1 % of the interval)
    assert hi == pytest.approx(_independent_dark_profile_upper(scan), rel=1e-2)
    # the efficiency is far from its bounds: Wald interval, covering the truth (false fail 5 %,
    # fixed seed)
    assert result.ci_method["efficiency"] == "wald"
    assert result.ci95["efficiency"][0] <= 0.6 <= result.ci95["efficiency"][1]
