"""The whole job on one scan: model ranking, fit, model-free reconstructions, cross-check.

Data flow: scan -> ranking and fit of the chosen model (``inference``) -> reconstructions of
the scan and of scans simulated from the fit (``tomography``) -> cross-check -> datasheet,
detector file, tables and report (``outputs``). The model-free POVM does not depend on the
fit, so with ``n_jobs >= 2`` it runs in a worker process (``concurrent.futures``) while this
process ranks and fits the models; the outputs never depend on where a part was computed
(same functions, same seeds).
"""
from __future__ import annotations

from contextlib import nullcontext
from os import PathLike
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import povmfit
from povmfit.fitting.data.detector_file import DetectorRecord
from povmfit.fitting.data.errors import ArgumentError, NotIdentifiable
from povmfit.fitting.data.metadata import metadata_for_scan
from povmfit.fitting.data.scan import Scan
from povmfit.fitting.display import format_uncertain, html_block, html_table, text_table
from povmfit.fitting.inference.compare import Comparison
from povmfit.fitting.inference.fit import FitResult
from povmfit.fitting.tomography.scan_reconstruction import ScanReconstruction
from povmfit.fitting.inference.fit import check_identifiable
from povmfit.fitting.data.arguments import as_models, as_scan
from povmfit.fitting.workflow.worker import report_to_parent, submit, worker_pool

__all__ = ["characterise", "Characterisation"]


