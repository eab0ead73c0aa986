"""The main job, one way through: scan -> model ranking -> fit -> cross-check -> outputs.

Everything that can refuse the input (loading, options, identifiability) happens before the
first file is written; every file is written atomically.
"""
from __future__ import annotations

import sys
import warnings
from pathlib import Path

import numpy as np

import povmfit
from povmfit.models import parse_model_spec, povm_wigner

from povmfit.fitting.data.files import write_json
from povmfit.fitting.inference.candidates import candidate_models, family_compute_model
from povmfit.fitting.inference.compare import compare_models
from povmfit.fitting.outputs.datasheet import datasheet_document
from povmfit.fitting.data.detector_file import DetectorRecord, save_detector
from povmfit.fitting.inference.fit import FitNotConverged, check_identifiable, fit_scan
from povmfit.fitting.tomography.model_free import CROSS_CHECK_SIMULATIONS, ModelFreeJob, ranking_request, start_model_free
from povmfit.fitting.data.scan import load_scan
from povmfit.fitting.data.errors import ArgumentError

__all__ = ["run_fit_pipeline", "model_povm_with_errors"]


def _parse_model_option(text: str, option: str = "--model"):
    try:
        return parse_model_spec(text)
    except ValueError as error:
        raise ArgumentError(f"{option}: {error}") from None


def model_povm_with_errors(result, n_photons: int):
    """Model POVM theta[k, n] and its delta-method standard errors (combined covariance)."""
    theta, jac = result.povm_and_jacobian(n_photons)
    n_model = len(result.model.parameter_names)
    var = np.einsum("kni,ij,knj->kn", jac, result.covariance[:n_model, :n_model], jac)
    return theta, np.sqrt(np.clip(var, 0, None))


def _select_model(scan, args):
    if args.model != "auto":
        return _parse_model_option(args.model), None
    if args.candidates:
        candidates = [_parse_model_option(c, "--candidates") for c in args.candidates.split(",") if c.strip()]
    else:
        candidates = candidate_models(scan.n_outcomes)
    comparison = compare_models(
        scan, candidates, args.calibration_uncertainty, seed=args.seed, quiet=args.quiet or args.json
    )
    return comparison.chosen, comparison


def run_fit_pipeline(scan_path, out_dir: Path, args, model_free: ModelFreeJob | None = None, scan=None) -> dict:
    """Run fit (+ ranking, cross-check, report) and write every output. Returns a summary dict.

    ``model_free``: the reconstructions already started by :func:`start_model_free` (the
    command line starts them before importing this module); started here when absent.
    ``scan``: the scan already loaded from ``scan_path``, if it is.
    """
    if model_free is None:
        model_free = start_model_free(scan_path, args.seed, ranking=ranking_request(args))
    try:
        scan = scan if scan is not None else load_scan(scan_path)
        if args.model != "auto":  # refuse what can be refused before any work starts
            if args.candidates:
                raise ArgumentError("--candidates is only used with --model auto")
            check_identifiable(scan, _parse_model_option(args.model))
        elif args.candidates:
            for spec in args.candidates.split(","):
                _parse_model_option(spec, "--candidates")
        # the model-free reconstructions run in their own process meanwhile
        model, comparison, result = _rank_and_fit(scan, args)
        # the helper gets the fit, to simulate scans from it while the rest is prepared here
        parts = model_free.result(scan, result.predicted)
        cross = _cross_check_section(scan, result, parts, model_free)
    finally:
        model_free.cancel()

    options = {
        "model": args.model,
        "candidates": args.candidates,
        "calibration_uncertainty": args.calibration_uncertainty,
        "gate_duration_s": args.gate_duration,
        "weighting": args.weighting,
        "bootstrap": args.bootstrap,
        "seed": args.seed,
    }
    sheet = datasheet_document(
        scan, result, options=options, gate_duration_s=args.gate_duration,
        comparison=comparison.to_dict() if comparison else _single_row(result),
        verdict=comparison.verdict if comparison else f"{model.spec} fitted as requested (no model comparison).",
        cross_check=cross["summary"],
    )
    if comparison:
        sheet["likelihood_ratio_tests"] = comparison.tests
    record = DetectorRecord(
        model=model,
        parameters={n: result.values[n] for n in model.parameter_names},
        covariance=result.covariance[: len(model.parameter_names), : len(model.parameter_names)],
        gate_duration_s=args.gate_duration,
        provenance={
            "software": f"povmfit {povmfit.__version__}",
            "input_file": str(scan.source),
            "input_sha256": scan.sha256,
            "options": options,
        },
        bounds=model.bounds(),
    )

    out_dir = Path(out_dir)
    files = {}
    files["datasheet"] = out_dir / "datasheet.json"
    write_json(files["datasheet"], sheet)
    files["detector"] = out_dir / "detector.json"
    save_detector(record, files["detector"])
    files.update(cross["write"](out_dir))
    if not getattr(args, "no_report", False):
        from povmfit.fitting.outputs.report import write_report

        files.update(write_report(out_dir, scan, result, sheet, comparison, cross))
    return {"datasheet": sheet, "result": result, "comparison": comparison, "files": files}


