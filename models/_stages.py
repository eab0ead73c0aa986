"""Detector stages: pure JAX functions returning column-stochastic matrices.

A stage maps a distribution over ``n_in`` input values (photons, pixels fired, counts) to a
distribution over ``n_out`` output values: ``M[out, in] = P(out | in)``; every column sums to
one. A detector's POVM is the product of its stages (see ``_families``).

Every continuous parameter enters through expressions whose derivative is finite at the
edges of its range (efficiency 1, dark probability 0, crosstalk 0), so Jacobians stay exact
where fits most often end up.
"""
from __future__ import annotations

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

_COMB_CAP = 1e300


def _log_comb(n, k):
    return gammaln(n + 1.0) - gammaln(k + 1.0) - gammaln(n - k + 1.0)


def _powers(x, count: int):
    """x^0 .. x^(count-1) by repeated multiplication: exact derivative at x = 0."""
    return jnp.cumprod(jnp.concatenate([jnp.ones(1), jnp.full(count - 1, 1.0) * x]))


def _binomial_table(p, trials: np.ndarray, successes: np.ndarray):
    """Binomial pmf C(trials, successes) p^successes (1-p)^(trials-successes), elementwise.

    ``trials`` and ``successes`` are integer numpy arrays of one shape; entries with
    successes outside 0..trials are 0. Inside (0, 1) the log form is used (no overflow); at the
    edges p = 0 or 1 a power table gives the exact value and derivative.
    """
    trials = np.asarray(trials)
    successes = np.asarray(successes)
    valid = (successes >= 0) & (successes <= trials)
    k = np.where(valid, successes, 0).astype(float)
    n = np.where(valid, trials, 0).astype(float)
    log_comb = _log_comb(n, k)
    inside = (p > 0.0) & (p < 1.0)
    p_safe = jnp.where(inside, p, 0.5)
    log_form = jnp.exp(log_comb + k * jnp.log(p_safe) + (n - k) * jnp.log1p(-p_safe))
    size = int(max(n.max(initial=0), 0)) + 1
    p_pow = _powers(p, size)
    q_pow = _powers(1.0 - p, size)
    comb = np.minimum(np.exp(np.minimum(log_comb, 700.0)), _COMB_CAP)
    edge_form = comb * p_pow[k.astype(int)] * q_pow[(n - k).astype(int)]
    return jnp.where(valid, jnp.where(inside, log_form, edge_form), 0.0)


def loss_matrix(efficiency, n_photons: int):
    """Binomial thinning: ``M[m, n] = C(n, m) eta^m (1-eta)^(n-m)``, shape (n_photons, n_photons)."""
    m, n = np.meshgrid(np.arange(n_photons), np.arange(n_photons), indexing="ij")
    return _binomial_table(efficiency, n, m)


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


def split_pixel_matrix(ratios, n_photons: int):
    """Photons split over pixels with unequal probabilities ``ratios`` (summing to one).

    ``M[j, m]`` = P(j distinct pixels hit | m photons), shape (len(ratios)+1, n_photons).
    Uses the exponential generating function prod_i (1 + y (exp(r_i x) - 1)): the coefficient
    of y^j x^m/m! is the wanted probability. Multiplying in one pixel at a time is a binomial
    convolution in m with only non-negative terms, so there is no cancellation.
    Valid for n_photons <= 1000 (binomial coefficients stay finite).
    """
    if n_photons > 1000:
        raise ValueError(f"unequal split supports at most 1000 photon numbers, got {n_photons}")
    ratios = jnp.asarray(ratios, dtype=jnp.float64)
    pixels = ratios.shape[0]
    m = np.arange(n_photons)
    comb = np.exp(_log_comb(m[:, None].astype(float), m[None, :].astype(float)))
    comb = jnp.asarray(np.where(m[None, :] <= m[:, None], comb, 0.0))  # comb[m, l] = C(m, l)
    lag = m[:, None] - m[None, :]  # m - k

    def add_pixel(coeffs, ratio):
        # new[j, m] = old[j, m] + sum_{l>=1} C(m, l) r^l old[j-1, m-l]
        powers = _powers(ratio, n_photons).at[0].set(0.0)  # r^l for l >= 1
        shifted = jnp.concatenate([jnp.zeros((1, n_photons)), coeffs[:-1]], axis=0)
        return coeffs + _binomial_convolution(shifted, powers, comb, lag), None

    start = jnp.zeros((pixels + 1, n_photons)).at[0, 0].set(1.0)
    # a scan over pixels keeps the compiled program one pixel long
    return jax.lax.scan(add_pixel, start, ratios)[0]


def _binomial_convolution(rows, powers, comb, lag):
    """out[j, m] = sum_l C(m, l) powers[l] rows[j, m-l], as rows @ T^T with
    T[m, k] = C(m, k) powers[m-k] for k <= m (``lag`` = m - k): one small matrix product."""
    toeplitz = jnp.where(lag >= 0, powers[np.clip(lag, 0, None)], 0.0) * comb
    return rows @ toeplitz.T


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

