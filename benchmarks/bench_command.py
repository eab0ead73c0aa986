"""The whole ``povmfit fit`` command on the bundled example scan, new code against old.

Old = commit ``c65d21c`` (before the restructuring), new = the installed package (or the commit
in ``$POVMFIT_BENCH_NEW``); see ``_previous.py`` for how each is run. The command is the one the
demo runs: ``python -m povmfit fit demo_scan.csv --out DIR --quiet --calibration-uncertainty
0.03 --gate-duration 1e-7`` (model auto), each version on its own copy of the scan.

Each run is a fresh process; wall time is taken from the start to the exit of the command:

- cold: first run with a fresh empty user cache folder (``XDG_CACHE_HOME``);
- warm: the same command again on the cache the cold run left.

Figures are the median of ``REPEATS`` (cold, warm) pairs per version, the versions interleaved
(alternating which goes first) so machine noise hits both, after one untimed cold run of each
(the first run on the machine pays for reading the libraries from disk). Target: new/old <=
``TARGET_RATIO`` for both cold and warm; the single runs and per-repeat ratios are in ``notes``
in results.json. Also reported, for information: a fresh process that only imports jax
and numpy (the floor any JAX command line pays), and the non-blank production lines of code
(``*.py`` under ``src/``, ``models/``, ``fitting/``) of both versions.
"""
from __future__ import annotations

import statistics
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _previous import environment, fresh_folder, production_lines, run_timed, versions  # noqa: E402

REPEATS = 5
TARGET_RATIO = 1.15
FIT_OPTIONS = ("--quiet", "--calibration-uncertainty", "0.03", "--gate-duration", "1e-7")


def _fit(version, cwd, out, scan):
    return run_timed(version.command("fit", str(scan), "--out", out, *FIT_OPTIONS),
                     version.environment(cwd / "cache"), cwd)


def _cold_warm(version, scratch, scan):
    """One (cold, warm) pair of ``version`` on a fresh cache folder; a failed run gives None."""
    cwd = fresh_folder(scratch, "work")
    times = []
    for out in ("out-cold", "out-warm"):
        result = _fit(version, cwd, out, scan)
        if result.returncode:
            return None, result.error
        times.append(result.seconds)
    return tuple(times), ""


def _ratio_row(name, new, old):
    ratio = None if new is None or old is None else new / old
    return {"name": name, "value": new, "unit": "s", "baseline": old, "ratio": ratio,
            "target": f"ratio <= {TARGET_RATIO:g}", "passed": ratio is not None and ratio <= TARGET_RATIO}


def _info_row(name, value, unit, baseline=None):
    ratio = None if baseline is None else value / baseline
    return {"name": name, "value": value, "unit": unit, "baseline": baseline, "ratio": ratio,
            "target": None, "passed": None}


def run():
    with versions() as (old, new, scratch):
        roles = {"old": old, "new": new}
        # both fit the same file: the working tree's demo scan (the same counts as the old
        # commit's; only its probe labels were made readable since)
        scan = new.demo_scan()
        pairs = {"old": [], "new": []}  # (cold s, warm s) per repeat
        errors = {}  # role -> last stderr line of its failed run
        floor = []
        for version in roles.values():  # untimed: the very first run pays for reading files from disk
            _fit(version, fresh_folder(scratch, "warm-up"), "out", scan)
        for repeat in range(REPEATS):
            cwd = fresh_folder(scratch, "floor")
            floor_run = run_timed([sys.executable, "-c", "import jax, numpy"], environment(cwd / "cache"), cwd)
            floor.append(floor_run.seconds)
            for role in ("old", "new") if repeat % 2 == 0 else ("new", "old"):
                if role in errors:
                    continue  # a broken version is not run again
                pair, error = _cold_warm(roles[role], scratch, scan)
                if pair is None:
                    errors[role] = error
                else:
                    pairs[role].append(pair)
        lines = {role: production_lines(version.tree) for role, version in roles.items()}

    def median(role, index):
        return None if role in errors else statistics.median(pair[index] for pair in pairs[role])

    versus = f"{new.label} vs {old.label}"
    rows = []
    for index, cache in ((0, "cold"), (1, "warm")):
        row = _ratio_row(f"fit command, {cache} cache: {versus}", median("new", index), median("old", index))
        row["notes"] = {f"{role} runs (s)": [pair[index] for pair in pairs[role]] for role in roles}
        row["notes"]["new/old per repeat"] = [n[index] / o[index] for n, o in zip(pairs["new"], pairs["old"])]
        rows.append(row)
    for role, error in errors.items():
        rows.append({"name": f"FAILED {roles[role].label}: {error[:100]}", "value": None, "unit": None,
                     "baseline": None, "ratio": None, "target": "runs", "passed": False, "notes": error})
    rows.append(_info_row("process importing jax, numpy only (information)", statistics.median(floor), "s"))
    rows.append(_info_row(f"production lines (non-blank *.py in src/ models/ fitting/): {versus}",
                          lines["new"], "lines", baseline=lines["old"]))
    rows.append(_info_row(f"production lines: difference {new.label} - {old.label}",
                          lines["new"] - lines["old"], "lines"))
    return rows
