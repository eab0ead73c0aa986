"""Sweep figures (``inference.sweeps``): plateau and dark-limit crossing, pure computation."""
from __future__ import annotations

import math

import numpy as np
import pytest

from povmfit.fitting.inference.sweeps import dark_limit_crossing, plateau

BIAS = np.arange(6.0, 10.01, 0.25)


def sigmoid(bias, top=0.85, half=7.0, width=0.4):
    return top / (1.0 + np.exp(-(bias - half) / width))


def test_noise_free_sigmoid_plateau_start_matches_the_closed_form():
    eta = sigmoid(BIAS)
    result = plateau(BIAS, eta, np.zeros_like(eta), 0.01)
    # closed form: eta(I) = 0.99 eta(I_last)  <=>  I = half + width ln(r/(1-r)), r = 0.99 eta(I_last)/top;
    # linear interpolation of the concave flank on a 0.25 grid errs by less than 0.02 (second
    # derivative bound: |eta''| h^2/8 / eta' ~ 0.016 here, common practice, no source)
    r = 0.99 * sigmoid(BIAS[-1]) / 0.85
    assert result["start"]["value"] == pytest.approx(7.0 + 0.4 * math.log(r / (1 - r)), abs=0.02)
    assert result["end"]["open"] and result["end"]["value"] == BIAS[-1]
    assert not result["start"]["open"]
    assert result["efficiency"]["value"] == pytest.approx(eta.max())  # no noise, no correction
    assert result["width"]["value"] == pytest.approx(result["end"]["value"] - result["start"]["value"])


def test_plateau_closed_on_both_sides_and_open_at_the_start():
    bias = np.arange(7)
    eta = np.array([0.50, 0.70, 0.80, 0.80, 0.80, 0.70, 0.50])
    result = plateau(bias, eta, np.zeros(7), 0.05)
    # 0.95 * 0.8 = 0.76: crossings at 1 + (0.76-0.70)/(0.80-0.70) = 1.6 and 5 - 0.6 = 4.4 (hand computed)
    assert result["start"]["value"] == pytest.approx(1.6)
    assert result["end"]["value"] == pytest.approx(4.4)
    assert not result["start"]["open"] and not result["end"]["open"]
    flat = plateau(bias[::-1], eta[::-1] * 0 + 0.8, np.zeros(7), 0.01)  # order of input irrelevant
    assert flat["start"]["open"] and flat["end"]["open"] and flat["width"]["value"] == 6


def test_plateau_uncertainty_matches_the_spread_of_repeated_sweeps():
    """Independent Monte Carlo: the spread of the estimate over 300 simulated noisy sweeps
    agrees with the stderr one sweep reports, and the bias-corrected level is unbiased."""
    rng = np.random.default_rng(11)
    se = np.full(BIAS.size, 0.003)
    truth = sigmoid(BIAS)
    starts, reported, levels = [], [], []
    for _ in range(300):
        noisy = truth + se * rng.standard_normal(BIAS.size)
        result = plateau(BIAS, noisy, se, 0.01, draws=400, seed=1)
        starts.append(result["start"]["value"])
        reported.append(result["start"]["stderr"])
        levels.append(result["efficiency"]["value"])
    spread = np.std(starts, ddof=1)
    # 300 repeats: the sd of a sample sd is ~4 %; allow 25 % for the non-normal tails of a max
    assert np.median(reported) == pytest.approx(spread, rel=0.25)
    # corrected level: mean within 3 standard errors of the mean of the sweep's true maximum,
    # where the raw maximum of ~9 points on the plateau sits ~1.5 sd (0.0045) above it
    assert abs(np.mean(levels) - truth.max()) < 3 * np.std(levels) / np.sqrt(300) + 0.001


def test_dark_crossing_of_an_exponential_is_exact():
    bias = np.array([6.0, 7.0, 8.0, 9.0])
    p = 1e-4 * np.exp(bias - 6.0)
    result = dark_limit_crossing(bias, p, 0.1 * p, 1e-3)
    # log-linear interpolation is exact for an exponential: 1e-4 e^(I-6) = 1e-3 at I = 6 + ln 10
    assert result["value"] == pytest.approx(6 + math.log(10), abs=1e-12)
    # 10 % relative error on each point -> the crossing moves by ~0.1 / (1 per uA) at most;
    # a normal approximation of the draws gives 0.07-0.1 (interpolation between two points)
    assert 0.03 < result["stderr"] < 0.15
    assert result["ci95"][0] < result["value"] < result["ci95"][1]


def test_dark_limit_not_reached_or_already_exceeded_is_said():
    bias = np.array([1.0, 2.0, 3.0])
    low = dark_limit_crossing(bias, [1e-5, 2e-5, 4e-5], [1e-6] * 3, 1e-3)
    assert math.isnan(low["value"]) and "not reached" in low["note"]
    high = dark_limit_crossing(bias, [1e-2, 2e-2, 4e-2], [1e-3] * 3, 1e-3)
    assert math.isnan(high["value"]) and "already" in high["note"]
