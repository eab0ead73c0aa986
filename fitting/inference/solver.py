"""The one least-squares solver of the fitter: the fit, the profile-likelihood intervals and
the bootstrap refits all go through :func:`solve`.

``solve`` runs scipy's trust-region-reflective least squares (``method="trf"``, linear loss,
``x_scale=1``) on a problem's residuals and exact Jacobian, inside box bounds, with some
parameters optionally held fixed, and returns a small :class:`Solution` with the optimiser's
status. A *problem* is any object with ``residuals_and_jacobian(x) -> (r, dr/dx)`` over the
full parameter vector ``x``; the objective is ``sum r^2`` (the deviance, see ``objective``).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

__all__ = ["Solution", "solve", "GRADIENT_TOLERANCE", "MAX_EVALUATIONS"]

GRADIENT_TOLERANCE = 1e-10  # scipy's gtol: scaled gradient norm at which the search stops
MAX_EVALUATIONS = 4000  # residual evaluations before the search gives up (status 0)


@dataclass(frozen=True)
class Solution:
    """Outcome of :func:`solve`.

    Attributes:
        x: the full parameter vector at the end (fixed entries at their given values).
        deviance: sum of squared residuals at ``x``.
        converged: True when a tolerance was met (scipy status > 0).
        status: scipy's status code: 1 gradient, 2 objective change, 3 step size, 4 both of
            2 and 3; 0 evaluation limit reached; -1 bad input.
        message: scipy's sentence for the status.
        nfev: residual evaluations used.
    """

    x: np.ndarray
    deviance: float
    converged: bool
    status: int
    message: str
    nfev: int


def solve(problem, x0, lower, upper, tolerance: float, fixed: dict | None = None,
          max_evaluations: int = MAX_EVALUATIONS) -> Solution:
    """Minimise ``sum problem.residuals(x)^2`` over ``lower <= x <= upper``.

    Args:
        problem: object with ``residuals_and_jacobian(x) -> (r (m,), jac (m, n))``.
        x0: starting point, shape (n,); clipped into the bounds.
        lower, upper: bounds of every parameter, shape (n,).
        tolerance: relative change of the parameters and of the objective below which the
            search stops (scipy's ``xtol`` and ``ftol``).
        fixed: {index: value} of parameters held fixed (profile likelihood); the others are
            fitted.
        max_evaluations: limit on residual evaluations.
    """
    x0 = np.asarray(x0, dtype=float)
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    template = x0.copy()
    fixed = fixed or {}
    for index, value in fixed.items():
        template[index] = value
    free = np.array([i for i in range(len(x0)) if i not in fixed], dtype=int)
    if free.size == 0:
        r, _ = problem.residuals_and_jacobian(template)
        return Solution(template, float(np.sum(r**2)), True, 1, "no free parameter", 1)

    last = {}

    def full(y):
        x = template.copy()
        x[free] = y
        return x

    def residuals(y):
        r, jac = problem.residuals_and_jacobian(full(y))
        last["y"], last["jac"] = np.array(y), jac
        return r

    def jacobian(y):
        if "y" not in last or not np.array_equal(last["y"], y):  # scipy asks at the last point
            residuals(y)
        return np.array(last["jac"][:, free])

    result = optimize.least_squares(
        residuals, np.clip(x0[free], lower[free], upper[free]), jac=jacobian, bounds=(lower[free], upper[free]),
        method="trf", x_scale=1.0, loss="linear", xtol=tolerance, ftol=tolerance, gtol=GRADIENT_TOLERANCE,
        max_nfev=max_evaluations,
    )
    return Solution(
        x=full(result.x), deviance=float(2.0 * result.cost), converged=bool(result.success),
        status=int(result.status), message=str(result.message), nfev=int(result.nfev),
    )
