"""Statistics of parametric detector models fitted to raw probe counts.

- ``objective``: predicted outcome probabilities, deviance residuals, Fisher information and
  ``FitProblem`` (the one residual function of a model on a scan);
- ``solver``: ``solve``, the one least-squares solver (scipy trust-region reflective) used
  by the fit, its profile-likelihood intervals and its bootstrap, with a ``Solution`` status;
- ``fit``: ``fit_scan`` (maximum likelihood, Fisher and profile intervals, calibration prior,
  optional bootstrap) -> ``FitResult`` (``result``);
- ``bootstrap``: seeded parametric bootstrap refits;
- ``candidates`` and ``compare``: candidate models and their ranking -> ``Comparison``.

Estimators print nothing; long jobs report through an optional ``progress(task, done,
total)`` callback.
"""
from povmfit.fitting.inference.bootstrap import parametric_bootstrap
from povmfit.fitting.inference.candidates import candidate_models, family_compute_model, ranking_order
from povmfit.fitting.inference.compare import ADEQUACY_LEVEL, Comparison, compare_models
from povmfit.fitting.inference.fit import CHI2_95, check_identifiable, fit_scan
from povmfit.fitting.inference.objective import FitProblem
from povmfit.fitting.inference.result import FitNotConverged, FitResult
from povmfit.fitting.inference.solver import Solution, solve

__all__ = [
    "fit_scan", "FitResult", "FitNotConverged", "check_identifiable", "CHI2_95",
    "compare_models", "Comparison", "candidate_models", "family_compute_model", "ranking_order", "ADEQUACY_LEVEL",
    "parametric_bootstrap", "FitProblem", "Solution", "solve",
]