@dataclass(frozen=True)
class Characterisation:
    """Result of :func:`characterise`.

    Attributes:
        scan: the :class:`~povmfit.fitting.data.scan.Scan` analysed.
        fit: :class:`~povmfit.fitting.inference.fit.FitResult` of the chosen model.
        comparison: :class:`~povmfit.fitting.inference.compare.Comparison` of the candidates,
            or None when the model was given.
        model_free: the model-free reconstructions of the scan (``tomography``
            ``ScanReconstruction``: the POVM, the pointwise and smoothed Wigner values, the
            phase-insensitivity test), exactly what :func:`povmfit.reconstruct` gives.
        model_theta, model_stderr: (n_outcomes, n_photons) fitted POVM and its delta-method
            standard errors, on the reconstruction's photon numbers or more (as many as the
            report's model curves need).
        model_wigner_alpha, model_wigner: displacements (complex amplitude alpha) and the
            fitted model's Wigner values there, (n_outcomes, n_points); None without points.
        model_pointwise_wigner: the pointwise Wigner estimator applied to the fitted model's
            exact probabilities, (n_outcomes, n_points) at ``model_free.pointwise.alpha``:
            what the cross-check compares the data's pointwise values with; None without points.
        cross_check: JSON-able comparison of the fit with the reconstructions (see
            ``tomography.cross_check``), with its verdict.
        options: the analysis options (calibration_uncertainty, gate_duration_s, weighting,
            bootstrap, seed, model, candidates, readout), as recorded in the provenance.
        metadata: conditions and identity of the measurement (device, serial, wavelength_nm,
            temperature_k, bias_current_ua, ...; see ``data.metadata``), from the scan's
            sidecar file and the ``metadata`` argument.
    """

    scan: Scan
    fit: FitResult
    comparison: Comparison | None
    model_free: ScanReconstruction
    model_theta: np.ndarray
    model_stderr: np.ndarray
    model_wigner_alpha: np.ndarray | None
    model_wigner: np.ndarray | None
    model_pointwise_wigner: np.ndarray | None
    cross_check: dict
    options: dict
    metadata: dict

    @property
    def reconstruction(self):
        """The model-free POVM (``model_free.reconstruction``)."""
        return self.model_free.reconstruction

    @property
    def model(self):
        """The chosen DetectorModel."""
        return self.fit.model

    @property
    def verdict(self) -> str:
        if self.comparison is not None:
            return self.comparison.verdict
        return f"{self.model.spec} fitted as requested (no model comparison)."

    def datasheet(self) -> dict:
        """The ``povmfit.datasheet/1`` document (plain JSON-able data)."""
        from povmfit.fitting.outputs.datasheet import datasheet_document

        sheet = datasheet_document(
            self.scan, self.fit, options=self.options, gate_duration_s=self.options["gate_duration_s"],
            comparison=self.comparison.rows() if self.comparison else _single_row(self.fit),
            verdict=self.verdict, cross_check=self.cross_check, conditions=self.metadata,
        )
        if self.comparison is not None:
            sheet["likelihood_ratio_tests"] = self.comparison.tests
        return sheet

    def detector(self) -> DetectorRecord:
        """The fitted detector as stored in ``detector.json`` (input of the emulator)."""
        return self.fit.to_detector(
            gate_duration_s=self.options["gate_duration_s"],
            provenance={"software": f"povmfit {povmfit.__version__}", "input_file": str(self.scan.source),
                        "input_sha256": self.scan.sha256, "options": self.options, "metadata": self.metadata},
        )

    def write(self, out_dir, report: bool = True, overwrite: bool = False) -> dict:
        """Write datasheet.json, detector.json, povm.csv, wigner.csv and (with ``report``)
        report.html with plots/ into ``out_dir`` as one set (written beside it, then renamed
        into place); returns {name: Path}. An ``out_dir`` that already holds files is refused
        (OutputError) unless ``overwrite``, which replaces the whole folder."""
        from povmfit.fitting.outputs.files import write_characterisation

        return write_characterisation(self, Path(out_dir), report=report, overwrite=overwrite)

    def figures(self) -> dict:
        return self.datasheet()["figures"]

    def summary(self) -> str:
        """Plain text: model, verdict, figures with uncertainties, fit quality, cross-check."""
        sheet = self.datasheet()
        rows = [[name, format_uncertain(f["value"], f["stderr"]), f"[{f['ci95'][0]:.4g}, {f['ci95'][1]:.4g}]"]
                for name, f in sheet["figures"].items()]
        gof = sheet["goodness_of_fit"]
        lines = [f"model        {self.model.spec}", f"verdict      {self.verdict}", "",
                 text_table(["figure", "value ± stderr", "95 % interval"], rows), "",
                 f"fit quality  deviance {gof['deviance']:.1f} on {gof['dof']} dof, p = {gof['p_value']:.3g}",
                 f"cross-check  {self.cross_check.get('verdict', 'n/a')}"]
        note = sheet["calibration"].get("note")
        return "\n".join(lines + ([f"note: {note}"] if note else []))

    def _repr_html_(self) -> str:
        sheet = self.datasheet()
        rows = [[name, format_uncertain(f["value"], f["stderr"]), f"[{f['ci95'][0]:.4g}, {f['ci95'][1]:.4g}]"]
                for name, f in sheet["figures"].items()]
        return html_block(f"Characterisation of {self.scan.source}: {self.model.spec}",
                          [self.verdict, f"cross-check: {self.cross_check.get('verdict', 'n/a')}"],
                          [html_table(["figure", "value ± stderr", "95 % interval"], rows)])

    def to_dataframe(self):
        """The figures as a pandas DataFrame: one row per figure (value, stderr, ci95_lo, ci95_hi)."""
        import pandas as pd

        figures = self.datasheet()["figures"]
        return pd.DataFrame(
            [{"figure": name, "value": f["value"], "stderr": f["stderr"], "ci95_lo": f["ci95"][0], "ci95_hi": f["ci95"][1]}
             for name, f in figures.items()]
        ).set_index("figure")

    def to_dict(self) -> dict:
        """The datasheet document (JSON-able)."""
        return self.datasheet()


