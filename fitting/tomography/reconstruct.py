"""Model-free reconstruction of a diagonal POVM from probe counts.

Two estimators, chosen by ``method``:

``"likelihood"`` (the default): maximum likelihood for the multinomial counts, columns on the
simplex, with an optional smoothness penalty g sum_k sum_n (theta[k, n] - theta[k, n+1])^2
whose strength is chosen by K-fold cross-validation on the held-out probes' log-likelihood
(the grid includes g = 0, plain maximum likelihood; the g with the largest held-out
log-likelihood is taken). Solver: an interior-point method for small dense problems, penalised
EM accelerated by SQUAREM beyond (``likelihood_solver``). The bootstrap also gives the
estimator's bias at the chosen g (mean of the replicates minus the estimate), reported beside
the standard errors, and 68 % percentile intervals.

``"least_squares"``: the regularised least-squares estimator below (the default before the
likelihood estimator; it smooths more where the data are informative).

Least-squares problem (Lundeen et al., Nature Physics 5, 27 (2009); Feito et al., New J. Phys. 11, 093038
(2009)), with per-probe weights w_p = shots_p / mean(shots):

    minimise  sum_p w_p sum_k (f[p, k] - sum_n F[p, n] theta[k, n])^2
              + g sum_k sum_n (theta[k, n] - theta[k, n+1])^2
    subject to theta[k, n] >= 0 and sum_k theta[k, n] = 1 for every n,

where f are the observed outcome frequencies and F the probe photon-number distributions
(n = 0..n_photons-1, cutoff from ``choose_cutoff``). With equal shots the weights are 1 and
this is the published objective.

The solver (accelerated projected gradient, many problems per compiled loop) lives in
``povm_solver``; its names are importable from here too.

The regularisation strength g is chosen by K-fold cross-validation over held-out probes
from a grid relative to the largest eigenvalue of the weighted data term; uncertainties come
from a seeded parametric bootstrap (multinomial counts drawn from the fitted probabilities,
re-solved at the chosen g).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from povmfit.models import banded_probe_distributions, choose_cutoff

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.tomography.likelihood_solver import (
    heldout_log_likelihood,
    heldout_log_likelihood_per_probe,
    likelihood_coarse_start,
    solve_likelihood_chunked,
    solve_likelihood,
    solve_likelihood_batch,
)
from povmfit.fitting.tomography.povm_solver import (
    BATCH,
    ProblemLayout,
    WeightedOperator,
    build_layout,
    coarse_start,
    interpolation_matrix,
    objective_value,
    predicted_frequencies,
    project_columns_to_simplex,
    solve_povm,
    solve_povm_batch,
    weighted_operator,
)

__all__ = [
    "Reconstruction", "reconstruct_povm", "ProblemLayout", "build_layout", "WeightedOperator",
    "weighted_operator", "solve_povm", "solve_povm_batch", "cross_validate", "predicted_frequencies",
    "objective_value", "project_columns_to_simplex", "coarse_start", "interpolation_matrix", "DEFAULT_GRID",
    "DEFAULT_FOLDS", "BATCH", "CROSS_VALIDATION_TASK", "BOOTSTRAP_TASK", "COARSE_TASK", "SOLVE_TASK", "METHODS",
    "LIKELIHOOD_GRID",
    "solve_likelihood", "solve_likelihood_batch",
]

METHODS = ("likelihood", "least_squares")
# g / (largest expected number of shots at one photon number); 0 = plain maximum likelihood
LIKELIHOOD_GRID = (0.0, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2)
# stopping rules (change of the objective, in nats, over one SQUAREM cycle <= ATOL + RTOL |f|):
# a change of 1e-6 nats is far below anything the statistics can see (a deviance of 2e-6)
LIKELIHOOD_RTOL, LIKELIHOOD_ATOL = 1e-11, 1e-8  # the estimate itself
RESAMPLE_RTOL, RESAMPLE_ATOL = 1e-10, 1e-6  # folds, bootstrap replicates and simulated scans
RESAMPLE_CYCLES = 5_000

DEFAULT_GRID = tuple(10.0 ** np.arange(-8, 1))  # g / lambda_max(F^T W F)
DEFAULT_FOLDS = 5
CONSTRAINED_FRACTION = 1e-2  # n is "constrained" where the probe weight is >= 1% of its peak
CROSS_VALIDATION_TASK = "cross-validation (POVM)"  # progress task names
BOOTSTRAP_TASK = "bootstrap (POVM)"
SOLVE_TASK = "solve (POVM)"
COARSE_TASK = "coarse start (POVM)"
LARGE_CYCLES = 2_000  # fine-level SQUAREM cycles at most for banded (large) problems


# ----- cross-validation, bootstrap and the result ---------------------------------------------
@dataclass(frozen=True)
class Reconstruction:
    """Result of :func:`reconstruct_povm`.

    Attributes:
        theta: (n_outcomes, n_photons) reconstructed P(outcome k | n photons).
        stderr: (n_outcomes, n_photons) parametric-bootstrap standard errors (zeros when
            ``bootstrap == 0``).
        regularisation: chosen g (objective units: counts for "likelihood", probe-weighted
            squared frequencies for "least_squares"; see module docstring).
        regularisation_grid: (n_grid,) the g values tried.
        cv_scores: (n_grid,) held-out score summed over folds, lower is better: minus the
            held-out log-likelihood ("likelihood") or the weighted squared error.
        cv_folds: number of folds.
        probe_weight: (n_photons,) expected number of shots with n photons,
            sum_p shots_p F[p, n].
        constrained: (n_photons,) bool, probe_weight >= CONSTRAINED_FRACTION x its maximum:
            the photon numbers the probes actually inform.
        objective: objective value at theta (chosen g).
        iterations, converged: solver status of the final solve.
        bootstrap: number of bootstrap replicates; seed: their seed.
        method: "likelihood" or "least_squares".
        bias: (n_outcomes, n_photons) bootstrap estimate of the estimator's bias at the
            chosen g (mean of the replicates minus theta; zeros without bootstrap). With
            g > 0 this is mainly the smoothing bias of the penalty.
        interval: (2, n_outcomes, n_photons) the bootstrap 68 % percentile interval (the
            15.87 and 84.13 percentiles of the replicates; Efron & Tibshirani, An Introduction
            to the Bootstrap (1993), ch. 13), "likelihood" only; None otherwise. Unlike
            theta +- stderr it follows the skew of estimates held near 0 or 1.
    """

    theta: np.ndarray
    stderr: np.ndarray
    regularisation: float
    regularisation_grid: np.ndarray
    cv_scores: np.ndarray
    cv_folds: int
    probe_weight: np.ndarray
    constrained: np.ndarray
    objective: float
    iterations: int
    converged: bool
    bootstrap: int
    seed: int | None
    method: str = "least_squares"
    bias: np.ndarray | None = None
    interval: np.ndarray | None = None

    @property
    def n_outcomes(self) -> int:
        return self.theta.shape[0]

    @property
    def n_photons(self) -> int:
        return self.theta.shape[1]

    def to_dict(self) -> dict:
        """Plain JSON-able data (lists and numbers)."""
        return {
            "n_outcomes": self.n_outcomes,
            "n_photons": self.n_photons,
            "theta": self.theta.tolist(),
            "stderr": self.stderr.tolist(),
            "regularisation": self.regularisation,
            "regularisation_grid": self.regularisation_grid.tolist(),
            "cv_scores": self.cv_scores.tolist(),
            "cv_folds": self.cv_folds,
            "probe_weight": self.probe_weight.tolist(),
            "constrained_photons": np.nonzero(self.constrained)[0].tolist(),
            "objective": self.objective,
            "iterations": self.iterations,
            "converged": self.converged,
            "bootstrap": self.bootstrap,
            "seed": self.seed,
            "method": self.method,
            "bias": None if self.bias is None else self.bias.tolist(),
            "interval_68": None if self.interval is None else self.interval.tolist(),
        }

    def largest_bias(self) -> float:
        """Largest |bias| / stderr over the constrained photon numbers (0 without bootstrap)."""
        if self.bias is None or self.bootstrap <= 1:
            return 0.0
        stderr = self.stderr[:, self.constrained]
        ratio = np.abs(self.bias[:, self.constrained]) / np.maximum(stderr, 1e-12)
        return float(np.max(np.where(stderr > 1e-6, ratio, 0.0))) if ratio.size else 0.0


def _fold_ids(n_probes: int, folds: int, rng: np.random.Generator) -> np.ndarray:
    return rng.permutation(np.arange(n_probes) % folds)


def cross_validate(layout, frequencies, probe_weights, grid, folds: int, rng, rtol=1e-10, max_iter=50_000,
                   progress=None):
    """Held-out weighted squared error for every g in ``grid``: shape (len(grid),).

    Each fold's probes get weight 0 in training and are scored on their predicted
    frequencies. The folds are solved together, one g at a time from the largest down, each
    g warm-started at the previous one's solution of the same fold. ``progress``: optional
    callback ``progress(task, done, total)``, called after each g.
    """
    n_probes = frequencies.shape[0]
    folds = max(2, min(folds, n_probes))
    fold = _fold_ids(n_probes, folds, rng)
    held = [fold == f for f in range(folds)]
    ops = [weighted_operator(layout, np.where(h, 0.0, probe_weights)) for h in held]
    scores = np.zeros(len(grid))
    thetas = None
    for done, i in enumerate(np.argsort(grid)[::-1], start=1):
        thetas, _, _ = solve_povm_batch(ops, frequencies, grid[i], thetas, rtol, max_iter)
        for h, theta in zip(held, thetas):
            predicted = predicted_frequencies(layout, theta, n_probes)
            scores[i] += float(np.sum(probe_weights[h, None] * (predicted[h] - frequencies[h]) ** 2))
        if progress is not None:
            progress(CROSS_VALIDATION_TASK, done, len(grid))
    return scores


def reconstruct_povm(coherent, thermal, counts, *, method: str = "likelihood", n_photons: int | None = None,
                     grid=None, folds: int = DEFAULT_FOLDS, bootstrap: int = 100, seed: int | None = 0,
                     tolerance: float = 1e-10, progress=None) -> Reconstruction:
    """Reconstruct the diagonal POVM from probe counts.

    Args:
        method: "likelihood" (maximum likelihood, the default) or "least_squares".
        coherent, thermal: (n_probes,) |alpha|^2 and nbar of each probe.
        counts: (n_probes, n_outcomes) integer outcome counts (shots are the row sums).
        n_photons: photon numbers 0..n_photons-1; default ``choose_cutoff(..., tolerance)``.
        grid: g values; "likelihood": relative to the largest expected number of shots at
            one photon number, max_n sum_p shots_p F[p, n], default :data:`LIKELIHOOD_GRID`;
            "least_squares": relative to the largest row sum of F^T W F (an upper bound of
            its largest eigenvalue), default :data:`DEFAULT_GRID` (1e-8 .. 1, one per decade).
            A single value skips cross-validation.
        folds: cross-validation folds over probes.
        bootstrap: parametric bootstrap replicates (0: no standard errors).
        seed: seeds the fold assignment and the bootstrap.
        tolerance: neglected tail mass of the default cutoff.
        progress: optional callback ``progress(task, done, total)`` (tasks
            :data:`CROSS_VALIDATION_TASK`, :data:`BOOTSTRAP_TASK` and, for large likelihood
            problems, :data:`COARSE_TASK` and :data:`SOLVE_TASK`); nothing is printed.
    """
    if method not in METHODS:
        raise ArgumentError(f"method: expected one of {', '.join(METHODS)}, got {method!r}")
    if method == "likelihood":
        return _reconstruct_likelihood(coherent, thermal, counts, n_photons=n_photons, grid=grid, folds=folds,
                                       bootstrap=bootstrap, seed=seed, tolerance=tolerance, progress=progress)
    counts = np.asarray(counts, dtype=np.int64)
    shots = counts.sum(axis=1).astype(float)
    frequencies = counts / shots[:, None]
    probe_weights = shots / shots.mean()
    if n_photons is None:
        n_photons = choose_cutoff(coherent, thermal, tolerance)
    layout = build_layout(coherent, thermal, n_photons)
    op = weighted_operator(layout, probe_weights)
    relative = np.atleast_1d(np.asarray(DEFAULT_GRID if grid is None else grid, dtype=float))
    absolute = relative * op.scale
    rng = np.random.default_rng(seed)
    cross_validated = absolute.size > 1
    if cross_validated:
        scores = cross_validate(layout, frequencies, probe_weights, absolute, folds, rng, progress=progress)
        chosen = float(absolute[int(np.argmin(scores))])
    else:
        scores, chosen = np.zeros(1), float(absolute[0])
    start = coarse_start(layout, frequencies, probe_weights, chosen) if op.kind == "blocks" else None
    theta, iterations, converged = solve_povm(op, frequencies, chosen, start)
    stderr = _bootstrap_stderr(op, theta, shots, chosen, bootstrap, rng, progress)
    weight = banded_probe_distributions(coherent, thermal, n_photons).column_weights(shots)
    return Reconstruction(
        theta=theta, stderr=stderr, regularisation=chosen, regularisation_grid=absolute,
        cv_scores=scores, cv_folds=int(folds) if cross_validated else 0, probe_weight=weight,
        constrained=weight >= CONSTRAINED_FRACTION * weight.max(),
        objective=objective_value(layout, frequencies, probe_weights, chosen, theta),
        iterations=iterations, converged=converged, bootstrap=int(bootstrap), seed=seed, method="least_squares",
        bias=None,
    )


def _reconstruct_likelihood(coherent, thermal, counts, *, n_photons, grid, folds, bootstrap, seed, tolerance,
                            progress) -> Reconstruction:
    counts = np.asarray(counts, dtype=np.int64)
    shots = counts.sum(axis=1).astype(float)
    if n_photons is None:
        n_photons = choose_cutoff(coherent, thermal, tolerance)
    layout = build_layout(coherent, thermal, n_photons)
    weight = banded_probe_distributions(coherent, thermal, n_photons).column_weights(shots)
    relative = np.atleast_1d(np.asarray(LIKELIHOOD_GRID if grid is None else grid, dtype=float))
    absolute = relative * float(weight.max())
    rng = np.random.default_rng(seed)
    cross_validated = absolute.size > 1
    if cross_validated:
        per_probe = likelihood_cross_validate(layout, counts, absolute, folds, rng, progress=progress)
        scores = per_probe.sum(axis=1)
        chosen = float(absolute[int(np.argmin(scores))])  # the largest held-out log-likelihood
    else:
        scores, chosen = np.zeros(1), float(absolute[0])
    if layout.blocks.shape[0] > 1:  # large: coarse start, then the fine solve, both reported in chunks
        def reporter(task):
            return None if progress is None else lambda done, total: progress(task, done, total)

        start = likelihood_coarse_start(layout, counts, chosen, progress=reporter(COARSE_TASK))
        theta, objective, cycles, converged = solve_likelihood_chunked(
            layout, counts, chosen, start, LARGE_CYCLES, rtol=LIKELIHOOD_RTOL, atol=LIKELIHOOD_ATOL,
            progress=reporter(SOLVE_TASK))
    else:
        theta, objective, cycles, converged = solve_likelihood(layout, counts, chosen, None, rtol=LIKELIHOOD_RTOL,
                                                               atol=LIKELIHOOD_ATOL)
    stderr, bias, interval = _likelihood_bootstrap(layout, theta, shots, chosen, bootstrap, rng, progress)
    return Reconstruction(
        theta=theta, stderr=stderr, regularisation=chosen, regularisation_grid=absolute, cv_scores=scores,
        cv_folds=int(folds) if cross_validated else 0, probe_weight=weight,
        constrained=weight >= CONSTRAINED_FRACTION * weight.max(), objective=objective, iterations=cycles,
        converged=converged, bootstrap=int(bootstrap), seed=seed, method="likelihood", bias=bias,
        interval=interval,
    )


def likelihood_cross_validate(layout, counts, grid, folds: int, rng, rtol=RESAMPLE_RTOL, progress=None):
    """Minus the held-out log-likelihood of every probe (scored in the fold that holds it out),
    for every g in ``grid``: shape (len(grid), n_probes).

    A fold's probes have their counts set to zero in training (so they do not enter the
    likelihood) and are scored with sum c log q on the trained POVM. The folds are solved
    together, one g at a time from the largest down, each warm-started at the previous
    solution of the same fold. ``progress(task, done, total)`` is called after each g.
    """
    n_probes = counts.shape[0]
    folds = max(2, min(folds, n_probes))
    fold = _fold_ids(n_probes, folds, rng)
    held = [fold == f for f in range(folds)]
    training = np.stack([np.where(h[:, None], 0, counts) for h in held]).astype(float)
    scores = np.zeros((len(grid), n_probes))
    thetas = None
    for done, i in enumerate(np.argsort(grid)[::-1], start=1):
        thetas, _, _, _ = solve_likelihood_batch(layout, training, grid[i], thetas, rtol=rtol, atol=RESAMPLE_ATOL,
                                                max_cycles=RESAMPLE_CYCLES)
        for h, theta in zip(held, thetas):
            scores[i, h] = -heldout_log_likelihood_per_probe(layout, counts, theta)[h]
        if progress is not None:
            progress(CROSS_VALIDATION_TASK, done, len(grid))
    return scores


def _likelihood_bootstrap(layout, theta, shots, g, replicates, rng, progress):
    """(stderr, bias, 68 % percentile interval (2, K, N)) over parametric-bootstrap re-solves
    at g, each started at ``theta``; counts drawn in order from ``rng`` (one multinomial draw
    per replicate). Without replicates: zeros, zeros and None."""
    if replicates <= 1:
        return np.zeros_like(theta), np.zeros_like(theta), None
    q = np.clip(predicted_frequencies(layout, theta, shots.size), 0.0, None)
    q /= q.sum(axis=1, keepdims=True)
    counts = shots.astype(np.int64)
    simulated = np.stack([rng.multinomial(counts, q) for _ in range(replicates)]).astype(float)

    def report(done, total):
        if progress is not None:
            progress(BOOTSTRAP_TASK, done, total)

    samples, _, _, _ = solve_likelihood_batch(layout, simulated, g, theta, rtol=RESAMPLE_RTOL, atol=RESAMPLE_ATOL,
                                              max_cycles=RESAMPLE_CYCLES, progress=report)
    interval = np.percentile(samples, [100 * special.ndtr(-1.0), 100 * special.ndtr(1.0)], axis=0)
    return samples.std(axis=0, ddof=1), samples.mean(axis=0) - theta, interval


def _bootstrap_stderr(op, theta, shots, g, replicates, rng, progress):
    """Standard deviation over parametric-bootstrap re-solves: (n_outcomes, n_photons).

    The replicates' counts are drawn in order from ``rng`` (one multinomial draw per
    replicate) and solved :data:`BATCH` at a time, each started at ``theta``.
    """
    if replicates <= 1:
        return np.zeros_like(theta)
    q = np.clip(predicted_frequencies(op.layout, theta, shots.size), 0.0, None)
    q /= q.sum(axis=1, keepdims=True)
    counts = shots.astype(np.int64)
    samples = np.empty((replicates,) + theta.shape)
    for first in range(0, replicates, BATCH):
        size = min(BATCH, replicates - first)
        simulated = np.stack([rng.multinomial(counts, q) for _ in range(size)]) / shots[:, None]
        samples[first : first + size] = solve_povm_batch(op, simulated, g, theta, rtol=1e-11)[0]
        if progress is not None:
            progress(BOOTSTRAP_TASK, first + size, replicates)
    return samples.std(axis=0, ddof=1)
