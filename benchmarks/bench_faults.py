"""Extreme input: whole `povmfit fit` runs on a 20,000-probe scan and on a 60-outcome scan.

Rows: wall time and peak memory (largest resident set of the run and its worker, from
``resource.getrusage(RUSAGE_CHILDREN)``) of

- ``povmfit fit SCAN --model threshold+dark --no-report --quiet`` on 20,000 probes (coherent
  0..5 photons, thermal 0 or 0.5, 1000 shots each, simulated from an on/off detector), with
  the same run on 200 probes as the baseline measured in the same run. Targets: under 120 s
  and under 2 GiB (the fault study measured 44 s and 0.84 GB before the restructuring);
- ``povmfit fit SCAN --no-report --quiet`` (automatic model choice) on a 60-outcome scan of a
  59-photon-resolving detector (32 probes: coherent 0..45 photons at thermal 0 and 2, 10^5
  shots each, simulated by the emulation module from ``pnr:59+dark``), with the same probes
  on a 6-outcome ``pnr:5+dark`` detector as the baseline. Target: under 400 s (the run that
  gave no result in 400 s) and under 2 GiB.

The one-minute load average after each pair of runs is in the time row's name: timings are
only comparable between runs at similar load.
"""
from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

POVMFIT = str(Path(sys.executable).with_name("povmfit"))
PNR_PROBES = "coherent=0:45:16;thermal=0,2"  # the simulate verb's grid syntax: 16 x 2 probes
PNR_SHOTS = 100_000


def _threshold_scan(path: Path, probes: int) -> None:
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


def _pnr_scan(path: Path, max_outcome: int) -> None:
    """A scan of a ``pnr:K+dark`` detector (efficiency 0.8, dark mean 1e-3 per shot) drawn by
    the emulation module (multinomial counts, seed 60)."""
    from povmfit.fitting.data.scan import write_scan
    from povmfit.fitting.emulation.emulator import Emulator
    from povmfit.fitting.emulation.simulate import simulate_scan
    from povmfit.models import parse_model_spec

    model = parse_model_spec(f"pnr:{max_outcome}+dark")
    detector = Emulator(model=model, members=[model.pack({"efficiency": 0.8, "dark_mean": 1e-3})])
    write_scan(simulate_scan(detector, PNR_PROBES, shots=PNR_SHOTS, seed=60), path)


def _run(command: list[str]) -> tuple[float, float]:
    """Wall time (s) and peak resident memory (GiB) of ``command`` and everything it starts."""
    script = ("import resource, subprocess, sys; subprocess.run(sys.argv[1:], check=True); "
              "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", script, *command], capture_output=True, text=True, check=True)
    elapsed = time.perf_counter() - started
    return elapsed, int(done.stdout.split()[-1]) * 1024 / 2**30  # ru_maxrss is in KiB on Linux


def _fit_threshold(folder: Path, probes: int) -> tuple[float, float]:
    scan = folder / f"scan{probes}.csv"
    _threshold_scan(scan, probes)
    return _run([POVMFIT, "fit", str(scan), "--model", "threshold+dark", "--no-report", "--quiet",
                 "--out", str(folder / f"out{probes}")])


def _fit_pnr(folder: Path, max_outcome: int) -> tuple[float, float]:
    scan = folder / f"pnr{max_outcome}.csv"
    _pnr_scan(scan, max_outcome)
    return _run([POVMFIT, "fit", str(scan), "--no-report", "--quiet", "--out", str(folder / f"pnr{max_outcome}")])


def _rows(name: str, unit_target: tuple, value: tuple, baseline: tuple) -> list[dict]:
    (time_target, memory_target) = unit_target
    load = f"load {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores"
    return [
        {"name": f"{name}, wall time ({load})", "value": value[0], "unit": "s", "baseline": baseline[0],
         "ratio": value[0] / baseline[0], "target": f"< {time_target} s", "passed": value[0] < time_target},
        {"name": f"{name}, peak memory of the largest process", "value": value[1], "unit": "GiB",
         "baseline": baseline[1], "ratio": value[1] / baseline[1], "target": f"< {memory_target} GiB",
         "passed": value[1] < memory_target},
    ]


def run() -> list[dict]:
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        probes = _rows("fit 20,000 probes (threshold+dark) vs 200", (120, 2),
                       _fit_threshold(folder, 20_000), _fit_threshold(folder, 200))
        outcomes = _rows("fit 60 outcomes (pnr, --model auto) vs 6", (400, 2),
                         _fit_pnr(folder, 59), _fit_pnr(folder, 5))
    return probes + outcomes


if __name__ == "__main__":
    for row in run():
        print(row)
