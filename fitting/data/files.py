"""Errors at the edge and atomic output."""
from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import tempfile
from pathlib import Path

from povmfit.fitting.data.errors import InputFileError

__all__ = ["atomic_write_text", "atomic_write_bytes", "write_json", "json_safe", "file_sha256", "read_csv_rows", "data_rows"]


def atomic_write_bytes(path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary file in the same folder, then rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as out:
            out.write(data)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_text(path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def json_safe(value):
    """Replace NaN and infinities by None (JSON has no such numbers), recursively."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def write_json(path, payload) -> None:
    atomic_write_text(path, json.dumps(json_safe(payload), indent=2, allow_nan=False) + "\n")


def read_csv_rows(path, what: str) -> list[list[str]]:
    """All rows of a small UTF-8 CSV file; InputFileError naming the file when it cannot be read."""
    try:
        with open(path, newline="", encoding="utf-8") as handle:
            return list(csv.reader(handle))
    except (OSError, UnicodeDecodeError) as error:
        raise InputFileError(f"{path}: cannot read the {what} ({error})") from None


def data_rows(rows: list[list[str]], path):
    """(line number, row) for every non-blank row after the header of ``read_csv_rows`` output;
    InputFileError when a row has a different number of fields than the header."""
    width = len(rows[0]) if rows else 0
    for line, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != width:
            raise InputFileError(f"{path}: line {line}: expected {width} fields, got {len(row)}")
        yield line, row


def file_sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
