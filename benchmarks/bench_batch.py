"""Batch benchmark: ``characterise_many`` on two Dask workers against a serial loop.

The scans: 40 simulated scans of an 8-pixel click array (``array:8+dark``), four channels
swept over ten bias currents (the sigmoid-efficiency, exponential-dark device of
``tests/test_batch.py``), six coherent probes of 20,000 shots each.

Baseline: the same work in one process, scan after scan: ``povmfit.characterise(path,
model, n_jobs=1)`` and ``Characterisation.write(folder)`` (what ``povmfit fit --jobs 1``
does per scan), after one untimed warm-up scan so that its models are compiled already.
The batch is timed from the call to its return: starting a two-worker LocalCluster, each
worker compiling its models (JAX's persistent cache on, as for the command line), the scans,
the figures table, the sweep figures and the batch report.

Rows:
- wall time of the batch and of the serial loop; speed-up = serial / batch, target >= 1.7;
- per-scan overhead: the batch's worker-seconds per scan (wall x 2 workers / scans) over
  the serial loop's seconds per scan, minus one; target < 10 %;
- information: the mean time one scan takes inside a worker, over the serial per-scan time.
"""
from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

import povmfit  # noqa: E402
from povmfit.fitting.cli.cache import enable_compilation_cache  # noqa: E402

from test_batch import MODEL, write_bias_sweep  # noqa: E402

CHANNELS = ("A", "B", "C", "D")
BIAS = tuple(np.round(np.linspace(6.0, 10.0, 10), 3))
WORKERS = 2


def _manifest(folder: Path, scans: int) -> tuple[Path, list[Path]]:
    lines, paths = ["scan,channel,bias_current_ua"], []
    for j, channel in enumerate(CHANNELS):
        for path, bias in zip(write_bias_sweep(folder, bias=BIAS, seed=100 + j, prefix=f"ch{channel}"), BIAS):
            lines.append(f"{path.name},{channel},{bias}")
            paths.append(path)
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join(lines[: scans + 1]) + "\n")
    return manifest, paths[:scans]


def run() -> list[dict]:
    scans = int(os.environ.get("POVMFIT_BENCH_BATCH_SCANS", "40"))
    enable_compilation_cache()
    with tempfile.TemporaryDirectory() as scratch:
        folder = Path(scratch)
        manifest, paths = _manifest(folder, scans)

        povmfit.characterise(paths[0], MODEL, n_jobs=1)  # warm-up: compile in this process
        started = time.perf_counter()
        for path in paths:
            povmfit.characterise(path, MODEL, n_jobs=1).write(folder / "serial" / path.stem)
        serial = time.perf_counter() - started

        started = time.perf_counter()
        result = povmfit.characterise_many(manifest, folder / "batch", model=MODEL, workers=WORKERS,
                                           worker_setup=enable_compilation_cache)
        batch = time.perf_counter() - started
        assert result.count("ok") == scans, [row["reason"] for row in result.rows if row["status"] != "ok"]
        in_worker = float(np.mean([row["seconds"] for row in result.rows]))

    speedup = serial / batch
    overhead = (batch * WORKERS / scans) / (serial / scans) - 1
    return [
        {"name": f"batch of {scans} scans, 2 Dask workers: wall time", "value": batch, "unit": "s",
         "baseline": serial, "ratio": speedup, "target": "serial/batch >= 1.7", "passed": speedup >= 1.7},
        {"name": "batch per-scan overhead (worker-seconds per scan / serial seconds per scan - 1)",
         "value": 100 * overhead, "unit": "%", "baseline": serial / scans, "ratio": None, "target": "< 10 %",
         "passed": overhead < 0.10},
        {"name": "one scan inside a worker / one scan in the serial loop (information)", "value": in_worker,
         "unit": "s", "baseline": serial / scans, "ratio": in_worker / (serial / scans), "target": None, "passed": None},
    ]


if __name__ == "__main__":
    for row in run():
        print(row)
