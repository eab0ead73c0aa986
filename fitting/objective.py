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

from povmfit.models import DetectorModel, probe_distributions

__all__ = ["predicted_probabilities", "compiled", "PROBABILITY_FLOOR"]

PROBABILITY_FLOOR = 1e-300


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

        def fisher(x, coherent, thermal, shots, prior_width):
            """Expected Fisher information of the multinomial counts (plus the prior)."""
            jac = jax.jacfwd(probabilities)(x, coherent, thermal)  # (p, k, params)
            q = jnp.maximum(probabilities(x, coherent, thermal), PROBABILITY_FLOOR)
            info = jnp.einsum("p,pki,pkj->ij", shots, jac / q[..., None], jac)
            if calibrated:
                info = info.at[n_model, n_model].add(1.0 / prior_width**2)
            return info

        self.probabilities = jax.jit(probabilities)
        self.probability_jacobian = jax.jit(jax.jacfwd(probabilities))
        self.residuals = jax.jit(residuals)
        self.jacobian = jax.jit(jax.jacfwd(residuals))
        self.fisher = jax.jit(fisher)
        self.deviance = jax.jit(lambda *a: jnp.sum(residuals(*a) ** 2))
        self.batched_deviance = jax.jit(jax.vmap(lambda x, *a: jnp.sum(residuals(x, *a) ** 2), in_axes=(0,) + (None,) * 5))


@lru_cache(maxsize=64)
def compiled(model: DetectorModel, n_photons: int, weighting: str = "deviance", calibrated: bool = False) -> _Compiled:
    """Compiled objective functions for a model and cutoff (cached)."""
    if weighting not in ("deviance", "pearson"):
        raise ValueError(f"weighting must be 'deviance' or 'pearson', got {weighting!r}")
    return _Compiled(model, n_photons, weighting, calibrated)
