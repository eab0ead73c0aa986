"""A validated container for a phase-insensitive POVM."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["POVM"]

COMPLETENESS_TOLERANCE = 1e-12


@dataclass(frozen=True)
class POVM:
    """Diagonal POVM ``theta[k, n] = P(outcome k | n photons)``.

    ``elements`` has shape (n_outcomes, n_photons); it must be non-negative and every column
    must sum to one within ``COMPLETENESS_TOLERANCE``. Entries that are negative by less than
    the tolerance (rounding) are accepted as they are.
    """

    elements: np.ndarray

    def __post_init__(self):
        theta = np.array(self.elements, dtype=float)
        if theta.ndim != 2 or theta.shape[0] < 2 or theta.shape[1] < 1:
            raise ValueError(f"POVM elements must have shape (n_outcomes >= 2, n_photons >= 1), got {theta.shape}")
        if not np.all(np.isfinite(theta)):
            raise ValueError("POVM elements contain NaN or infinity")
        worst_negative = theta.min()
        if worst_negative < -COMPLETENESS_TOLERANCE:
            k, n = np.unravel_index(np.argmin(theta), theta.shape)
            raise ValueError(f"POVM element {k} is negative at {n} photons ({worst_negative:.3g})")
        deviation = np.abs(theta.sum(axis=0) - 1.0)
        if deviation.max() > COMPLETENESS_TOLERANCE:
            n = int(np.argmax(deviation))
            raise ValueError(f"POVM columns must sum to 1; at {n} photons the sum is off by {deviation[n]:.3g}")
        theta.setflags(write=False)
        object.__setattr__(self, "elements", theta)

    @property
    def n_outcomes(self) -> int:
        return self.elements.shape[0]

    @property
    def n_photons(self) -> int:
        return self.elements.shape[1]

    def coarse_grain(self, groups) -> "POVM":
        """Merge outcomes: ``groups`` is a sequence of sequences of outcome indices, which must
        partition 0..n_outcomes-1. The new outcome i is the sum of the elements in groups[i]."""
        flat = sorted(int(k) for g in groups for k in g)
        if flat != list(range(self.n_outcomes)):
            raise ValueError(f"groups must partition the outcomes 0..{self.n_outcomes - 1} exactly once each")
        return POVM(np.stack([self.elements[list(g)].sum(axis=0) for g in groups]))

    def to_threshold(self) -> "POVM":
        """On/off coarse graining: outcome 0 vs everything else."""
        return self.coarse_grain([[0], list(range(1, self.n_outcomes))])

    def outcome_probabilities(self, photon_distribution) -> np.ndarray:
        """q[..., k] = sum_n P(n) theta[k, n] for distributions of shape (..., n_photons)."""
        return np.asarray(photon_distribution) @ self.elements.T

    @property
    def vacuum_click_probability(self) -> float:
        return float(1.0 - self.elements[0, 0])
