"""Model-free POVM reconstruction by regularised least squares (``method="least_squares"``): solver,
banded storage, cross-validation, bootstrap. The maximum-likelihood estimator is tested in
test_tomography_likelihood.py."""
from __future__ import annotations

import json

import cvxpy as cp
import numpy as np
import pytest

from povmfit.fitting.tomography.reconstruct import (
    BOOTSTRAP_TASK,
    CROSS_VALIDATION_TASK,
    ProblemLayout,
    build_layout,
    objective_value,
    project_columns_to_simplex,
    reconstruct_povm,
    solve_povm,
    solve_povm_batch,
    weighted_operator,
)
from povmfit.models import banded_probe_distributions, choose_cutoff, parse_model_spec, probe_distributions


def simulate(spec, values, coherent, thermal, shots, seed):
    """Counts of a model detector: multinomial draws from sum_n P(n) theta[k, n]."""
    model = parse_model_spec(spec)
    n_photons = choose_cutoff(coherent, thermal)
    theta = np.asarray(model.povm(model.pack(values), n_photons))
    q = np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T
    q = np.clip(q, 0, None)
    q /= q.sum(axis=1, keepdims=True)
    counts = np.random.default_rng(seed).multinomial(shots, q)
    return theta, counts


def _bisection_projection(v):
    """Independent computation: tau solving sum max(v - tau, 0) = 1 by bisection."""
    lo, hi = v.min() - 1.0, v.max()
    for _ in range(200):
        tau = 0.5 * (lo + hi)
        lo, hi = (tau, hi) if np.maximum(v - tau, 0).sum() > 1 else (lo, tau)
    return np.maximum(v - 0.5 * (lo + hi), 0)


@pytest.mark.parametrize("n_outcomes, decimals", [(5, None), (20, None), (9, 0), (60, None), (60, 1), (300, None)])
def test_simplex_projection_matches_bisection(n_outcomes, decimals):
    v = np.random.default_rng(0).normal(size=(n_outcomes, 40)) * 2
    if decimals is not None:  # many ties within a column
        v = np.round(v, decimals)
    projected = np.asarray(project_columns_to_simplex(v))
    expected = np.stack([_bisection_projection(v[:, j]) for j in range(v.shape[1])], axis=1)
    np.testing.assert_allclose(projected, expected, atol=1e-12)  # bisection to 2^-200: exact in float64


def test_banded_storage_equals_dense_distributions():
    coherent = np.r_[np.linspace(0, 60, 25), 0.0, 3.0]
    thermal = np.r_[np.zeros(25), 1.5, 0.7]
    n_photons = choose_cutoff(coherent, thermal)
    banded = banded_probe_distributions(coherent, thermal, n_photons)
    dense = np.asarray(probe_distributions(coherent, thermal, n_photons))
    # dropped window tails are < 1e-12 per probe by construction (tolerance argument)
    np.testing.assert_allclose(banded.dense(), dense, atol=1e-12)
    assert banded.width < n_photons


def _cvxpy_objective(frequencies, distributions, g):
    """General-purpose reference: cvxpy's default QP solver (OSQP in cvxpy 1.9), with its
    tolerances tightened to 1e-10 because the defaults (about 1e-4) are looser than the
    1e-6 agreement we check."""
    n_outcomes, n_photons = frequencies.shape[1], distributions.shape[1]
    theta = cp.Variable((n_outcomes, n_photons))
    objective = cp.sum_squares(frequencies - distributions @ theta.T) + g * cp.sum_squares(theta[:, 1:] - theta[:, :-1])
    problem = cp.Problem(cp.Minimize(objective), [theta >= 0, cp.sum(theta, axis=0) == 1])
    problem.solve(solver=cp.OSQP, eps_abs=1e-10, eps_rel=1e-10, polishing=True, max_iter=400_000)
    return theta.value


