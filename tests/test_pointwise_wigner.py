"""Point-by-point Wigner values, the smoothed curve and the phase-insensitivity test."""
from __future__ import annotations

import math

import numpy as np
import pytest

from scipy import optimize

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.tomography.pointwise_wigner import (
    BOOTSTRAP_TASK,
    box_least_squares,
    phase_insensitivity_test,
    pointwise_wigner,
    smoothed_wigner,
    thermal_design,
    wigner_from_p,
)
from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions


def model_probabilities(spec, values, coherent, thermal):
    """Outcome probabilities with a cutoff tail below 1e-16: the thermal design matrices are
    ill-conditioned (condition number ~1e9 for 9 levels in 0..0.5), so exact-data checks need
    probabilities exact to rounding."""
    model = parse_model_spec(spec)
    n_photons = choose_cutoff(coherent, thermal, tolerance=1e-16)
    theta = np.asarray(model.povm(model.pack(values), n_photons))
    q = np.clip(np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T, 0, None)
    return q / q.sum(axis=1, keepdims=True)


def exact_counts(q, scale=1e17):
    """Counts proportional to the exact probabilities (relative rounding 1e-17)."""
    return np.round(q * scale).astype(np.int64)


def grid(radii, levels):
    return np.repeat(radii, len(levels)), np.tile(levels, len(radii))


def lossy_no_click(alpha, eta):
    """REFERENCES.md closed form: W(alpha) = (2/pi)/(2-eta) exp(-2 eta |alpha|^2/(2-eta))."""
    return (2 / math.pi) / (2 - eta) * np.exp(-2 * eta * np.abs(alpha) ** 2 / (2 - eta))


def test_thermal_design_rows_are_distributions():
    design = thermal_design([0.0, 0.3, 2.0], 4)
    np.testing.assert_allclose(design.sum(axis=1), 1.0, rtol=1e-15)  # geometric series sums to 1
    assert design[0, 0] == 1.0 and design[2, 4] == pytest.approx((2 / 3) ** 4)  # tail mass r^M


@pytest.mark.parametrize("n_rows, n, rank", [(4, 4, 4), (9, 3, 3), (6, 5, 3), (8, 7, 7)])
def test_box_least_squares_matches_scipy_bvls(n_rows, n, rank):
    """Reference: scipy.optimize.lsq_linear (BVLS, exact active-set method) target by target.
    Targets are spread so that some optima lie inside the box and many on its faces; the
    rank-deficient design has optima that are not unique, so the objectives are compared."""
    rng = np.random.default_rng(n_rows * 10 + n)
    design = rng.normal(size=(n_rows, rank)) @ rng.normal(size=(rank, n))
    targets = design @ rng.uniform(-0.5, 1.5, size=(n, 40)) + 0.1 * rng.normal(size=(n_rows, 40))
    ours = box_least_squares(design, targets)
    assert np.all((ours >= 0.0) & (ours <= 1.0))
    for x, t in zip(ours, targets.T):
        reference = optimize.lsq_linear(design, t, bounds=(0.0, 1.0), method="bvls", tol=1e-14).x
        value, best = np.sum((design @ x - t) ** 2), np.sum((design @ reference - t) ** 2)
        assert value == pytest.approx(best, rel=1e-9, abs=1e-12)  # both exact: rounding only
        if rank == n:  # unique optimum
            np.testing.assert_allclose(x, reference, atol=1e-8)


def test_abel_sum_of_a_saturating_sequence():
    # p = (0.3, 0.8, 0.5, 0.5, ...): sum (-1)^n p_n, Abel-summed = 0.3 - 0.8 + 0.5 - 0.5 ... = -0.5 + 0.5/2
    assert wigner_from_p([0.3, 0.8, 0.5]) == pytest.approx((2 / math.pi) * (0.3 - 0.8 + 0.25))  # hand computation


@pytest.mark.parametrize("eta, expected", [(1.0, 2 / math.pi), (0.9, 0.578745)])
def test_no_click_value_at_the_origin(eta, expected):
    # REFERENCES.md check values: 2/pi (perfect detector) and 0.578745 (eta = 0.9)
    coherent, thermal = grid([0.0], np.linspace(0.0, 0.5, 9))
    q = model_probabilities("threshold", {"efficiency": eta}, coherent, thermal)
    result = pointwise_wigner(coherent, thermal, exact_counts(q), bootstrap=0)
    # the saturation prior at M = 8 misses (1-eta)^n beyond n = 8 weighted by (1/3)^8: < 1e-9
    assert result.values[0, 0] == pytest.approx(expected, abs=2e-6)


def test_lossy_closed_form_from_exact_probabilities():
    eta = 0.9
    coherent, thermal = grid([0.0, 0.25, 0.5], np.linspace(0.0, 0.5, 9))
    q = model_probabilities("threshold", {"efficiency": eta}, coherent, thermal)
    result = pointwise_wigner(coherent, thermal, exact_counts(q), bootstrap=0)
    assert result.saturation == 8
    # Saturation-prior error: tail mass (nbar/(1+nbar))^M <= (1/3)^8 = 1.5e-4 times the spread
    # of p_n beyond M; measured 2e-5 at |alpha|^2 = 0.5 (it grows with |alpha|^2: see module doc)
    np.testing.assert_allclose(result.values[0], lossy_no_click(result.alpha, eta), atol=1e-4)


