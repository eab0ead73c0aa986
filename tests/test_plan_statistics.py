"""The plan's predicted standard errors against the spread of maximum-likelihood fits to scans
simulated from the plan (independent Monte Carlo: multinomial counts drawn with numpy from the
model's outcome probabilities, fitted by the package's fit).

With a calibration uncertainty every simulated scan also draws its true probe scale
s ~ N(1, sigma^2) (the probes really carry s times their nominal photon numbers) and the fit
is told sigma, so the spread includes the calibration part.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats

from povmfit.fitting.data.scan import scan_from_arrays
from povmfit.fitting.inference.fit import fit_scan
from povmfit.fitting.workflow.plan import plan
from povmfit.models import choose_cutoff, probe_distributions_numpy


def _spread(result, seeds: int, first_seed: int = 1000, probes=None) -> np.ndarray:
    """Efficiency estimates of fits to ``seeds`` scans simulated from the plan ``result`` (or
    from ``probes`` = (coherent, thermal, shots) with the plan's detector)."""
    model = result.model
    x = np.array([result.parameters[n] for n in model.parameter_names])
    sigma = result.calibration_uncertainty
    nominal_a, nominal_t, shots = probes or (result.coherent_photons, result.thermal_photons, result.shots)
    estimates = []
    for seed in range(first_seed, first_seed + seeds):
        rng = np.random.default_rng(seed)
        scale = 1.0 if sigma is None else 1.0 + sigma * rng.standard_normal()
        coherent, thermal = scale * nominal_a, scale * nominal_t
        n = choose_cutoff(coherent, thermal, 1e-12)
        q = np.clip(probe_distributions_numpy(coherent, thermal, n) @ np.asarray(model.povm(x, n)).T, 0, None)
        counts = rng.multinomial(shots, q / q.sum(axis=1, keepdims=True))
        scan = scan_from_arrays(nominal_a, nominal_t, counts)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a rare non-converged refit still counts
            estimates.append(fit_scan(scan, model, sigma, intervals=False).values["efficiency"])
    return np.array(estimates)


@pytest.fixture(scope="module")
def quick():
    """A threshold-detector plan and the efficiency estimates of 40 scans simulated from it."""
    result = plan("threshold+dark", {"efficiency": 0.01}, guess="efficiency=0.8,dark=1e-3")
    return result, _spread(result, 40)


def test_predicted_stderr_matches_fits_quick(quick):
    """40 seeds: (n-1) s^2 / sigma^2 ~ chi2_{n-1} for normal estimates; the two-sided 99.9 %
    interval of s/sigma (false-failure probability 0.1 %) is about [0.68, 1.33]."""
    result, estimates = quick
    seeds = len(estimates)
    ratio = estimates.std(ddof=1) / result.figures["efficiency"]["stderr"]
    lo, hi = (np.sqrt(stats.chi2.ppf(p, seeds - 1) / (seeds - 1)) for p in (0.0005, 0.9995))
    assert lo < ratio < hi


@pytest.mark.slow
@pytest.mark.parametrize("spec, guess, target, calibration", [
    ("threshold+dark", "efficiency=0.8,dark=1e-3", 0.01, None),
    ("threshold+dark", "efficiency=0.8,dark=1e-3", 0.01, 0.01),
    ("array:8+dark+crosstalk", "efficiency=0.62,dark=2e-3,crosstalk=0.04", 0.005, None),
])
def test_predicted_stderr_matches_fits_within_15_percent(spec, guess, target, calibration):
    """200 seeds: the sample sd has relative sd 1/sqrt(2 * 199) = 5 %, so 15 % is 3 sigma
    (false-failure probability about 0.3 % per case)."""
    result = plan(spec, {"efficiency": target}, guess=guess, calibration_uncertainty=calibration)
    estimates = _spread(result, 200)
    predicted = result.figures["efficiency"]["stderr"]
    assert abs(estimates.std(ddof=1) / predicted - 1) < 0.15
    # and the fits are unbiased to within 4 standard errors of their mean
    assert abs(estimates.mean() - result.parameters["efficiency"]) < 4 * predicted / np.sqrt(200)


def test_planned_design_beats_a_uniform_grid_in_simulation(quick):
    """The uniform grid with the plan's total shots spreads its fits wider than the plan (40
    seeds each). Predicted sd ratio sqrt(uniform/planned total), about 2.7; the test asks for
    more than 1.3: were both designs equally good, the sd ratio would exceed 1.3 with
    probability 5 % (F(39, 39)); with the predicted ratio it falls below 1.3 with probability
    below 0.1 % (log sd ratio has sd sqrt(2/39) = 0.23)."""
    result, estimates = quick
    assert result.uniform["ratio"] > 2
    coherent = np.array(result.uniform["coherent_photons"])
    thermal = np.array(result.uniform["thermal_photons"])
    shots = np.full(len(coherent), result.total_shots // len(coherent))
    planned_sd = estimates.std(ddof=1)
    uniform_sd = _spread(result, 40, first_seed=5000, probes=(coherent, thermal, shots)).std(ddof=1)
    assert uniform_sd / planned_sd > 1.3
