"""Throughput of ``povmfit tally``'s streaming readers against a plain read-and-bin by hand.

Files are generated in a temporary folder: pulse heights of a simulated number-resolving
detector (``.npy``: ``POVMFIT_BENCH_TRIGGERS`` values, default 10^7; text: a fifth of that,
one number per line) and click logs of an 8-channel detector (bitmasks, ``.npy`` and text).

Rows (each the best of three runs, triggers per second; target >= 0.8 x the baseline):

* ``heights npy``: the tally's reading pass (memory-mapped blocks -> exact lattice histogram)
  against ``np.load`` of the whole file, then the faster of two hand-written binnings:
  ``np.searchsorted`` on the thresholds with ``np.bincount``, or equal-width bins by
  scaling, ``astype(int)`` and ``np.bincount``;
* ``heights text``: blocks parsed by pandas -> lattice histogram, against ``pandas.read_csv``
  of the whole file and the same binning;
* ``click log npy`` / ``click log text``: the tally of bitmasks against ``np.load`` /
  ``pandas.read_csv`` and ``np.bincount``;
* ``heights npy peak memory``: the peak of memory allocated while the tally reads the .npy
  file (tracemalloc), against the same for ``np.load`` (ratio: tally / by hand; target: below
  64 MiB whatever the file size);
* ``pulse-height tally end to end``: ``tally_pulse_heights`` on four probes of a quarter of
  the triggers each (reading, fit, thresholds, counts), no baseline.
"""
from __future__ import annotations

import os
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd

from povmfit.fitting.tally.click_log import tally_log
from povmfit.fitting.tally.lattice import LatticeHistogram
from povmfit.fitting.tally.streams import read_numbers

TRIGGERS = int(os.environ.get("POVMFIT_BENCH_TRIGGERS", 10_000_000))
CUTS = np.array([0.55, 1.56, 2.57, 3.58, 4.58, 5.59, 6.59, 7.6])


def _best(work, repeats: int = 3) -> float:
    best = np.inf
    for _ in range(repeats):
        started = time.perf_counter()
        work()
        best = min(best, time.perf_counter() - started)
    return best


def _heights(rng, size: int) -> np.ndarray:
    m = rng.binomial(rng.poisson(3.0, size), 0.7)
    return rng.normal(0.1 + m, np.sqrt(0.07**2 + m * 0.045**2))


def _lattice(path) -> np.ndarray:
    lattice = LatticeHistogram()
    for block in read_numbers(path, str(path)):
        lattice.add(block)
    return lattice.counts


def _row(name, triggers, seconds, baseline_seconds, target=0.8) -> dict:
    value, baseline = triggers / seconds, triggers / baseline_seconds
    return {"name": f"{name} (triggers/s; ratio tally/by hand)", "value": value, "unit": "triggers/s",
            "baseline": baseline, "ratio": value / baseline, "target": f">= {target} x by hand",
            "passed": value / baseline >= target}


def run() -> list[dict]:
    rng = np.random.default_rng(0)
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        heights = _heights(rng, TRIGGERS)
        np.save(folder / "h.npy", heights)
        text_size = TRIGGERS // 5
        pd.DataFrame({"h": heights[:text_size]}).to_csv(folder / "h.txt", header=False, index=False, float_format="%.5f")
        masks = rng.integers(0, 256, TRIGGERS).astype(np.int64)
        np.save(folder / "m.npy", masks)
        pd.DataFrame({"m": masks[:text_size]}).to_csv(folder / "m.txt", header=False, index=False)
        del heights, masks

        def by_thresholds(load):
            return np.bincount(np.searchsorted(CUTS, load()), minlength=CUTS.size + 1)

        def by_equal_bins(load):
            x = load()
            lo = x.min()
            return np.bincount(((x - lo) * (16384 / (x.max() - lo))).astype(np.int64))

        def by_hand_heights(load):  # the faster of the two hand-written binnings
            return min(_best(lambda: by_thresholds(load)), _best(lambda: by_equal_bins(load)))

        npy_load = lambda: np.load(folder / "h.npy")  # noqa: E731
        text_load = lambda: pd.read_csv(folder / "h.txt", header=None)[0].to_numpy()  # noqa: E731
        rows.append(_row("heights npy", TRIGGERS, _best(lambda: _lattice(folder / "h.npy")), by_hand_heights(npy_load)))
        rows.append(_row("heights text", text_size, _best(lambda: _lattice(folder / "h.txt")), by_hand_heights(text_load)))
        rows.append(_row("click log npy", TRIGGERS, _best(lambda: tally_log(folder / "m.npy", "m.npy")),
                         _best(lambda: np.bincount(np.load(folder / "m.npy")))))
        rows.append(_row("click log text", text_size, _best(lambda: tally_log(folder / "m.txt", "m.txt")),
                         _best(lambda: np.bincount(pd.read_csv(folder / "m.txt", header=None)[0].to_numpy()))))
        peaks = []
        for work in (lambda: _lattice(folder / "h.npy"), lambda: by_thresholds(npy_load)):
            tracemalloc.start()
            work()
            peaks.append(tracemalloc.get_traced_memory()[1] / 2**20)
            tracemalloc.stop()
        rows.append({"name": "heights npy peak memory (MiB; ratio tally/by hand)", "value": peaks[0], "unit": "MiB",
                     "baseline": peaks[1], "ratio": peaks[0] / peaks[1], "target": "< 64 MiB",
                     "passed": peaks[0] < 64})
        rows.append(_end_to_end(folder, rng))
    return rows


def _end_to_end(folder: Path, rng) -> dict:
    import povmfit

    lines = ["probe,coherent_photons,thermal_photons,heights"]
    quarter = TRIGGERS // 4
    for i, coherent in enumerate((0.3, 1.0, 2.5, 5.0)):
        m = rng.binomial(rng.poisson(coherent, quarter), 0.7)
        np.save(folder / f"p{i}.npy", rng.normal(0.1 + m, np.sqrt(0.07**2 + m * 0.045**2)))
        lines.append(f"p{i},{coherent},0,p{i}.npy")
    (folder / "probes.csv").write_text("\n".join(lines) + "\n")
    seconds = _best(lambda: povmfit.tally_pulse_heights(folder / "probes.csv"), repeats=2)
    return {"name": "pulse-height tally end to end (4 probes, triggers/s)", "value": TRIGGERS / seconds,
            "unit": "triggers/s", "baseline": None, "ratio": None, "target": None, "passed": None}
