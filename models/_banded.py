"""Banded storage of probe photon-number distributions.

A probe's distribution is concentrated in a band of photon numbers around its mean
(|alpha|^2 + nbar), so the probe matrix ``F[p, n] = P_p(n)`` of shape (n_probes, n_photons)
is stored as one window per probe: ``values[p, j] = P_p(starts[p] + j)`` for
j = 0..width-1. Every entry outside the window is below the stated tolerance in total mass
(the two tails together) and is dropped; photon numbers >= n_photons are never stored.

Conventions as in ``_probes``: ``coherent`` is |alpha|^2, ``thermal`` is nbar, both in mean
photons per shot at the reference plane. Displaced-thermal probes are the Lachs form,
evaluated by the same rescaled Laguerre recurrence as ``_probes`` (run from n = 0 to the end
of the probe's window). Pure coherent and pure thermal probes are evaluated in closed form on
their window alone (``_probes.pure_probe_row``), so their cost does not grow with the mean.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._probes import _generous_bound, probe_distributions_numpy, pure_probe_row

__all__ = ["BandedProbeMatrix", "banded_probe_distributions"]

_CHUNK_ENTRIES = 8_000_000  # probes x photon numbers computed at once (64 MB of float64)


@dataclass(frozen=True)
class BandedProbeMatrix:
    """Probe distributions stored per probe window.

    Attributes:
        values: shape (n_probes, width); ``values[p, j] = P_p(starts[p] + j)``, zero where
            ``starts[p] + j >= n_photons``.
        starts: shape (n_probes,), first photon number of each window (int64).
        n_photons: number of photon numbers 0..n_photons-1 the matrix stands for.
    """

    values: np.ndarray
    starts: np.ndarray
    n_photons: int

    @property
    def n_probes(self) -> int:
        return self.values.shape[0]

    @property
    def width(self) -> int:
        return self.values.shape[1]

    def dense(self) -> np.ndarray:
        """The full matrix, shape (n_probes, n_photons). Only for problems that fit in memory."""
        out = np.zeros((self.n_probes, self.n_photons + self.width))
        rows = np.arange(self.n_probes)[:, None]
        out[rows, self.starts[:, None] + np.arange(self.width)[None, :]] = self.values
        return out[:, : self.n_photons]

    def column_weights(self, probe_weights) -> np.ndarray:
        """sum_p probe_weights[p] * F[p, n] for every n: shape (n_photons,)."""
        out = np.zeros(self.n_photons + self.width)
        columns = self.starts[:, None] + np.arange(self.width)[None, :]
        np.add.at(out, columns.ravel(), (np.asarray(probe_weights, dtype=float)[:, None] * self.values).ravel())
        return out[: self.n_photons]


def _trim(row: np.ndarray, tolerance: float) -> tuple[int, int]:
    """Smallest [lo, hi) keeping all but ``tolerance`` of the mass (half on each side)."""
    left = np.cumsum(row)
    right = np.cumsum(row[::-1])[::-1]
    lo = int(np.searchsorted(left, tolerance / 2, side="right"))
    above = np.nonzero(right < tolerance / 2)[0]
    hi = int(above[0]) if above.size else row.size
    lo = min(lo, max(hi - 1, 0))
    return lo, max(hi, lo + 1)


def banded_probe_distributions(coherent, thermal, n_photons: int, tolerance: float = 1e-12) -> BandedProbeMatrix:
    """Windowed displaced-thermal distributions of a batch of probes.

    Args:
        coherent: |alpha|^2 of each probe, shape (n_probes,).
        thermal: nbar of each probe, shape (n_probes,).
        n_photons: photon numbers 0..n_photons-1 are represented.
        tolerance: mass per probe that may be dropped from the two tails of its window
            (mass at n >= n_photons is not counted here: choose ``n_photons`` with
            ``choose_cutoff``).
    Returns:
        :class:`BandedProbeMatrix` whose common width is the widest probe window.
    """
    coherent = np.atleast_1d(np.asarray(coherent, dtype=float))
    thermal = np.atleast_1d(np.asarray(thermal, dtype=float))
    n_probes = coherent.size
    windows = [None] * n_probes
    pure = (coherent == 0) | (thermal == 0)
    for p in np.nonzero(pure)[0]:
        first, row = pure_probe_row(coherent[p], thermal[p], n_photons)
        lo, hi = _trim(row, tolerance)
        windows[p] = (first + lo, row[lo:hi].copy())
    mixed = np.nonzero(~pure)[0]
    chunk = max(1, _CHUNK_ENTRIES // max(n_photons, 1))
    for start in range(0, mixed.size, chunk):
        probes = mixed[start : start + chunk]
        reach = min(n_photons, _generous_bound(coherent[probes], thermal[probes]))
        for p, row in zip(probes, probe_distributions_numpy(coherent[probes], thermal[probes], reach)):
            lo, hi = _trim(row, tolerance)
            windows[p] = (lo, row[lo:hi].copy())
    width = max(len(w) for _, w in windows)
    values = np.zeros((n_probes, width))
    starts = np.zeros(n_probes, dtype=np.int64)
    for p, (lo, window) in enumerate(windows):
        lo = min(lo, max(n_photons - width, 0))  # keep every window inside 0..n_photons-1
        starts[p] = lo
        stop = min(lo + width, n_photons)
        values[p, : stop - lo] = _displaced_slice(windows[p], lo, stop)
    return BandedProbeMatrix(values=values, starts=starts, n_photons=int(n_photons))


def _displaced_slice(window, lo: int, stop: int) -> np.ndarray:
    """Entries lo..stop-1 of a trimmed window (zeros where the window had dropped them)."""
    start, data = window
    out = np.zeros(stop - lo)
    a, b = max(start, lo), min(start + data.size, stop)
    if b > a:
        out[a - lo : b - lo] = data[a - start : b - start]
    return out

