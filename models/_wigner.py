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
from jax import lax

__all__ = ["fock_wigner_table", "povm_wigner", "saturating_wigner"]


@partial(jax.jit, static_argnums=1)
def fock_wigner_table(alpha, n_photons: int):
    """W_n(alpha) of |n><n| for n = 0..n_photons-1: shape (n_photons, *alpha.shape)."""
    x = 4.0 * jnp.abs(jnp.asarray(alpha)) ** 2
    x = x.astype(jnp.float64)

    def step(carry, n):
        f_prev, f_curr, log2_scale = carry
        f_next = ((2.0 * n + 1.0 - x) * f_curr - n * f_prev) / (n + 1.0)
        big = jnp.maximum(jnp.abs(f_next), jnp.abs(f_curr))
        exponent = jnp.where(big > 0, jnp.round(jnp.log2(jnp.where(big > 0, big, 1.0))), 0.0)
        factor = jnp.exp2(-exponent)
        return (f_curr * factor, f_next * factor, log2_scale + exponent), (f_next, log2_scale)

    init = (jnp.zeros_like(x), jnp.ones_like(x), jnp.zeros_like(x))
    _, (f_rest, scale_rest) = lax.scan(step, init, jnp.arange(n_photons - 1, dtype=jnp.float64))
    f = jnp.concatenate([jnp.ones_like(x)[None], f_rest])
    log2_scale = jnp.concatenate([jnp.zeros_like(x)[None], scale_rest])
    signs = jnp.where(jnp.arange(n_photons) % 2 == 0, 1.0, -1.0).reshape((-1,) + (1,) * x.ndim)
    return (2.0 / math.pi) * signs * f * jnp.exp(log2_scale * math.log(2.0) - x / 2.0)


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


@jax.jit
def saturating_wigner(theta_head, alpha):
    """Wigner values of elements that saturate at M photons (theta(n) = theta(M) for n >= M).

    ``theta_head`` has shape (n_outcomes, M+1) holding theta(0..M). Exact form:
    W = theta(M)/pi + (2/pi) e^{-2|alpha|^2} sum_{n<M} (theta(n) - theta(M)) (-1)^n L_n(4|alpha|^2).
    Returns shape (n_outcomes, *alpha.shape).
    """
    theta_head = jnp.asarray(theta_head, dtype=jnp.float64)
    top = theta_head[:, -1]
    alpha = jnp.asarray(alpha)
    constant = top.reshape((-1,) + (1,) * alpha.ndim) / math.pi
    m = theta_head.shape[1] - 1
    if m == 0:
        return constant * jnp.ones_like(jnp.abs(alpha))[None]
    table = fock_wigner_table(alpha, m)
    return constant + jnp.tensordot(theta_head[:, :-1] - top[:, None], table, axes=(1, 0))
