"""Simulated probe scans for the statistical tests of the fitter (self-contained).

Counts are drawn with numpy's multinomial sampler from the exact outcome probabilities of a
detector model at known parameters: q[p, k] = sum_n P_p(n) theta[k, n], the photon-number
distributions taken at a cutoff whose neglected tail is below 1e-13 per probe.
"""
from __future__ import annotations

import numpy as np

from povmfit.fitting.data.scan import scan_from_arrays
from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions


def exact_probabilities(model, truth: dict, coherent, thermal) -> np.ndarray:
    """q[p, k] of ``model`` at parameters ``truth`` ({name: value}), shape (n_probes, n_outcomes).

    The tail beyond the cutoff (< 1e-13) is put back by renormalising each row."""
    coherent = np.asarray(coherent, float)
    thermal = np.asarray(thermal, float)
    n_photons = choose_cutoff(coherent, thermal, 1e-13)
    distributions = np.asarray(probe_distributions(coherent, thermal, n_photons))
    theta = np.asarray(model.povm(model.pack(truth), n_photons))
    q = np.clip(distributions @ theta.T, 0.0, None)
    return q / q.sum(axis=1, keepdims=True)


def simulated_counts(q: np.ndarray, shots, rng) -> np.ndarray:
    """One multinomial count table per probe row of ``q``; ``shots`` is an int or (n_probes,)."""
    shots = np.broadcast_to(np.asarray(shots, dtype=np.int64), (q.shape[0],))
    return np.stack([rng.multinomial(n, row) for n, row in zip(shots, q)])


class Experiment:
    """A detector (model spec and true parameters) probed with fixed coherent/thermal probes.

    ``scan(rng)`` draws one simulated scan; the exact probabilities are computed once.
    """

    def __init__(self, spec: str, truth: dict, coherent, thermal=None, shots=10_000):
        self.model = parse_model_spec(spec)
        self.truth = dict(truth)
        self.coherent = np.asarray(coherent, float)
        self.thermal = np.zeros_like(self.coherent) if thermal is None else np.asarray(thermal, float)
        self.shots = shots
        self.q = exact_probabilities(self.model, self.truth, self.coherent, self.thermal)

    def scan(self, rng):
        counts = simulated_counts(self.q, self.shots, rng)
        return scan_from_arrays(self.coherent, self.thermal, counts, source="<simulated>")


def on_off_fisher_per_shot(efficiency, mean_photons, dark_probability=0.0):
    """Fisher information per shot about the efficiency from on/off clicks with a coherent
    probe of mean ``mean_photons``: I = m^2 (1-p)/p, p = 1 - (1-d) exp(-eta m)
    (binomial click statistics; see REFERENCES.md, Formulas)."""
    m = np.asarray(mean_photons, float)
    p = 1.0 - (1.0 - dark_probability) * np.exp(-efficiency * m)
    return m**2 * (1.0 - p) / p
