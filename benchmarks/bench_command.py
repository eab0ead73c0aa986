"""The whole ``povmfit fit`` command on the bundled example scan, as a user runs it.

Each run is a fresh process with its own empty user cache folder (``XDG_CACHE_HOME``):

- cold: nothing compiled yet (JAX's persistent cache and the traced-program store empty);
- warm: the same command again with the cache the cold run left.

Baseline, measured in the same run: a fresh process that only imports jax and numpy — the
floor any JAX command line pays before doing work. Targets (absolute wall time): cold < 10 s,
warm < 3 s. The figures are the median of ``REPEATS`` cold/warm pairs.
"""
from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPEATS = 5
SCAN = Path(__file__).resolve().parents[1] / "fitting" / "data" / "demo_scan.csv"


def _wall(command, cache: str, cwd: str) -> float:
    env = dict(os.environ, XDG_CACHE_HOME=cache)
    started = time.perf_counter()
    subprocess.run(command, env=env, cwd=cwd, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - started


def run():
    fit = [sys.executable, "-m", "povmfit", "fit", str(SCAN), "--out", "out", "--quiet"]
    floor = [sys.executable, "-c", "import jax, numpy"]
    cold, warm, base = [], [], []
    for _ in range(REPEATS):
        with tempfile.TemporaryDirectory() as folder:
            cache = str(Path(folder) / "cache")
            base.append(_wall(floor, cache, folder))
            cold.append(_wall(fit, cache, folder))
            warm.append(_wall(fit, cache, folder))
    floor_s = statistics.median(base)
    rows = []
    for name, times, target in (("fit command, cold cache", cold, 10.0), ("fit command, warm cache", warm, 3.0)):
        value = statistics.median(times)
        rows.append({
            "name": f"{name} (ratio = time / import-jax floor)",
            "value": value, "unit": "s", "baseline": floor_s, "ratio": value / floor_s,
            "target": f"< {target:g} s", "passed": value < target,
        })
    return rows