def test_lossy_closed_form_within_bootstrap_errors():
    eta = 0.9
    coherent, thermal = grid(np.linspace(0.0, 2.0, 9), [0.0, 0.2, 0.5, 1.0, 1.5, 2.0])
    q = model_probabilities("threshold", {"efficiency": eta}, coherent, thermal)
    counts = np.random.default_rng(0).multinomial(20_000, q)
    result = pointwise_wigner(coherent, thermal, counts, bootstrap=20, seed=1)
    z = (result.values[0] - lossy_no_click(result.alpha, eta)) / result.stderr[0]
    # shot noise (20,000 shots per probe) dominates the saturation bias here; |z| < 3.5 for
    # 9 points is a 0.4% false-alarm rate at most (Bonferroni)
    assert np.all(np.abs(z) < 3.5)
    smooth = smoothed_wigner(result)
    z_smooth = (smooth.values[0] - lossy_no_click(smooth.alpha, eta)) / smooth.stderr[0]
    assert np.all(np.abs(z_smooth) < 3.5)
    assert 1 <= smooth.saturation <= 8


def test_outcome_values_add_up_to_one_over_pi():
    coherent, thermal = grid(np.linspace(0.0, 3.0, 6), [0.0, 0.3, 0.8, 1.5])
    q = model_probabilities("array:4+dark", {"efficiency": 0.6, "dark_probability": 0.02}, coherent, thermal)
    counts = np.random.default_rng(4).multinomial(5_000, q)
    result = pointwise_wigner(coherent, thermal, counts, bootstrap=3, seed=2)
    # completeness: sum_k Pi_k = 1 has W = 1/pi everywhere (DESIGN section 2); the simplex
    # constraint keeps it exact even where the bounds are active
    np.testing.assert_allclose(result.values.sum(axis=0), 1 / math.pi, atol=1e-9)
    box = pointwise_wigner(coherent, thermal, counts, bootstrap=0, method="box")
    assert box.values.shape == result.values.shape


def test_points_need_two_thermal_levels():
    coherent = np.array([0.0, 0.0, 1.0, 2.0, 2.0])
    thermal = np.array([0.0, 0.5, 0.0, 0.0, 0.4])
    q = model_probabilities("threshold", {"efficiency": 0.5}, coherent, thermal)
    result = pointwise_wigner(coherent, thermal, exact_counts(q, 1e6), bootstrap=0)
    np.testing.assert_allclose(np.abs(result.alpha) ** 2, [0.0, 2.0])  # |alpha|^2 = 1 has one level


def _phase_scan(phase_dependent, seed):
    radii, phases, levels = [0.5, 1.5], np.linspace(0, 2 * math.pi, 4, endpoint=False), [0.0, 0.5]
    rows = [(a, ph, t) for a in radii for ph in phases for t in levels]
    coherent, phase, thermal = (np.array(c) for c in zip(*rows))
    q = model_probabilities("threshold+dark", {"efficiency": 0.5, "dark_probability": 0.01}, coherent, thermal)
    if phase_dependent:  # an invented phase-sensitive response: click probability x (1 + 0.05 cos phase)
        click = np.clip(q[:, 1] * (1 + 0.05 * np.cos(phase)), 0, 1)
        q = np.stack([1 - click, click], axis=1)
    counts = np.random.default_rng(seed).multinomial(20_000, q)
    return coherent, thermal, counts, phase


def test_phase_test_accepts_an_insensitive_detector_and_rejects_a_sensitive_one():
    insensitive = phase_insensitivity_test(*_phase_scan(False, seed=7))
    sensitive = phase_insensitivity_test(*_phase_scan(True, seed=7))
    # fixed seed: the insensitive scan's p-value is uniform under H0; 0.01 is the test level
    assert insensitive.p_value > 0.01 and insensitive.settings == 4
    # a 5% modulation of a ~0.3-0.5 click probability with 20,000 shots is about 7-10 sigma
    assert sensitive.p_value < 1e-6
    coherent, thermal, counts, phase = _phase_scan(False, seed=7)
    result = pointwise_wigner(coherent, thermal, counts, phase, bootstrap=0)
    assert result.alpha.size == 8 and np.any(np.abs(result.alpha.imag) > 0.1)  # off the real axis


def test_progress_callback_and_typed_errors(capsys):
    # Source: common practice, no source (progress through a callback; errors name the argument).
    coherent, thermal = grid([0.0, 0.5, 1.0], [0.0, 0.3, 0.8])
    q = model_probabilities("threshold", {"efficiency": 0.6}, coherent, thermal)
    counts = np.random.default_rng(5).multinomial(5_000, q)
    calls = []
    result = pointwise_wigner(coherent, thermal, counts, method="box", bootstrap=4, seed=3,
                              progress=lambda *call: calls.append(call))
    assert calls == [(BOOTSTRAP_TASK, i, 3) for i in (1, 2, 3)]  # one step per displacement
    assert capsys.readouterr() == ("", "")
    silent = pointwise_wigner(coherent, thermal, counts, method="box", bootstrap=4, seed=3)
    np.testing.assert_array_equal(silent.stderr, result.stderr)  # the callback draws no random numbers
    with pytest.raises(ArgumentError, match="^method: "):
        pointwise_wigner(coherent, thermal, counts, method="simplex-ish")
    with pytest.raises(ArgumentError, match="^saturation: "):
        pointwise_wigner(coherent, thermal, counts, saturation=0)
    with pytest.raises(ArgumentError, match="^saturation: "):
        smoothed_wigner(result, saturation=0)
