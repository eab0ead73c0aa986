"""Parametric bootstrap of a fit.

Resampled count tables are drawn from the fitted outcome probabilities (multinomial per
probe, with the scan's shots, from one seeded generator, one table after another), and each
is refitted by the fit's own solver (``solver.solve`` on the same ``FitProblem``), started
at the estimate. The counts are resampled; the calibration prior is not, so the bootstrap
spread is the statistical uncertainty. Refits that stop without meeting a convergence
criterion are counted and left out of the statistics.
"""
from __future__ import annotations

import numpy as np

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.inference.objective import FitProblem
from povmfit.fitting.inference.solver import solve

__all__ = ["parametric_bootstrap", "bootstrap_problem", "RESAMPLE_TOLERANCE"]

# Relative parameter and deviance change at which a resample's refit stops: the model
# ranking's tolerance, looser than the reported fit's 1e-12. On the demo scan the refits at
# 1e-8 and at 1e-12 differ by 1e-5 standard errors at most, and 1e-8 takes half the time.
RESAMPLE_TOLERANCE = 1e-8


def bootstrap_problem(problem: FitProblem, x_hat, predicted, shots, n_resamples: int, seed: int,
                      tolerance: float = RESAMPLE_TOLERANCE, progress=None) -> dict:
    """Refit ``n_resamples`` multinomial resamples of ``problem``'s probes.

    Args:
        problem: the fit's problem (every probe fitted).
        x_hat: the estimate over ``problem.names``; every refit starts there.
        predicted: fitted q[p, k], shape (n_probes, n_outcomes); rows are clipped at 0 and
            renormalised before sampling.
        shots: shots per probe, shape (n_probes,).
        n_resamples, seed: number of resamples and the seed of their generator.
        tolerance: the refits' relative tolerance (see ``RESAMPLE_TOLERANCE``).
        progress: optional ``progress(task, done, total)`` called with task "bootstrap".

    Returns:
        {"resamples", "seed", "converged", "stderr": {name}, "ci95": {name: [lo, hi]},
        "estimates": (n_resamples, n_params) array, "refit_converged": (n_resamples,) bool}.
    """
    if isinstance(n_resamples, bool) or int(n_resamples) != n_resamples or n_resamples < 2:
        raise ArgumentError(f"bootstrap: expected a whole number of resamples >= 2, got {n_resamples!r}")
    n_resamples = int(n_resamples)
    rng = np.random.default_rng(seed)
    q = np.clip(predicted, 0.0, None)
    q = q / q.sum(axis=1, keepdims=True)
    shots = np.asarray(shots)
    lower, upper = problem.lower, problem.upper
    estimates = np.empty((n_resamples, len(x_hat)))
    converged = np.zeros(n_resamples, bool)
    if progress is not None:
        progress("bootstrap", 0, n_resamples)
    for i in range(n_resamples):
        counts = rng.multinomial(shots, q).astype(float)
        solution = solve(problem.with_counts(counts), x_hat, lower, upper, tolerance)
        estimates[i], converged[i] = solution.x, solution.converged
        if progress is not None:
            progress("bootstrap", i + 1, n_resamples)
    kept = estimates[converged]
    names = problem.names
    enough = len(kept) >= 2
    return {
        "resamples": n_resamples,
        "seed": int(seed),
        "converged": int(converged.sum()),
        "stderr": {n: float(np.std(kept[:, i], ddof=1)) if enough else float("nan") for i, n in enumerate(names)},
        "ci95": {n: [float(v) for v in np.percentile(kept[:, i], [2.5, 97.5])] if enough else [float("nan")] * 2
                 for i, n in enumerate(names)},
        "estimates": estimates,
        "refit_converged": converged,
    }


def parametric_bootstrap(scan, result, n_resamples: int, seed: int, progress=None,
                         tolerance: float = RESAMPLE_TOLERANCE) -> dict:
    """Bootstrap a finished fit of ``scan`` (``result`` from ``fit_scan`` on every probe):
    the dict of :func:`bootstrap_problem`, raw refits included. ``fit_scan(..., bootstrap=N)``
    stores the same statistics, without the raw refits, in ``FitResult.bootstrap``."""
    problem = FitProblem(scan, result.model, result.compute_model or result.model, result.n_photons,
                         result.weighting, result.calibration_uncertainty)
    x_hat = np.array([result.values[n] for n in problem.names])
    return bootstrap_problem(problem, x_hat, result.predicted, scan.shots, n_resamples, seed, tolerance, progress)
