"""Emulation speed: per-shot responses and click patterns (numpy samplers).

Rows: ``respond`` for a 9-outcome detector (array:8+dark+crosstalk) at 10^7 shots, photon
numbers Poisson(2) (target >= 1e7 shots/s); the same with a plain per-outcome comparison loop
as baseline; pattern sampling for a uniform 16-pixel array at 10^6 shots (target >= 1e6
shots/s); and the physical-chain sampler for an unequal 16-pixel split (no target).
Each figure is the best of three runs.
"""
from __future__ import annotations

import time

import numpy as np

from povmfit.fitting.data.detector_file import DetectorRecord
from povmfit.fitting.emulation.emulator import Emulator
from povmfit.models import parse_model_spec


def _best_rate(work, shots: int, repeats: int = 3) -> float:
    best = np.inf
    for _ in range(repeats):
        started = time.perf_counter()
        work()
        best = min(best, time.perf_counter() - started)
    return shots / best


def _emulator(spec: str, values: dict) -> Emulator:
    model = parse_model_spec(spec)
    names = model.parameter_names
    return Emulator.from_record(DetectorRecord(model, {n: values[n] for n in names}, np.zeros((len(names),) * 2), None, {}))


def _comparison_loop(theta, photons, rng):
    edges = np.cumsum(theta, axis=0)[:-1]
    u = rng.random(photons.size)
    out = np.zeros(photons.size, dtype=np.int32)
    for row in edges:
        out += u >= row[photons]
    return out


def run() -> list[dict]:
    rows = []
    array8 = _emulator("array:8+dark+crosstalk", {"efficiency": 0.6, "dark_probability": 0.01, "crosstalk_probability": 0.05})
    shots = 10_000_000
    photons = np.random.default_rng(0).poisson(2.0, shots)
    array8.respond(photons[:1000], seed=0)  # compile the POVM once
    rate = _best_rate(lambda: array8.respond(photons, seed=1), shots)
    theta = array8.povms(int(photons.max()) + 1)[0]
    rng = np.random.default_rng(2)
    base = _best_rate(lambda: _comparison_loop(theta, photons, rng), shots)
    rows.append({"name": "respond, 9 outcomes (speed-up = value/baseline)", "value": rate, "unit": "shots/s",
                 "baseline": base, "ratio": rate / base, "target": ">= 1e7", "passed": rate >= 1e7})

    array16 = _emulator("array:16+dark+crosstalk", {"efficiency": 0.6, "dark_probability": 0.01, "crosstalk_probability": 0.05})
    shots = 1_000_000
    array16.patterns("coherent:4", 1000, seed=0)
    rate = _best_rate(lambda: array16.patterns("coherent:4", shots, seed=3), shots)
    rows.append({"name": "patterns, uniform 16-pixel array", "value": rate, "unit": "shots/s",
                 "baseline": None, "ratio": None, "target": ">= 1e6", "passed": rate >= 1e6})

    split = {"efficiency": 0.6, "dark_probability": 0.01, "crosstalk_probability": 0.05}
    split.update({f"split_log_ratio_{i}": 0.05 * i for i in range(1, 16)})
    split16 = _emulator("array:16+dark+crosstalk+unequal_split", split)
    split16.patterns("coherent:4", 1000, seed=0)
    rate = _best_rate(lambda: split16.patterns("coherent:4", shots, seed=4), shots)
    rows.append({"name": "patterns, unequal-split 16-pixel array", "value": rate, "unit": "shots/s",
                 "baseline": None, "ratio": None, "target": "-", "passed": None})
    return rows
