"""Detector stages: pure JAX functions returning column-stochastic matrices.

A stage maps a distribution over ``n_in`` input values (photons, pixels fired, counts) to a
distribution over ``n_out`` output values: ``M[out, in] = P(out | in)``; every column sums to
one. A detector's POVM is the product of its stages (see ``_families``).

Every continuous parameter enters through expressions whose derivative is finite at the
edges of its range (efficiency 1, dark probability 0, crosstalk 0), so Jacobians stay exact
where fits most often end up.
"""
from __future__ import annotations

import decimal
import functools

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.special import ndtr
from scipy.special import gammaln

__all__ = [
    "loss_matrix",
    "uniform_pixel_matrix",
    "split_pixel_matrix",
    "click_dark_matrix",
    "poisson_dark_matrix",
    "pixel_crosstalk_matrix",
    "borel_crosstalk_matrix",
    "readout_matrix",
    "saturation_matrix",
]

_SQRT_TWO_PI_DIGITS = "2.506628274631000502415765284811045253006986740609938316629923"
_EXACT_STIRLING_BELOW = 100  # Stirling errors below this are summed in 50-digit decimals
_DEVIANCE_SERIES_BELOW = 0.25  # |x - m|/(x + m) below this uses the series of the deviance term
_DEVIANCE_SERIES_TERMS = 15  # 0.25^(2*15) < 1e-18: the series is exhausted in double precision


def _powers(x, count: int):
    """x^0 .. x^(count-1) by repeated multiplication: exact derivative at x = 0."""
    return jnp.cumprod(jnp.concatenate([jnp.ones(1), jnp.full(count - 1, 1.0) * x]))


@functools.lru_cache(maxsize=8)
def _stirling_errors(size: int) -> np.ndarray:
    """delta(n) = ln n! - (n + 1/2) ln n + n - ln sqrt(2 pi) for n = 0..size-1 (delta(0) = 0, unused).

    Below 100 the value is summed exactly in 50-digit decimal arithmetic; above, the Stirling
    series 1/(12n) - 1/(360n^3) + 1/(1260n^5) - 1/(1680n^7) + 1/(1188n^9), whose next term is
    below 1e-21 there. Both are correct to the last bit of a double.
    """
    table = np.zeros(size)
    with decimal.localcontext() as context:
        context.prec = 50
        log_root = decimal.Decimal(_SQRT_TWO_PI_DIGITS).ln()
        log_factorial = decimal.Decimal(0)
        for n in range(1, min(size, _EXACT_STIRLING_BELOW)):
            d = decimal.Decimal(n)
            log_factorial += d.ln()
            table[n] = float(log_factorial - (d + decimal.Decimal("0.5")) * d.ln() + d - log_root)
    if size > _EXACT_STIRLING_BELOW:
        n = np.arange(_EXACT_STIRLING_BELOW, size, dtype=float)
        nn = n * n
        table[_EXACT_STIRLING_BELOW:] = (1 / 12 - (1 / 360 - (1 / 1260 - (1 / 1680 - 1 / 1188 / nn) / nn) / nn) / nn) / n
    table.setflags(write=False)
    return table


def _split_product(n, p):
    """n * p = high + low exactly (Dekker's product by Veltkamp splitting, no fused multiply-add)."""
    high = n * p
    factor = 134217729.0  # 2^27 + 1
    n_big = factor * n
    n_hi = n_big - (n_big - n)
    n_lo = n - n_hi
    p_big = factor * p
    p_hi = p_big - (p_big - p)
    p_lo = p - p_hi
    low = ((n_hi * p_hi - high) + n_hi * p_lo + n_lo * p_hi) + n_lo * p_lo
    return high, low


def _log1p(z):
    """log(1 + z) to a few ulps using only ``log`` (XLA's own log1p is off by up to ~100 ulps
    on CPU): log(u) z/(u - 1) with u = 1 + z rounded (D. Goldberg, ACM Comput. Surv. 23, 5
    (1991), theorem 4). The correction factor z/(u - 1), within an ulp of 1, is held out of
    the derivative, which is then 1/u = 1/(1 + z) to rounding."""
    u = 1.0 + z
    exact = u == 1.0
    factor = jax.lax.stop_gradient(jnp.where(exact, 1.0, z / jnp.where(exact, 1.0, u - 1.0)))
    return jnp.where(exact, z, jnp.log(u) * factor)


