"""Batch manifests: one row per scan, with the operating conditions it was taken under.

A manifest is a CSV or Parquet file (chosen by the suffix) with

* ``scan`` (required): the scan file, a path relative to the manifest's folder (absolute
  paths are taken as they are);
* ``model`` (optional): a model spec or ``auto`` for this scan; an empty cell uses the
  batch's option;
* ``calibration_uncertainty`` (optional): relative 1-sigma probe calibration for this scan,
  0 <= value < 0.5; an empty cell uses the batch's option;
* any number of condition columns, numbers or text (``bias_current_ua``, ``wavelength_nm``,
  ``temperature_k``, ``channel``, ``device`` ...).

Policies: a condition column is numeric when every cell is a number and text when no cell
is (a CSV column mixing both is refused: a typo such as ``12,5`` must not silently turn a
sweep axis into labels); Parquet columns must be integer, floating point or string typed;
condition cells may not be empty; a scan file listed twice is refused (the same data cannot
stand for two rows); condition names that the batch's own output columns use are refused.
Whether a scan file exists and is valid is judged later, scan by scan, so that one bad scan
does not stop a batch. Bad manifests raise :class:`InputFileError` with one line naming the
file, the line (CSV; the header is line 1) or row (Parquet) and the column.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from povmfit.fitting.data._scan_cells import _number
from povmfit.fitting.data.errors import InputFileError
from povmfit.fitting.data.files import read_csv_rows

__all__ = ["Manifest", "ManifestRow", "load_manifest", "manifest_from_frame", "FIGURE_NAMES", "OUTPUT_COLUMNS",
           "FIGURE_SUFFIXES"]

FIGURE_NAMES = ("efficiency", "vacuum_click_probability", "dark_count_rate_hz", "crosstalk_probability")
"""The datasheet figures a batch tabulates (one group of columns each)."""
FIGURE_SUFFIXES = ("value", "stderr", "ci95_lo", "ci95_hi")
OUTPUT_COLUMNS = ("scan", "status", "reason", "model", "calibration_uncertainty", "gof_p_value", "deviance", "dof",
                  "cross_check", "output", "seconds", "efficiency_stat_stderr", "efficiency_calibration_stderr")
"""Columns of the batch's figures table besides the conditions and the figure columns."""
_OPTIONAL = ("model", "calibration_uncertainty")


@dataclass(frozen=True)
class ManifestRow:
    """One scan of a manifest.

    Fields:
        place: where the row is, for messages ("line 3" for CSV, "row 2" otherwise).
        scan: the scan path as written in the manifest.
        path: that path resolved against the manifest's folder.
        conditions: {condition column: float or str}.
        model: the row's model spec, or None (use the batch's option).
        calibration_uncertainty: the row's relative calibration, or None (use the option).
    """

    place: str
    scan: str
    path: Path
    conditions: dict
    model: str | None
    calibration_uncertainty: float | None


@dataclass(frozen=True)
class Manifest:
    """A validated manifest: ``rows`` in file order; ``conditions`` the condition column names
    in file order, ``numeric`` those holding numbers; ``source`` the file (or "<DataFrame>")."""

    source: str
    rows: tuple[ManifestRow, ...]
    conditions: tuple[str, ...]
    numeric: tuple[str, ...]

    @property
    def text(self) -> tuple[str, ...]:
        """The condition columns holding text."""
        return tuple(c for c in self.conditions if c not in self.numeric)


def _reserved(name: str) -> bool:
    if name in OUTPUT_COLUMNS:
        return True
    return any(name == f"{figure}_{suffix}" for figure in FIGURE_NAMES for suffix in FIGURE_SUFFIXES)


