"""Cross-check of a parametric model against the reconstructions.

Source of the numbers: scans simulated here from the model itself (independent Monte Carlo,
fixed seed), so the true model must pass and a wrong efficiency must fail; the verdict level
(p < 0.01) and the quadrature combination of errors are common practice, no source.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.tomography.cross_check import cross_check
from povmfit.fitting.tomography.pointwise_wigner import pointwise_wigner
from povmfit.fitting.tomography.reconstruct import reconstruct_povm
from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions

SPEC = "array:4+dark"
TRUTH = {"efficiency": 0.7, "dark_probability": 0.02}


@pytest.fixture(scope="module")
def simulated():
    """Coherent ramp plus displaced-thermal probes at 4 levels; 20,000 shots per probe."""
    radii = np.linspace(0.0, 2.0, 5)
    coherent = np.r_[np.linspace(0.0, 8.0, 25), np.repeat(radii, 4)]
    thermal = np.r_[np.zeros(25), np.tile([0.0, 0.3, 0.8, 1.5], 5)]
    model = parse_model_spec(SPEC)
    n_photons = choose_cutoff(coherent, thermal)
    theta = np.asarray(model.povm(model.pack(TRUTH), n_photons))
    q = np.clip(np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T, 0, None)
    counts = np.random.default_rng(21).multinomial(20_000, q / q.sum(axis=1, keepdims=True))
    # the direct comparison with bootstrap errors (no simulations under the model) is exercised
    # on the least-squares estimator, as before; the maximum-likelihood estimator and the
    # calibrated comparison are tested in test_tomography_likelihood.py
    rec = reconstruct_povm(coherent, thermal, counts, method="least_squares", grid=[1e-5, 1e-3, 1e-1], folds=3,
                           bootstrap=25, seed=1)
    pointwise = pointwise_wigner(coherent, thermal, counts, bootstrap=25, seed=1)
    return coherent, thermal, model, rec, pointwise


def test_true_model_is_consistent(simulated):
    coherent, thermal, model, rec, pointwise = simulated
    theta = np.asarray(model.povm(model.pack(TRUTH), rec.n_photons))
    result = cross_check(theta, np.zeros_like(theta), rec, pointwise, probes=(coherent, thermal))
    # fixed seed; under the true model the p-values are (roughly) uniform, level 0.01
    assert result["verdict"] == "consistent", result["verdict"]
    assert result["povm"]["p_value"] > 0.01 and result["wigner"]["p_value"] > 0.01
    assert json.loads(json.dumps(result)) == result  # JSON-able as it is
    assert set(result["povm"]["photons_compared"]) == set(np.nonzero(rec.constrained)[0].tolist())


def test_wrong_efficiency_is_flagged(simulated):
    coherent, thermal, model, rec, pointwise = simulated
    wrong = np.asarray(model.povm(model.pack({**TRUTH, "efficiency": 0.55}), rec.n_photons))
    result = cross_check(wrong, np.zeros_like(wrong), rec, pointwise, probes=(coherent, thermal))
    # efficiency 0.55 vs 0.7 moves P(0|1) by 0.15, many standard errors (about 0.01 each)
    assert result["verdict"].startswith("tension at outcome")
    assert result["povm"]["max_abs_z"] > 5


def test_model_errors_enter_in_quadrature(simulated):
    _, _, model, rec, pointwise = simulated
    theta = np.asarray(model.povm(model.pack({**TRUTH, "efficiency": 0.55}), rec.n_photons))
    large = np.full_like(theta, 1.0)
    narrow = cross_check(theta, None, rec, None)
    wide = cross_check(theta, large, rec, None)
    assert wide["povm"]["max_abs_z"] < narrow["povm"]["max_abs_z"] / 10  # sqrt(1 + se^2) >= 1 > 10 se
    assert wide["wigner"] is None and wide["verdict"] == "consistent"


def test_wigner_comparison_needs_the_probes(simulated):
    # Source: common practice, no source (a missing argument is named in the error).
    _, _, model, rec, pointwise = simulated
    theta = np.asarray(model.povm(model.pack(TRUTH), rec.n_photons))
    with pytest.raises(ArgumentError, match="^probes: "):
        cross_check(theta, None, rec, pointwise)