@pytest.mark.parametrize("relative_g", [1e-3, 1e-1])
def test_solver_matches_cvxpy_objective(relative_g):
    coherent = np.linspace(0.0, 6.0, 25)
    thermal = np.zeros_like(coherent)
    _, counts = simulate("array:2+dark", {"efficiency": 0.6, "dark_probability": 0.03}, coherent, thermal, 5000, seed=11)
    frequencies = counts / counts.sum(axis=1, keepdims=True)
    n_photons = choose_cutoff(coherent, thermal)
    layout = build_layout(coherent, thermal, n_photons)
    weights = np.ones(coherent.size)
    op = weighted_operator(layout, weights)
    g = relative_g * op.scale
    ours, _, converged = solve_povm(op, frequencies, g)
    reference = _cvxpy_objective(frequencies, np.asarray(probe_distributions(coherent, thermal, n_photons)), g)
    ours_value = objective_value(layout, frequencies, weights, g, ours)
    reference_value = objective_value(layout, frequencies, weights, g, reference)
    assert converged
    assert ours_value == pytest.approx(reference_value, rel=1e-6)  # requirement: equal to 1e-6 relative
    assert np.all(ours >= 0) and np.allclose(ours.sum(axis=0), 1.0, atol=1e-12)


def test_batched_solves_agree_with_single_solves():
    """Source: the single solve (checked against cvxpy above). Seven problems (two batches, the
    second padded) with their own weights, frequencies, g, starts and tolerances: each must end
    where it ends alone, iteration count included, since a member that has met its stopping
    rule no longer moves."""
    coherent = np.linspace(0.0, 6.0, 20)
    thermal = np.zeros_like(coherent)
    _, counts = simulate("array:2+dark", {"efficiency": 0.6, "dark_probability": 0.03}, coherent, thermal, 5000, seed=4)
    frequencies = counts / counts.sum(axis=1, keepdims=True)
    layout = build_layout(coherent, thermal, choose_cutoff(coherent, thermal))
    rng = np.random.default_rng(8)
    ops = [weighted_operator(layout, np.where(rng.random(coherent.size) < 0.2, 0.0, rng.uniform(0.5, 2.0, coherent.size)))
           for _ in range(7)]
    tables = np.stack([rng.multinomial(5000, f) / 5000 for f in [frequencies] * 7])
    g = ops[0].scale * np.array([1e-1, 1e-3, 1e-2, 1e-4, 1e-1, 1e-3, 1e-2])
    rtol = np.array([1e-10, 1e-10, 1e-12, 1e-11, 1e-10, 1e-12, 1e-11])
    starts = np.asarray(project_columns_to_simplex(rng.normal(size=(7, 3, layout.n_photons))))
    thetas, iterations, converged = solve_povm_batch(ops, tables, g, starts, rtol)
    assert iterations.min() != iterations.max()  # members stop at different times
    for i in range(7):
        alone, its, ok = solve_povm(ops[i], tables[i], g[i], starts[i], rtol[i])
        assert (iterations[i], converged[i]) == (its, ok)
        np.testing.assert_allclose(thetas[i], alone, atol=1e-12)  # same iterates up to rounding
    shared, _, _ = solve_povm_batch(ops[0], frequencies, g[:3])  # one operator and data for all
    for i in range(3):
        np.testing.assert_allclose(shared[i], solve_povm(ops[0], frequencies, g[i])[0], atol=1e-12)