def _deviance_series(x, difference, v):
    """Loader's series of the deviance term near the mean, ``(x - m) v + 2 x sum_j
    v^(2j+1)/(2j+1)`` with v = (x - m)/(x + m), by Horner's rule: plain arithmetic, so numpy
    and JAX arrays alike."""
    v2 = v * v
    tail = 0.0
    for j in range(_DEVIANCE_SERIES_TERMS, 0, -1):
        tail = v2 * (1.0 / (2 * j + 1) + tail)
    return difference * v + 2.0 * x * v * tail


def _deviance_term(x, trials, p):
    """D(x, m) = x ln(x/m) + m - x with m = trials * p, for x >= 1 and m > 0.

    ``x - m`` is formed from the exact product ``trials * p`` so that the deviance keeps full
    relative accuracy even for 10^6 trials. Near the mean (|v| < 1/4) the series
    ``(x - m) v + 2 x sum_j v^(2j+1)/(2j+1)``, v = (x - m)/(x + m) (C. Loader, "Fast and
    accurate computation of binomial probabilities", 2000) is summed by Horner's rule;
    elsewhere ``x log1p((x - m)/m) - (x - m)`` is well conditioned.
    """
    high, low = _split_product(trials, p)
    difference = (x - high) - low
    mean = high + low
    v = difference / (x + mean)
    series = _deviance_series(x, difference, v)
    near = jnp.abs(v) < _DEVIANCE_SERIES_BELOW
    closed = x * _log1p(jnp.where(near, 0.0, difference / mean)) - difference
    return jnp.where(near, series, closed)


def _binomial_pmf(p, trials, successes, size: int):
    """Binomial pmf C(n, k) p^k (1-p)^(n-k) elementwise, accurate to a few ulps (relative) for
    every n < ``size`` (0 outside 0 <= k <= n).

    Inside 0 < p < 1 the saddle-point form of Loader (2000) is used:
    ``sqrt(n / (2 pi k (n-k))) exp(delta(n) - delta(k) - delta(n-k) - D(k, np) - D(n-k, nq))``
    with the Stirling errors ``delta`` and deviance terms ``D`` (:func:`_deviance_term`), so no
    large logarithm is ever subtracted; its rounding grows only with |ln pmf|, never with n.
    ``k = 0`` and ``k = n`` are ``q^n`` and ``p^n``. At p = 0 or 1 a power table gives the
    exact value and the exact first and second derivatives. ``trials`` and ``successes`` are integer arrays of
    one shape (numpy or JAX).
    """
    n = jnp.asarray(trials)
    k = jnp.asarray(successes)
    valid = (k >= 0) & (k <= n)
    k = jnp.where(valid, k, 0)
    n = jnp.where(valid, n, 0)
    rest = n - k
    middle = (k > 0) & (rest > 0)
    nf = n.astype(jnp.float64)
    kf = jnp.where(middle, k, 1).astype(jnp.float64)
    rf = jnp.where(middle, rest, 1).astype(jnp.float64)
    mf = jnp.where(middle, nf, 2.0)
    stirling = jnp.asarray(_stirling_errors(size))
    log_correction = stirling[n] - stirling[k] - stirling[rest]
    root = jnp.sqrt(mf / (2.0 * np.pi * kf * rf))

    def interior(p):
        p_safe = jnp.where((p > 0.0) & (p < 1.0), p, 0.5)
        q_safe = 1.0 - p_safe
        saddle = root * jnp.exp(log_correction - _deviance_term(kf, mf, p_safe) - _deviance_term(rf, mf, q_safe))
        ends = jnp.exp(nf * jnp.where(k == 0, _log1p(-p_safe), jnp.log(p_safe)))
        return jnp.where(middle, saddle, ends)

    def edge(p):
        # p = 0 or 1: C(n, k) p^k q^(n-k) from power tables. Only C(n, j) with j = min(k, n-k)
        # <= 2 is kept: the other entries and their first and second derivatives vanish there.
        fewest = jnp.minimum(k, rest)
        comb = jnp.where(fewest == 0, 1.0, jnp.where(fewest == 1, nf, jnp.where(fewest == 2, nf * (nf - 1) / 2, 0.0)))
        return comb * _powers(p, size)[k] * _powers(1.0 - p, size)[rest]

    inside = (p > 0.0) & (p < 1.0)
    return jnp.where(valid, jnp.where(inside, interior(p), edge(p)), 0.0)