def characterise(scan, model="auto", *, candidates=None, calibration_uncertainty=None, gate_duration=None,
                 weighting: str = "deviance", bootstrap: int = 0, seed: int = 0, n_jobs: int = 1,
                 metadata: dict | None = None, readout=None, progress=None, worker=None) -> Characterisation:
    """Characterise a detector from one scan: rank the candidate models (``model="auto"``) or
    fit the given one, reconstruct the POVM and the Wigner values model-free, cross-check.

    Args:
        scan: a :class:`Scan`, or the path of a scan file (CSV or Parquet).
        model: "auto", a model spec such as ``"array:8+dark+crosstalk"``, or a DetectorModel.
        candidates: with ``model="auto"``: specs or models to rank instead of the default set.
        calibration_uncertainty: relative 1-sigma uncertainty of the probe photon numbers
            (None or 0: probes taken as exact).
        gate_duration: gate or counting-window duration in seconds (dark count rate).
        weighting: "deviance" (maximum likelihood) or "pearson".
        bootstrap: parametric-bootstrap resamples of the fit (0: none).
        seed: seeds the cross-validation folds and every bootstrap and simulation.
        n_jobs: processes to use; 1 computes everything here, >= 2 (or -1: all cores)
            computes the model-free POVM in one worker process beside the ranking.
        metadata: conditions of the measurement ({"wavelength_nm": 1550, "device": ...});
            a sidecar ``SCAN.meta.json``/``.toml`` beside a scan file is read first.
        readout: None, a ``readout.json`` path or an array M[k, m]: a fixed readout stage after
            the model (see :func:`povmfit.fit`); the options record its file name and SHA-256
            (or "array").
        progress: optional callback ``progress(task, done, total)``.
        worker: a pool from :func:`povmfit.fitting.workflow.worker.worker_pool` that is
            already running, used instead of ``n_jobs`` (the command line starts it before its
            own imports); left running.
    """
    from povmfit.fitting.workflow.api import model_with_readout, rank_and_fit, readout_for_scan

    conditions = metadata_for_scan(scan if isinstance(scan, (str, PathLike)) else _source_file(scan), metadata)
    scan = as_scan(scan)
    readout_matrix, readout_record = readout_for_scan(readout, scan)
    options = _options(model, candidates, calibration_uncertainty, gate_duration, weighting, bootstrap, seed)
    options["readout"] = readout_record
    # refuse what can be refused before any work starts
    if scan.n_probes < 2:
        raise NotIdentifiable(f"{scan.source}: the model-free cross-check needs two or more probes, the scan has "
                              f"{scan.n_probes} (fit one model with povmfit.fit instead)")
    if not (isinstance(model, str) and model.strip().lower() == "auto"):
        check_identifiable(scan, model_with_readout(model, readout_matrix))
    as_models(candidates)
    from povmfit.fitting.tomography.model_free import (
        CROSS_CHECK_SIMULATIONS, RECONSTRUCTION_BOOTSTRAP, UnderModel, povm_reconstruction,
        reconstructions_under_model, wigner_reconstructions,
    )

    with worker_pool(n_jobs, progress) if worker is None else nullcontext(worker) as pool:
        povm_future = submit(pool, povm_reconstruction, scan, seed, RECONSTRUCTION_BOOTSTRAP,
                             progress if pool is None else report_to_parent)
        comparison, result = rank_and_fit(scan, model, calibration_uncertainty, candidates=candidates,
                                          weighting=weighting, bootstrap=bootstrap, seed=seed,
                                          readout=readout_matrix, progress=progress)
        wigner = wigner_reconstructions(scan, seed, RECONSTRUCTION_BOOTSTRAP, progress=progress)
        reconstruction = povm_future.result()
        # the simulated scans of the cross-check, half in the worker and half here
        half = CROSS_CHECK_SIMULATIONS // 2
        remote = submit(pool, reconstructions_under_model, scan, result.predicted, reconstruction, seed, half)
        parts = _model_side(scan, result, reconstruction, wigner)
        local = reconstructions_under_model(scan, result.predicted, reconstruction, seed,
                                            CROSS_CHECK_SIMULATIONS - half, half)
        under_model = UnderModel.joined([remote.result(), local])
        expected, spread = under_model
    from povmfit.fitting.tomography.cross_check import cross_check

    # Under the model the reconstruction of the data is one draw from (expected, spread); the
    # fit's own parameter uncertainty is added in quadrature.
    # The POVM p-value is calibrated on the simulated reconstructions themselves.
    summary = cross_check(
        expected, np.sqrt(spread**2 + parts["model_stderr"][:, : reconstruction.n_photons] ** 2), reconstruction, wigner["pointwise"],
        model_wigner=parts["model_pointwise"], reconstruction_stderr=np.zeros_like(reconstruction.stderr),
        null_draws=under_model.draws,
    )
    summary["povm_comparison"] = (
        f"reconstruction of the data ({reconstruction.method.replace('_', ' ')}) against {CROSS_CHECK_SIMULATIONS} "
        "reconstructions of scans simulated from the fitted model (same probes, shots, estimator and regularisation); "
        "p-value from the distribution of the statistic over those simulations"
    )
    if wigner["phase_test"] is not None:
        summary["phase_insensitivity"] = wigner["phase_test"].to_dict()
    return Characterisation(
        scan=scan, fit=result, comparison=comparison,
        model_free=ScanReconstruction.from_parts(scan, reconstruction, wigner),
        model_theta=parts["model_theta"], model_stderr=parts["model_stderr"],
        model_wigner_alpha=parts["alpha"], model_wigner=parts["model_wigner"],
        model_pointwise_wigner=parts["model_pointwise"], cross_check=summary, options=options,
        metadata=conditions,
    )


