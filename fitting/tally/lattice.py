"""An exact one-pass histogram of a stream of numbers on a fixed lattice of bins.

Bin j covers ``[j h, (j+1) h)`` for a width ``h`` chosen from the first block (its range
divided by :data:`FIRST_BINS`). Later blocks extend the occupied index range; when it would
exceed :data:`MAX_BINS` bins, pairs of neighbouring bins are merged (h doubles), which is
exact because the lattice stays anchored at 0. Memory is bounded by ``MAX_BINS`` counts
whatever the number of values; the result does not depend on the block size except through
the width ``h`` chosen from the first block.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["LatticeHistogram", "FIRST_BINS", "MAX_BINS"]

FIRST_BINS = 16384
MAX_BINS = 1 << 21


class LatticeHistogram:
    """Accumulates counts of float values on the lattice ``[j h, (j+1) h)``."""

    def __init__(self, width: float | None = None):
        self.width = width
        self.first = 0  # lattice index of counts[0]
        self.counts = np.zeros(0, dtype=np.int64)
        self.total = 0
        self.minimum = math.inf
        self.maximum = -math.inf

    def _choose_width(self, values: np.ndarray) -> None:
        lo, hi = float(values.min()), float(values.max())
        span = hi - lo if hi > lo else max(abs(hi), 1.0)
        raw = span / FIRST_BINS
        self.width = 2.0 ** math.floor(math.log2(raw))  # a power of two: j h is exact

    def _index_range(self, lo: int, hi: int) -> None:
        """Make counts cover lattice indices lo..hi, merging pairs while too wide."""
        if self.counts.size == 0:
            self.first, self.counts = lo, np.zeros(hi - lo + 1, dtype=np.int64)
            return
        new_first = min(lo, self.first)
        new_last = max(hi, self.first + self.counts.size - 1)
        if new_first != self.first or new_last != self.first + self.counts.size - 1:
            grown = np.zeros(new_last - new_first + 1, dtype=np.int64)
            grown[self.first - new_first:self.first - new_first + self.counts.size] = self.counts
            self.first, self.counts = new_first, grown

    def _merge_pairs(self) -> None:
        first = self.first
        if first % 2:  # start on an even index so pairs are (2i, 2i+1)
            self.counts = np.concatenate([[0], self.counts])
            first -= 1
        if self.counts.size % 2:
            self.counts = np.concatenate([self.counts, [0]])
        self.counts = self.counts.reshape(-1, 2).sum(axis=1)
        self.first = first // 2
        self.width *= 2.0

    def add(self, values: np.ndarray) -> None:
        """Add a block of finite float values."""
        if values.size == 0:
            return
        if self.width is None:
            self._choose_width(values)
        lo_value, hi_value = float(values.min()), float(values.max())
        self.minimum, self.maximum = min(self.minimum, lo_value), max(self.maximum, hi_value)
        while True:
            lo, hi = math.floor(lo_value / self.width), math.floor(hi_value / self.width)
            span_first = min(lo, self.first) if self.counts.size else lo
            span_last = max(hi, self.first + self.counts.size - 1) if self.counts.size else hi
            if span_last - span_first + 1 <= MAX_BINS:
                break
            self._merge_pairs()
        self._index_range(lo, hi)
        index = np.floor(values * (1.0 / self.width)).astype(np.int64)
        index -= self.first
        self.counts += np.bincount(index, minlength=self.counts.size)[: self.counts.size]
        self.total += int(values.size)

    def edges(self) -> np.ndarray:
        """Bin edges, shape (n_bins + 1,)."""
        return (self.first + np.arange(self.counts.size + 1)) * self.width

    def trimmed(self) -> tuple[np.ndarray, np.ndarray]:
        """(edges, counts) without empty bins at either end."""
        nonzero = np.nonzero(self.counts)[0]
        if nonzero.size == 0:
            return np.zeros(1), np.zeros(0, dtype=np.int64)
        a, b = nonzero[0], nonzero[-1] + 1
        return self.edges()[a:b + 1], self.counts[a:b].copy()
