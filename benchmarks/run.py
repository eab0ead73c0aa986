"""Run every benchmark and print one table of figures and ratios.

Each ``benchmarks/bench_*.py`` module defines ``run() -> list[dict]``; each dict is one row:

    name      what is measured
    value     the figure (float)
    unit      e.g. "ms", "s", "shots/s", "GiB"
    baseline  the same figure for the baseline measured in the same run, or None
    ratio     value/baseline (or baseline/value for speed-ups: say which in ``name``), or None
    target    the target as text, e.g. "< 1 ms"
    passed    True/False/None

Usage: ``python benchmarks/run.py [NAME ...]`` runs all modules or the named ones
(``povm``, ``fit``, ...). The rows are also written to ``benchmarks/results.json``.
"""
from __future__ import annotations

import importlib.util
import json
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _load(path: Path):
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "NO"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def main(argv: list[str]) -> int:
    wanted = set(argv)
    rows = []
    for path in sorted(HERE.glob("bench_*.py")):
        if wanted and path.stem.removeprefix("bench_") not in wanted:
            continue
        started = time.perf_counter()
        print(f"running {path.stem} ...", file=sys.stderr, flush=True)
        for row in _load(path).run():
            rows.append({"module": path.stem, **row})
        print(f"  {path.stem} took {time.perf_counter() - started:.1f} s", file=sys.stderr, flush=True)
    columns = ["name", "value", "unit", "baseline", "ratio", "target", "passed"]
    table = [[_fmt(row.get(c)) for c in columns] for row in rows]
    widths = [max(len(c), *(len(r[i]) for r in table)) if table else len(c) for i, c in enumerate(columns)]
    print("  ".join(c.ljust(w) for c, w in zip(columns, widths)))
    print("  ".join("-" * w for w in widths))
    for r in table:
        print("  ".join(v.ljust(w) for v, w in zip(r, widths)))
    (HERE / "results.json").write_text(json.dumps(rows, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