_binomial_pmf_compiled = jax.jit(_binomial_pmf, static_argnums=3)


def _binomial_table(p, trials: np.ndarray, successes: np.ndarray):
    """Binomial pmf C(trials, successes) p^successes (1-p)^(trials-successes), elementwise.

    ``trials`` and ``successes`` are integer numpy arrays of one shape; entries with
    successes outside 0..trials are 0. Accurate to a few ulps for any size (see
    :func:`_binomial_pmf`); exact value and derivative at p = 0 and p = 1.
    """
    trials = np.asarray(trials)
    successes = np.asarray(successes)
    size = int(max(trials.max(initial=0), 0)) + 1
    return _binomial_pmf_compiled(p, trials, successes, max(size, 2))


@functools.partial(jax.jit, static_argnums=1)
def _loss_matrix(efficiency, n_photons: int):
    m = jnp.arange(n_photons)[:, None]
    n = jnp.arange(n_photons)[None, :]
    return _binomial_pmf(efficiency, n, m, max(n_photons, 2))


def loss_matrix(efficiency, n_photons: int):
    """Binomial thinning: ``M[m, n] = C(n, m) eta^m (1-eta)^(n-m)``, shape (n_photons, n_photons).

    Every entry is within a few ulps of the exact binomial probability (the rounding grows
    with |ln M[m, n]|, not with n), so columns sum to one to rounding for any n_photons;
    the derivative in ``efficiency`` is exact, also at 0 and 1.
    """
    return _loss_matrix(jnp.asarray(efficiency, dtype=jnp.float64), int(n_photons))


def uniform_pixel_matrix(pixels: int, n_photons: int):
    """Photons spread uniformly and independently over ``pixels`` pixels.

    ``M[j, m]`` = P(j distinct pixels hit | m photons), shape (pixels+1, n_photons). Built by
    adding photons one at a time: from j hit pixels the next photon lands on a new pixel with
    probability (pixels - j)/pixels (the classical occupancy chain).
    """
    j = np.arange(pixels + 1)
    step = np.zeros((pixels + 1, pixels + 1))
    step[j, j] = j / pixels
    step[j[:-1] + 1, j[:-1]] = (pixels - j[:-1]) / pixels
    columns = [np.eye(pixels + 1)[:, 0]]
    for _ in range(n_photons - 1):
        columns.append(step @ columns[-1])
    return jnp.asarray(np.stack(columns, axis=1))


_SPLIT_ROWS_PER_BLOCK = 256  # photon numbers per block of the split's transfer table (memory ~ block * n)


