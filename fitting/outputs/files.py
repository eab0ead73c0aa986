"""Every output of the whole job, written into one folder (each file atomically)."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from povmfit.fitting.data.detector_file import save_detector
from povmfit.fitting.data.files import write_json

__all__ = ["write_characterisation"]


def write_characterisation(result, out_dir: Path, report: bool = True) -> dict:
    """Write datasheet.json, detector.json, povm.csv, wigner.csv and, with ``report``,
    report.html and plots/ for a ``Characterisation``; returns {name: Path}."""
    from povmfit.fitting.outputs.tables import povm_rows, wigner_rows, write_reconstruction_csvs

    out_dir = Path(out_dir)
    sheet = result.datasheet()
    files = {"datasheet": out_dir / "datasheet.json", "detector": out_dir / "detector.json"}
    write_json(files["datasheet"], sheet)
    save_detector(result.detector(), files["detector"])
    model_free = result.model_free
    n = model_free.reconstruction.n_photons
    model_wigner_rows = []
    if result.model_wigner is not None:
        model_wigner_rows = wigner_rows(result.model_wigner_alpha, result.model_wigner,
                                        np.zeros_like(result.model_wigner), "model")
    files.update(write_reconstruction_csvs(
        out_dir, model_free.reconstruction, model_free.pointwise, model_free.smoothed,
        model_rows=povm_rows(result.model_theta[:, :n], result.model_stderr[:, :n], "model"),
        model_wigner_rows=model_wigner_rows,
    ))
    if report:
        from povmfit.fitting.outputs.report import write_report

        cross = {"summary": result.cross_check, "reconstruction": model_free.reconstruction,
                 "pointwise": model_free.pointwise, "smoothed": model_free.smoothed, "model_theta": result.model_theta[:, :n],
                 "model_stderr": result.model_stderr[:, :n], "curve_theta": result.model_theta}
        files.update(write_report(out_dir, result.scan, result.fit, sheet, result.comparison, cross))
    return files