def _rank_and_fit(scan, args):
    model, comparison = _select_model(scan, args)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", FitNotConverged)
        result = fit_scan(scan, model, args.calibration_uncertainty, args.weighting,
                          compute_model=family_compute_model(model) if comparison else None)
    for warning in caught:
        print(f"povmfit: warning: {warning.message}", file=sys.stderr)
    if args.bootstrap:
        from povmfit.fitting.inference.bootstrap import parametric_bootstrap

        boot = parametric_bootstrap(scan, result, args.bootstrap, args.seed, quiet=args.quiet or args.json)
        boot.pop("estimates")
        object.__setattr__(result, "bootstrap", boot)
    return model, comparison, result


def _single_row(result) -> list:
    k = len(result.model.parameter_names)
    return [{
        "model": result.model.spec, "parameters": k, "deviance": result.deviance, "dof": result.dof,
        "p_value": result.p_value, "aic": result.deviance + 2 * k, "bic": None,
        "delta_aic": 0.0, "delta_bic": 0.0, "weight": 1.0,
    }]


def _cross_check_section(scan, result, parts, model_free: ModelFreeJob) -> dict:
    """Compare the fit with the model-free reconstructions of the same scan; the
    reconstructions of scans simulated from the fit come from ``model_free``."""
    from povmfit.fitting.cli.reconstruct import povm_rows, wigner_rows, write_reconstruction_csvs
    from povmfit.fitting.tomography.cross_check import cross_check, model_pointwise_wigner

    coherent, thermal = scan.coherent_photons, scan.thermal_photons
    reconstruction, pointwise, smoothed = parts["reconstruction"], parts["pointwise"], parts["smoothed"]
    theta_model, theta_se = model_povm_with_errors(result, reconstruction.n_photons)
    # The Wigner values are compared through the pointwise estimator applied to the exact model.
    model_pointwise = None if pointwise is None else model_pointwise_wigner(theta_model, pointwise, coherent, thermal)
    # Under the model the reconstruction of the data is one draw from (theta_expected,
    # theta_spread); the fit's own parameter uncertainty is added in quadrature.
    theta_expected, theta_spread = model_free.under_model(scan, result.predicted, reconstruction)
    summary = cross_check(
        theta_expected, np.sqrt(theta_spread**2 + theta_se**2), reconstruction, pointwise,
        model_wigner=model_pointwise, reconstruction_stderr=np.zeros_like(reconstruction.stderr),
    )
    summary["povm_comparison"] = (
        f"reconstruction of the data against {CROSS_CHECK_SIMULATIONS} reconstructions of scans simulated from the "
        "fitted model (same probes, shots and regularisation)"
    )
    if parts["phase_test"] is not None:
        summary["phase_insensitivity"] = parts["phase_test"].to_dict()
    grid = smoothed.alpha if smoothed is not None else (pointwise.alpha if pointwise is not None else None)
    model_wigner = None if grid is None else np.asarray(povm_wigner(theta_model, np.asarray(grid)))

    def write(out_dir):
        extra = []
        if model_wigner is not None:
            extra = wigner_rows(grid, model_wigner, np.zeros_like(model_wigner), "model")
        return write_reconstruction_csvs(
            out_dir, reconstruction, pointwise, smoothed,
            model_rows=povm_rows(theta_model, theta_se, "model"), model_wigner_rows=extra,
        )

    return {
        "summary": summary,
        "reconstruction": reconstruction,
        "pointwise": pointwise,
        "smoothed": smoothed,
        "model_theta": theta_model,
        "model_stderr": theta_se,
        "model_wigner": model_wigner,
        "model_wigner_alpha": grid,
        "write": write,
    }
