"""The long-layout CSV tables of DESIGN section 4: ``povm.csv`` and ``wigner.csv``.

``povm.csv``: photons, outcome, probability, stderr, source (``reconstruction`` or
``model``), one row for every (photon number, outcome) pair up to the cutoff, zeros
included, photon number outermost. ``wigner.csv``: re_alpha, im_alpha, outcome, value,
stderr, source (``model``, ``pointwise`` or ``smoothed``), alpha being the complex amplitude
and W normalised so that the identity is 1/pi. Numbers are written with ``repr`` (shortest
text that reads back to the same float). Both files are written atomically.

The rows of a fitted model (source ``model``) are built with the same row functions by the
caller and passed in, so one writer serves the reconstruction alone and the whole job.
"""
from __future__ import annotations

import io
from pathlib import Path

from povmfit.fitting.data.files import atomic_write_text

__all__ = ["POVM_COLUMNS", "WIGNER_COLUMNS", "povm_rows", "wigner_rows", "csv_text", "write_reconstruction_csvs"]

POVM_COLUMNS = ("photons", "outcome", "probability", "stderr", "source")
WIGNER_COLUMNS = ("re_alpha", "im_alpha", "outcome", "value", "stderr", "source")


def povm_rows(theta, stderr, source: str) -> list[tuple]:
    """Rows (photons, outcome, probability, stderr, source) for every (n, k) pair.

    ``theta`` and ``stderr``: (n_outcomes, n_photons) arrays.
    """
    n_outcomes, n_photons = theta.shape
    return [(n, k, theta[k, n], stderr[k, n], source) for n in range(n_photons) for k in range(n_outcomes)]


def wigner_rows(alpha, values, stderr, source: str) -> list[tuple]:
    """Rows (re_alpha, im_alpha, outcome, value, stderr, source) for every point and outcome.

    ``alpha``: (n_points,) complex amplitudes; ``values``, ``stderr``: (n_outcomes, n_points).
    """
    return [(alpha[i].real, alpha[i].imag, k, values[k, i], stderr[k, i], source)
            for i in range(alpha.size) for k in range(values.shape[0])]


def _cell(value) -> str:
    return str(value) if isinstance(value, (int, str)) else repr(float(value))


def csv_text(header, rows) -> str:
    """CSV text: the header line, then one line per row (integers and strings as they are,
    every other value as ``repr(float(value))``)."""
    out = io.StringIO()
    out.write(",".join(header) + "\n")
    for row in rows:
        out.write(",".join(_cell(c) for c in row) + "\n")
    return out.getvalue()


def write_reconstruction_csvs(out_dir, reconstruction, pointwise, smoothed, model_rows=None,
                              model_wigner_rows=None) -> dict[str, Path]:
    """Write povm.csv and wigner.csv atomically into ``out_dir``; returns {"povm": path, "wigner": path}.

    ``reconstruction``: the POVM ``Reconstruction``; ``pointwise`` / ``smoothed``: Wigner
    values or None. ``model_rows`` / ``model_wigner_rows``: extra rows built with
    :func:`povm_rows` / :func:`wigner_rows` and source "model" (e.g. from a fit); the POVM
    model rows follow the reconstruction rows, the Wigner model rows come first.
    """
    out_dir = Path(out_dir)
    povm = povm_rows(reconstruction.theta, reconstruction.stderr, "reconstruction") + list(model_rows or [])
    wigner = list(model_wigner_rows or [])
    if pointwise is not None:
        wigner += wigner_rows(pointwise.alpha, pointwise.values, pointwise.stderr, "pointwise")
    if smoothed is not None:
        wigner += wigner_rows(smoothed.alpha, smoothed.values, smoothed.stderr, "smoothed")
    files = {"povm": out_dir / "povm.csv", "wigner": out_dir / "wigner.csv"}
    texts = {"povm": csv_text(POVM_COLUMNS, povm), "wigner": csv_text(WIGNER_COLUMNS, wigner)}
    for name, path in files.items():
        atomic_write_text(path, texts[name])
    return files
