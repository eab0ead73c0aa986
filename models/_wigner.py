"""Wigner functions of diagonal POVM elements.

Normalisation (alpha is the complex amplitude, W integrates over d(Re alpha) d(Im alpha)):

    W(alpha) = (2/pi) sum_n theta(n) (-1)^n exp(-2|alpha|^2) L_n(4|alpha|^2)

so the identity has W = 1/pi everywhere and the vacuum projector has W(0) = 2/pi.
The functions f_n(x) = exp(-x/2) L_n(x), x = 4|alpha|^2, come from the three-term Laguerre
recurrence, renormalised by exact powers of two so that large |alpha| neither under- nor
overflows.
"""
from __future__ import annotations

import math
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

__all__ = ["fock_wigner_table", "fock_wigner_table_numpy", "povm_wigner", "saturating_wigner"]


def _laguerre_step(xp, x, n, f_prev, f_curr, log2_scale):
    """One step of f_{n+1} = ((2n+1-x) f_n - n f_{n-1})/(n+1), f_n = e^{-x/2} L_n(x) up to the
    factor 2^log2_scale; both kept values are renormalised by an exact power of two."""
    f_next = ((2.0 * n + 1.0 - x) * f_curr - n * f_prev) / (n + 1.0)
    big = xp.maximum(xp.abs(f_next), xp.abs(f_curr))
    exponent = xp.where(big > 0, xp.round(xp.log2(xp.where(big > 0, big, 1.0))), 0.0)
    factor = xp.exp2(-exponent)
    return f_curr * factor, f_next * factor, log2_scale + exponent


def _wigner_from_recurrence(xp, x, f, log2_scale, n_photons):
    signs = xp.where(xp.arange(n_photons) % 2 == 0, 1.0, -1.0).reshape((-1,) + (1,) * x.ndim)
    return (2.0 / math.pi) * signs * f * xp.exp(log2_scale * math.log(2.0) - x / 2.0)


@partial(jax.jit, static_argnums=1)
def fock_wigner_table(alpha, n_photons: int):
    """W_n(alpha) of |n><n| for n = 0..n_photons-1: shape (n_photons, *alpha.shape)."""
    x = (4.0 * jnp.abs(jnp.asarray(alpha)) ** 2).astype(jnp.float64)

    def step(carry, n):
        carry = _laguerre_step(jnp, x, n, *carry)
        return carry, (carry[1], carry[2])

    init = (jnp.zeros_like(x), jnp.ones_like(x), jnp.zeros_like(x))
    _, (f_rest, scale_rest) = lax.scan(step, init, jnp.arange(n_photons - 1, dtype=jnp.float64))
    f = jnp.concatenate([jnp.ones_like(x)[None], f_rest])
    log2_scale = jnp.concatenate([jnp.zeros_like(x)[None], scale_rest])
    return _wigner_from_recurrence(jnp, x, f, log2_scale, n_photons)


def fock_wigner_table_numpy(alpha, n_photons: int) -> np.ndarray:
    """Numpy twin of :func:`fock_wigner_table` (same recurrence, nothing to compile): for
    evaluations outside JAX transformations."""
    x = 4.0 * np.abs(np.asarray(alpha)) ** 2
    f = np.empty((n_photons,) + x.shape)
    log2_scale = np.empty_like(f)
    f[0], log2_scale[0] = 1.0, 0.0
    carry = (np.zeros_like(x), np.ones_like(x), np.zeros_like(x))
    for n in range(n_photons - 1):
        carry = _laguerre_step(np, x, float(n), *carry)
        f[n + 1], log2_scale[n + 1] = carry[1], carry[2]
    return _wigner_from_recurrence(np, x, f, log2_scale, n_photons)


def povm_wigner(theta, alpha):
    """Wigner values of every POVM element: shape (n_outcomes, *alpha.shape).

    The alternating sum over n converges only for elements that vanish at large n, so the
    POVM is continued beyond its last photon number by that last column (theta(n) =
    theta(n_photons-1) for larger n) and evaluated in the saturating form. Choose
    ``n_photons`` where the detector response has settled; then the identity gives 1/pi
    exactly and the click elements are right at every alpha.

    Args:
        theta: POVM elements, shape (n_outcomes, n_photons).
        alpha: complex amplitudes, any shape.
    """
    return saturating_wigner(theta, alpha)


def saturating_wigner(theta_head, alpha):
    """Wigner values of elements that saturate at M photons (theta(n) = theta(M) for n >= M).

    ``theta_head`` has shape (n_outcomes, M+1) holding theta(0..M). Exact form:
    W = theta(M)/pi + (2/pi) e^{-2|alpha|^2} sum_{n<M} (theta(n) - theta(M)) (-1)^n L_n(4|alpha|^2).
    Returns shape (n_outcomes, *alpha.shape). With numpy inputs the result is a numpy array
    computed without JAX (no compilation); with JAX inputs it is traceable.
    """
    if isinstance(theta_head, jax.Array) or isinstance(alpha, jax.Array):
        return _saturating_wigner_jax(theta_head, alpha)
    theta_head = np.asarray(theta_head, dtype=float)
    alpha = np.asarray(alpha)
    return _saturating_sum(np, theta_head, alpha, fock_wigner_table_numpy)


@jax.jit
def _saturating_wigner_jax(theta_head, alpha):
    return _saturating_sum(jnp, jnp.asarray(theta_head, dtype=jnp.float64), jnp.asarray(alpha), fock_wigner_table)


def _saturating_sum(xp, theta_head, alpha, table_of):
    top = theta_head[:, -1]
    constant = top.reshape((-1,) + (1,) * alpha.ndim) / math.pi
    m = theta_head.shape[1] - 1
    if m == 0:
        return constant * xp.ones_like(xp.abs(alpha))[None]
    return constant + xp.tensordot(theta_head[:, :-1] - top[:, None], table_of(alpha, m), axes=(1, 0))
