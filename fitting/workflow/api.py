"""The library's entry points for single tasks: fit a model, rank models, reconstruct model-free.

Each accepts what a user would pass (paths, spec strings, models) and returns a frozen
result object with ``summary()``, ``_repr_html_()``, ``to_dataframe()`` and ``to_dict()``.
The whole job on one scan is :func:`povmfit.characterise`.
"""
from __future__ import annotations

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.inference.candidates import family_compute_model
from povmfit.fitting.inference.compare import Comparison, compare_models
from povmfit.fitting.inference.fit import FitResult, check_identifiable, fit_scan
from povmfit.fitting.data.arguments import as_calibration_uncertainty, as_model, as_models, as_scan

__all__ = ["fit", "compare", "reconstruct", "rank_and_fit"]

_WEIGHTINGS = ("deviance", "pearson")


def fit(scan, model="auto", calibration_uncertainty=None, *, candidates=None, weighting: str = "deviance",
        bootstrap: int = 0, seed: int = 0, progress=None) -> FitResult:
    """Fit a detector model to a scan's raw counts by maximum likelihood.

    Args:
        scan: a Scan or the path of a scan file.
        model: "auto" (rank the candidates, fit the chosen one), a model spec or a DetectorModel.
        calibration_uncertainty: relative 1-sigma width of the probe photon numbers; None or 0
            take the probes as exact (the efficiency then excludes the calibration part).
        candidates: with "auto", the specs or models to rank instead of the default set.
        weighting: "deviance" (maximum likelihood) or "pearson".
        bootstrap: parametric-bootstrap resamples (0: none); seed: their seed and the
            cross-validation folds'.
        progress: optional callback ``progress(task, done, total)``.
    """
    return rank_and_fit(scan, model, calibration_uncertainty, candidates=candidates, weighting=weighting,
                        bootstrap=bootstrap, seed=seed, progress=progress)[1]


def compare(scan, candidates=None, calibration_uncertainty=None, *, cv_folds: int = 5, cv_top: int = 3,
            seed: int = 0, progress=None) -> Comparison:
    """Fit every candidate model (default: all that match the scan's outcomes) and rank them
    (AIC, BIC, goodness of fit, likelihood-ratio tests, and ``cv_folds``-fold held-out-probe
    cross-validation of up to ``cv_top`` leading candidates)."""
    scan = as_scan(scan)
    return compare_models(scan, as_models(candidates), as_calibration_uncertainty(calibration_uncertainty),
                          cv_folds=cv_folds, cv_top=cv_top, seed=_seed(seed), progress=progress)


def reconstruct(scan, *, bootstrap=None, seed: int = 0, saturation=None, progress=None):
    """Model-free reconstructions of a scan (a ``ScanReconstruction``): the diagonal POVM
    (regularised least squares, strength by cross-validation) and the pointwise and smoothed
    Wigner values; ``bootstrap`` resamples (default as in the fit's cross-check) give their
    standard errors; ``saturation`` fixes M of the smoothed Wigner curve."""
    from povmfit.fitting.tomography.model_free import RECONSTRUCTION_BOOTSTRAP, reconstruct_scan

    bootstrap = RECONSTRUCTION_BOOTSTRAP if bootstrap is None else bootstrap
    return reconstruct_scan(as_scan(scan), bootstrap=bootstrap, seed=seed, saturation=saturation, progress=progress)


def rank_and_fit(scan, model="auto", calibration_uncertainty=None, *, candidates=None, weighting="deviance",
                 bootstrap=0, seed=0, progress=None) -> tuple[Comparison | None, FitResult]:
    """(comparison or None, fit of the chosen model); see :func:`fit`."""
    scan = as_scan(scan)
    calibration_uncertainty = as_calibration_uncertainty(calibration_uncertainty)
    if weighting not in _WEIGHTINGS:
        raise ArgumentError(f"weighting: expected one of {', '.join(_WEIGHTINGS)}, got {weighting!r}")
    bootstrap, seed = _count(bootstrap, "bootstrap"), _seed(seed)
    comparison = None
    if isinstance(model, str) and model.strip().lower() == "auto":
        comparison = compare_models(scan, as_models(candidates), calibration_uncertainty, seed=seed, progress=progress)
        chosen, compute = comparison.chosen, family_compute_model(comparison.chosen)
    else:
        if candidates is not None:
            raise ArgumentError("candidates: only used with model='auto'")
        chosen, compute = as_model(model), None
        check_identifiable(scan, chosen)
    result = fit_scan(scan, chosen, calibration_uncertainty, weighting, compute_model=compute,
                      bootstrap=bootstrap, seed=seed, progress=progress)
    return comparison, result


def _count(value, argument: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ArgumentError(f"{argument}: expected a whole number >= 0, got {value!r}")
    return value


def _seed(value) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ArgumentError(f"seed: expected a whole number >= 0, got {value!r}")
    return value
