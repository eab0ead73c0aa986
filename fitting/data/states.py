"""Input states for emulation: ``KIND:VALUES`` text, CSV columns and arrays -> p(n).

State text (values are mean photon numbers per shot at the detector's reference plane)::

    fock:3                       number state |3>
    coherent:2.0                 Poisson, mean 2.0 (|alpha|^2)
    thermal:0.5                  Bose-Einstein, mean 0.5
    displaced_thermal:2.0,0.5    coherent part 2.0, thermal part 0.5 (Lachs form)
    squeezed_vacuum:0.8          squeezed vacuum, mean sinh^2 r = 0.8 (odd numbers have p = 0)

A photon-number distribution can also come from a CSV file: ``FILE.csv`` (a single
column, or the column ``probability``) or ``FILE.csv:COLUMN``. Row i holds p(i) unless the
file has a ``photons`` column, which must then list 0, 1, 2, ... in order. Entries must be
finite and >= 0 and sum to one within ``SUM_TOLERANCE``; nothing is renormalised
silently beyond that tolerance.

The photon-number cutoff of a named state is the smallest one whose neglected tail mass is
below ``tolerance`` (default 1e-10, as for the probes).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from povmfit.models import (
    choose_cutoff,
    displaced_thermal_distribution,
    fock_distribution,
    squeezed_vacuum_distribution,
)

from povmfit.fitting.data.files import data_rows, read_csv_rows
from povmfit.fitting.data.errors import StateError

__all__ = ["STATE_KINDS", "SUM_TOLERANCE", "parse_state", "state_distribution", "distribution_from_array", "load_distribution_csv"]

STATE_KINDS = {"fock": 1, "coherent": 1, "thermal": 1, "displaced_thermal": 2, "squeezed_vacuum": 1}
SUM_TOLERANCE = 1e-6
_MAX_PHOTONS = 1_000_000


def parse_state(text: str) -> tuple[str, tuple[float, ...]]:
    """``"KIND:V1[,V2]"`` -> (kind, values). StateError naming the state on bad text."""
    kind, sep, rest = str(text).strip().partition(":")
    kind = kind.strip().lower()
    if not sep or kind not in STATE_KINDS:
        raise StateError(
            f"state {text!r}: expected KIND:VALUES with KIND one of {', '.join(STATE_KINDS)} (e.g. coherent:2.0)"
        )
    parts = [p.strip() for p in rest.split(",")]
    if len(parts) != STATE_KINDS[kind]:
        raise StateError(f"state {text!r}: {kind} takes {STATE_KINDS[kind]} value(s), got {len(parts)}")
    values = []
    for part in parts:
        try:
            value = float(part)
        except ValueError:
            raise StateError(f"state {text!r}: {part!r} is not a number") from None
        if not math.isfinite(value) or value < 0:
            raise StateError(f"state {text!r}: mean photon numbers must be finite and >= 0, got {part}")
        values.append(value)
    if kind == "fock" and not values[0].is_integer():
        raise StateError(f"state {text!r}: a Fock state needs a whole number of photons")
    return kind, tuple(values)


def _squeezed_cutoff(mean: float, tolerance: float) -> int:
    """Tail of p(2m) ~ (s/(1+s))^m / sqrt(m): grow the cutoff until the tail is below tolerance."""
    n = 16
    while n <= _MAX_PHOTONS:
        p = np.asarray(squeezed_vacuum_distribution(mean, n))
        if 1.0 - p.sum() < tolerance:
            # the last even term bounds the tail geometrically: ratio s/(1+s) per two photons
            ratio = mean / (1.0 + mean)
            last = p[(n - 1) // 2 * 2]
            if last * ratio / (1.0 - ratio) < tolerance:
                return n
        n *= 2
    raise StateError(f"state squeezed_vacuum:{mean}: needs more than {_MAX_PHOTONS} photon numbers")


def state_distribution(state, tolerance: float = 1e-10) -> np.ndarray:
    """p(n) for n = 0 .. cutoff-1 of a state given as text, CSV reference or array.

    Args:
        state: ``KIND:VALUES`` text, ``FILE.csv[:COLUMN]`` or an array of probabilities.
        tolerance: neglected tail mass allowed for named states.
    Returns:
        float array (n_photons,).
    """
    if not isinstance(state, str):
        return distribution_from_array(state)
    text = state.strip()
    head = text.partition(":")[0].strip().lower()
    if head not in STATE_KINDS and (".csv" in text.lower()):
        path, _, column = text.rpartition(":") if not text.lower().endswith(".csv") else (text, "", "")
        return load_distribution_csv(path, column or None)
    kind, values = parse_state(text)
    if kind == "fock":
        photons = int(values[0])
        if photons >= _MAX_PHOTONS:
            raise StateError(f"state {text!r}: at most {_MAX_PHOTONS - 1} photons")
        return np.asarray(fock_distribution(photons, photons + 1))
    if kind == "squeezed_vacuum":
        n = _squeezed_cutoff(values[0], tolerance)
        return np.asarray(squeezed_vacuum_distribution(values[0], n))
    coherent, thermal = {
        "coherent": (values[0], 0.0),
        "thermal": (0.0, values[0]),
        "displaced_thermal": values,
    }[kind]
    if coherent + thermal >= _MAX_PHOTONS:  # the mean alone is past the limit: refuse at once
        raise StateError(f"state {text!r}: mean of {coherent + thermal:g} photons; at most {_MAX_PHOTONS} photon "
                         "numbers are supported")
    try:
        n = choose_cutoff([coherent], [thermal], tolerance, limit=_MAX_PHOTONS)
    except ValueError as error:
        raise StateError(f"state {text!r}: {error}") from None
    return np.asarray(displaced_thermal_distribution(coherent, thermal, n))


def distribution_from_array(values) -> np.ndarray:
    """Check a user-given photon-number distribution (1-D, finite, >= 0, sums to one)."""
    p = np.asarray(values, dtype=float)
    if p.ndim != 1 or p.size == 0:
        raise ValueError(f"a photon-number distribution must be a non-empty 1-D array, got shape {p.shape}")
    if not np.all(np.isfinite(p)) or p.min() < 0:
        raise ValueError("a photon-number distribution must be finite and non-negative")
    if abs(p.sum() - 1.0) > SUM_TOLERANCE:
        raise ValueError(f"a photon-number distribution must sum to 1 within {SUM_TOLERANCE}, got {p.sum():.9g}")
    return p


def load_distribution_csv(path, column: str | None = None) -> np.ndarray:
    """Read p(n) from a CSV column (see module docstring). StateError names file, line, column."""
    path = Path(path)
    rows = read_csv_rows(path, "distribution file")
    if not rows:
        raise StateError(f"{path}: empty file")
    header = [h.strip() for h in rows[0]]
    if column is None:
        if "probability" in header:
            column = "probability"
        elif len([h for h in header if h != "photons"]) == 1:
            column = next(h for h in header if h != "photons")
        else:
            raise StateError(f"{path}: several columns; name one as {path}:COLUMN")
    if column not in header:
        raise StateError(f"{path}: no column {column!r} (columns: {', '.join(header)})")
    index = header.index(column)
    photons_index = header.index("photons") if "photons" in header else None
    values = []
    for line, row in data_rows(rows, path):
        if photons_index is not None and row[photons_index].strip() != str(len(values)):
            raise StateError(f"{path}: line {line}, column 'photons': expected {len(values)}, got {row[photons_index]!r}")
        try:
            value = float(row[index])
        except ValueError:
            raise StateError(f"{path}: line {line}, column {column!r}: {row[index]!r} is not a number") from None
        if not math.isfinite(value) or value < 0:
            raise StateError(f"{path}: line {line}, column {column!r}: probability must be finite and >= 0, got {row[index]!r}")
        values.append(value)
    if not values:
        raise StateError(f"{path}: column {column!r} has no values")
    total = math.fsum(values)
    if abs(total - 1.0) > SUM_TOLERANCE:
        raise StateError(f"{path}: column {column!r}: probabilities sum to {total:.9g}, not 1 (tolerance {SUM_TOLERANCE})")
    return np.asarray(values)
