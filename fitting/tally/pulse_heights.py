"""From pulse heights to outcome counts: read every probe's heights, fit the peak model jointly,
set the thresholds, count each probe's triggers per outcome, and build the misassignment matrix.

The steps, each explained where it lives: reading (:mod:`.streams`, exact lattice histograms
from :mod:`.lattice`, or the user's histogram), the fit (:mod:`.spectra`), then here:

* the largest outcome K: ``max_photons`` when given (refused when peaks K-1 and K are not
  separable), else the smallest K >= 1 for which every probe registers more than K photons
  with fitted probability below :data:`TOP_TAIL`, lowered to the last separable peak;
* thresholds at the densities' crossings, each snapped to the nearest bin edge of every
  probe's histogram (lattice bins of raw heights are far narrower than any peak); a snap
  that moves a threshold by more than :data:`SNAP_LIMIT` peak widths is refused (bins too
  coarse). The counts are exact sums of the bins between the applied thresholds;
* the misassignment matrix at the fitted thresholds, with columns for every registered
  number up to where outcome K is certain (to 1e-12).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from povmfit.models import probe_distributions_numpy

from povmfit.fitting.data.errors import ArgumentError, InputFileError
from povmfit.fitting.tally import spectra as sp
from povmfit.fitting.tally.lattice import LatticeHistogram
from povmfit.fitting.tally.streams import read_histogram, read_numbers

__all__ = ["PulseHeightCounts", "count_pulse_heights", "TOP_TAIL", "SNAP_LIMIT", "MAX_COLUMNS"]

TOP_TAIL = 1e-3  # default K: every probe registers more than K photons with probability below this
SNAP_LIMIT = 0.25  # largest threshold shift from snapping to a bin edge, in widths of the narrower peak
MAX_COLUMNS = 2000
_CERTAIN = 1e-12


@dataclass(frozen=True)
class PulseHeightCounts:
    """What the pulse-height tally computed (the workflow wraps it into the public result).

    Fields: ``entries`` (the PROBES rows), ``spectra`` (binned as fitted), ``fit``
    (:class:`~povmfit.fitting.tally.spectra.SpectrumFit`), ``max_outcome`` K, ``thresholds``
    (K,), ``applied`` (n_probes, K) thresholds as snapped to each probe's bins, ``counts``
    (n_probes, K+1), ``matrix`` (K+1, n_columns), ``separation`` (equal-prior misassignment of
    neighbouring peaks 0|1 .. K-1|K), ``triggers`` (n_probes,)."""

    entries: tuple
    spectra: tuple
    fit: sp.SpectrumFit
    max_outcome: int
    thresholds: np.ndarray
    applied: np.ndarray
    counts: np.ndarray
    matrix: np.ndarray
    separation: np.ndarray
    triggers: np.ndarray


def _read(entry, progress):
    """(edges or None, lo, hi, counts) of one probe; lattice edges for raw heights."""
    task = f"reading {entry.label}"
    if entry.kind == "histogram":
        lo, hi, counts = read_histogram(entry.path, entry.name)
        return None, lo, hi, counts
    lattice = LatticeHistogram()
    for block in read_numbers(entry.path, entry.name, "pulse height", progress, task):
        lattice.add(block)
    if lattice.total == 0:
        raise InputFileError(f"{entry.name}: empty spectrum (no pulse heights)")
    edges, counts = lattice.trimmed()
    return edges, edges[:-1], edges[1:], counts


def count_pulse_heights(entries, probes_name: str, max_photons=None, quadratic: bool = False,
                        progress=None) -> PulseHeightCounts:
    """Run the whole pulse-height tally on the checked PROBES rows (see the module docstring)."""
    binned, spectra = [], []
    for entry in entries:
        edges, lo, hi, counts = _read(entry, progress)
        binned.append((edges, lo, hi, counts))
        if edges is not None:
            fit_lo, fit_hi, fit_counts = sp.fit_bins(edges, counts)
        else:
            fit_lo, fit_hi, fit_counts = sp.merged_bins(lo, hi, counts, 4 * sp.FIT_BINS)  # user bins may be wide
        spectra.append(sp.Spectrum(entry.label, entry.coherent_photons, entry.thermal_photons, fit_lo, fit_hi,
                                   fit_counts, entry.name))
    if progress is not None:
        progress("fitting the peaks", 0, 1)
    fit = sp.fit_spectra(spectra, quadratic)
    if fit is None:
        raise InputFileError(f"{probes_name}: no separable peaks: the probes' summed spectrum shows fewer than two "
                             "peaks (is the detector number resolving, and do the probes carry light?)")
    if progress is not None:
        progress("fitting the peaks", 1, 1)
    values = fit.values
    top = max(fit.n_peaks - 1, 1, max_photons or 0)
    limit = sp.separable_limit(values, top)
    if limit < 1:
        error = sp.pair_errors(values, 1)[0]
        raise InputFileError(f"{probes_name}: no separable peaks: peaks 0 and 1 overlap (equal-prior misassignment "
                             f"{error:.2f}, at most {sp.SEPARABLE_ERROR} allowed)")
    if max_photons is not None:
        if max_photons > limit:
            error = sp.pair_errors(values, limit + 1)[limit]
            raise ArgumentError(f"max_photons: peaks {limit} and {limit + 1} are not separable (equal-prior "
                                f"misassignment {error:.2f}); give at most {limit}")
        max_outcome = int(max_photons)
    else:
        max_outcome = min(_default_top(entries, values["efficiency"], fit.n_peaks), limit)
    cuts = sp.thresholds(values, max_outcome)
    widths = sp.peak_widths(values, np.arange(max_outcome + 1))
    applied = np.zeros((len(entries), max_outcome))
    counts = np.zeros((len(entries), max_outcome + 1), dtype=np.int64)
    for p, (entry, (edges, lo, hi, bins)) in enumerate(zip(entries, binned)):
        applied[p], counts[p] = _count(entry, edges, lo, hi, bins, cuts, widths)
    n_columns = _columns(values, cuts, max(fit.n_peaks, max_outcome + 1))
    matrix = sp.misassignment_matrix(values, cuts, n_columns)
    matrix = matrix / matrix.sum(axis=0, keepdims=True)
    return PulseHeightCounts(tuple(entries), tuple(spectra), fit, max_outcome, cuts, applied, counts, matrix,
                             sp.pair_errors(values, max_outcome), np.array([b[3].sum() for b in binned]))


def _default_top(entries, efficiency: float, n_peaks: int) -> int:
    coherent = np.array([e.coherent_photons for e in entries]) * efficiency
    thermal = np.array([e.thermal_photons for e in entries]) * efficiency
    p = probe_distributions_numpy(coherent, thermal, n_peaks + 1)
    above = 1.0 - np.cumsum(p, axis=1)  # above[:, k] = P(n > k)
    worst = above.max(axis=0)
    small = np.nonzero(worst < TOP_TAIL)[0]
    return max(int(small[0]) if small.size else n_peaks, 1)


def _count(entry, edges, lo, hi, bins, cuts, widths):
    """Thresholds snapped to the probe's bin edges, and the counts between them."""
    candidates = edges if edges is not None else np.union1d(lo, hi)
    nearest = np.clip(np.searchsorted(candidates, cuts), 1, max(candidates.size - 1, 1))
    left, right = candidates[nearest - 1], candidates[np.minimum(nearest, candidates.size - 1)]
    applied = np.where(np.abs(cuts - left) <= np.abs(right - cuts), left, right)
    for k, (cut, snapped) in enumerate(zip(cuts, applied)):
        inside = candidates[0] < cut < candidates[-1]
        allowed = SNAP_LIMIT * min(widths[k], widths[k + 1])
        if inside and abs(snapped - cut) > allowed:
            raise InputFileError(f"{entry.name}: the histogram's bins are too coarse at the threshold between "
                                 f"{k} and {k + 1} photons ({cut:.6g}; nearest bin edge {snapped:.6g}, more than "
                                 f"{SNAP_LIMIT} peak widths away)")
        if not inside:
            applied[k] = cut  # every bin lies on one side: the count is exact as it is
    outcome = np.searchsorted(applied, lo, side="right")  # bins starting at or above t_k belong to k or higher
    counts = np.bincount(outcome, weights=bins, minlength=cuts.size + 1)
    return applied, np.rint(counts).astype(np.int64)


def _columns(values: dict, cuts: np.ndarray, start: int) -> int:
    """Columns of the misassignment matrix: at least ``start``, then until outcome K is certain."""
    n = start
    while n < MAX_COLUMNS:
        last = sp.misassignment_matrix(values, cuts, n)[-1, -1]
        if last >= 1 - _CERTAIN:
            return n
        n += max(1, n // 4)
    return MAX_COLUMNS
