"""Sampling from a detector: outcomes per shot, outcome histograms and pixel click patterns.

Pure numpy functions (numpy, not JAX: sampling is memory-bound and numpy's generator is
fast); every sampler takes an explicit ``numpy.random.Generator``. Conventions as in the
rest of ``povmfit.models``: a POVM is ``theta[k, n] = P(outcome k | n photons)`` of shape
(n_outcomes, n_photons), columns summing to one.

Per-shot outcomes (:func:`sample_outcomes`) use inverse-CDF sampling with a guide table
(C. Chen and H. Asau, "On generating random variates from an empirical distribution",
AIIE Transactions 6, 163 (1974)): the unit interval is cut into ``GUIDE_BINS`` equal bins;
for every photon number a table says which outcome covers a whole bin. One uniform per
shot and one table look-up give the outcome; the few shots that land in a bin containing a
cumulative-probability edge are finished by an exact comparison with the cumulative
column. The result is exactly inverse-CDF sampling (no approximation), in memory linear in
the number of shots.

Click patterns of a multiplexed array:

- uniform split (every pixel equally likely): the whole detector chain (loss, spreading,
  dark clicks, crosstalk) is symmetric under permuting pixels, so given k fired pixels the
  pattern is a uniformly random k-subset. :func:`uniform_subset_patterns` draws one by
  ranking all 2^N patterns by popcount once and picking one uniformly inside the block of
  popcount k (N <= ``MAX_TABLE_PIXELS``), or by ranking random keys for larger N.
- unequal split: the pattern law given k is not uniform, so :func:`split_array_patterns`
  simulates the physical chain pixel by pixel: detected photons are shared out by
  sequential conditional binomials (photons in pixel i ~ Binomial(remaining, r_i / (r_i +
  ... + r_N))), silent pixels click with the dark probability, then one generation of
  crosstalk as in :func:`povmfit.models.pixel_crosstalk_matrix`.
"""
from __future__ import annotations

import numpy as np

__all__ = [
    "GUIDE_BINS",
    "MAX_TABLE_PIXELS",
    "ResponseTable",
    "response_table",
    "sample_outcomes",
    "sample_counts",
    "uniform_subset_patterns",
    "split_array_patterns",
    "apply_pixel_crosstalk",
]

GUIDE_BINS = 4096  # a power of two: u * GUIDE_BINS and the bin edges are exact in binary
MAX_TABLE_PIXELS = 20  # 2^20 patterns (4 MiB of uint32) is the largest pattern table kept


class ResponseTable:
    """Pre-computed inverse-CDF tables of a POVM (build with :func:`response_table`).

    Attributes:
        inner_edges: cumulative probabilities, shape (n_outcomes - 1, n_photons): outcome k
            is chosen for a uniform u when exactly k edges of column n are <= u.
        guide: flat int32 array (n_photons * GUIDE_BINS): outcome covering the whole bin, or -1.
        n_outcomes, n_photons: POVM shape.
    """

    def __init__(self, inner_edges: np.ndarray, guide: np.ndarray):
        self.inner_edges = inner_edges
        self.guide = guide
        self.n_outcomes = inner_edges.shape[0] + 1
        self.n_photons = inner_edges.shape[1]


def response_table(theta) -> ResponseTable:
    """Build the sampling tables of a POVM ``theta`` of shape (n_outcomes, n_photons)."""
    theta = np.asarray(theta, dtype=float)
    if theta.ndim != 2 or theta.shape[0] < 1 or theta.shape[1] < 1:
        raise ValueError(f"theta must have shape (n_outcomes, n_photons), got {theta.shape}")
    inner = np.cumsum(theta, axis=0)[:-1]
    # columns sum to one up to rounding: scale the edges so the last one is exactly 1
    inner = np.ascontiguousarray(np.clip(inner / theta.sum(axis=0), 0.0, 1.0))
    n_photons = theta.shape[1]
    starts = np.arange(GUIDE_BINS) / GUIDE_BINS
    guide = np.empty((n_photons, GUIDE_BINS), dtype=np.int32)
    for n in range(n_photons):
        edges = inner[:, n]
        low = np.searchsorted(edges, starts, side="right")  # edges <= bin start
        high = np.searchsorted(edges, starts + 1.0 / GUIDE_BINS, side="left")  # edges < bin end
        guide[n] = np.where(low == high, low, -1)
    return ResponseTable(inner, guide.ravel())


def sample_outcomes(table: ResponseTable, photon_numbers, rng: np.random.Generator) -> np.ndarray:
    """One outcome per shot for the given photon numbers (inverse-CDF sampling).

    Args:
        table: from :func:`response_table`.
        photon_numbers: integer array (any shape) of photon numbers 0 .. table.n_photons-1
            arriving at the detector, one per shot.
        rng: numpy Generator; one uniform is drawn per shot.
    Returns:
        int32 array of outcomes, same shape as ``photon_numbers``.
    """
    photons = np.asarray(photon_numbers)
    if photons.size and not np.issubdtype(photons.dtype, np.integer):
        raise ValueError(f"photon numbers must be integers, got dtype {photons.dtype}")
    flat = photons.reshape(-1)
    if flat.size and (flat.min() < 0 or flat.max() >= table.n_photons):
        raise ValueError(
            f"photon numbers must lie in 0..{table.n_photons - 1}, got {flat.min()}..{flat.max()}"
        )
    u = rng.random(flat.size)
    index = (u * GUIDE_BINS).astype(np.intp)
    index += flat * GUIDE_BINS
    out = np.take(table.guide, index)
    unresolved = np.flatnonzero(out < 0)
    if unresolved.size:
        n = flat[unresolved]
        u_left = u[unresolved]
        k = np.zeros(unresolved.size, dtype=np.int32)
        for row in table.inner_edges:
            k += u_left >= row[n]
        out[unresolved] = k
    return out.reshape(photons.shape)


