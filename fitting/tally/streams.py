"""Chunked reading of per-trigger files in bounded memory.

Two kinds of file hold one value per trigger:

* text: one value per line (blank lines are skipped; ``\\n`` or ``\\r\\n`` line ends). The
  file is read in blocks of about :data:`BLOCK_BYTES` bytes cut at line ends, and each block
  is parsed by pandas' C parser; line numbers are counted exactly, so a bad value is named
  by its line in the file;
* NumPy ``.npy``: a one-dimensional array, opened as a memory map and read in slices of
  :data:`BLOCK_VALUES` values (a bad value is named by its index, counted from 0).

Each reader yields numpy arrays and reports ``progress(task, done, total)`` in bytes. Memory
stays bounded by one block whatever the file's length. Bad content raises
:class:`~povmfit.fitting.data.errors.InputFileError` with one line ``FILE: line L: ...``.
"""
from __future__ import annotations

import io
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd

from povmfit.fitting.data.errors import InputFileError

__all__ = ["BLOCK_BYTES", "BLOCK_VALUES", "read_numbers", "read_lines", "npy_length", "file_kind"]

BLOCK_BYTES = 16 << 20  # text read per block (about 2 million lines of heights)
BLOCK_VALUES = 1 << 20  # .npy values per slice (8 MiB of float64)


def file_kind(path) -> str:
    """``"npy"`` for a NumPy file (by suffix), else ``"text"``."""
    return "npy" if Path(path).suffix.lower() == ".npy" else "text"


def _open_npy(path, name: str):
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as error:
        raise InputFileError(f"{name}: cannot read as a NumPy .npy file ({error})") from None
    if array.ndim != 1:
        raise InputFileError(f"{name}: expected a one-dimensional array (one value per trigger), got shape {array.shape}")
    return array


def npy_length(path, name: str) -> int:
    return int(_open_npy(path, name).shape[0])


def _text_blocks(path, name: str, progress, task: str, block_bytes: int):
    """(first line number, bytes) of blocks cut at line ends."""
    try:
        total = os.path.getsize(path)
        handle = open(path, "rb")
    except OSError as error:
        raise InputFileError(f"{name}: cannot read ({error.strerror or error})") from None
    line, done, carry = 1, 0, b""
    with handle:
        while True:
            chunk = handle.read(block_bytes)
            if not chunk:
                break
            done += len(chunk)
            data = carry + chunk
            cut = data.rfind(b"\n") + 1
            if cut == 0:
                carry = data
                continue
            block, carry = data[:cut], data[cut:]
            yield line, block
            line += block.count(b"\n")
            if progress is not None:
                progress(task, done, total)
        if carry:
            yield line, carry
    if progress is not None:
        progress(task, total, total)


def _bad_line(block: bytes, first_line: int, check) -> tuple[int, str]:
    """(line number, text) of the first non-blank line in ``block`` that ``check`` refuses."""
    for offset, raw in enumerate(block.split(b"\n")):
        text = raw.decode("utf-8", errors="replace").strip()
        if text and not check(text):
            return first_line + offset, text
    return first_line, ""


def _is_finite_number(text: str) -> bool:
    try:
        return bool(np.isfinite(float(text)))
    except ValueError:
        return False


def read_numbers(path, name: str, what: str = "pulse height", progress=None, task: str = "reading",
                 block_bytes: int = BLOCK_BYTES, block_values: int = BLOCK_VALUES):
    """Yield float64 arrays of the finite numbers in a text or ``.npy`` file, block by block.

    A value that is not a finite number is refused naming its line (text) or index (.npy)."""
    if file_kind(path) == "npy":
        array = _open_npy(path, name)
        if array.dtype.kind not in "iuf":
            raise InputFileError(f"{name}: expected numbers, got an array of dtype {array.dtype}")
        total = array.shape[0]
        for start in range(0, total, block_values):
            values = np.asarray(array[start:start + block_values], dtype=np.float64)
            finite = np.isfinite(values)
            if not finite.all():
                index = start + int(np.argmin(finite))
                raise InputFileError(f"{name}: index {index}: {what} {values[index - start]!r} is not a finite number")
            if progress is not None:
                progress(task, start + values.size, total)
            yield values
        return
    for first_line, block in _text_blocks(path, name, progress, task, block_bytes):
        try:
            values = pd.read_csv(io.BytesIO(block), header=None, names=["v"], dtype=np.float64, engine="c",
                                 na_filter=False, skip_blank_lines=True, index_col=False)["v"].to_numpy()
            good = b"," not in block and bool(np.isfinite(values).all())
        except (ValueError, pd.errors.ParserError):
            good = False
        except pd.errors.EmptyDataError:
            continue
        if not good:
            line, text = _bad_line(block, first_line, _is_finite_number)
            raise InputFileError(f"{name}: line {line}: {what} {text!r} is not a finite number")
        yield values


def read_lines(path, name: str, progress=None, task: str = "reading", block_bytes: int = BLOCK_BYTES):
    """Yield (first line number, bytes block) of a text file, cut at line ends (for parsers
    of their own, such as click patterns)."""
    yield from _text_blocks(path, name, progress, task, block_bytes)


def read_histogram(path, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(bin_lo, bin_hi, count) of a pre-binned pulse-height CSV (header ``bin_lo,bin_hi,count``).

    Bins must be finite, ``bin_lo < bin_hi``, sorted and not overlapping (gaps are allowed);
    counts are whole numbers >= 0 with a positive total. One line per bad cell."""
    from povmfit.fitting.data.files import data_rows, read_csv_rows

    rows = read_csv_rows(path, "histogram")
    header = [c.strip() for c in rows[0]] if rows else []
    if sorted(header) != ["bin_hi", "bin_lo", "count"]:
        raise InputFileError(f"{name}: line 1: expected the columns bin_lo, bin_hi, count, got {', '.join(header) or 'nothing'}")
    lo, hi, count = [], [], []
    for line, row in data_rows(rows, name):
        cells = dict(zip(header, (c.strip() for c in row)))
        values = {}
        for column in ("bin_lo", "bin_hi", "count"):
            try:
                values[column] = float(cells[column])
            except ValueError:
                raise InputFileError(f"{name}: line {line}: column {column}: expected a number, got {cells[column]!r}") from None
            if not math.isfinite(values[column]):
                raise InputFileError(f"{name}: line {line}: column {column}: expected a finite number, got {cells[column]!r}")
        if not values["count"] >= 0 or values["count"] != int(values["count"]) or values["count"] > 2**53:
            raise InputFileError(f"{name}: line {line}: column count: expected a whole number >= 0, got {cells['count']!r}")
        if not values["bin_lo"] < values["bin_hi"]:
            raise InputFileError(f"{name}: line {line}: column bin_hi: must be above bin_lo")
        if hi and values["bin_lo"] < hi[-1]:
            raise InputFileError(f"{name}: line {line}: column bin_lo: bins must be sorted and must not overlap "
                                 f"(the previous bin ends at {hi[-1]:g})")
        lo.append(values["bin_lo"]), hi.append(values["bin_hi"]), count.append(int(values["count"]))
    if not count or sum(count) == 0:
        raise InputFileError(f"{name}: empty spectrum (no triggers in any bin)")
    return np.array(lo), np.array(hi), np.array(count, dtype=np.int64)
