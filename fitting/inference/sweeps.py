"""Figures of a bias sweep that practitioners quote: the efficiency plateau and the bias at
which the dark click probability crosses a limit. Pure computation on per-scan figures.

Plateau. The plateau is the contiguous bias range, around the bias of highest measured
efficiency, where the efficiency is at least ``(1 - fraction)`` times its maximum (default
fraction 0.01). Its ends are found by linear interpolation between neighbouring bias points;
an end that reaches the edge of the sweep is reported at that edge and flagged ``open``.
The maximum of noisy points sits above the true maximum (it picks the luckiest point), so
the plateau level is bias-corrected with the same parametric draws that give the
uncertainties: level = max(observed) - (mean of the drawn maxima - max(observed)).

Dark limit. The bias at which the vacuum click probability first reaches ``limit`` going up
in bias, interpolating log(probability) linearly between the bracketing points (dark counts
rise about exponentially with bias).

Uncertainties: parametric Monte Carlo. Each point's figure is drawn independently from a
normal distribution with its standard error (the efficiency's *statistical* error: the probe
calibration is common to the scans of one sweep and scales every efficiency alike, which
leaves a relative criterion unchanged) or, for the dark probability, a log-normal with the
delta-method width stderr/value; every figure is recomputed per draw. ``stderr`` is the
standard deviation of the draws and ``ci95`` the estimate +- 1.96 stderr. Draws in which a
figure is undefined (no crossing) are counted in ``undefined_fraction``.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["plateau", "dark_limit_crossing", "DRAWS"]

DRAWS = 4000


def _sorted(bias, values, stderr):
    bias, values, stderr = (np.asarray(a, dtype=float) for a in (bias, values, stderr))
    order = np.argsort(bias, kind="stable")
    return bias[order], values[order], np.nan_to_num(stderr[order])


def _edges(bias: np.ndarray, eta: np.ndarray, threshold: float) -> tuple[float, float, bool, bool]:
    """(start, end, open_start, open_end) of the run of eta >= threshold around the maximum."""
    top = int(np.argmax(eta))
    low = top
    while low > 0 and eta[low - 1] >= threshold:
        low -= 1
    high = top
    while high < len(eta) - 1 and eta[high + 1] >= threshold:
        high += 1
    start, open_start = bias[low], low == 0
    if low > 0:
        start = _interpolate(bias[low - 1], bias[low], eta[low - 1], eta[low], threshold)
    end, open_end = bias[high], high == len(eta) - 1
    if high < len(eta) - 1:
        end = _interpolate(bias[high], bias[high + 1], eta[high], eta[high + 1], threshold)
    return start, end, open_start, open_end


def _interpolate(x0, x1, y0, y1, level) -> float:
    if y1 == y0:
        return 0.5 * (x0 + x1)
    return x0 + (level - y0) / (y1 - y0) * (x1 - x0)


def _figure(value, draws, note=None, **extra) -> dict:
    finite = draws[np.isfinite(draws)]
    stderr = float(np.std(finite, ddof=1)) if finite.size > 1 else math.nan
    out = {"value": float(value), "stderr": stderr, "ci95": [float(value - 1.96 * stderr), float(value + 1.96 * stderr)],
           "undefined_fraction": float(1 - finite.size / draws.size), **extra}
    if note:
        out["note"] = note
    return out


def plateau(bias, efficiency, stderr, fraction: float = 0.01, *, draws: int = DRAWS, seed: int = 0) -> dict:
    """The efficiency plateau of a bias sweep (see the module docstring).

    Args:
        bias: (n,) bias values (any unit; the results are in the same unit), distinct.
        efficiency: (n,) efficiencies; stderr: (n,) their statistical standard errors.
        fraction: relative distance below the maximum still counted as plateau (0 < f < 1).
        draws, seed: Monte Carlo draws for the uncertainties, and their seed.

    Returns {``start``, ``end``, ``width``, ``efficiency``}: figures with ``value``,
    ``stderr``, ``ci95`` and ``undefined_fraction``; ``start``/``end`` carry ``open`` (the
    plateau reaches that edge of the sweep, so the true edge may lie beyond it).
    """
    bias, eta, se = _sorted(bias, efficiency, stderr)
    rng = np.random.default_rng(seed)
    sample = eta + se * rng.standard_normal((draws, eta.size))
    drawn_max = sample.max(axis=1)
    shift = float(drawn_max.mean() - eta.max())
    level = float(eta.max()) - shift
    start, end, open_start, open_end = _edges(bias, eta, (1 - fraction) * level)
    ends = np.array([_edges(bias, row, (1 - fraction) * (top - shift))[:2] for row, top in zip(sample, drawn_max)])
    return {
        "start": _figure(start, ends[:, 0], "the plateau reaches the lowest bias of the sweep" if open_start else None,
                         open=open_start),
        "end": _figure(end, ends[:, 1], "the plateau reaches the highest bias of the sweep" if open_end else None,
                       open=open_end),
        "width": _figure(end - start, ends[:, 1] - ends[:, 0]),
        "efficiency": _figure(level, drawn_max - 2 * shift, maximum_observed=float(eta.max())),
    }


def _first_crossing(bias: np.ndarray, p: np.ndarray, limit: float) -> float:
    above = np.flatnonzero(p >= limit)
    if above.size == 0 or above[0] == 0:
        return math.nan
    i = int(above[0])
    if p[i - 1] > 0:
        return _interpolate(bias[i - 1], bias[i], math.log(p[i - 1]), math.log(p[i]), math.log(limit))
    return _interpolate(bias[i - 1], bias[i], p[i - 1], p[i], limit)


def dark_limit_crossing(bias, probability, stderr, limit: float, *, draws: int = DRAWS, seed: int = 0) -> dict:
    """The bias where the vacuum click probability first reaches ``limit`` (module docstring).

    Returns a figure (``value``, ``stderr``, ``ci95``, ``undefined_fraction``, ``limit``);
    ``value`` is NaN with a ``note`` when the sweep never crosses the limit from below.
    """
    bias, p, se = _sorted(bias, probability, stderr)
    value = _first_crossing(bias, p, limit)
    rng = np.random.default_rng(seed)
    width = np.where(p > 0, se / np.where(p > 0, p, 1.0), 0.0)
    sample = p * np.exp(width * rng.standard_normal((draws, p.size)))
    drawn = np.array([_first_crossing(bias, row, limit) for row in sample])
    note = None
    if math.isnan(value):
        note = ("above the limit already at the lowest bias" if p.size and p[0] >= limit
                else "the limit is not reached within the sweep")
    return _figure(value, drawn, note, limit=float(limit))
