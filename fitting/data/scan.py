"""Scan files: loading, validation and writing (one row per probe setting).

A scan holds, for each probe setting p, the probe's photon numbers at the reference plane
(``coherent_photons`` = |alpha|^2 and ``thermal_photons`` = nbar, mean photons per shot),
the number of trials ``shots[p]`` and the outcome histogram ``counts[p, k]``, k = 0..K.

Accepted layouts (CSV or Parquet, chosen by the file suffix ``.csv`` / ``.parquet``):

* wide: ``coherent_photons``, ``thermal_photons``, ``shots``, ``count_0`` .. ``count_K``,
  optional ``phase_rad`` and ``probe`` (label);
* long: ``probe``, ``coherent_photons``, ``thermal_photons``, optional ``phase_rad``,
  ``outcome``, ``count`` -- one row per probe and outcome. Every probe must list every
  outcome 0..K exactly once, K being the largest outcome in the file; a missing outcome is
  refused rather than taken as zero (write zero counts explicitly). ``shots`` is the sum
  of a probe's counts. A probe's settings must be identical on all of its rows;
* click patterns (array detectors): ``probe``, probe columns, ``pattern`` (a string of
  N characters 0/1, the same N on every row), ``count``. The outcome is the number of
  clicks, so there are N+1 outcomes. Patterns a probe does not list have zero counts
  (an N-pixel array has 2^N patterns); a pattern listed twice for a probe is refused.
  The raw pattern counts are kept in ``Scan.pattern_counts``.

Policies: column names are case sensitive; unknown columns are refused, naming them;
nothing is repaired. Bad input raises :class:`ScanError` with one line
``FILE:LINE: column COL: what is wrong`` (CSV; LINE counts lines in the file, the header is
line 1) or ``FILE: row R: column COL: ...`` (Parquet and arrays; R = 1 is the first data
row). Blank lines in a CSV are skipped. Integer columns accept integral numbers written
as floats (``12.0``). Duplicate probe settings are separate rows of data.

Limits, checked before anything is allocated and named in the refusal: a probe whose
photon-number distribution needs more than :data:`MAX_CUTOFF` photon numbers to leave a tail
below 1e-10 (see :func:`povmfit.models.choose_cutoff`) is refused -- the limit is that of the
most restricted candidate model (unequal split ratios), so every probe the loader accepts can
be fitted by every model; outcomes run at most to ``MAX_OUTCOMES - 1`` (click patterns have at
most ``MAX_OUTCOMES - 1`` pixels); a count, and the shots of a probe, are at most
:data:`MAX_SHOTS` (2^53, the largest whole number a double holds exactly), and the shots of
the whole scan at most 2^62 -- larger totals, and totals that would wrap around, are
refused, never summed silently. A scan whose probes are all dark (no light: nothing
identifies the detector) is refused too.
"""
from __future__ import annotations

import csv
import hashlib
import io
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from povmfit.models import choose_cutoff

from povmfit.fitting.data.files import atomic_write_bytes, atomic_write_text
from povmfit.fitting.data._scan_cells import _numbers, _read_csv, _read_parquet, _refuse, _Table, _texts
from povmfit.fitting.data.errors import ScanError

__all__ = ["Scan", "load_scan", "scan_from_arrays", "write_scan", "MAX_CUTOFF", "MAX_OUTCOMES", "MAX_SHOTS",
           "MAX_SCAN_SHOTS", "CUTOFF_TOLERANCE"]

MAX_CUTOFF = 1000
"""Largest photon-number cutoff a probe may need; brighter probes are refused. It is the
limit of the most restricted model stage (unequal split ratios, ``split_pixel_matrix``), so a
probe the loader accepts can be fitted by every candidate model."""
MAX_OUTCOMES = 1001
"""Most outcomes (0 .. 1000) a scan may have; larger outcome numbers are refused before any
table is allocated."""
MAX_SHOTS = 2**53
"""Largest count and largest number of shots of one probe (exact in double precision)."""
MAX_SCAN_SHOTS = 2**62
"""Largest number of shots of a whole scan (their sum stays far from int64 wrap-around)."""
CUTOFF_TOLERANCE = 1e-10
"""Neglected tail mass used to judge a probe's cutoff."""