def _build(source: str, base: Path, header: list[str], cells: dict, places: list[str], where) -> Manifest:
    """Validate the columns (cells: name -> list of raw cells, None for a missing value)."""
    seen = set()
    for name in header:
        if not name:
            raise InputFileError(f"{where(None)}: a column has no name")
        if name in seen:
            raise InputFileError(f"{where(None)}: column {name}: appears twice in the header")
        seen.add(name)
    if "scan" not in header:
        raise InputFileError(f"{where(None)}: no column 'scan' (the scan file of each row, relative to the manifest)")
    if not places:
        raise InputFileError(f"{where(None)}: no rows: the manifest lists no scan")
    conditions = [name for name in header if name != "scan" and name not in _OPTIONAL]
    for name in conditions:
        if _reserved(name):
            raise InputFileError(f"{where(None)}: column {name}: the name is used by the batch's output; rename the condition")
    numeric = [name for name in conditions if _is_numeric(name, cells[name], where)]
    rows, first = [], {}
    for i, place in enumerate(places):
        scan = cells["scan"][i]
        if scan is None or not str(scan).strip():
            raise InputFileError(f"{where(i)}: column scan: empty cell")
        scan = str(scan).strip()
        path = (base / scan).resolve()
        if path in first:
            raise InputFileError(f"{where(i)}: column scan: {scan} is listed again (first on {first[path]}); "
                                 "each scan file may appear once")
        first[path] = place
        values = {}
        for name in conditions:
            cell = cells[name][i]
            if cell is None or (isinstance(cell, str) and not cell.strip()) or (isinstance(cell, float) and math.isnan(cell)):
                raise InputFileError(f"{where(i)}: column {name}: empty cell (every scan needs every condition)")
            values[name] = _as_number(cell, name, where, i) if name in numeric else str(cell).strip()
        rows.append(ManifestRow(place=place, scan=scan, path=path, conditions=values,
                                model=_row_model(cells, i, where), calibration_uncertainty=_row_calibration(cells, i, where)))
    return Manifest(source=source, rows=tuple(rows), conditions=tuple(conditions), numeric=tuple(numeric))


def _as_number(cell, name, where, row) -> float:
    def refuse(what):
        raise InputFileError(f"{where(row)}: column {name}: {what}")

    value = _number(cell, refuse)
    if not math.isfinite(value):
        refuse(f"{cell!r} is not a finite number")
    return value


def _looks_numeric(cell) -> bool:
    if isinstance(cell, (bool,)) or cell is None:
        return False
    try:
        _number(cell, lambda what: (_ for _ in ()).throw(ValueError(what)))
    except ValueError:
        return False
    return True


def _is_numeric(name: str, column: list, where) -> bool:
    """True for a column of numbers, False for text; a column mixing both is refused."""
    filled = [(i, c) for i, c in enumerate(column) if c is not None and not (isinstance(c, str) and not c.strip())]
    kinds = [_looks_numeric(c) for _, c in filled]
    if all(kinds):
        return bool(filled)
    if not any(kinds):
        return False
    text = next((i, c) for (i, c), k in zip(filled, kinds) if not k)
    raise InputFileError(f"{where(text[0])}: column {name}: text {text[1]!r} where the other cells are numbers; "
                         "write every cell as a number, or every cell as text")


def _row_model(cells: dict, i: int, where) -> str | None:
    if "model" not in cells:
        return None
    cell = cells["model"][i]
    if cell is None or (isinstance(cell, float) and math.isnan(cell)) or not str(cell).strip():
        return None
    spec = str(cell).strip()
    if spec.lower() == "auto":
        return "auto"
    from povmfit.models import parse_model_spec

    try:
        parse_model_spec(spec)
    except ValueError as error:
        raise InputFileError(f"{where(i)}: column model: {' '.join(str(error).split())}") from None
    return spec


def _row_calibration(cells: dict, i: int, where) -> float | None:
    if "calibration_uncertainty" not in cells:
        return None
    cell = cells["calibration_uncertainty"][i]
    if cell is None or (isinstance(cell, float) and math.isnan(cell)) or (isinstance(cell, str) and not cell.strip()):
        return None
    value = _as_number(cell, "calibration_uncertainty", where, i)
    if not 0 <= value < 0.5:
        raise InputFileError(f"{where(i)}: column calibration_uncertainty: expected a relative width from 0 (exact "
                             f"probes) to below 0.5, got {cell}")
    return value