@functools.partial(jax.jit, static_argnums=1)
def _split_pixel_matrix(ratios, n_photons: int):
    pixels = ratios.shape[0]
    shares = ratios[1:] / jnp.cumsum(ratios)[1:]  # p_i = r_i / (r_1 + ... + r_i), i >= 2
    block = min(n_photons, _SPLIT_ROWS_PER_BLOCK)
    n_blocks = -(-n_photons // block)
    size = max(n_blocks * block, 2)
    photons = jnp.arange(n_photons)
    earlier = photons[None, :]  # k: photons on the earlier pixels
    # one pixel: no photon hits nothing, any photon hits that pixel
    first = jnp.zeros((pixels + 1, n_photons)).at[0, 0].set(1.0).at[1, 1:].set(1.0)

    def add_pixel(hits, share):
        # new[j, m] = Binom(0 | m, p) hits[j, m] + sum_{k<m} Binom(m-k | m, p) hits[j-1, k]
        shifted = jnp.concatenate([jnp.zeros((1, n_photons)), hits[:-1]], axis=0)

        def block_of_rows(first_row):
            total = first_row + jnp.arange(block)[:, None]  # m: photons on the pixels so far
            landing = _binomial_pmf(share, total, total - earlier, size)  # m-k photons on the new pixel
            return jnp.where(earlier < total, landing, 0.0) @ shifted.T  # (block, pixels+1)

        arrived = jax.lax.map(block_of_rows, jnp.arange(n_blocks) * block).reshape(-1, pixels + 1)[:n_photons].T
        missed = _binomial_pmf(share, photons, jnp.zeros_like(photons), size)  # (1-p)^m
        return missed * hits + arrived, None

    # a scan over pixels (and a map over blocks of photon numbers) keeps the program small
    return jax.lax.scan(add_pixel, first, shares)[0]


def split_pixel_matrix(ratios, n_photons: int):
    """Photons split over pixels with unequal probabilities proportional to ``ratios``.

    ``M[j, m]`` = P(j distinct pixels hit | m photons), shape (len(ratios)+1, n_photons).
    Pixels are added one at a time: with pixels 1..i holding m photons, each of them is on
    pixel i with probability p_i = r_i / (r_1 + ... + r_i), independently, so the number on
    pixel i is Binomial(m, p_i) and pixel i is hit unless it is 0. Every term of the
    recursion is a probability (a binomial pmf, accurate to a few ulps for any m, see
    :func:`_binomial_pmf`, times a probability) and nothing is subtracted, so each column
    sums to one to rounding for any n_photons, and the derivatives in the ratios are exact.
    Work grows as pixels * n_photons^2; memory as n_photons * 256 (the transfer table is
    formed in blocks of 256 photon numbers).
    """
    return _split_pixel_matrix(jnp.asarray(ratios, dtype=jnp.float64), int(n_photons))


def click_dark_matrix(dark_probability, pixels: int):
    """Each silent pixel clicks on its own with probability d per shot.

    ``M[k, j] = C(N-j, k-j) d^(k-j) (1-d)^(N-k)``, shape (pixels+1, pixels+1).
    """
    k, j = np.meshgrid(np.arange(pixels + 1), np.arange(pixels + 1), indexing="ij")
    return _binomial_table(dark_probability, pixels - j, k - j)


def poisson_dark_matrix(dark_mean, n_in: int, n_out: int):
    """Adds Poisson(dark_mean) spurious counts: shape (n_out, n_in), mass above n_out-1 kept in
    the last row (which then means "n_out - 1 or more")."""
    extra = np.arange(n_out)
    mu = jnp.asarray(dark_mean, dtype=jnp.float64)
    log_fact = gammaln(extra + 1.0)
    pmf = _powers(mu, n_out) * jnp.exp(-mu - log_fact)
    k, m = np.meshgrid(np.arange(n_out), np.arange(n_in), indexing="ij")
    diff = k - m
    matrix = jnp.where(diff >= 0, pmf[np.clip(diff, 0, None)], 0.0)
    return _lump_last_row(matrix)


def _lump_last_row(matrix):
    """Put each column's missing mass into the last row, so columns sum to one."""
    missing = 1.0 - matrix[:-1].sum(axis=0)
    return matrix.at[-1].set(missing)


def pixel_crosstalk_matrix(crosstalk_probability, pixels: int):
    """Crosstalk between the pixels of a click array (one generation, uniform target).

    Model: each fired pixel, independently with probability ``x``, tries to fire one other
    pixel chosen uniformly among the remaining ``pixels - 1``; a try on a pixel that has
    already fired changes nothing; pixels fired by crosstalk do not trigger further
    crosstalk. With one pixel fired, ``x`` is exactly the probability of a second click.
    ``M[k, j]`` = P(k fired after crosstalk | j fired before), shape (pixels+1, pixels+1).
    """
    x = jnp.asarray(crosstalk_probability, dtype=jnp.float64)
    size = pixels + 1
    if pixels < 2:
        return jnp.eye(size)
    f = np.arange(size)
    step = np.zeros((size, size))
    # a try from a fired pixel hits one of the other f-1 fired pixels with prob (f-1)/(N-1)
    step[f, f] = np.where(f > 0, (f - 1) / (pixels - 1), 1.0)
    step[f[:-1] + 1, f[:-1]] = np.where(f[:-1] > 0, (pixels - f[:-1]) / (pixels - 1), 0.0)
    # after_tries[a][:, j]: distribution after a tries starting from j fired pixels
    after_tries = [np.eye(size)]
    for _ in range(pixels):
        after_tries.append(step @ after_tries[-1])
    after_tries = np.stack(after_tries)  # (a, k, j)
    a, j = np.meshgrid(np.arange(size), np.arange(size), indexing="ij")
    tries_pmf = _binomial_table(x, j, a)  # (a, j): P(a tries | j fired)
    return jnp.einsum("aj,akj->kj", tries_pmf, after_tries)


def borel_crosstalk_matrix(crosstalk_probability, n_in: int, n_out: int):
    """Branching (Borel-Tanner) crosstalk for number-resolving devices.

    Every avalanche triggers Poisson(L) secondary avalanches, which branch in turn
    (S. Vinogradov, arXiv:1109.2014). From n primaries the total t >= n has the Borel-Tanner
    pmf ``n/t (tL)^(t-n) exp(-tL) / (t-n)!``. The parameter is the crosstalk probability
    p = 1 - exp(-L) (probability that one avalanche triggers at least one other), p < 1 is
    required and L = -log(1-p) < 1 keeps the total finite. Shape (n_out, n_in); the last row
    means "n_out - 1 or more".
    """
    p = jnp.asarray(crosstalk_probability, dtype=jnp.float64)
    lam = -jnp.log1p(-p)
    t, n = np.meshgrid(np.arange(n_out), np.arange(n_in), indexing="ij")
    k = t - n
    valid = (k >= 0) & (n >= 1)
    t_f = np.where(valid, t, 1).astype(float)
    n_f = np.where(valid, n, 1).astype(float)
    k_f = np.where(valid, k, 0).astype(float)
    log_const = np.log(n_f / t_f) + k_f * np.log(t_f) - gammaln(k_f + 1.0)
    positive = lam > 0
    lam_safe = jnp.where(positive, lam, 1.0)
    log_form = jnp.exp(log_const + k_f * jnp.log(lam_safe) - t_f * lam_safe)
    lam_pow = _powers(lam, max(n_out, 2))
    edge_form = lam_pow[k_f.astype(int)] * jnp.exp(np.minimum(log_const, 700.0) - t_f * lam)
    matrix = jnp.where(valid, jnp.where(positive, log_form, edge_form), 0.0)
    matrix = jnp.where((t == 0) & (n == 0), 1.0, matrix)
    return _lump_last_row(matrix)


def readout_matrix(readout_width, n_in: int, n_out: int):
    """Gaussian pulse-height misassignment with saturation of the reported number.

    A true count m gives a pulse height ~ Normal(m, width^2) (width in photon-number units);
    the reported number is the nearest integer, clipped to 0 .. n_out-1:
    ``M[k, m] = Phi((k + 1/2 - m)/w) - Phi((k - 1/2 - m)/w)`` with open outer bins.
    Shape (n_out, n_in).
    """
    w = jnp.asarray(readout_width, dtype=jnp.float64)
    k = np.arange(n_out)[:, None].astype(float)
    m = np.arange(n_in)[None, :].astype(float)
    lower = jnp.where(k == 0, -jnp.inf, (k - 0.5 - m) / w)
    upper = jnp.where(k == n_out - 1, jnp.inf, (k + 0.5 - m) / w)
    # difference of upper-tail probabilities where both bounds are positive: no cancellation
    upper_side = lower > 0
    return jnp.where(upper_side, ndtr(-lower) - ndtr(-upper), ndtr(upper) - ndtr(lower))


def saturation_matrix(n_in: int, max_outcome: int):
    """Outcomes >= max_outcome are reported as max_outcome: shape (max_outcome+1, n_in)."""
    k = np.arange(max_outcome + 1)[:, None]
    m = np.arange(n_in)[None, :]
    return jnp.asarray(((k == m) | ((k == max_outcome) & (m >= max_outcome))).astype(float))

