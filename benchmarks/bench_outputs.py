"""Same results from the new code as from the old: ``povmfit demo`` run once by each version.

Old = commit ``c65d21c``, new = the installed package (or ``$POVMFIT_BENCH_NEW``); see
``_previous.py``. Each version runs ``python -m povmfit demo --out DIR --quiet`` with a fresh
empty cache folder. Compared, as the largest relative difference |a-b| / max(|a|, |b|, 1e-300)
(entries both below 1e-12 in absolute value count as equal), one row per file, target <= 1e-8:

- datasheet.json: every number under ``figures``, ``parameters``, ``goodness_of_fit``, and the
  ``deviance`` of each ``model_comparison`` row (rows matched by ``model``);
- povm.csv: ``probability``, rows matched by (photons, outcome, source);
- wigner.csv: ``value``, rows matched by (re_alpha, im_alpha, outcome, source).

A structural difference (key, row or model on one side only; a non-number that differs) fails
the row and is counted in its name; the details are in ``notes`` in results.json.
"""
from __future__ import annotations

import csv
import json
import math
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _previous import fresh_folder, run_timed, versions  # noqa: E402

TARGET = 1e-8
TINY = 1e-12
DATASHEET_SECTIONS = ("figures", "parameters", "goodness_of_fit")


def relative_difference(a: float, b: float) -> float:
    if math.isnan(a) or math.isnan(b):
        return 0.0 if math.isnan(a) and math.isnan(b) else math.inf
    if a == b or (abs(a) < TINY and abs(b) < TINY):
        return 0.0
    if math.isinf(a) or math.isinf(b):
        return math.inf
    return abs(a - b) / max(abs(a), abs(b), 1e-300)


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


class Comparison:
    """Largest relative difference seen (and where), plus the structural differences."""

    def __init__(self):
        self.largest, self.where, self.problems, self.count = 0.0, None, [], 0

    def numbers(self, where: str, a: float, b: float) -> None:
        self.count += 1
        difference = relative_difference(float(a), float(b))
        if difference > self.largest:
            self.largest, self.where = difference, where

    def values(self, where: str, a, b) -> None:
        """Walk two JSON values alike: numbers compared, anything else must be equal."""
        if isinstance(a, dict) and isinstance(b, dict):
            for key in sorted(a.keys() | b.keys(), key=str):
                inner = f"{where}.{key}" if where else str(key)
                if key not in a or key not in b:
                    self.problems.append(f"{inner} only in {'old' if key in a else 'new'}")
                else:
                    self.values(inner, a[key], b[key])
        elif isinstance(a, list) and isinstance(b, list):
            if len(a) != len(b):
                self.problems.append(f"{where}: length {len(a)} (old) vs {len(b)} (new)")
            for i, (x, y) in enumerate(zip(a, b)):
                self.values(f"{where}[{i}]", x, y)
        elif _is_number(a) and _is_number(b):
            self.numbers(where, a, b)
        elif a != b:
            self.problems.append(f"{where}: {a!r} (old) vs {b!r} (new)")

    def row(self, file: str) -> dict:
        if not self.count:
            self.problems.append("no numbers to compare")
        name = f"{file}: largest relative difference of {self.count} numbers"
        if self.largest > 0:
            name += f" (at {self.where})"
        if self.problems:
            name += f"; STRUCTURE DIFFERS in {len(self.problems)} places, see notes"
        return {"name": name, "value": self.largest, "unit": "rel", "baseline": None, "ratio": None,
                "target": f"<= {TARGET:g}", "passed": self.largest <= TARGET and not self.problems,
                "notes": self.problems[:50]}


def compare_datasheets(old: dict, new: dict) -> Comparison:
    comparison = Comparison()
    comparison.values("", {s: old[s] for s in DATASHEET_SECTIONS if s in old},
                      {s: new[s] for s in DATASHEET_SECTIONS if s in new})
    deviances = [{row.get("model"): row.get("deviance") for row in side.get("model_comparison", [])}
                 for side in (old, new)]
    comparison.values("model_comparison.deviance", *deviances)
    return comparison


def compare_tables(old: Path, new: Path, keys: tuple, column: str) -> Comparison:
    """Compare ``column`` of two CSV files, rows matched by the ``keys`` columns. A key can occur
    more than once (wigner.csv lists some grid points twice): its n-th rows are matched."""
    tables = [_read_table(path, keys, column) for path in (old, new)]
    comparison = Comparison()
    for key in sorted(tables[0].keys() | tables[1].keys(), key=str):
        a, b = tables[0].get(key, []), tables[1].get(key, [])
        if len(a) != len(b):
            comparison.problems.append(f"row {key}: {len(a)} in old, {len(b)} in new")
        for x, y in zip(a, b):
            comparison.numbers(f"{column}[{', '.join(map(str, key))}]", x, y)
    return comparison


def _read_table(path: Path, keys: tuple, column: str) -> dict:
    table = {}
    with path.open(newline="") as handle:
        for row in csv.DictReader(handle):
            table.setdefault(tuple(_key(row[k]) for k in keys), []).append(float(row[column]))
    return table


def _key(text: str):
    """Key columns compared as numbers where they are numbers ("1" and "1.0" match)."""
    for parse in (int, lambda t: round(float(t), 9)):
        try:
            return parse(text)
        except ValueError:
            pass
    return text


def _failed(file: str, problem: str) -> dict:
    return {"name": f"{file}: {problem}", "value": None, "unit": "rel", "baseline": None, "ratio": None,
            "target": f"<= {TARGET:g}", "passed": False, "notes": problem}


def run():
    with versions() as (old, new, scratch):
        folders, errors = {}, {}
        for role, version in (("old", old), ("new", new)):
            cwd = fresh_folder(scratch, f"demo-{role}")
            result = run_timed(version.command("demo", "--out", "out", "--quiet"),
                               version.environment(cwd / "cache"), cwd)
            folders[role] = cwd / "out"
            if result.returncode:
                errors[role] = f"{version.label}: {result.error}"
        if errors:
            return [_failed("demo", f"FAILED {error[:100]}") for error in errors.values()]
        rows = []
        checks = {
            "datasheet.json": lambda o, n: compare_datasheets(*(json.loads(p.read_text()) for p in (o, n))),
            "povm.csv": lambda o, n: compare_tables(o, n, ("photons", "outcome", "source"), "probability"),
            "wigner.csv": lambda o, n: compare_tables(o, n, ("re_alpha", "im_alpha", "outcome", "source"), "value"),
        }
        for file, compare in checks.items():
            paths = [folders[role] / file for role in ("old", "new")]
            missing = [role for role, path in zip(("old", "new"), paths) if not path.exists()]
            if missing:
                rows.append(_failed(file, f"missing in {' and '.join(missing)} output"))
                continue
            try:
                rows.append(compare(*paths).row(file))
            except Exception as error:  # e.g. a renamed column: reported, not raised
                rows.append(_failed(file, f"cannot compare: {type(error).__name__} {error}"))
        return rows
