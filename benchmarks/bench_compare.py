"""Model ranking speed: every default candidate for an 8-pixel array scan of 100 probes.

Rows: wall time of ``compare_models`` including compilation (first call in this process) and
again with compiled code reused; baseline = the same candidates fitted one by one, each with
its own compiled model (no shared code), in the same run.
"""
from __future__ import annotations

import time

import numpy as np

from povmfit.fitting.inference.compare import candidate_models, compare_models
from povmfit.fitting.inference.fit import fit_scan
from povmfit.fitting.data.scan import scan_from_arrays
from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions

TRUTH = {"efficiency": 0.6, "dark_probability": 2e-3, "crosstalk_probability": 0.04}


def _scan():
    model = parse_model_spec("array:8+dark+crosstalk")
    coherent = np.tile(np.linspace(0.0, 6.0, 25), 4)
    thermal = np.repeat([0.0, 0.3, 0.6, 1.0], 25)
    n = choose_cutoff(coherent, thermal, 1e-13)
    q = np.clip(np.asarray(probe_distributions(coherent, thermal, n) @ model.povm(model.pack(TRUTH), n).T), 0, None)
    q /= q.sum(axis=1, keepdims=True)
    rng = np.random.default_rng(8)
    return scan_from_arrays(coherent, thermal, np.array([rng.multinomial(100_000, row) for row in q]))


def run():
    scan = _scan()
    started = time.perf_counter()
    comparison = compare_models(scan)
    cold = time.perf_counter() - started
    started = time.perf_counter()
    compare_models(scan)
    warm = time.perf_counter() - started
    subset = [m for m in candidate_models(scan.n_outcomes) if "unequal_split" not in m.features][:4]
    started = time.perf_counter()
    for model in subset:
        fit_scan(scan, model, intervals=False)
    separate = (time.perf_counter() - started) / len(subset) * len(candidate_models(scan.n_outcomes))
    return [
        {"name": "rank 24 candidates, array:8 scan of 100 probes, incl. compilation (baseline: separate compiles, 4 timed and scaled)",
         "value": cold, "unit": "s", "baseline": separate, "ratio": separate / cold, "target": "< 15 s", "passed": cold < 15},
        {"name": "same ranking, compiled code reused", "value": warm, "unit": "s", "baseline": None, "ratio": None,
         "target": "-", "passed": None},
        {"name": f"chosen model (truth array:8+dark+crosstalk): {comparison.chosen.spec}", "value": float(comparison.chosen.spec == "array:8+dark+crosstalk"),
         "unit": "bool", "baseline": None, "ratio": None, "target": "1", "passed": comparison.chosen.spec == "array:8+dark+crosstalk"},
    ]
