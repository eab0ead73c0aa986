"""``readout.json``: the misassignment matrix and peak parameters a pulse-height tally fitted.

Schema ``povmfit.readout/1`` (JSON object):

* ``max_outcome`` K: the scan's outcomes are 0..K, K meaning "K or more";
* ``thresholds``: t_1..t_K in pulse-height units (outcome k is a height in [t_k, t_{k+1}));
* ``parameters``: ``offset``, ``gain``, ``curvature``, ``width_0``, ``width_1``, ``efficiency``,
  each ``{value, stderr, ci95}`` (heights in the instrument's unit);
* ``misassignment``: ``{"matrix": M, "rows": "outcome k = 0..K", "columns": "photons registered m = 0..M-1"}``
  with ``M[k][m] = P(outcome k | m photons registered)``; every column sums to 1, and a
  column beyond the last one listed is outcome K with probability 1 (the last column is
  already there to 1e-12);
* ``separation``: the equal-prior misassignment between neighbouring peaks n and n+1;
* ``probes``: per probe its label, file, triggers and the thresholds as applied to its bins;
* ``goodness_of_fit``, ``provenance``.

:func:`load_readout` returns the validated matrix; :func:`apply_readout` puts it after a
detector's registered-photon POVM as a fixed readout stage.
"""
from __future__ import annotations

import json
import math

import jax.numpy as jnp
import numpy as np

from povmfit.fitting.data.errors import InputFileError

__all__ = ["SCHEMA", "load_readout", "apply_readout", "extend_columns", "COLUMN_TOLERANCE"]

SCHEMA = "povmfit.readout/1"
COLUMN_TOLERANCE = 1e-9  # columns must sum to 1 within this


def load_readout(path) -> np.ndarray:
    """The misassignment matrix M[k, m] of a ``readout.json``, shape (K+1, n_columns).

    Refused with one line naming the file: unreadable JSON, another schema, a matrix that is
    not a rectangle of finite numbers in [0, 1] with at least K+1 >= 2 rows and K+1 columns,
    or a column that does not sum to 1 (within 1e-9)."""
    name = str(path)
    try:
        with open(path, encoding="utf-8") as handle:
            record = json.load(handle)
    except OSError as error:
        raise InputFileError(f"{name}: cannot read ({error.strerror or error})") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as error:
        raise InputFileError(f"{name}: not a JSON file ({error})") from None
    if not isinstance(record, dict) or record.get("schema") != SCHEMA:
        found = record.get("schema") if isinstance(record, dict) else None
        raise InputFileError(f"{name}: expected schema {SCHEMA!r}, got {found!r}")
    try:
        matrix = np.array(record["misassignment"]["matrix"], dtype=float)
    except (KeyError, TypeError, ValueError):
        raise InputFileError(f"{name}: misassignment.matrix: expected a list of rows of numbers") from None
    if matrix.ndim != 2 or matrix.shape[0] < 2 or matrix.shape[1] < matrix.shape[0]:
        raise InputFileError(f"{name}: misassignment.matrix: expected shape (K+1, n_columns) with K >= 1 and "
                             f"n_columns >= K+1, got {matrix.shape}")
    if not np.isfinite(matrix).all() or (matrix < 0).any() or (matrix > 1).any():
        raise InputFileError(f"{name}: misassignment.matrix: entries must be probabilities in [0, 1]")
    sums = matrix.sum(axis=0)
    bad = np.nonzero(np.abs(sums - 1) > COLUMN_TOLERANCE)[0]
    if bad.size:
        raise InputFileError(f"{name}: misassignment.matrix: column {int(bad[0])} sums to {sums[bad[0]]:.12g}, not 1")
    max_outcome = record.get("max_outcome")
    if max_outcome is not None and max_outcome != matrix.shape[0] - 1:
        raise InputFileError(f"{name}: max_outcome {max_outcome} does not match the matrix's {matrix.shape[0]} rows")
    return matrix


def extend_columns(matrix: np.ndarray, n_columns: int) -> np.ndarray:
    """``matrix`` cut or padded to ``n_columns`` columns; padded columns report outcome K."""
    matrix = np.asarray(matrix, dtype=float)
    if n_columns <= matrix.shape[1]:
        return matrix[:, :n_columns]
    pad = np.zeros((matrix.shape[0], n_columns - matrix.shape[1]))
    pad[-1] = 1.0
    return np.concatenate([matrix, pad], axis=1)


def apply_readout(theta, matrix):
    """Put a fixed readout stage after a detector: ``matrix @ theta``.

    Args:
        theta: POVM of the registered photon number, ``theta[m, n] = P(m registered | n
            photons)``, shape (n_registered, n_photons), columns summing to 1 (numpy or JAX;
            the result is a JAX array, differentiable in ``theta``).
        matrix: misassignment ``M[k, m]`` from :func:`load_readout`, shape (K+1, n_columns);
            registered numbers beyond its columns report outcome K.
    Returns:
        ``theta_out[k, n] = sum_m M[k, m] theta[m, n]``, shape (K+1, n_photons).
    """
    rows = int(np.shape(theta)[0])
    return jnp.asarray(extend_columns(matrix, rows)) @ jnp.asarray(theta)


def parameter_entry(value: float, stderr: float, lower: float = -math.inf, upper: float = math.inf) -> dict:
    """{value, stderr, ci95} with a Wald interval cut at the bounds."""
    if not math.isfinite(stderr):
        return {"value": value, "stderr": None, "ci95": [None, None]}
    return {"value": value, "stderr": stderr,
            "ci95": [max(value - 1.959964 * stderr, lower), min(value + 1.959964 * stderr, upper)]}