_PROBE_COLUMNS = ("coherent_photons", "thermal_photons")
_OPTIONAL_WIDE = ("phase_rad", "probe")
_COUNT_COLUMN = re.compile(r"count_(0|[1-9][0-9]*)")
_EXACT_CUTOFF_BUDGET = 100_000  # photon numbers evaluated at most to report an exact cutoff


@dataclass(frozen=True, eq=False)
class Scan:
    """Validated probe scan. Arrays are read-only.

    Fields:
        coherent_photons: (n_probes,) float, |alpha|^2 >= 0 at the reference plane.
        thermal_photons: (n_probes,) float, nbar >= 0.
        shots: (n_probes,) int64 > 0, number of trials.
        counts: (n_probes, n_outcomes) int64 >= 0, rows sum to ``shots``.
        phase_rad: (n_probes,) float displacement phase, or None.
        labels: probe labels, or None.
        source: the file name as given ("<memory>" for arrays).
        sha256: SHA-256 of the input file, or None.
        pattern_counts: per probe, {pattern: count} for click-pattern input, else None.
    """

    coherent_photons: np.ndarray
    thermal_photons: np.ndarray
    shots: np.ndarray
    counts: np.ndarray
    phase_rad: np.ndarray | None
    labels: tuple[str, ...] | None
    source: str
    sha256: str | None
    pattern_counts: tuple[dict[str, int], ...] | None = None

    @property
    def n_probes(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_outcomes(self) -> int:
        return int(self.counts.shape[1])

    @property
    def max_outcome(self) -> int:
        return self.n_outcomes - 1

    @property
    def frequencies(self) -> np.ndarray:
        """Observed outcome frequencies counts/shots, shape (n_probes, n_outcomes)."""
        return self.counts / self.shots[:, None]

    def subset(self, index) -> "Scan":
        """The rows picked by an integer index array or a boolean mask of length n_probes."""
        index = np.asarray(index)
        if index.dtype == bool and index.shape != (self.n_probes,):
            raise ValueError(f"mask has shape {index.shape}, expected ({self.n_probes},)")
        rows = np.arange(self.n_probes)[index].reshape(-1)
        pick = lambda values: None if values is None else tuple(values[i] for i in rows)  # noqa: E731
        return Scan(
            coherent_photons=_frozen(self.coherent_photons[rows]),
            thermal_photons=_frozen(self.thermal_photons[rows]),
            shots=_frozen(self.shots[rows]),
            counts=_frozen(self.counts[rows]),
            phase_rad=None if self.phase_rad is None else _frozen(self.phase_rad[rows]),
            labels=pick(self.labels),
            source=self.source,
            sha256=self.sha256,
            pattern_counts=pick(self.pattern_counts),
        )

    def to_frame(self) -> pd.DataFrame:
        """Wide layout: [probe], coherent_photons, thermal_photons, [phase_rad], shots, count_k."""
        columns = {}
        if self.labels is not None:
            columns["probe"] = list(self.labels)
        columns["coherent_photons"] = self.coherent_photons.astype(float)
        columns["thermal_photons"] = self.thermal_photons.astype(float)
        if self.phase_rad is not None:
            columns["phase_rad"] = self.phase_rad.astype(float)
        columns["shots"] = self.shots.astype(np.int64)
        for k in range(self.n_outcomes):
            columns[f"count_{k}"] = self.counts[:, k].astype(np.int64)
        return pd.DataFrame(columns)

    to_dataframe = to_frame

    def to_dict(self) -> dict:
        """Plain JSON-able data (lists and numbers) in the wide layout, plus source and SHA-256."""
        return {"source": self.source, "sha256": self.sha256, **self.to_frame().to_dict(orient="list")}

    def summary(self) -> str:
        """One paragraph: source, probes, outcomes, shots and the probed photon-number ranges."""
        total = sum(int(s) for s in self.shots)
        return (f"scan {self.source}: {self.n_probes} probes, outcomes 0..{self.max_outcome}, {total:,} shots; "
                f"coherent photons {self.coherent_photons.min():.3g}..{self.coherent_photons.max():.3g}, "
                f"thermal photons {self.thermal_photons.min():.3g}..{self.thermal_photons.max():.3g}"
                + (f"; SHA-256 {self.sha256[:12]}..." if self.sha256 else ""))

    def __repr__(self) -> str:
        return f"<Scan {self.source}: {self.n_probes} probes x {self.n_outcomes} outcomes>"

    def _repr_html_(self) -> str:
        from povmfit.fitting.display import html_block

        return html_block("Scan", [self.summary()]) + self.to_frame().head(20).to_html(index=False)


def _frozen(array: np.ndarray) -> np.ndarray:
    array = np.array(array, copy=True)
    array.setflags(write=False)
    return array


# ---------------------------------------------------------------------------- array checks


def _check_photons(values: np.ndarray, name: str, where) -> None:
    """Finite, non-negative photon numbers; ``where(row)`` names a row."""
    _check_finite(values, name, where)
    bad = np.flatnonzero(values < 0)
    if bad.size:
        _refuse(where(bad[0]), name, f"photon number must be >= 0, got {values[bad[0]]:g}")


def _check_finite(values: np.ndarray, name: str, where) -> None:
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        value = values[bad[0]]
        _refuse(where(bad[0]), name, "not a number (NaN)" if np.isnan(value) else f"infinite value {value}")


def _check_integers(values: np.ndarray, name: str, where, what: str = "count") -> np.ndarray:
    """Finite, integral, non-negative values as int64."""
    values = np.asarray(values)
    if values.dtype.kind in "iu":
        bad = np.flatnonzero(values < 0)
        if bad.size:
            _refuse(where(bad[0]), name, f"{what} must be >= 0, got {values[bad[0]]}")
        bad = np.flatnonzero(values > _integer_limit(what))
        if bad.size:
            _refuse(where(bad[0]), name, f"{what} {values[bad[0]]} is above the limit {_integer_limit(what)}")
        return values.astype(np.int64)
    if values.dtype.kind not in "f":
        raise ScanError(f"{where(0)}: column {name}: expected numbers, got dtype {values.dtype}")
    _check_finite(values, name, where)
    for test, message in (
        (values < 0, "must be >= 0"),
        (values != np.round(values), "must be a whole number"),
    ):
        bad = np.flatnonzero(test)
        if bad.size:
            _refuse(where(bad[0]), name, f"{what} {message}, got {values[bad[0]]:.17g}")
    bad = np.flatnonzero(values > _integer_limit(what))
    if bad.size:
        _refuse(where(bad[0]), name, f"{what} {values[bad[0]]:.17g} is above the limit {_integer_limit(what)}")
    return values.astype(np.int64)


def _integer_limit(what: str) -> int:
    return MAX_OUTCOMES - 1 if what == "outcome" else MAX_SHOTS


def _check_cutoffs(coherent: np.ndarray, thermal: np.ndarray, where) -> None:
    """Refuse the first probe that needs more than MAX_CUTOFF photon numbers.

    Screening, so that normal scans never evaluate a distribution:
      * upper bound (the same generous bound the cutoff search starts from):
        mean + 40 sd + 40 (nbar + 1/2) + 40 -- rows below MAX_CUTOFF are fine;
      * lower bounds: the tail at n > mean/2 is at least 1/12 (Paley-Zygmund, using
        var <= mean^2 + mean), and a displaced thermal state dominates the thermal state of
        the same nbar, whose tail at n >= N is (nbar/(1+nbar))^N -- rows above are refused.
    Rows in between are decided by choose_cutoff.
    """
    mean = coherent + thermal
    sd = np.sqrt(thermal * (thermal + 1) + coherent * (2 * thermal + 1))
    upper = mean + 40 * sd + 40 * (thermal + 0.5) + 40
    candidates = np.flatnonzero(upper > MAX_CUTOFF)
    if not candidates.size:
        return
    lower = _cutoff_lower_bound(coherent[candidates], thermal[candidates])
    hopeless = candidates[lower > MAX_CUTOFF]
    unsure = candidates[lower <= MAX_CUTOFF]
    first_unsure = _first_over_limit(coherent[unsure], thermal[unsure])
    offending = [*hopeless[:1], *([] if first_unsure is None else [unsure[first_unsure]])]
    if not offending:
        return
    row = min(offending)
    if upper[row] <= _EXACT_CUTOFF_BUDGET:
        needed = f"{choose_cutoff(coherent[row], thermal[row], tolerance=CUTOFF_TOLERANCE)}"
    else:
        estimate = max(mean[row] + 6.4 * sd[row], _cutoff_lower_bound(coherent[row : row + 1], thermal[row : row + 1])[0])
        needed = f"about {estimate:.3g}"
    column = "coherent_photons" if coherent[row] >= thermal[row] else "thermal_photons"
    _refuse(
        where(row), column,
        f"probe too bright (coherent_photons={coherent[row]:g}, thermal_photons={thermal[row]:g}): it needs "
        f"a photon-number cutoff of {needed} for a tail below {CUTOFF_TOLERANCE:g}, more than the limit {MAX_CUTOFF}",
    )


def _cutoff_lower_bound(coherent: np.ndarray, thermal: np.ndarray) -> np.ndarray:
    mean = coherent + thermal
    by_mean = np.floor(mean / 2) + 1
    with np.errstate(divide="ignore"):
        ratio = np.log(thermal / (1 + thermal))  # -inf at nbar = 0
    by_tail = np.where(thermal > 0, np.floor(math.log(CUTOFF_TOLERANCE) / np.where(thermal > 0, ratio, -1.0)), 0)
    return np.maximum(by_mean, by_tail)


def _first_over_limit(coherent: np.ndarray, thermal: np.ndarray) -> int | None:
    """Index of the first probe needing more than MAX_CUTOFF, by bisection on prefixes
    (one vectorised choose_cutoff call when every probe is fine)."""
    if not coherent.size or choose_cutoff(coherent, thermal, tolerance=CUTOFF_TOLERANCE) <= MAX_CUTOFF:
        return None
    low, high = 0, coherent.size - 1  # the prefix ending at `high` fails
    while low < high:
        middle = (low + high) // 2
        if choose_cutoff(coherent[: middle + 1], thermal[: middle + 1], tolerance=CUTOFF_TOLERANCE) > MAX_CUTOFF:
            high = middle
        else:
            low = middle + 1
    return low


def _validated_scan(coherent, thermal, counts, phase, labels, source, sha256, where,
                    count_names, shots=None, pattern_counts=None) -> Scan:
    """Checks shared by every layout. ``where(row)`` names a probe row in messages;
    ``count_names[k]`` names the column of outcome k."""
    coherent = np.asarray(coherent, dtype=float)
    thermal = np.asarray(thermal, dtype=float)
    _check_photons(coherent, "coherent_photons", where)
    _check_photons(thermal, "thermal_photons", where)
    if phase is not None:
        phase = np.asarray(phase, dtype=float)
        _check_finite(phase, "phase_rad", where)
    if shots is not None:
        shots = _check_integers(shots, "shots", where, what="shots")
    counts = np.column_stack([_check_integers(counts[:, k], count_names[k], where) for k in range(counts.shape[1])])
    # every count is <= 2^53, so a float sum cannot wrap; it decides before the exact int64 sum
    rough = counts.sum(axis=1, dtype=float)
    bad = np.flatnonzero(rough > MAX_SHOTS)
    if bad.size:
        _refuse(where(bad[0]), "shots" if shots is not None else count_names[0],
                f"the counts of this probe sum to about {rough[bad[0]]:.4g}, above the limit {MAX_SHOTS} shots per probe")
    if rough.sum() > MAX_SCAN_SHOTS:
        _refuse(source, "shots", f"the scan holds about {rough.sum():.4g} shots, above the limit {MAX_SCAN_SHOTS}")
    totals = counts.sum(axis=1)
    if shots is None:
        shots = totals
        empty = np.flatnonzero(shots == 0)
        if empty.size:
            _refuse(where(empty[0]), count_names[0], "all counts of this probe are 0 (no shots)")
    else:
        empty = np.flatnonzero(shots == 0)
        if empty.size:
            _refuse(where(empty[0]), "shots", "shots must be > 0, got 0")
        bad = np.flatnonzero(totals != shots)
        if bad.size:
            row = bad[0]
            _refuse(where(row), "shots", f"counts sum to {totals[row]} but shots is {shots[row]}")
    _check_cutoffs(coherent, thermal, where)
    if not np.any((coherent > 0) | (thermal > 0)):
        _refuse(source, "coherent_photons", "cannot identify a detector: no probe has light")
    return Scan(
        coherent_photons=_frozen(coherent), thermal_photons=_frozen(thermal), shots=_frozen(shots),
        counts=_frozen(counts), phase_rad=None if phase is None else _frozen(phase),
        labels=None if labels is None else tuple(labels), source=source, sha256=sha256,
        pattern_counts=pattern_counts,
    )


# ---------------------------------------------------------------------------- layouts


def _layout(table: _Table) -> str:
    names = set(table.columns)
    wide = any(_COUNT_COLUMN.fullmatch(name) for name in names) or "shots" in names
    if "pattern" in names and "outcome" in names:
        _refuse(table.where(), "pattern", "a file gives either outcome or pattern rows, not both")
    long_kind = "pattern" if "pattern" in names else "long" if names & {"outcome", "count"} else None
    if long_kind and wide:
        extra = "shots" if "shots" in names else next(n for n in table.columns if _COUNT_COLUMN.fullmatch(n))
        _refuse(table.where(), extra, f"not allowed in the {long_kind} layout (one row per probe and "
                f"{'pattern' if long_kind == 'pattern' else 'outcome'}; shots are the sum of count)")
    return long_kind or "wide"


def _require_columns(table: _Table, required, optional) -> None:
    for name in required:
        if name not in table.cells:
            _refuse(table.where(), name, "required column is missing")
    unknown = [n for n in table.columns if n not in required and n not in optional]
    if unknown:
        allowed = ", ".join([*required, *optional])
        _refuse(table.where(), ", ".join(repr(n) for n in unknown),
                f"unknown column{'s' if len(unknown) > 1 else ''} (allowed here: {allowed}; names are case sensitive)")


def _wide_scan(table: _Table, sha256) -> Scan:
    indices = sorted(int(_COUNT_COLUMN.fullmatch(n).group(1)) for n in table.columns if _COUNT_COLUMN.fullmatch(n))
    if indices and indices[-1] >= MAX_OUTCOMES:
        _refuse(table.where(), f"count_{indices[-1]}", f"outcome {indices[-1]} is above the limit "
                f"{MAX_OUTCOMES - 1} (at most {MAX_OUTCOMES} outcomes)")
    if not indices or indices[0] != 0:
        _refuse(table.where(), "count_0", "required column is missing (outcome columns are count_0 .. count_K)")
    missing = sorted(set(range(indices[-1] + 1)) - set(indices))
    if missing:
        _refuse(table.where(), f"count_{missing[0]}",
                f"missing: outcome columns must run count_0 .. count_{indices[-1]} without gaps")
    if len(indices) < 2:
        _refuse(table.where(), "count_1", "missing: a detector needs at least two outcomes (count_0 and count_1)")
    count_names = [f"count_{k}" for k in indices]
    _require_columns(table, ("coherent_photons", "thermal_photons", "shots", *count_names), _OPTIONAL_WIDE)
    counts = np.column_stack([_numbers(table, name) for name in count_names])
    return _validated_scan(
        _numbers(table, "coherent_photons"), _numbers(table, "thermal_photons"), counts,
        _numbers(table, "phase_rad") if "phase_rad" in table.cells else None,
        _texts(table, "probe") if "probe" in table.cells else None,
        table.source, sha256, table.where, count_names, shots=_numbers(table, "shots"),
    )


def _probe_rows(table: _Table):
    """Group the rows of a long table by probe label. Returns labels, the first row of each
    probe, the probe index of every row, and the checked settings per probe."""
    labels = _texts(table, "probe")
    settings = {name: _numbers(table, name) for name in (*_PROBE_COLUMNS, "phase_rad") if name in table.cells}
    for name in _PROBE_COLUMNS:
        _check_photons(settings[name], name, table.where)
    if "phase_rad" in settings:
        _check_finite(settings["phase_rad"], "phase_rad", table.where)
    first_row: dict[str, int] = {}
    index_of: dict[str, int] = {}
    probe_of_row = np.empty(table.n_rows, dtype=np.int64)
    for row, label in enumerate(labels):
        first = first_row.setdefault(label, row)
        probe_of_row[row] = index_of.setdefault(label, len(index_of))
        for name, values in settings.items():
            if values[row] != values[first]:
                _refuse(table.where(row), name, f"probe {label!r} has {float(values[row])!r} here but "
                        f"{float(values[first])!r} on {table.place(first)} (a probe's settings must agree on all its rows)")
    firsts = np.array(list(first_row.values()))
    per_probe = {name: values[firsts] for name, values in settings.items()}
    return list(first_row), firsts, probe_of_row, per_probe


def _long_scan(table: _Table, sha256) -> Scan:
    _require_columns(table, ("probe", *_PROBE_COLUMNS, "outcome", "count"), ("phase_rad",))
    outcome = _check_integers(_numbers(table, "outcome"), "outcome", table.where, what="outcome")
    count = _check_integers(_numbers(table, "count"), "count", table.where)
    labels, firsts, probe_of_row, settings = _probe_rows(table)
    n_outcomes = int(outcome.max()) + 1
    if n_outcomes < 2:
        _refuse(table.where(), "outcome", "only outcome 0 appears: a detector needs at least two outcomes")
    counts = np.zeros((len(labels), n_outcomes), dtype=np.int64)
    seen_at = -np.ones((len(labels), n_outcomes), dtype=np.int64)
    for row in range(table.n_rows):
        p, k = probe_of_row[row], outcome[row]
        if seen_at[p, k] >= 0:
            _refuse(table.where(row), "outcome", f"outcome {k} of probe {labels[p]!r} already given on "
                    f"{table.place(int(seen_at[p, k]))}")
        seen_at[p, k], counts[p, k] = row, count[row]
    absent = np.argwhere(seen_at < 0)
    if absent.size:
        p, k = absent[0]
        _refuse(table.where(int(firsts[p])), "outcome", f"probe {labels[p]!r} lacks outcome {k} (every probe must "
                f"list outcomes 0 .. {n_outcomes - 1}; write zero counts explicitly)")
    where = lambda p: table.where(int(firsts[p]))  # noqa: E731
    return _validated_scan(settings["coherent_photons"], settings["thermal_photons"], counts,
                           settings.get("phase_rad"), labels, table.source, sha256, where,
                           ["count"] * n_outcomes)


def _pattern_scan(table: _Table, sha256) -> Scan:
    _require_columns(table, ("probe", *_PROBE_COLUMNS, "pattern", "count"), ("phase_rad",))
    count = _check_integers(_numbers(table, "count"), "count", table.where)
    patterns = table.cells["pattern"]
    width = None
    for row, pattern in enumerate(patterns):
        if not isinstance(pattern, str):
            _refuse(table.where(row), "pattern", f"must be text of 0/1 characters, got {pattern!r}")
        if pattern == "":
            _refuse(table.where(row), "pattern", "empty cell")
        if set(pattern) - {"0", "1"}:
            _refuse(table.where(row), "pattern", f"{pattern!r} contains characters other than 0 and 1")
        width = len(pattern) if width is None else width
        if width >= MAX_OUTCOMES:
            _refuse(table.where(row), "pattern", f"{width} pixels, above the limit {MAX_OUTCOMES - 1}")
        if len(pattern) != width:
            _refuse(table.where(row), "pattern", f"{pattern!r} has {len(pattern)} pixels but the first pattern "
                    f"has {width}")
    labels, firsts, probe_of_row, settings = _probe_rows(table)
    counts = np.zeros((len(labels), width + 1), dtype=np.int64)
    raw: list[dict[str, int]] = [{} for _ in labels]
    for row, pattern in enumerate(patterns):
        p = probe_of_row[row]
        if pattern in raw[p]:
            _refuse(table.where(row), "pattern", f"pattern {pattern} of probe {labels[p]!r} is listed twice")
        raw[p][pattern] = int(count[row])
        clicks = pattern.count("1")
        if counts[p, clicks] > MAX_SHOTS - count[row]:  # checked before adding: no wrap-around
            _refuse(table.where(row), "count", f"the counts of probe {labels[p]!r} with {clicks} clicks add up "
                    f"to more than the limit {MAX_SHOTS}")
        counts[p, clicks] += count[row]
    where = lambda p: table.where(int(firsts[p]))  # noqa: E731
    return _validated_scan(settings["coherent_photons"], settings["thermal_photons"], counts,
                           settings.get("phase_rad"), labels, table.source, sha256, where,
                           ["count"] * (width + 1), pattern_counts=tuple(raw))


# ---------------------------------------------------------------------------- public entry points


def load_scan(path) -> Scan:
    """Read and validate a scan file (CSV or Parquet, by suffix). The file is only read."""
    source = str(path)
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        _refuse(source, None, f"unknown format {suffix or '(no suffix)'!r}: expected a .csv or .parquet file")
    try:
        data = path.read_bytes()
    except OSError as error:
        _refuse(source, None, f"cannot read: {error.strerror or error}")
    if not data.strip():
        _refuse(source, None, "empty file")
    sha256 = hashlib.sha256(data).hexdigest()
    table = _read_csv(data, source) if suffix == ".csv" else _read_parquet(data, source)
    builders = {"wide": _wide_scan, "long": _long_scan, "pattern": _pattern_scan}
    return builders[_layout(table)](table, sha256)


def scan_from_arrays(coherent, thermal, counts, phase=None, labels=None, source="<memory>") -> Scan:
    """Validated scan from arrays: coherent, thermal (n_probes,), counts (n_probes, n_outcomes);
    shots are the row sums of ``counts``. Messages name rows as ``SOURCE: row R`` (R from 1)."""
    counts = np.asarray(counts)
    if counts.ndim != 2 or counts.shape[1] < 2:
        _refuse(source, "counts", f"expected shape (n_probes, n_outcomes >= 2), got {counts.shape}")
    if counts.dtype.kind not in "iuf":
        _refuse(source, "counts", f"expected numbers, got dtype {counts.dtype}")
    n_probes = counts.shape[0]
    if n_probes == 0:
        _refuse(source, "counts", "no probes")
    arrays = {"coherent_photons": coherent, "thermal_photons": thermal, "phase_rad": phase}
    for name, values in arrays.items():
        if values is not None:
            shape = np.shape(values)
            if shape != (n_probes,):
                _refuse(source, name, f"expected shape ({n_probes},), got {shape}")
            try:
                arrays[name] = np.asarray(values, dtype=float)
            except (TypeError, ValueError) as error:
                _refuse(source, name, f"expected numbers: {error}")
    if labels is not None:
        labels = tuple(str(label) for label in labels)
        if len(labels) != n_probes:
            _refuse(source, "probe", f"expected {n_probes} labels, got {len(labels)}")
    where = lambda row: f"{source}: row {row + 1}"  # noqa: E731
    return _validated_scan(arrays["coherent_photons"], arrays["thermal_photons"], counts, arrays["phase_rad"],
                           labels, source, None, where, [f"count_{k}" for k in range(counts.shape[1])])


def write_scan(scan: Scan, path) -> None:
    """Write ``scan`` in the wide layout, CSV or Parquet by suffix, atomically.
    Floats are written with the shortest text that reads back to the same number."""
    path = Path(path)
    frame = scan.to_frame()
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        buffer = io.BytesIO()
        frame.to_parquet(buffer, index=False)
        atomic_write_bytes(path, buffer.getvalue())
    elif suffix == ".csv":
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(frame.columns)
        for row in frame.itertuples(index=False):
            writer.writerow([repr(float(v)) if isinstance(v, float) else v for v in row])
        atomic_write_text(path, out.getvalue())
    else:
        raise ScanError(f"{path}: unknown format {suffix or '(no suffix)'!r}: expected a .csv or .parquet file")
