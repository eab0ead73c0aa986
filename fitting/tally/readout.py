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
detector's registered-photon POVM as a fixed readout stage. :func:`resolve_readout` turns what a
user passes to ``fit(..., readout=...)`` (a path or an array) into the matrix and the record
the provenance keeps; :func:`check_readout_outcomes` refuses a matrix whose rows do not match
the scan's outcomes. The fit itself carries the matrix in its model
(``DetectorModel.fixed_readout``).
"""
from __future__ import annotations

import hashlib
import json
import math
import os
from os import PathLike

import jax.numpy as jnp
import numpy as np

from povmfit.models import check_readout_matrix, fixed_readout_columns

from povmfit.fitting.data.errors import ArgumentError, InputFileError

__all__ = ["SCHEMA", "load_readout", "apply_readout", "resolve_readout", "check_readout_outcomes"]

SCHEMA = "povmfit.readout/1"


def load_readout(path) -> np.ndarray:
    """The misassignment matrix M[k, m] of a ``readout.json``, shape (K+1, n_columns).

    Refused with one line naming the file: unreadable JSON, another schema, a matrix that is
    not a rectangle of finite numbers in [0, 1] with at least K+1 >= 2 rows and K+1 columns,
    or a column that does not sum to 1 (within 1e-9)."""
    return _parse_readout(_read_bytes(path), str(path))


def _read_bytes(path) -> bytes:
    try:
        with open(path, "rb") as handle:
            return handle.read()
    except OSError as error:
        raise InputFileError(f"{path}: cannot read ({error.strerror or error})") from None


def _parse_readout(content: bytes, name: str) -> np.ndarray:
    try:
        record = json.loads(content.decode("utf-8"))
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
    try:
        check_readout_matrix(matrix)
    except ValueError as error:
        raise InputFileError(f"{name}: misassignment.matrix: {error}") from None
    max_outcome = record.get("max_outcome")
    if max_outcome is not None and max_outcome != matrix.shape[0] - 1:
        raise InputFileError(f"{name}: max_outcome {max_outcome} does not match the matrix's {matrix.shape[0]} rows")
    return matrix


def resolve_readout(readout) -> tuple[np.ndarray | None, object]:
    """(matrix M[k, m], provenance record) of a ``readout=`` argument.

    ``readout`` is None (no fixed readout: ``(None, None)``), the path of a ``readout.json``
    (record ``{"file": its name, "sha256": hex digest of its bytes}``) or an array M[k, m]
    of shape (K+1, n_registered) with columns summing to 1 (record ``"array"``).
    Raises InputFileError (a bad file, naming it) or ArgumentError (a bad array)."""
    if readout is None:
        return None, None
    if isinstance(readout, (str, PathLike)):
        content = _read_bytes(readout)  # read once: the digest is of the bytes parsed
        return _parse_readout(content, str(readout)), {"file": os.fspath(readout),
                                                      "sha256": hashlib.sha256(content).hexdigest()}
    try:
        return check_readout_matrix(readout), "array"
    except (TypeError, ValueError) as error:
        raise ArgumentError(f"readout: {error}") from None


def check_readout_outcomes(matrix: np.ndarray, n_outcomes: int, readout_name: str, scan_name: str,
                           from_file: bool = True) -> None:
    """Refuse a readout matrix whose rows are not the scan's outcomes 0..K, with one line
    naming both and both counts (InputFileError for a file, ArgumentError for an array)."""
    rows = int(np.shape(matrix)[0])
    if rows != n_outcomes:
        error = InputFileError if from_file else ArgumentError
        raise error(f"{readout_name}: the readout matrix has {rows} rows (outcomes 0..{rows - 1}) but the "
                    f"scan {scan_name} has {n_outcomes} outcomes (count_0..count_{n_outcomes - 1})")


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
    return jnp.asarray(fixed_readout_columns(matrix, rows)) @ jnp.asarray(theta)


def parameter_entry(value: float, stderr: float, lower: float = -math.inf, upper: float = math.inf) -> dict:
    """{value, stderr, ci95} with a Wald interval cut at the bounds."""
    if not math.isfinite(stderr):
        return {"value": value, "stderr": None, "ci95": [None, None]}
    return {"value": value, "stderr": stderr,
            "ci95": [max(value - 1.959964 * stderr, lower), min(value + 1.959964 * stderr, upper)]}