def sample_counts(probabilities, shots: int, rng: np.random.Generator) -> np.ndarray:
    """Outcome histogram of ``shots`` independent shots: Multinomial(shots, probabilities).

    ``probabilities`` has shape (..., n_outcomes); it is renormalised to absorb rounding.
    Returns int64 counts of the same shape.
    """
    q = np.clip(np.asarray(probabilities, dtype=float), 0.0, None)
    q = q / q.sum(axis=-1, keepdims=True)
    return rng.multinomial(int(shots), q)


_PATTERN_TABLES: dict[int, tuple[np.ndarray, np.ndarray]] = {}


def _patterns_by_popcount(pixels: int) -> tuple[np.ndarray, np.ndarray]:
    """All 2^pixels bitmasks sorted by popcount, and where each popcount block starts."""
    if pixels not in _PATTERN_TABLES:
        masks = np.arange(1 << pixels, dtype=np.uint32)
        popcount = np.zeros(masks.size, dtype=np.int64)
        for bit in range(pixels):
            popcount += (masks >> bit) & 1
        order = np.argsort(popcount, kind="stable")
        starts = np.searchsorted(popcount[order], np.arange(pixels + 2))
        _PATTERN_TABLES[pixels] = (masks[order], starts)
    return _PATTERN_TABLES[pixels]


def _masks_to_patterns(masks: np.ndarray, pixels: int) -> np.ndarray:
    bits = np.arange(pixels, dtype=np.uint32)
    return ((masks[:, None] >> bits) & 1).astype(bool)


def uniform_subset_patterns(fired, pixels: int, rng: np.random.Generator) -> np.ndarray:
    """A uniformly random set of ``fired[s]`` pixels out of ``pixels`` for every shot s.

    Args:
        fired: integer array (shots,), each in 0..pixels.
    Returns:
        bool array (shots, pixels); row s has exactly fired[s] True entries.
    """
    fired = np.asarray(fired, dtype=np.int64).reshape(-1)
    if fired.size and (fired.min() < 0 or fired.max() > pixels):
        raise ValueError(f"fired pixel numbers must lie in 0..{pixels}")
    if pixels <= MAX_TABLE_PIXELS:
        masks, starts = _patterns_by_popcount(pixels)
        block = starts[fired + 1] - starts[fired]  # C(pixels, k)
        pick = starts[fired] + (rng.random(fired.size) * block).astype(np.int64)
        return _masks_to_patterns(masks[pick], pixels)
    ranks = np.argsort(np.argsort(rng.random((fired.size, pixels)), axis=1), axis=1)
    return ranks < fired[:, None]


def apply_pixel_crosstalk(patterns, crosstalk_probability: float, rng: np.random.Generator) -> np.ndarray:
    """One generation of crosstalk on click patterns (bool (shots, pixels)), in place of a copy.

    Each fired pixel, with probability ``crosstalk_probability``, tries to fire one other pixel
    chosen uniformly among the remaining pixels - 1; pixels fired by crosstalk do not try
    again (the model of :func:`povmfit.models.pixel_crosstalk_matrix`).
    """
    patterns = np.array(patterns, dtype=bool, copy=True)
    shots, pixels = patterns.shape
    if pixels < 2 or crosstalk_probability <= 0.0:
        return patterns
    tries = patterns & (rng.random((shots, pixels)) < crosstalk_probability)
    source_shot, source_pixel = np.nonzero(tries)
    offset = rng.integers(1, pixels, size=source_pixel.size)  # uniform among the other pixels
    target = (source_pixel + offset) % pixels
    patterns[source_shot, target] = True
    return patterns


def split_array_patterns(
    detected_photons, ratios, dark_probability: float, crosstalk_probability: float, rng: np.random.Generator
) -> np.ndarray:
    """Click patterns of an array with splitting probabilities ``ratios`` (sum one).

    Args:
        detected_photons: integer array (shots,): photons left after loss, one per shot.
        ratios: array (pixels,) of splitting probabilities.
        dark_probability: per-pixel probability that a silent pixel clicks on its own.
        crosstalk_probability: see :func:`apply_pixel_crosstalk`.
    Returns:
        bool array (shots, pixels).
    """
    remaining = np.asarray(detected_photons, dtype=np.int64).reshape(-1).copy()
    ratios = np.asarray(ratios, dtype=float)
    pixels = ratios.size
    # share of the not-yet-assigned photons that goes to pixel i
    rest = np.cumsum(ratios[::-1])[::-1]
    patterns = np.zeros((remaining.size, pixels), dtype=bool)
    for i in range(pixels):
        share = 1.0 if i == pixels - 1 else min(ratios[i] / rest[i], 1.0) if rest[i] > 0 else 0.0
        here = rng.binomial(remaining, share)
        patterns[:, i] = here > 0
        remaining -= here
    if dark_probability > 0.0:
        patterns |= rng.random(patterns.shape) < dark_probability
    return apply_pixel_crosstalk(patterns, crosstalk_probability, rng)
