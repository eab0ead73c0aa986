"""Photon-number distributions of the probe states.

Conventions: photon numbers are mean photons per shot at the reference plane;
``coherent_photons`` is |alpha|^2 and ``thermal_photons`` is the thermal mean nbar.
Every distribution returns an array of shape ``(n_photons,)`` holding p(0) ... p(n_photons-1).

The displaced thermal distribution (Lachs, Phys. Rev. 138, B1012 (1965)) is

    p(n) = nbar^n / (1+nbar)^(n+1) * exp(-A/(1+nbar)) * L_n(-A/(nbar(1+nbar))),   A = |alpha|^2.

It is evaluated by the three-term Laguerre recurrence written for u_n = r^n L_n(-x),
r = nbar/(1+nbar), x = A/(nbar(1+nbar)):

    u_{n+1} = [(r(2n+1) + A/(1+nbar)^2) u_n - n r^2 u_{n-1}] / (n+1),

which stays finite at nbar = 0 (it becomes the Poisson recurrence) and at A = 0 (geometric).
For x >= 0 the Laguerre polynomials are the dominant solution, so the forward recurrence is
stable. Each step is renormalised by an exact power of two held outside the derivative, so
nothing overflows or underflows before the final product.
"""
from __future__ import annotations

import math
from functools import lru_cache

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from ._stages import _DEVIANCE_SERIES_BELOW, _deviance_series, _stirling_errors

__all__ = [
    "fock_distribution",
    "coherent_distribution",
    "thermal_distribution",
    "displaced_thermal_distribution",
    "squeezed_vacuum_distribution",
    "choose_cutoff",
    "probe_distributions",
    "probe_distributions_numpy",
    "tail_mass",
]


def _power_of_two_scale(value):
    """Exact power of two near |value| (1 for value == 0), outside the derivative."""
    magnitude = jnp.abs(lax.stop_gradient(value))
    exponent = jnp.where(magnitude > 0, jnp.round(jnp.log2(jnp.where(magnitude > 0, magnitude, 1.0))), 0.0)
    return exponent


def displaced_thermal_distribution(coherent_photons, thermal_photons, n_photons: int):
    """p(n), n = 0..n_photons-1, of D(alpha) rho_th(nbar) D(alpha)^dagger.

    Args:
        coherent_photons: |alpha|^2 >= 0 (scalar).
        thermal_photons: nbar >= 0 (scalar).
        n_photons: number of photon numbers returned (static int).
    Returns:
        Array of shape ``(n_photons,)``. Differentiable in both photon-number arguments.
    """
    a = jnp.asarray(coherent_photons, dtype=jnp.float64)
    nbar = jnp.asarray(thermal_photons, dtype=jnp.float64)
    r = nbar / (1.0 + nbar)
    drive = a / (1.0 + nbar) ** 2
    log_prefactor = -a / (1.0 + nbar) - jnp.log1p(nbar)

    def step(carry, n):
        u_prev, u_curr, log2_scale = carry
        u_next = ((r * (2.0 * n + 1.0) + drive) * u_curr - n * r * r * u_prev) / (n + 1.0)
        exponent = _power_of_two_scale(u_next)
        factor = jnp.exp2(-exponent)
        new_carry = (u_curr * factor, u_next * factor, log2_scale + exponent)
        return new_carry, (u_next, log2_scale)

    ns = jnp.arange(n_photons - 1, dtype=jnp.float64)
    init = (jnp.zeros_like(a), jnp.ones_like(a), jnp.zeros_like(a))
    _, (u_rest, log2_rest) = lax.scan(step, init, ns)
    u = jnp.concatenate([jnp.ones((1,), dtype=jnp.float64) * jnp.ones_like(a), u_rest])
    log2_scale = jnp.concatenate([jnp.zeros((1,), dtype=jnp.float64), log2_rest])
    return jnp.exp(log_prefactor + log2_scale * math.log(2.0)) * u


def coherent_distribution(coherent_photons, n_photons: int):
    """Poisson distribution of a coherent state with mean ``coherent_photons``."""
    return displaced_thermal_distribution(coherent_photons, 0.0, n_photons)


def thermal_distribution(thermal_photons, n_photons: int):
    """Geometric (Bose-Einstein) distribution with mean ``thermal_photons``."""
    return displaced_thermal_distribution(0.0, thermal_photons, n_photons)


def fock_distribution(photons: int, n_photons: int):
    """Number state |photons>: a one-hot vector of shape ``(n_photons,)``."""
    if not 0 <= int(photons) < n_photons:
        raise ValueError(f"fock state with {photons} photons needs n_photons > {photons}, got {n_photons}")
    return jnp.zeros(n_photons, dtype=jnp.float64).at[int(photons)].set(1.0)


