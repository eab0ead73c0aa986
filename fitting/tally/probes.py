"""The PROBES file: which instrument file belongs to which probe setting.

A PROBES file is a UTF-8 CSV with a header line and one row per probe setting:

| column | meaning |
|---|---|
| ``probe`` | label, unique in the file (text) |
| ``coherent_photons`` | \\|alpha\\|^2 at the reference plane, >= 0 |
| ``thermal_photons`` | thermal mean nbar, >= 0 (0 = coherent probe) |
| ``heights`` | pulse heights: a text file (one number per line) or a one-dimensional ``.npy`` |
| ``histogram`` | pulse heights already binned: a CSV with ``bin_lo``, ``bin_hi``, ``count`` |
| ``log`` | click log: one trigger per line, a bitmask integer or a 0/1 string (or ``.npy`` integers) |

Paths are relative to the folder of the PROBES file (absolute paths work too). For pulse
heights each row fills exactly one of ``heights`` and ``histogram`` (both columns may be
present, one cell per row empty); for click logs the ``log`` column is required. Unknown
columns are refused. Bad content raises :class:`InputFileError` with one line
``PROBES: line L: column C: what is wrong`` (the header is line 1); a listed file that does
not exist is refused the same way, before anything is read.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from povmfit.fitting.data.errors import InputFileError
from povmfit.fitting.data.files import data_rows, read_csv_rows

__all__ = ["ProbeEntry", "read_probes", "MAX_PROBE_PHOTONS"]

MAX_PROBE_PHOTONS = 200.0  # brighter probes would need hundreds of peaks (and are refused)
_PROBE = ("probe", "coherent_photons", "thermal_photons")
_SOURCES = {"pulse_heights": ("heights", "histogram"), "click_log": ("log",)}


@dataclass(frozen=True)
class ProbeEntry:
    """One probe setting of a PROBES file.

    Fields:
        label: the probe's label.
        coherent_photons, thermal_photons: mean photons per shot at the reference plane.
        kind: ``"heights"``, ``"histogram"`` or ``"log"``.
        path: the instrument file (resolved against the PROBES folder).
        name: the path as written in the PROBES file (used in messages).
        line: the row's line number in the PROBES file.
    """

    label: str
    coherent_photons: float
    thermal_photons: float
    kind: str
    path: Path
    name: str
    line: int


def read_probes(path, job: str) -> tuple[ProbeEntry, ...]:
    """Read and check a PROBES file for ``job`` (``"pulse_heights"`` or ``"click_log"``)."""
    source = str(path)
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"{source}: the PROBES file does not exist" if not path.exists()
                             else f"{source}: not a file")
    rows = read_csv_rows(path, "PROBES file")
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise InputFileError(f"{source}: empty PROBES file (expected a header line: {', '.join(_PROBE)}, ...)")
    header = [cell.strip() for cell in rows[0]]
    sources = _SOURCES[job]
    allowed = set(_PROBE) | set(sources)
    unknown = [c for c in header if c not in allowed]
    if unknown:
        raise InputFileError(f"{source}: line 1: unknown column {unknown[0]!r} (expected {', '.join(_PROBE)} and "
                             f"{' or '.join(sources)})")
    for column in _PROBE:
        if column not in header:
            raise InputFileError(f"{source}: line 1: missing column {column!r}")
    if not any(c in header for c in sources):
        raise InputFileError(f"{source}: line 1: missing column {' or '.join(repr(c) for c in sources)}")
    if len(set(header)) != len(header):
        raise InputFileError(f"{source}: line 1: a column is named twice")
    entries, seen = [], {}
    for line, row in data_rows(rows, source):
        cells = {name: cell.strip() for name, cell in zip(header, row)}
        where = f"{source}: line {line}"
        label = cells["probe"]
        if not label:
            raise InputFileError(f"{where}: column probe: empty label")
        if label in seen:
            raise InputFileError(f"{where}: column probe: {label!r} is listed twice (also on line {seen[label]})")
        seen[label] = line
        photons = [_photons(cells[c], c, where) for c in ("coherent_photons", "thermal_photons")]
        given = [c for c in sources if cells.get(c)]
        if len(given) != 1:
            column = given[1] if len(given) > 1 else sources[0]
            what = "empty cell" if not given else "give one file per probe"
            either = f" (fill exactly one of {' and '.join(sources)})" if len(sources) > 1 else ""
            raise InputFileError(f"{where}: column {column}: {what}{either}")
        kind = given[0]
        name = cells[kind]
        file = Path(name) if Path(name).is_absolute() else path.parent / name
        if not file.is_file():
            raise InputFileError(f"{where}: column {kind}: file {name!r} does not exist"
                                 + ("" if not file.exists() else " as a file"))
        entries.append(ProbeEntry(label, photons[0], photons[1], kind, file, name, line))
    if not entries:
        raise InputFileError(f"{source}: no probes (the file has a header but no rows)")
    return tuple(entries)


def _photons(text: str, column: str, where: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputFileError(f"{where}: column {column}: expected a number, got {text!r}") from None
    if not math.isfinite(value) or value < 0:
        raise InputFileError(f"{where}: column {column}: expected a finite number >= 0, got {text!r}")
    if value > MAX_PROBE_PHOTONS:
        raise InputFileError(f"{where}: column {column}: {value:g} photons is above the limit {MAX_PROBE_PHOTONS:g}")
    return value