def _source_file(scan):
    """The file a Scan was loaded from, when it still exists (for its metadata sidecar)."""
    source = Path(getattr(scan, "source", ""))
    return source if getattr(scan, "sha256", None) and source.is_file() else None


def _options(model, candidates, calibration_uncertainty, gate_duration, weighting, bootstrap, seed) -> dict:
    if gate_duration is not None and not gate_duration > 0:
        raise ArgumentError(f"gate_duration: expected a positive number of seconds, got {gate_duration}")
    return {
        "model": model if isinstance(model, str) else getattr(model, "spec", str(model)),
        "candidates": None if candidates is None else [getattr(c, "spec", c) for c in candidates],
        "calibration_uncertainty": calibration_uncertainty,
        "gate_duration_s": gate_duration,
        "weighting": weighting,
        "bootstrap": bootstrap,
        "seed": seed,
    }


def _model_side(scan, result, reconstruction, wigner) -> dict:
    """The fitted model where the reconstructions look: its POVM with errors, the pointwise
    estimator applied to its exact probabilities, and its Wigner values at the points."""
    from povmfit.fitting.tomography.cross_check import model_pointwise_wigner
    from povmfit.models import povm_wigner

    from povmfit.fitting.outputs.report import curve_cutoff

    # one evaluation of the fitted POVM serves the cross-check and the report's curves (its
    # columns do not depend on the cutoff); at the fit's own cutoff or more, so that the
    # program compiled for the datasheet figures serves here too
    wide, stderr = result.povm_with_errors(max(reconstruction.n_photons, curve_cutoff(scan, result), result.n_photons))
    theta = wide[:, : reconstruction.n_photons]
    pointwise, smoothed = wigner["pointwise"], wigner["smoothed"]
    model_pointwise = None if pointwise is None else model_pointwise_wigner(
        theta, pointwise, scan.coherent_photons, scan.thermal_photons)
    alpha = smoothed.alpha if smoothed is not None else (pointwise.alpha if pointwise is not None else None)
    model_wigner = None if alpha is None else np.asarray(povm_wigner(theta, np.asarray(alpha)))
    return {"model_theta": wide, "model_stderr": stderr, "model_pointwise": model_pointwise,
            "alpha": alpha, "model_wigner": model_wigner}


def _single_row(result) -> list:
    k = len(result.model.parameter_names)
    return [{
        "model": result.model.spec, "parameters": k, "deviance": result.deviance, "dof": result.dof,
        "p_value": result.p_value, "aic": result.deviance + 2 * k, "bic": None,
        "delta_aic": 0.0, "delta_bic": 0.0, "weight": 1.0,
    }]