def squeezed_vacuum_distribution(mean_photons, n_photons: int):
    """Squeezed vacuum with mean photon number s = sinh^2(r).

    p(2m) = (2m)! / (2^m m!)^2 * tanh(r)^(2m) / cosh(r), p(odd) = 0
    (e.g. Gerry & Knight, Introductory Quantum Optics, eq. 7.77).
    With tanh^2 r = s/(1+s) and cosh r = sqrt(1+s).
    """
    s = jnp.asarray(mean_photons, dtype=jnp.float64)
    ratio = s / (1.0 + s)
    m = jnp.arange((n_photons + 1) // 2, dtype=jnp.float64)
    # p(2m+2)/p(2m) = (2m+1)/(2m+2) * ratio: a cumulative product, safe at s = 0.
    factors = jnp.concatenate([jnp.ones(1), (2 * m[:-1] + 1) / (2 * m[:-1] + 2) * ratio])
    even = jnp.cumprod(factors) / jnp.sqrt(1.0 + s)
    full = jnp.zeros(2 * m.shape[0], dtype=jnp.float64).at[::2].set(even)
    return full[:n_photons]


def probe_distributions_numpy(coherent, thermal, n_photons: int) -> np.ndarray:
    """Numpy twin of :func:`probe_distributions` (same recurrence, logarithmic rescaling, nothing
    to compile): shape (n_probes, n_photons). For evaluations outside JAX transformations."""
    a = np.asarray(coherent, dtype=float)[:, None]
    nbar = np.asarray(thermal, dtype=float)[:, None]
    r = nbar / (1 + nbar)
    drive = a / (1 + nbar) ** 2
    log_prefactor = -a / (1 + nbar) - np.log1p(nbar)
    out = np.empty((a.shape[0], n_photons))
    u_prev = np.zeros_like(a)
    u_curr = np.ones_like(a)
    log_scale = np.zeros_like(a)
    out[:, :1] = np.exp(log_prefactor)
    for n in range(n_photons - 1):
        u_next = ((r * (2 * n + 1) + drive) * u_curr - n * r * r * u_prev) / (n + 1)
        scale = np.where(u_next > 0, u_next, 1.0)
        out[:, n + 1 : n + 2] = np.exp(log_prefactor + log_scale + np.log(scale)) * (u_next > 0)
        u_prev, u_curr = u_curr / scale, u_next / scale
        log_scale = log_scale + np.log(scale)
    return out


def _generous_bound(coherent, thermal):
    coherent = np.asarray(coherent, dtype=float)
    thermal = np.asarray(thermal, dtype=float)
    mean = coherent + thermal
    sd = np.sqrt(thermal * (thermal + 1) + coherent * (2 * thermal + 1))
    # A geometric tail of mean nbar falls by e per (nbar + 1/2) photons; 40 e-folds reach 1e-17.
    return int(np.max(mean + 40 * sd + 40 * (thermal + 0.5) + 40))


def tail_mass(coherent, thermal, n_photons: int) -> np.ndarray:
    """Probability mass at photon numbers >= n_photons, for each probe (numpy arrays)."""
    coherent = np.atleast_1d(np.asarray(coherent, dtype=float))
    thermal = np.atleast_1d(np.asarray(thermal, dtype=float))
    bound = max(_generous_bound(coherent, thermal), n_photons + 1)
    p = probe_distributions_numpy(coherent, thermal, bound)
    return p[:, n_photons:].sum(axis=1)


_CUTOFF_CHUNK_ENTRIES = 8_000_000  # probes x photon numbers of the recurrence held at once (64 MB)


def _first_below_tolerance(first: int, row, tolerance: float, bound: int) -> int:
    """Smallest n whose tail mass (at n' >= n) is below ``tolerance``, for P(n) given from
    n = ``first`` on (summed from the top for accuracy); ``bound`` when none is."""
    tail = np.cumsum(row[::-1])[::-1]
    below = np.nonzero(tail < tolerance)[0]
    return first + int(below[0]) if below.size else bound


def choose_cutoff(coherent, thermal, tolerance: float = 1e-10, limit: int | None = None) -> int:
    """Smallest number of photon numbers n_max such that every probe's mass at n >= n_max is
    below ``tolerance``.

    Args:
        coherent, thermal: arrays of probe photon numbers (|alpha|^2 and nbar).
        tolerance: allowed neglected tail mass per probe.
        limit: if given, raise ValueError when the cutoff would exceed it.
    Returns:
        n_max as an int: photon numbers 0 .. n_max-1 are kept.
    """
    coherent = np.atleast_1d(np.asarray(coherent, dtype=float))
    thermal = np.atleast_1d(np.asarray(thermal, dtype=float))
    bound = _generous_bound(coherent, thermal)
    if limit is not None and bound > 50 * limit:
        raise ValueError(f"the brightest probe needs a photon-number cutoff far above {limit}")
    # the tails fall monotonically, so the cutoff is the largest of the probes' own cutoffs;
    # pure coherent probes in closed form on their window, the others by the recurrence
    poisson = (thermal == 0) & (coherent > 0)
    cutoffs = [_first_below_tolerance(*pure_probe_row(c, 0.0, bound), tolerance, bound) for c in coherent[poisson]]
    others = np.nonzero(~poisson)[0]
    chunk = max(1, _CUTOFF_CHUNK_ENTRIES // bound)
    for start in range(0, others.size, chunk):
        rows = probe_distributions_numpy(coherent[others[start : start + chunk]], thermal[others[start : start + chunk]], bound)
        cutoffs.extend(_first_below_tolerance(0, row, tolerance, bound) for row in rows)
    cutoff = max(max(cutoffs), 2)
    if limit is not None and cutoff > limit:
        raise ValueError(f"the brightest probe needs a photon-number cutoff of {cutoff} (limit {limit})")
    return cutoff


def probe_distributions(coherent, thermal, n_photons: int):
    """Displaced thermal distributions of a batch of probes: shape ``(n_probes, n_photons)``."""
    return jax.vmap(lambda a, t: displaced_thermal_distribution(a, t, n_photons))(
        jnp.asarray(coherent, dtype=jnp.float64), jnp.asarray(thermal, dtype=jnp.float64)
    )


def pure_probe_row(coherent: float, thermal: float, n_photons: int) -> tuple[int, np.ndarray]:
    """(first, P(first), ..., P(last)) of a pure coherent (thermal = 0) or pure thermal
    (coherent = 0) probe over a window holding all but about 1e-20 of its mass below
    ``n_photons``. Poisson by Loader's saddle-point form exp(-delta(n) - D(n, mean)) /
    sqrt(2 pi n) (C. Loader, "Fast and accurate computation of binomial probabilities", 2000;
    delta the Stirling error, D the deviance term, no large logarithm subtracted), thermal as
    the geometric nbar^n / (1 + nbar)^(n+1); only the window is evaluated."""
    if coherent > 0 and thermal > 0:
        raise ValueError("pure_probe_row: a displaced-thermal probe has no closed form here")
    if coherent == 0:  # thermal (or vacuum): geometric from 0
        last = min(n_photons, _generous_bound([0.0], [thermal]))
        n = np.arange(last, dtype=float)
        if thermal == 0:
            return 0, (n == 0).astype(float)
        return 0, np.exp(n * np.log(thermal / (1.0 + thermal)) - np.log1p(thermal))
    spread = 12.0 * np.sqrt(coherent) + 40.0  # Poisson tails beyond 12 sd hold < 1e-30
    first = min(int(max(0.0, coherent - spread)), max(n_photons - 1, 0))
    last = min(n_photons, int(coherent + spread) + 1)
    return first, poisson_pmf(np.arange(first, last), coherent)


def poisson_pmf(n, mean: float) -> np.ndarray:
    """Poisson pmf at integers n >= 0 by Loader's saddle-point form, accurate to a few ulps
    times (1 + |ln pmf|) for any mean."""
    n = np.asarray(n, dtype=float)
    safe = np.maximum(n, 1.0)
    stirling = _stirling_table(int(safe.max()) + 1)[safe.astype(np.int64)]
    out = np.exp(-stirling - _poisson_deviance(safe, mean)) / np.sqrt(2.0 * np.pi * safe)
    return np.where(n == 0, np.exp(-mean), out)


@lru_cache(maxsize=4)
def _stirling_table_of_size(size: int) -> np.ndarray:
    return _stirling_errors(size)


def _stirling_table(size: int) -> np.ndarray:
    """Stirling errors delta(0..size-1) or more, one table per power of two (remembered)."""
    return _stirling_table_of_size(1 << max(int(size - 1).bit_length(), 7))


def _poisson_deviance(x, mean: float) -> np.ndarray:
    """D(x, m) = x ln(x/m) + m - x for x >= 1: the series of Loader near the mean, else the
    well-conditioned x log1p((x - m)/m) - (x - m) (as ``_stages._deviance_term``)."""
    difference = x - mean
    v = difference / (x + mean)
    series = _deviance_series(x, difference, v)
    near = np.abs(v) < _DEVIANCE_SERIES_BELOW
    closed = x * np.log1p(np.where(near, 0.0, difference / mean)) - difference
    return np.where(near, series, closed)
