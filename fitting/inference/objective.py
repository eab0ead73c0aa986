"""Predicted outcome probabilities, deviance residuals and Fisher information, compiled once.

Data flow: probe photon numbers (scaled by the probe-calibration factor) -> displaced thermal
photon-number distributions P[p, n] -> model POVM theta[k, n] -> q[p, k] = sum_n P[p, n]
theta[k, n] -> residuals against the raw counts.

The residual of cell (p, k) is the signed square root of its multinomial deviance,

    r = sign(o - e) sqrt(2 [o log(o/e) - (o - e)]),   e = shots_p q[p, k],

so sum r^2 is the deviance and least squares on r is maximum likelihood. The Pearson option
uses r = (o - e)/sqrt(e). With a calibration prior one more residual (s - 1)/sigma is
appended (a Gaussian prior on the probe scale s).

Every function here is compiled once per (model, scan shape, cutoff) and takes the data as
arguments, so refits (bootstrap, profiles, cross-validation) reuse the compiled code.
"""
from __future__ import annotations

from functools import lru_cache

import jax
import jax.numpy as jnp
import numpy as np

from povmfit.models import DetectorModel, choose_cutoff, probe_distributions, probe_distributions_numpy

__all__ = [
    "predicted_probabilities", "compiled", "povm_and_jacobian", "fixed_probe_distributions", "fit_cutoff",
    "SCALE_SPAN", "PROBABILITY_FLOOR", "cell_residuals", "cell_residual_derivative",
]

PROBABILITY_FLOOR = 1e-300
SCALE_SPAN = 6.0  # a fitted probe-calibration scale is explored within 1 +- 6 sigma
_CUTOFFS: dict = {}


def fit_cutoff(scan, calibration_uncertainty=None, tolerance: float = 1e-10) -> int:
    """Photon-number cutoff of a fit to the scan's probes, wide enough for the largest probe
    scale the fit explores (remembered per probe set: refits of the same probes, as in
    bootstraps and cross-validation, do not recompute it)."""
    top = 1.0 + SCALE_SPAN * calibration_uncertainty if calibration_uncertainty else 1.0
    coherent = np.asarray(scan.coherent_photons, float) * top
    thermal = np.asarray(scan.thermal_photons, float) * top
    key = (coherent.tobytes(), thermal.tobytes(), float(tolerance))
    if key not in _CUTOFFS:
        if len(_CUTOFFS) > 256:
            _CUTOFFS.clear()
        _CUTOFFS[key] = choose_cutoff(coherent, thermal, tolerance)
    return _CUTOFFS[key]


def predicted_probabilities(model: DetectorModel, params, scale, coherent, thermal, n_photons: int):
    """q[p, k]: outcome probabilities of every probe, shape (n_probes, n_outcomes).

    ``scale`` multiplies both photon numbers of every probe (probe calibration).
    """
    distributions = probe_distributions(scale * coherent, scale * thermal, n_photons)
    theta = model.povm(params, n_photons)
    return distributions @ theta.T


def _deviance_residuals(q, counts, shots):
    expected = shots[:, None] * jnp.maximum(q, PROBABILITY_FLOOR)
    observed = counts
    difference = observed - expected
    positive_obs = observed > 0
    safe_obs = jnp.where(positive_obs, observed, 1.0)
    cell = 2.0 * (jnp.where(positive_obs, observed * jnp.log(safe_obs / expected), 0.0) - difference)
    small = jnp.abs(difference) < 1e-6 * expected
    # near o = e the deviance ~ (o-e)^2/e: use that form to keep the derivative finite
    root = jnp.sqrt(jnp.where(small, 1.0, jnp.maximum(cell, 0.0)))
    return jnp.where(small, difference / jnp.sqrt(expected), jnp.sign(difference) * root)


def _pearson_residuals(q, counts, shots):
    expected = shots[:, None] * jnp.maximum(q, PROBABILITY_FLOOR)
    return (counts - expected) / jnp.sqrt(expected)


