"""The result of the model-free reconstructions of one scan, as both the reconstruct verb and
the whole job produce it: the diagonal POVM, the pointwise and smoothed Wigner values, the
phase-insensitivity test, and the scan they came from.

Files written by :meth:`ScanReconstruction.write`: ``povm.csv`` and ``wigner.csv`` (the long
tables of :mod:`povmfit.fitting.tomography.tables`) and ``reconstruction.json``
(:meth:`ScanReconstruction.to_dict`), as one set renamed into place when complete.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from povmfit.fitting.data.files import json_safe, output_set, write_json
from povmfit.fitting.display import format_number, format_uncertain, html_block, html_table, text_table
from povmfit.fitting.tomography.tables import POVM_COLUMNS, povm_rows, write_reconstruction_csvs

if TYPE_CHECKING:  # the estimators' modules load JAX and scipy; this one stays light
    from povmfit.fitting.tomography.pointwise_wigner import PhaseTest, PointwiseWigner, SmoothedWigner
    from povmfit.fitting.tomography.reconstruct import Reconstruction

__all__ = ["ScanReconstruction", "RECONSTRUCTION_SCHEMA"]

RECONSTRUCTION_SCHEMA = "povmfit.reconstruction/1"
_TABLE_PHOTONS = 4  # photon numbers 0..3 in the summary's table


@dataclass(frozen=True, eq=False)
class ScanReconstruction:
    """Model-free reconstructions of one scan.

    Fields:
        reconstruction: the diagonal POVM (:class:`Reconstruction`): theta[k, n] =
            P(outcome k | n photons), shape (n_outcomes, n_photons), its bootstrap standard
            errors, the regularisation and how it was chosen, the solver status.
        pointwise: Wigner values W_k(alpha) of every POVM element at each displacement
            probed at two or more thermal levels (:class:`PointwiseWigner`, alpha the complex
            amplitude, identity -> 1/pi), or None when no displacement has two levels.
        smoothed: the saturating Gaussian-modulated polynomial fitted to the pointwise
            values (:class:`SmoothedWigner`), or None (fewer than two pointwise displacements).
        phase_test: chi-square test that probes differing only in displacement phase give
            the same outcome distribution (:class:`PhaseTest`), or None when the scan has no
            setting probed at two or more phases.
        source: the scan's file name as given ("<memory>" for arrays).
        sha256: SHA-256 of the scan file, or None (scan built from arrays).
    """

    reconstruction: Reconstruction
    pointwise: PointwiseWigner | None
    smoothed: SmoothedWigner | None
    phase_test: PhaseTest | None
    source: str
    sha256: str | None

    @classmethod
    def from_parts(cls, scan, reconstruction: Reconstruction, wigner_parts: dict) -> "ScanReconstruction":
        """Assemble the result from the POVM reconstruction of ``scan`` and the dict
        {pointwise, smoothed, phase_test} of ``model_free.wigner_reconstructions``."""
        return cls(reconstruction=reconstruction, pointwise=wigner_parts["pointwise"],
                   smoothed=wigner_parts["smoothed"], phase_test=wigner_parts["phase_test"],
                   source=str(scan.source), sha256=scan.sha256)

    @property
    def constrained_photons(self) -> tuple[int, int]:
        """(smallest, largest) photon number the probes constrain (``reconstruction.constrained``)."""
        photons = np.nonzero(self.reconstruction.constrained)[0]
        return int(photons.min()), int(photons.max())

    # ----- plain data ---------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """Plain JSON-able data (NaN written as None): what ``reconstruction.json`` holds.

        Keys: ``schema``, ``scan`` {source, sha256}, and the ``to_dict()`` of
        ``reconstruction``, ``pointwise``, ``smoothed`` and ``phase_test`` (None where absent).
        """
        parts = {name: (None if part is None else part.to_dict()) for name, part in (
            ("reconstruction", self.reconstruction), ("pointwise", self.pointwise),
            ("smoothed", self.smoothed), ("phase_test", self.phase_test))}
        return json_safe({"schema": RECONSTRUCTION_SCHEMA, "scan": {"source": self.source, "sha256": self.sha256},
                          **parts})

    def to_dataframe(self):
        """The POVM as a long pandas table, one row per (photons, outcome) pair in the order of
        ``povm.csv``: columns photons, outcome, probability, stderr."""
        import pandas as pd

        rows = povm_rows(self.reconstruction.theta, self.reconstruction.stderr, "reconstruction")
        return pd.DataFrame.from_records(rows, columns=list(POVM_COLUMNS)).drop(columns="source")

    def overview(self) -> dict:
        """The key numbers, JSON-able (what ``povmfit reconstruct --json`` prints besides the
        file names)."""
        rec, pointwise, smoothed = self.reconstruction, self.pointwise, self.smoothed
        return json_safe({
            "scan": self.source, "sha256": self.sha256,
            "povm": {"method": getattr(rec, "method", "least_squares"), "n_outcomes": rec.n_outcomes,
                     "n_photons": rec.n_photons, "regularisation": rec.regularisation,
                     "cv_folds": rec.cv_folds, "converged": rec.converged,
                     "constrained_photons": list(self.constrained_photons)},
            "wigner_points": 0 if pointwise is None else int(pointwise.alpha.size),
            "wigner_saturation": None if pointwise is None else pointwise.saturation,
            "smoothed_saturation": None if smoothed is None else smoothed.saturation,
            "phase_test": None if self.phase_test is None else self.phase_test.to_dict(),
        })

    # ----- text ---------------------------------------------------------------------------------
    def _title(self) -> str:
        digest = "" if self.sha256 is None else f" (SHA-256 {self.sha256[:12]}...)"
        return f"Model-free reconstruction of {self.source}{digest}"

    def _lines(self) -> list[tuple[str, str]]:
        rec = self.reconstruction
        lo, hi = self.constrained_photons
        lines = [("POVM", f"{rec.n_outcomes} outcomes x {rec.n_photons} photon numbers; the probes constrain "
                          f"n = {lo}..{hi}")]
        grid = rec.regularisation_grid
        if rec.cv_folds:
            edge = " (at the edge of the values tried)" if rec.regularisation in (grid.min(), grid.max()) else ""
            how = (f"chosen by {rec.cv_folds}-fold cross-validation among {grid.size} values "
                   f"{format_number(float(grid.min()), 2)}..{format_number(float(grid.max()), 2)}{edge}")
        else:
            how = "fixed (one value given, no cross-validation)"
        method = getattr(rec, "method", "least_squares")
        lines.append(("estimator", "maximum likelihood on the counts (columns on the simplex), smoothness penalty g"
                      if method == "likelihood" else "regularised least squares on the frequencies (Feito et al. 2009)"))
        if method == "likelihood" and rec.cv_folds:
            how = how.replace("cross-validation", "cross-validation (largest held-out log-likelihood)")
        lines.append(("regularisation", f"g = {format_number(rec.regularisation, 3)}, {how}"))
        if method == "likelihood" and rec.bootstrap > 1:
            lines.append(("penalty bias", f"largest |bootstrap bias| / stderr on constrained photon numbers: "
                                          f"{format_number(rec.largest_bias(), 3)}"))
        lines.append(("solver", f"{'converged' if rec.converged else 'DID NOT CONVERGE'} after {rec.iterations} iterations"))
        lines.append(("errors", f"parametric bootstrap, {rec.bootstrap} resamples (seed {rec.seed})"
                      if rec.bootstrap > 1 else "none (no bootstrap resamples)"))
        lines.extend(self._wigner_lines())
        return lines

    def _wigner_lines(self) -> list[tuple[str, str]]:
        pointwise, smoothed, phase = self.pointwise, self.smoothed, self.phase_test
        if pointwise is None:
            lines = [("Wigner values", "none (no displacement probed at two or more thermal levels)")]
        else:
            radius = float(np.abs(pointwise.alpha).max())
            estimator = "box-constrained" if pointwise.method == "box" else "simplex-constrained"
            lines = [("Wigner values", f"{pointwise.alpha.size} displacements, |alpha| <= {format_number(radius, 3)}; "
                                       f"saturation M = {pointwise.saturation}, {estimator} estimator")]
        if smoothed is not None:
            lines.append(("smoothed curve", f"M = {smoothed.saturation}; chi2 = {format_number(smoothed.chi_square, 3)} "
                                            f"on {smoothed.dof} dof, p = {format_number(smoothed.p_value, 3)}"))
        if phase is None:
            lines.append(("phase test", "not done (no probe setting measured at two or more phases)"))
        else:
            lines.append(("phase test", f"chi2 = {format_number(phase.chi_square, 3)} on {phase.dof} dof over "
                                        f"{phase.settings} settings, p = {format_number(phase.p_value, 3)}"))
        return lines

    def _table(self) -> tuple[list[str], list[list[str]]]:
        """P(k | n) for the first photon numbers, and W_k(0) where the origin was probed."""
        rec = self.reconstruction
        photons = range(min(_TABLE_PHOTONS, rec.n_photons))
        header = ["outcome"] + [f"P(k|{n})" for n in photons]
        origin = None
        if self.pointwise is not None and np.any(self.pointwise.alpha == 0):
            origin = int(np.nonzero(self.pointwise.alpha == 0)[0][0])
            header.append("W_k(0)")
        rows = []
        for k in range(rec.n_outcomes):
            row = [str(k)] + [format_uncertain(float(rec.theta[k, n]), float(rec.stderr[k, n])) for n in photons]
            if origin is not None:
                row.append(format_uncertain(float(self.pointwise.values[k, origin]),
                                            float(self.pointwise.stderr[k, origin])))
            rows.append(row)
        return header, rows

    def summary(self) -> str:
        """Plain text: POVM size, constrained photon range, regularisation and how it was
        chosen, solver status, Wigner points and saturation M, phase test, and a table of
        P(k | n) for n = 0..3 (with W_k(0) where alpha = 0 was probed)."""
        lines = self._lines()
        width = max(len(name) for name, _ in lines)
        text = [self._title(), ""] + [f"{name.ljust(width)}  {value}" for name, value in lines]
        header, rows = self._table()
        return "\n".join(text + ["", text_table(header, rows)])

    def _repr_html_(self) -> str:
        header, rows = self._table()
        return html_block(self._title(), [f"{name}: {value}" for name, value in self._lines()],
                          [html_table(header, rows)])

    def __repr__(self) -> str:
        rec = self.reconstruction
        points = 0 if self.pointwise is None else self.pointwise.alpha.size
        return (f"ScanReconstruction(source={self.source!r}, povm={rec.n_outcomes}x{rec.n_photons}, "
                f"wigner_points={points})")

    # ----- files --------------------------------------------------------------------------------
    def write(self, out_dir, overwrite: bool = False) -> dict[str, Path]:
        """Write povm.csv, wigner.csv and reconstruction.json as one set (``data.files.output_set``:
        a temporary sibling folder renamed to ``out_dir`` when complete); returns
        {"povm": path, "wigner": path, "reconstruction": path} inside ``out_dir``.

        ``out_dir`` must be absent or an empty folder unless ``overwrite``, which replaces the
        whole folder (OutputError otherwise, before anything is written).
        """
        out_dir = Path(out_dir)
        with output_set(out_dir, overwrite) as staging:
            files = write_reconstruction_csvs(staging, self.reconstruction, self.pointwise, self.smoothed)
            files["reconstruction"] = staging / "reconstruction.json"
            write_json(files["reconstruction"], self.to_dict())
        return {name: out_dir / path.name for name, path in files.items()}
