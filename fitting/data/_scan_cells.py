"""Reading the cells of a scan file (CSV or Parquet) with their file positions.

A :class:`_Table` keeps every cell as read plus where it came from, so that a refusal can name
the file, the line (CSV, counted from 1 with the header as line 1) or row (Parquet) and the
column. Used by ``scan``; nothing here interprets the physics.
"""
from __future__ import annotations

import csv
import io
import math
import re

import numpy as np
from povmfit.fitting.data.errors import ScanError


_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


class _Table:
    """Raw cells of a file: column name -> list of cells, and how to name each row."""

    def __init__(self, source, columns, cells, lines=None):
        self.source = source
        self.columns = columns  # list of names in file order
        self.cells = cells  # dict name -> list
        self.lines = lines  # CSV: line number of each data row; None for Parquet
        self.n_rows = len(cells[columns[0]]) if columns else 0

    def where(self, row: int | None = None) -> str:
        """Message prefix for data row ``row`` (0-based), or for the header when None."""
        if self.lines is None:
            return self.source if row is None else f"{self.source}: row {row + 1}"
        return f"{self.source}:{1 if row is None else self.lines[row]}"

    def place(self, row: int) -> str:
        """'line L' (CSV) or 'row R' (Parquet) of data row ``row`` (0-based), without the file."""
        return f"row {row + 1}" if self.lines is None else f"line {self.lines[row]}"


def _refuse(where: str, column: str | None, what: str):
    what = " ".join(str(what).split())  # always one line
    raise ScanError(f"{where}: column {column}: {what}" if column else f"{where}: {what}")


def _read_csv(data: bytes, source: str) -> _Table:
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        _refuse(source, None, "cannot read: not UTF-8 text")
    reader = csv.reader(io.StringIO(text, newline=""))
    header, columns, lines = None, {}, []
    try:
        while True:
            start = reader.line_num + 1
            try:
                row = next(reader)
            except StopIteration:
                break
            if not row or all(not cell.strip() for cell in row) and len(row) <= 1:
                continue  # blank line
            if header is None:
                header = [cell.strip() for cell in row]
                _check_header(header, source + ":1")
                columns = {name: [] for name in header}
                continue
            if len(row) != len(header):
                _refuse(f"{source}:{start}", None, f"expected {len(header)} fields as in the header, found {len(row)}")
            for name, cell in zip(header, row):
                columns[name].append(cell.strip())
            lines.append(start)
    except csv.Error as error:
        _refuse(f"{source}:{reader.line_num}", None, f"malformed CSV: {error}")
    if header is None:
        _refuse(source, None, "empty file")
    if not lines:
        _refuse(f"{source}:1", None, "no data rows after the header")
    return _Table(source, header, columns, lines)


def _read_parquet(raw: bytes, source: str) -> _Table:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        data = pq.read_table(pa.BufferReader(raw)).to_pydict()
    except Exception as error:  # pyarrow raises several types for damaged files
        _refuse(source, None, f"cannot read as Parquet: {error}")
    header = list(data)
    _check_header(header, source)
    if not header or not len(data[header[0]]):
        _refuse(source, None, "no data rows")
    return _Table(source, header, data)


def _check_header(header: list[str], where: str) -> None:
    seen = set()
    for name in header:
        if name in seen:
            _refuse(where, name, "appears twice in the header")
        seen.add(name)


def _numbers(table: _Table, name: str) -> np.ndarray:
    """Cells of a numeric column as floats; text and empty cells are refused here,
    NaN, infinities, signs and integrality are judged later on the array."""
    values = np.empty(table.n_rows)
    for row, cell in enumerate(table.cells[name]):
        values[row] = _number(cell, lambda what: _refuse(table.where(row), name, what))
    return values


def _number(cell, refuse) -> float:
    if cell is None:
        refuse("empty cell")
    if isinstance(cell, (bool, np.bool_)):
        refuse(f"{cell!r} where a number is expected")
    if isinstance(cell, (int, float, np.integer, np.floating)):
        return float(cell)
    if not isinstance(cell, str):
        refuse(f"value of type {type(cell).__name__} where a number is expected")
    if cell == "":
        refuse("empty cell")
    if _NUMBER.fullmatch(cell):
        return float(cell)
    lowered = cell.lower().lstrip("+-")
    if lowered in ("nan", "inf", "infinity"):
        return float(cell)
    refuse(f"text {cell!r} where a number is expected")


def _texts(table: _Table, name: str) -> list[str]:
    out = []
    for row, cell in enumerate(table.cells[name]):
        if cell is None or cell == "" or (isinstance(cell, float) and math.isnan(cell)):
            _refuse(table.where(row), name, "empty cell")
        out.append(str(cell))
    return out
