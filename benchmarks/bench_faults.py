"""Extreme input: a whole `povmfit fit` of a 20,000-probe scan.

Rows: wall time and peak memory (largest resident set of the run and its worker) of
``povmfit fit SCAN --model threshold+dark --no-report --quiet`` on 20,000 probes (coherent
0..5 photons, thermal 0 or 0.5, 1000 shots each, simulated from an on/off detector), with the
same run on 200 probes as the baseline measured in the same run. Targets: under 120 s and
under 2 GiB (the fault study measured 44 s and 0.84 GB before the restructuring).
"""
from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def _scan(path: Path, probes: int) -> None:
    """On/off detector, efficiency 0.6, dark probability 1e-3: a displaced thermal probe
    (A, N) gives no click with probability (1-d) exp(-eta A/(1+eta N))/(1+eta N)."""
    rng = np.random.default_rng(20_000)
    coherent = rng.uniform(0.0, 5.0, probes)
    thermal = np.where(rng.random(probes) < 0.3, 0.5, 0.0)
    eta, dark = 0.6, 1e-3
    silent = (1 - dark) * np.exp(-eta * coherent / (1 + eta * thermal)) / (1 + eta * thermal)
    zero = rng.binomial(1000, silent)
    lines = ["coherent_photons,thermal_photons,shots,count_0,count_1"]
    lines += [f"{float(a)!r},{float(n)!r},1000,{z},{1000 - z}" for a, n, z in zip(coherent, thermal, zero)]
    path.write_text("\n".join(lines) + "\n")


def _fit(folder: Path, probes: int) -> tuple[float, float]:
    """Wall time (s) and peak resident memory (GiB) of one fit in fresh processes."""
    scan = folder / f"scan{probes}.csv"
    _scan(scan, probes)
    command = [str(Path(sys.executable).with_name("povmfit")), "fit", str(scan), "--model", "threshold+dark",
               "--no-report", "--quiet", "--out", str(folder / f"out{probes}")]
    script = ("import resource, subprocess, sys; subprocess.run(sys.argv[1:], check=True); "
              "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", script, *command], capture_output=True, text=True, check=True)
    elapsed = time.perf_counter() - started
    return elapsed, int(done.stdout.split()[-1]) * 1024 / 2**30  # ru_maxrss is in KiB on Linux


def run() -> list[dict]:
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        small_time, small_memory = _fit(folder, 200)
        big_time, big_memory = _fit(folder, 20_000)
    return [
        {"name": "fit 20,000 probes (threshold+dark), wall time", "value": big_time, "unit": "s",
         "baseline": small_time, "ratio": big_time / small_time, "target": "< 120 s", "passed": big_time < 120},
        {"name": "fit 20,000 probes, peak memory of the largest process", "value": big_memory, "unit": "GiB",
         "baseline": small_memory, "ratio": big_memory / small_memory, "target": "< 2 GiB", "passed": big_memory < 2},
    ]


if __name__ == "__main__":
    for row in run():
        print(row)