class _Compiled:
    """Jitted functions for one model, cutoff and weighting."""

    def __init__(self, model: DetectorModel, n_photons: int, weighting: str, calibrated: bool):
        self.model = model
        self.n_photons = n_photons
        self.calibrated = calibrated
        residual_cells = _deviance_residuals if weighting == "deviance" else _pearson_residuals
        n_model = len(model.parameter_names)

        def split(x):
            return (x[:n_model], x[n_model]) if calibrated else (x, 1.0)

        def probabilities(x, coherent, thermal):
            params, scale = split(x)
            return predicted_probabilities(model, params, scale, coherent, thermal, n_photons)

        def residuals(x, coherent, thermal, counts, shots, prior_width):
            cells = residual_cells(probabilities(x, coherent, thermal), counts, shots).ravel()
            if calibrated:
                cells = jnp.concatenate([cells, ((x[n_model] - 1.0) / prior_width)[None]])
            return cells

        def probabilities_and_jacobian(x, coherent, thermal):
            jac = jax.jacfwd(probabilities)(x, coherent, thermal)
            return probabilities(x, coherent, thermal), jac

        # fits with a calibration prior form residuals, their Jacobian and the Fisher
        # information in numpy from the first function; the JAX residuals serve the
        # vectorised bootstrap
        self.probabilities_and_jacobian = jax.jit(probabilities_and_jacobian)
        self.probabilities = jax.jit(probabilities)
        self.residuals = jax.jit(residuals)


@lru_cache(maxsize=64)
def compiled(model: DetectorModel, n_photons: int, weighting: str = "deviance", calibrated: bool = False) -> _Compiled:
    """Compiled objective functions for a model and cutoff (cached)."""
    if weighting not in ("deviance", "pearson"):
        raise ValueError(f"weighting must be 'deviance' or 'pearson', got {weighting!r}")
    return _Compiled(model, n_photons, weighting, calibrated)


_DISTRIBUTIONS: dict = {}


def fixed_probe_distributions(coherent, thermal, n_photons: int) -> np.ndarray:
    """P[p, n] of probes taken as exact, shape (n_probes, n_photons), remembered per probe set."""
    coherent = np.asarray(coherent, dtype=float)
    thermal = np.asarray(thermal, dtype=float)
    key = (coherent.tobytes(), thermal.tobytes(), n_photons)
    if key not in _DISTRIBUTIONS:
        if len(_DISTRIBUTIONS) > 64:
            _DISTRIBUTIONS.clear()
        _DISTRIBUTIONS[key] = probe_distributions_numpy(coherent, thermal, n_photons)
    return _DISTRIBUTIONS[key]


@lru_cache(maxsize=64)
def povm_and_jacobian(model: DetectorModel, n_photons: int):
    """Compiled ``x -> (theta[k, n], d theta[k, n] / d x[i])``, shapes (K, N) and (K, N, P).

    One function per model and cutoff serves the fits with exact probes (whose probe
    distributions are constant), the datasheet figures and the cross-check.
    """
    def povm(x):
        theta = model.povm(x, n_photons)
        return theta, theta

    return jax.jit(lambda x: jax.jacfwd(povm, has_aux=True)(x)[::-1])


def cell_residuals(q, counts, shots, weighting: str = "deviance") -> np.ndarray:
    """Numpy twin of the residuals above, shape (n_probes, n_outcomes)."""
    expected = shots[:, None] * np.maximum(q, PROBABILITY_FLOOR)
    difference = counts - expected
    if weighting == "pearson":
        return difference / np.sqrt(expected)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_term = np.where(counts > 0, counts * np.log(np.where(counts > 0, counts, 1.0) / expected), 0.0)
    cell = np.maximum(2.0 * (log_term - difference), 0.0)
    small = np.abs(difference) < 1e-6 * expected
    return np.where(small, difference / np.sqrt(expected), np.sign(difference) * np.sqrt(cell))


def cell_residual_derivative(q, residuals, counts, shots, weighting: str = "deviance") -> np.ndarray:
    """d r / d q for every cell (r depends on its own q only), shape (n_probes, n_outcomes)."""
    expected = shots[:, None] * np.maximum(q, PROBABILITY_FLOOR)
    difference = counts - expected
    if weighting == "pearson":
        # r = (o - e) e^(-1/2): dr/de = -e^(-1/2) - (o - e) e^(-3/2) / 2
        dr_de = -1.0 / np.sqrt(expected) - 0.5 * difference / expected**1.5
    else:
        small = np.abs(difference) < 1e-6 * expected
        safe_r = np.where(small, 1.0, residuals)
        dr_de = np.where(small, -1.0 / np.sqrt(expected), -(difference / expected) / safe_r)
    return dr_de * shots[:, None]
