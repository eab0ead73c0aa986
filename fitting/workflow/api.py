"""The library's entry points for single tasks: fit a model, rank models, reconstruct model-free.

Each accepts what a user would pass (paths, spec strings, models) and returns a frozen
result object with ``summary()``, ``_repr_html_()``, ``to_dataframe()`` and ``to_dict()``.
The whole job on one scan is :func:`povmfit.characterise`.

``readout=`` (a ``readout.json`` path or an array M[k, m]) puts a fixed, known readout matrix
after the model's registered-photon POVM (``DetectorModel.fixed_readout``): the fit, its
figures and everything built on it use the observed POVM M @ theta.
"""
from __future__ import annotations

from povmfit.models import DetectorModel, parse_model_spec

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.inference.compare import Comparison, compare_models, shared_compute_model
from povmfit.fitting.inference.fit import FitResult, check_identifiable, fit_scan
from povmfit.fitting.data.arguments import as_calibration_uncertainty, as_model, as_models, as_scan
from povmfit.fitting.tally.readout import check_readout_outcomes, resolve_readout

__all__ = ["fit", "compare", "reconstruct", "rank_and_fit", "readout_for_scan", "model_with_readout"]

_WEIGHTINGS = ("deviance", "pearson")


def fit(scan, model="auto", calibration_uncertainty=None, *, candidates=None, weighting: str = "deviance",
        bootstrap: int = 0, seed: int = 0, readout=None, progress=None) -> FitResult:
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
        readout: None, the path of a ``readout.json`` (``povmfit tally pulse-heights``) or an
            array M[k, m] = P(outcome k | m registered), rows = the scan's outcomes: a fixed
            readout stage after the model (with "auto", after every candidate without the
            readout feature; those with it are ranked alongside, without the matrix).
        progress: optional callback ``progress(task, done, total)``.
    """
    return rank_and_fit(scan, model, calibration_uncertainty, candidates=candidates, weighting=weighting,
                        bootstrap=bootstrap, seed=seed, readout=readout, progress=progress)[1]


def compare(scan, candidates=None, calibration_uncertainty=None, *, cv_folds: int = 5, cv_top: int = 3,
            seed: int = 0, readout=None, progress=None) -> Comparison:
    """Fit every candidate model (default: all that match the scan's outcomes) and rank them
    (AIC, BIC, goodness of fit, likelihood-ratio tests, and ``cv_folds``-fold held-out-probe
    cross-validation of up to ``cv_top`` leading candidates); ``readout`` as in :func:`fit`."""
    scan = as_scan(scan)
    matrix, _ = readout_for_scan(readout, scan)
    return compare_models(scan, as_models(candidates), as_calibration_uncertainty(calibration_uncertainty),
                          cv_folds=cv_folds, cv_top=cv_top, seed=_seed(seed), progress=progress, fixed_readout=matrix)


def readout_for_scan(readout, scan):
    """(matrix M[k, m] or None, provenance record) of a ``readout=`` argument, refused with one
    line naming the file and both counts when its rows are not the scan's outcomes."""
    matrix, record = resolve_readout(readout)
    if matrix is not None:
        name = record["file"] if isinstance(record, dict) else "readout"
        check_readout_outcomes(matrix, scan.n_outcomes, name, str(scan.source), from_file=isinstance(record, dict))
    return matrix, record


def model_with_readout(model, matrix, argument: str = "model") -> DetectorModel:
    """``model`` (a spec or a DetectorModel) with the fixed readout ``matrix`` after it (None:
    the model as given); a spec may then show ``+fixed_readout``."""
    if matrix is None:
        return as_model(model, argument)
    try:
        if isinstance(model, str):
            return parse_model_spec(model, fixed_readout=matrix)
        return as_model(model, argument).with_fixed_readout(matrix)
    except ValueError as error:
        raise ArgumentError(f"{argument}: {error}") from None


def reconstruct(scan, *, bootstrap=None, seed: int = 0, saturation=None, method: str | None = None, progress=None):
    """Model-free reconstructions of a scan (a ``ScanReconstruction``): the diagonal POVM
    (``method`` "likelihood", the default: multinomial maximum likelihood, or
    "least_squares"; smoothness penalty chosen by cross-validation) and the pointwise and smoothed Wigner
    values; ``bootstrap`` resamples (default as in the fit's cross-check) give their standard
    errors; ``saturation`` fixes M of the smoothed Wigner curve."""
    from povmfit.fitting.tomography.model_free import POVM_METHOD, RECONSTRUCTION_BOOTSTRAP, reconstruct_scan

    bootstrap = RECONSTRUCTION_BOOTSTRAP if bootstrap is None else bootstrap
    return reconstruct_scan(as_scan(scan), bootstrap=bootstrap, seed=seed, saturation=saturation, progress=progress,
                            method=POVM_METHOD if method is None else method)


def rank_and_fit(scan, model="auto", calibration_uncertainty=None, *, candidates=None, weighting="deviance",
                 bootstrap=0, seed=0, readout=None, progress=None) -> tuple[Comparison | None, FitResult]:
    """(comparison or None, fit of the chosen model); see :func:`fit`."""
    scan = as_scan(scan)
    calibration_uncertainty = as_calibration_uncertainty(calibration_uncertainty)
    if weighting not in _WEIGHTINGS:
        raise ArgumentError(f"weighting: expected one of {', '.join(_WEIGHTINGS)}, got {weighting!r}")
    bootstrap, seed = _count(bootstrap, "bootstrap"), _seed(seed)
    matrix, _ = readout_for_scan(readout, scan)
    comparison = None
    if isinstance(model, str) and model.strip().lower() == "auto":
        comparison = compare_models(scan, as_models(candidates), calibration_uncertainty, seed=seed, progress=progress,
                                    fixed_readout=matrix)
        chosen, compute = comparison.chosen, shared_compute_model(comparison.chosen)
    else:
        if candidates is not None:
            raise ArgumentError("candidates: only used with model='auto'")
        chosen, compute = model_with_readout(model, matrix), None
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
