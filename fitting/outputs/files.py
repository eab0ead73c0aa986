"""Every output of the whole job, written as one set: into a temporary sibling folder that is
renamed into place when complete (``data.files.output_set``)."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from povmfit.fitting.data.detector_file import save_detector
from povmfit.fitting.data.files import atomic_write_text, output_set, write_json
from povmfit.fitting.outputs.figure_tables import figure_tables

__all__ = ["write_characterisation"]


def write_characterisation(result, out_dir: Path, report: bool = True, overwrite: bool = False,
                           extra_files: dict | None = None) -> dict:
    """Write datasheet.json, detector.json, povm.csv, wigner.csv and, with ``report``,
    report.html and plots/ for a ``Characterisation`` as one set; returns {name: Path}.

    ``out_dir`` must be absent or an empty folder unless ``overwrite``, which replaces the whole
    folder (OutputError otherwise). ``extra_files`` ({file name: source path}) are copied into
    the set too (the demo's scan).
    """
    out_dir = Path(out_dir)
    with output_set(out_dir, overwrite) as staging:
        files = _write_all(result, staging, report)
        for name, source in (extra_files or {}).items():
            target = staging / name
            target.write_bytes(Path(source).read_bytes())
            files[Path(name).stem] = target
    return {name: out_dir / Path(path).relative_to(staging) for name, path in files.items()}


def _write_all(result, out_dir: Path, report: bool) -> dict:
    from povmfit.fitting.outputs.tables import povm_rows, wigner_rows, write_reconstruction_csvs

    sheet = result.datasheet()
    files = {"datasheet": out_dir / "datasheet.json", "detector": out_dir / "detector.json"}
    write_json(files["datasheet"], sheet)
    for name, text in figure_tables(sheet).items():
        files[name.replace(".", "_")] = out_dir / name
        atomic_write_text(out_dir / name, text)
    save_detector(_with_constrained_photons(result.detector(), result.scan), files["detector"])
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
                 "model_stderr": result.model_stderr[:, :n], "curve_theta": result.model_theta,
                 "model_pointwise": result.model_pointwise_wigner}
        files.update(write_report(out_dir, result.scan, result.fit, sheet, result.comparison, cross))
    return files


CONSTRAINED_TAIL = 1e-6
"""A photon number counts as constrained by the scan while some probe puts more than this
much of its mass at or above it."""


def _with_constrained_photons(record, scan):
    """The detector record with ``provenance.constrained_photons``: the largest photon number
    the scan's probes reach (every probe has less than CONSTRAINED_TAIL of its mass above it).
    The emulator warns about input states beyond it."""
    import dataclasses

    from povmfit.models import choose_cutoff

    top = int(choose_cutoff(scan.coherent_photons, scan.thermal_photons, tolerance=CONSTRAINED_TAIL)) - 1
    return dataclasses.replace(record, provenance={**record.provenance, "constrained_photons": top})