def _read_csv(path: Path, source: str) -> Manifest:
    rows = read_csv_rows(path, "manifest")
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise InputFileError(f"{source}: empty file (expected a header with a 'scan' column)")
    header = [cell.strip() for cell in rows[0]]
    if rows[0] and rows[0][0].startswith("\ufeff"):
        header[0] = header[0].lstrip("\ufeff")
    cells = {name: [] for name in header}
    lines = []
    for line, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            raise InputFileError(f"{source}:{line}: expected {len(header)} fields as in the header, found {len(row)}")
        for name, cell in zip(header, row):
            cells.setdefault(name, []).append(cell.strip())
        lines.append(line)
    where = lambda i: f"{source}:1" if i is None else f"{source}:{lines[i]}"  # noqa: E731
    return _build(source, path.parent, header, cells, [f"line {n}" for n in lines], where)


def _read_parquet(path: Path, source: str) -> Manifest:
    import pyarrow.parquet as pq
    import pyarrow.types as pt

    try:
        table = pq.read_table(path)
    except Exception as error:  # pyarrow raises several types for damaged files
        raise InputFileError(f"{source}: cannot read as Parquet: {' '.join(str(error).split())}") from None
    header = list(table.column_names)
    for field in table.schema:
        kind = field.type
        if not (pt.is_integer(kind) or pt.is_floating(kind) or pt.is_string(kind) or pt.is_large_string(kind)
                or pt.is_null(kind)):
            raise InputFileError(f"{source}: column {field.name}: type {kind} is neither a number nor text")
    cells = table.to_pydict()
    where = lambda i: source if i is None else f"{source}: row {i + 1}"  # noqa: E731
    return _build(source, path.parent, header, cells, [f"row {i + 1}" for i in range(table.num_rows)], where)


def load_manifest(path) -> Manifest:
    """Read and validate a manifest file (CSV or Parquet by suffix); see the module docstring."""
    source = str(path)
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        raise InputFileError(f"{source}: unknown format {suffix or '(no suffix)'!r}: expected a .csv or .parquet manifest")
    if not path.is_file():
        raise InputFileError(f"{source}: cannot read the manifest: no such file")
    return _read_csv(path, source) if suffix == ".csv" else _read_parquet(path, source)


def manifest_from_frame(frame, base_dir=".") -> Manifest:
    """A manifest from a pandas DataFrame (scan paths relative to ``base_dir``); the same
    rules as for files, with columns typed as in Parquet (rows named ``row R``, R from 1)."""
    import pandas as pd

    source = "<DataFrame>"
    header = [str(c) for c in frame.columns]
    for column, name in zip(frame.columns, header):
        dtype = frame[column].dtype
        if not (pd.api.types.is_integer_dtype(dtype) or pd.api.types.is_float_dtype(dtype)
                or pd.api.types.is_string_dtype(dtype) or dtype == object):
            raise InputFileError(f"{source}: column {name}: type {dtype} is neither a number nor text")
    cells = {name: [None if _missing(v) else v for v in frame[column].tolist()] for column, name in zip(frame.columns, header)}
    for name, column in cells.items():
        bad = next((v for v in column if v is not None and not isinstance(v, (str, int, float)) or isinstance(v, bool)), None)
        if bad is not None:
            raise InputFileError(f"{source}: column {name}: value {bad!r} of type {type(bad).__name__} is neither a number nor text")
    where = lambda i: source if i is None else f"{source}: row {i + 1}"  # noqa: E731
    return _build(source, Path(base_dir), header, cells, [f"row {i + 1}" for i in range(len(frame))], where)


def _missing(value) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value))
