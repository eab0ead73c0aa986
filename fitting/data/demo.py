"""The bundled example scan (simulated, in a scenario of our own).

The (invented) Fenwick Institute's detector group characterises an (invented) eight-bin
time-multiplexed click detector, the "Marlow TM-8", with coherent and displaced-thermal
probes. The true detector has efficiency 0.62, dark-click probability 2e-3 per bin and gate,
and pixel crosstalk 0.04; the group quotes a 3 % probe calibration and a 100 ns gate.
"""
from __future__ import annotations

from importlib import resources
from pathlib import Path

import numpy as np

__all__ = ["demo_scan_path", "generate_demo_scan", "DEMO_MODEL", "DEMO_TRUTH", "DEMO_GATE_S", "DEMO_CALIBRATION",
           "DEMO_METADATA"]

DEMO_MODEL = "array:8+dark+crosstalk"
DEMO_TRUTH = {"efficiency": 0.62, "dark_probability": 2e-3, "crosstalk_probability": 0.04}
DEMO_COHERENT = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0)
DEMO_THERMAL = (0.0, 0.3, 0.6, 1.0)
DEMO_SHOTS = 100_000
DEMO_SEED = 20261201
DEMO_GATE_S = 100e-9
DEMO_CALIBRATION = 0.03
DEMO_METADATA = {
    "device": "Marlow TM-8 (invented device, simulated data)",
    "operator": "Fenwick Institute detector group (invented)",
    "notes": "bundled example of povmfit: counts simulated with efficiency 0.62, dark 2e-3 per bin, crosstalk 0.04",
}


def demo_scan_path() -> Path:
    return Path(str(resources.files("povmfit.fitting.data") / "demo_scan.csv"))


def generate_demo_scan():
    """Regenerate the bundled example scan (deterministic)."""
    from povmfit.fitting.data.scan import scan_from_arrays
    from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions

    model = parse_model_spec(DEMO_MODEL)
    coherent, thermal = (np.array(v, float).ravel() for v in np.meshgrid(DEMO_COHERENT, DEMO_THERMAL, indexing="ij"))
    n = choose_cutoff(coherent, thermal, 1e-13)
    q = np.asarray(probe_distributions(coherent, thermal, n) @ model.povm(model.pack(DEMO_TRUTH), n).T)
    q = np.clip(q, 0, None)
    q /= q.sum(axis=1, keepdims=True)
    rng = np.random.default_rng(DEMO_SEED)
    counts = np.array([rng.multinomial(DEMO_SHOTS, row) for row in q])
    labels = [f"coh {a:g} th {t:g}" for a, t in zip(coherent, thermal)]
    return scan_from_arrays(coherent, thermal, counts, labels=labels, source="demo_scan.csv")
