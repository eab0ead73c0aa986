"""The one least-squares solver of the fitter: the fit, the profile-likelihood intervals and
the bootstrap refits all go through :func:`solve`.

``solve`` runs scipy's trust-region-reflective least squares (``method="trf"``, linear loss,
``x_scale=1``) on a problem's residuals and exact Jacobian, inside box bounds, with some
parameters optionally held fixed, and returns a small :class:`Solution` with the optimiser's
status. A *problem* is any object with ``residuals_and_jacobian(x) -> (r, dr/dx)`` over the
full parameter vector ``x``; the objective is ``sum r^2`` (the deviance, see ``objective``).

Non-finite objective: scipy's search is not defined for NaN or infinite residuals (its
linear algebra may fail or loop on them), so no such value ever reaches it. The first
evaluation whose residuals (or, where scipy asks for it, Jacobian) hold a NaN or an
infinity stops the search; the :class:`Solution` is then not converged, has status
:data:`NON_FINITE` and a one-line message saying where it happened, and holds the point of
lowest finite deviance seen so far (the starting point with an infinite deviance when no
evaluation was finite). A fit stopped this way is reported like any other non-converged fit.
(scipy's own handling, shrinking the trust region after a non-finite trial point, can end
in a "converged" status against the edge of the non-finite region rather than at a minimum;
a non-finite value in a valid parameter box is a numerical fault, so it is reported.)
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

__all__ = ["Solution", "solve", "GRADIENT_TOLERANCE", "MAX_EVALUATIONS", "NON_FINITE"]

GRADIENT_TOLERANCE = 1e-10  # scipy's gtol: scaled gradient norm at which the search stops
MAX_EVALUATIONS = 4000  # residual evaluations before the search gives up (status 0)
NON_FINITE = -2  # status of a search stopped by a NaN or infinite residual or Jacobian entry


@dataclass(frozen=True)
class Solution:
    """Outcome of :func:`solve`.

    Attributes:
        x: the full parameter vector at the end (fixed entries at their given values).
        deviance: sum of squared residuals at ``x`` (infinite only when no evaluation gave
            finite residuals).
        converged: True when a tolerance was met (scipy status > 0).
        status: scipy's status code: 1 gradient, 2 objective change, 3 step size, 4 both of
            2 and 3; 0 evaluation limit reached; -1 bad input; :data:`NON_FINITE` (-2) the
            objective or its Jacobian was not finite (see the module docstring).
        message: scipy's sentence for the status, or where the objective was not finite.
        nfev: residual evaluations used.
    """

    x: np.ndarray
    deviance: float
    converged: bool
    status: int
    message: str
    nfev: int


class _NotFinite(Exception):
    """Raised inside the search to stop it at a non-finite evaluation (never escapes solve)."""

    def __init__(self, what: str, x: np.ndarray):
        super().__init__(what)
        self.what, self.x = what, x


def _describe_point(problem, x: np.ndarray) -> str:
    """``name=value, ...`` of a parameter vector (names from ``problem.names`` if it has them)."""
    names = getattr(problem, "names", None)
    if names is None or len(names) != len(x):
        names = [f"x[{i}]" for i in range(len(x))]
    return ", ".join(f"{name}={value:.6g}" for name, value in zip(names, x))


def _not_finite_message(problem, stop: _NotFinite, nfev: int, finite_found: bool) -> str:
    where = _describe_point(problem, stop.x)
    kept = ("the point of lowest finite deviance found is kept" if finite_found
            else "no evaluation was finite, the starting point is kept")
    return f"stopped after {nfev} evaluations: the {stop.what} is not finite (NaN or infinity) at {where}; {kept}"


def solve(problem, x0, lower, upper, tolerance: float, fixed: dict | None = None,
          max_evaluations: int = MAX_EVALUATIONS) -> Solution:
    """Minimise ``sum problem.residuals(x)^2`` over ``lower <= x <= upper``.

    Args:
        problem: object with ``residuals_and_jacobian(x) -> (r (m,), jac (m, n))``; an
            optional ``names`` (one per parameter) labels the message of a non-finite stop.
        x0: starting point, shape (n,); clipped into the bounds.
        lower, upper: bounds of every parameter, shape (n,).
        tolerance: relative change of the parameters and of the objective below which the
            search stops (scipy's ``xtol`` and ``ftol``).
        fixed: {index: value} of parameters held fixed (profile likelihood); the others are
            fitted.
        max_evaluations: limit on residual evaluations.

    Returns:
        a :class:`Solution`; a NaN or infinite residual or Jacobian entry gives a
        non-converged one with status :data:`NON_FINITE` (nothing is raised).
    """
    x0 = np.asarray(x0, dtype=float)
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    template = x0.copy()
    fixed = fixed or {}
    for index, value in fixed.items():
        template[index] = value
    free = np.array([i for i in range(len(x0)) if i not in fixed], dtype=int)
    start = template.copy()
    start[free] = np.clip(x0[free], lower[free], upper[free])
    last, best, calls = {}, {"x": start, "deviance": np.inf}, [0]

    def full(y):
        x = template.copy()
        x[free] = y
        return x

    def residuals(y):
        x = full(y)
        calls[0] += 1
        r, jac = problem.residuals_and_jacobian(x)
        r = np.asarray(r, dtype=float)
        if not np.all(np.isfinite(r)):
            raise _NotFinite("objective", x)
        deviance = float(np.sum(r**2))
        if not np.isfinite(deviance):  # finite residuals whose squares overflow
            raise _NotFinite("objective", x)
        if deviance < best["deviance"]:
            best.update(x=x, deviance=deviance)
        last["y"], last["jac"] = np.array(y), jac
        return r

    def jacobian(y):
        if "y" not in last or not np.array_equal(last["y"], y):  # scipy asks at the last point
            residuals(y)
        jac = np.asarray(last["jac"], dtype=float)[:, free]  # a copy (integer indexing)
        if not np.all(np.isfinite(jac)):
            raise _NotFinite("Jacobian of the objective", full(y))
        return jac

    if free.size == 0:
        try:
            residuals(start[free])
        except _NotFinite as stop:
            return Solution(start, np.inf, False, NON_FINITE, _not_finite_message(problem, stop, 1, False), 1)
        return Solution(start, best["deviance"], True, 1, "no free parameter", 1)

    try:
        result = optimize.least_squares(
            residuals, start[free], jac=jacobian, bounds=(lower[free], upper[free]),
            method="trf", x_scale=1.0, loss="linear", xtol=tolerance, ftol=tolerance, gtol=GRADIENT_TOLERANCE,
            max_nfev=max_evaluations,
        )
    except _NotFinite as stop:
        message = _not_finite_message(problem, stop, calls[0], np.isfinite(best["deviance"]))
        return Solution(best["x"], float(best["deviance"]), False, NON_FINITE, message, calls[0])
    return Solution(
        x=full(result.x), deviance=float(2.0 * result.cost), converged=bool(result.success),
        status=int(result.status), message=str(result.message), nfev=int(result.nfev),
    )