def test_block_layout_gives_the_dense_solution():
    """The banded (block) operator and the dense Gram operator minimise the same objective."""
    coherent = np.linspace(0.0, 800.0, 30)
    thermal = np.zeros_like(coherent)
    _, counts = simulate("threshold+dark", {"efficiency": 0.1, "dark_probability": 0.01}, coherent, thermal, 4000, seed=5)
    frequencies = counts / counts.sum(axis=1, keepdims=True)
    n_photons = choose_cutoff(coherent, thermal)
    blocked = build_layout(coherent, thermal, n_photons, banded=True)
    assert blocked.blocks.shape[0] > 1  # the banded path is exercised
    dense = ProblemLayout(np.asarray(probe_distributions(coherent, thermal, n_photons))[None],
                          np.arange(coherent.size)[None], n_photons, n_photons, n_photons)
    weights = np.ones(coherent.size)
    op_blocks, op_dense = weighted_operator(blocked, weights), weighted_operator(dense, weights)
    assert op_blocks.kind == "blocks" and op_dense.kind == "gram"
    np.testing.assert_allclose(op_blocks.row_sums, op_dense.row_sums, rtol=1e-9, atol=1e-12)
    g = 1e-1 * op_dense.scale
    theta_blocks, _, _ = solve_povm(op_blocks, frequencies, g)
    theta_dense, _, _ = solve_povm(op_dense, frequencies, g)
    value_blocks = objective_value(dense, frequencies, weights, g, theta_blocks)
    value_dense = objective_value(dense, frequencies, weights, g, theta_dense)
    assert value_blocks == pytest.approx(value_dense, rel=1e-6)  # same problem, same optimum


def test_reconstruction_recovers_a_simulated_array_within_bootstrap_errors():
    truth_values = {"efficiency": 0.7, "dark_probability": 0.02}
    coherent = np.linspace(0.0, 8.0, 40)
    thermal = np.zeros_like(coherent)
    theta, counts = simulate("array:4+dark", truth_values, coherent, thermal, 20_000, seed=1)
    result = reconstruct_povm(coherent, thermal, counts, method="least_squares", grid=[1e-6, 1e-4, 1e-2], folds=3, bootstrap=30, seed=3)
    estimate = result.theta
    assert estimate.shape == theta.shape
    assert np.allclose(estimate.sum(axis=0), 1.0, atol=1e-12) and estimate.min() >= 0
    inside = result.constrained
    assert inside[:8].all()  # probes with means up to 8 inform at least n = 0..7
    difference = np.abs(estimate - theta)[:, inside]
    # Shot noise: bootstrap standard errors; entries pinned at 0 by the constraint have zero
    # bootstrap spread, hence the absolute floor (about the binomial error 1/sqrt(20000) x 2).
    assert np.all(difference <= 4.0 * result.stderr[:, inside] + 0.015)
    spread = result.stderr[:, inside] > 1e-3
    z2 = ((estimate - theta)[:, inside][spread] / result.stderr[:, inside][spread]) ** 2
    # mean z^2 of order 1 when the errors are honest (common practice, no source); 3 allows
    # for the smoothness bias the bootstrap does not include
    assert z2.mean() < 3.0
    payload = json.loads(json.dumps(result.to_dict()))
    assert payload["regularisation"] in payload["regularisation_grid"]
    assert len(payload["cv_scores"]) == 3 and payload["cv_folds"] == 3


def test_bootstrap_is_reproducible_with_a_seed():
    coherent = np.linspace(0.0, 4.0, 12)
    thermal = np.zeros_like(coherent)
    _, counts = simulate("threshold+dark", {"efficiency": 0.5, "dark_probability": 0.01}, coherent, thermal, 3000, seed=2)
    first = reconstruct_povm(coherent, thermal, counts, method="least_squares", grid=[1e-3], bootstrap=5, seed=9)
    second = reconstruct_povm(coherent, thermal, counts, method="least_squares", grid=[1e-3], bootstrap=5, seed=9)
    np.testing.assert_array_equal(first.stderr, second.stderr)
    assert first.stderr.max() > 0


def test_progress_goes_to_the_callback_and_nothing_is_printed(capsys):
    # Source: common practice, no source (an estimator reports progress, it does not print).
    coherent = np.linspace(0.0, 4.0, 12)
    thermal = np.zeros_like(coherent)
    _, counts = simulate("threshold+dark", {"efficiency": 0.5, "dark_probability": 0.01}, coherent, thermal, 3000, seed=2)
    calls = []
    result = reconstruct_povm(coherent, thermal, counts, method="least_squares", grid=[1e-4, 1e-3, 1e-2], folds=3, bootstrap=7, seed=9,
                              progress=lambda task, done, total: calls.append((task, done, total)))
    # one call per g (3), then one per batch of BATCH = 5 bootstrap problems (5, then 7)
    assert calls == [(CROSS_VALIDATION_TASK, 1, 3), (CROSS_VALIDATION_TASK, 2, 3), (CROSS_VALIDATION_TASK, 3, 3),
                     (BOOTSTRAP_TASK, 5, 7), (BOOTSTRAP_TASK, 7, 7)]
    assert capsys.readouterr() == ("", "")
    silent = reconstruct_povm(coherent, thermal, counts, method="least_squares", grid=[1e-4, 1e-3, 1e-2], folds=3, bootstrap=7, seed=9)
    np.testing.assert_array_equal(silent.theta, result.theta)  # the callback draws no random numbers
    np.testing.assert_array_equal(silent.stderr, result.stderr)


@pytest.mark.parametrize("mean", [0.3, 37.5, 5000.0, 9.2e5])
def test_closed_form_poisson_window_matches_arbitrary_precision(mean):
    # Source: mpmath (50 digits) of exp(-m) m^n / n!, at the centre, both shoulders and far
    # into both tails of the window the banded builder uses. Loader's form keeps a few ulps
    # times (1 + |ln pmf|).
    import mpmath

    from povmfit.models._probes import poisson_pmf

    mpmath.mp.dps = 50
    sd = np.sqrt(mean)
    points = np.unique(np.clip(np.round(mean + sd * np.array([-11.0, -3.0, -0.5, 0.0, 0.5, 3.0, 11.0])), 0, None))
    ours = poisson_pmf(points, mean)
    for n, value in zip(points, ours):
        exact = mpmath.exp(-mpmath.mpf(mean) + int(n) * mpmath.log(mean) - mpmath.loggamma(int(n) + 1))
        allowed = 8 * np.finfo(float).eps * (1 + abs(float(mpmath.log(exact))))
        assert abs(value / float(exact) - 1) <= allowed, (n, value, float(exact))


def test_pure_probe_windows_cost_nothing_beyond_the_window():
    # Source: the Laguerre recurrence (``probe_distributions_numpy``) over the whole range,
    # for pure coherent, pure thermal and vacuum probes at a cutoff of 4000 photon numbers.
    from povmfit.models._probes import probe_distributions_numpy, pure_probe_row

    for coherent, thermal in ((2500.0, 0.0), (0.0, 40.0), (0.0, 0.0), (3900.0, 0.0)):
        first, row = pure_probe_row(coherent, thermal, 4000)
        dense = probe_distributions_numpy(np.array([coherent]), np.array([thermal]), 4000)[0]
        np.testing.assert_allclose(row, dense[first : first + row.size], rtol=1e-10, atol=1e-300)
        assert dense[:first].sum() + dense[first + row.size :].sum() < 1e-15  # nothing left outside


@pytest.mark.parametrize("tolerance", [1e-6, 1e-10, 1e-13])
def test_cutoff_equals_the_one_from_the_whole_recurrence(tolerance):
    # Source: the Laguerre recurrence over every photon number up to the generous bound, the
    # tails of all probes summed from the top (the cutoff without closed-form windows).
    from povmfit.models._probes import _generous_bound, probe_distributions_numpy

    coherent = np.array([0.0, 0.0, 3.0, 25.0, 380.0, 1.0, 0.0])
    thermal = np.array([0.0, 2.0, 0.0, 0.0, 0.0, 0.5, 17.0])
    bound = _generous_bound(coherent, thermal)
    tail = np.cumsum(probe_distributions_numpy(coherent, thermal, bound)[:, ::-1], axis=1)[:, ::-1]
    expected = max(int(np.nonzero(tail.max(axis=0) < tolerance)[0][0]), 2)
    assert choose_cutoff(coherent, thermal, tolerance) == expected
    assert choose_cutoff(coherent[:1], thermal[:1], tolerance) == 2  # vacuum alone
