"""Probe photon-number distributions checked against the outside world."""
from __future__ import annotations

import math

import jax
import mpmath
import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from scipy.special import gammaln

from povmfit.models import (
    choose_cutoff,
    coherent_distribution,
    displaced_thermal_distribution,
    fock_distribution,
    probe_distributions,
    probe_distributions_numpy,
    squeezed_vacuum_distribution,
    tail_mass,
    thermal_distribution,
)


# ----- displaced thermal ---------------------------------------------------------------
@pytest.mark.parametrize(
    "coherent, thermal, phase",
    [(1.0, 1.0, 0.0), (0.5, 2.0, 1.1), (2.0, 0.5, -2.0), (4.0, 0.0, 0.3), (0.0, 3.0, 0.0), (6.0, 0.2, 2.5)],
)
def test_displaced_thermal_matches_fock_space_density_matrix(fock, coherent, thermal, phase):
    # Source: independent brute force, diag of D(alpha) rho_th D(alpha)^dagger with D from
    # scipy.linalg.expm in a Fock space of 150 levels (truncation effects < 1e-15 below n = 60).
    dim, kept = 150, 60
    d = fock.displacement(math.sqrt(coherent) * np.exp(1j * phase), dim)
    rho = d @ fock.thermal(thermal, dim) @ d.conj().T
    expected = np.real(np.diag(rho))[:kept]
    got = np.asarray(displaced_thermal_distribution(coherent, thermal, kept))
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-13)


@pytest.mark.parametrize(
    "thermal, coherent, expected",
    [
        # Source: check values of the project reference list (independent computation),
        # formula of G. Lachs, Phys. Rev. 138, B1012 (1965); given to 6 decimals.
        (1.0, 1.0, [0.303265, 0.227449, 0.161110, 0.109776]),
        (0.5, 2.0, [0.175731, 0.214783, 0.193088, 0.148572]),
    ],
)
def test_displaced_thermal_check_values(thermal, coherent, expected):
    got = np.asarray(displaced_thermal_distribution(coherent, thermal, 4))
    np.testing.assert_allclose(got, expected, rtol=0, atol=6e-7)  # half a unit of the 6th decimal


@pytest.mark.parametrize("mean", [0.0, 1e-4, 0.3, 5.0, 80.0, 400.0])
def test_poisson_limit_matches_scipy(mean):
    # Source: scipy.stats.poisson (general-purpose reference library).
    n = np.arange(1200)
    got = np.asarray(coherent_distribution(mean, n.size))
    expected = scipy.stats.poisson.pmf(n, mean) if mean > 0 else (n == 0).astype(float)
    mask = expected > 1e-300
    np.testing.assert_allclose(got[mask], expected[mask], rtol=1e-10)
    assert np.all(np.abs(got[~mask]) < 1e-290)


@pytest.mark.parametrize("mean", [1e-3, 0.4, 3.0, 100.0])
def test_geometric_limit_matches_scipy_and_closed_form(mean):
    # Source: scipy.stats.geom (support starts at 1, so p(n) = geom.pmf(n+1, 1/(1+nbar)))
    # and the Bose-Einstein closed form nbar^n/(1+nbar)^(n+1) (textbook).
    n = np.arange(2000)
    got = np.asarray(thermal_distribution(mean, n.size))
    by_scipy = scipy.stats.geom.pmf(n + 1, 1.0 / (1.0 + mean))
    closed = np.exp(n * np.log(mean) - (n + 1) * np.log1p(mean))
    mask = closed > 1e-300
    np.testing.assert_allclose(got[mask], closed[mask], rtol=1e-10)
    np.testing.assert_allclose(got[mask], by_scipy[mask], rtol=1e-9)


def _lachs_mpmath(coherent, thermal, n):
    """Lachs formula in 50-digit arithmetic (mpmath.laguerre), Poisson form at nbar = 0."""
    with mpmath.workdps(50):
        a, nb = mpmath.mpf(coherent), mpmath.mpf(thermal)
        if nb == 0:
            return mpmath.exp(-a) * a**n / mpmath.factorial(n)
        return nb**n / (1 + nb) ** (n + 1) * mpmath.exp(-a / (1 + nb)) * mpmath.laguerre(n, 0, -a / (nb * (1 + nb)))


@pytest.mark.parametrize(
    "coherent, thermal",
    [(400.0, 0.0), (400.0, 100.0), (0.0, 100.0), (400.0, 1e-6), (50.0, 0.01), (200.0, 30.0), (1e-3, 1e-3), (0.5, 2.0)],
)
@pytest.mark.parametrize("implementation", ["jax", "numpy"])
def test_displaced_thermal_high_precision(coherent, thermal, implementation):
    # Source: mpmath (general-purpose reference library), Lachs formula at 50 digits.
    if implementation == "jax":
        p = np.asarray(displaced_thermal_distribution(coherent, thermal, 2001))
    else:
        p = probe_distributions_numpy(np.array([coherent]), np.array([thermal]), 2001)[0]
    assert np.all(np.isfinite(p))
    for n in (0, 1, 7, 60, 200, 399, 400, 401, 650, 1000, 1500, 2000):
        ref = float(_lachs_mpmath(coherent, thermal, n))
        if ref > 1e-300:
            assert abs(p[n] - ref) <= 1e-10 * ref, (n, p[n], ref)
        else:
            assert 0.0 <= p[n] < 1e-290


@pytest.mark.parametrize("coherent, thermal, n", [(1.0, 1.0, 3), (3.0, 0.5, 0), (3.0, 0.5, 7), (25.0, 2.0, 30), (0.4, 0.05, 2)])
def test_displaced_thermal_gradients_match_finite_differences(coherent, thermal, n):
    # Source: independent central finite differences (step 1e-5 relative; error ~1e-10).
    f = lambda a, t: displaced_thermal_distribution(a, t, n + 1)[n]  # noqa: E731
    grad = jax.grad(f, argnums=(0, 1))(coherent, thermal)
    for i, x in enumerate((coherent, thermal)):
        h = 1e-5 * max(x, 1.0)
        args_plus = [coherent, thermal]
        args_minus = [coherent, thermal]
        args_plus[i] += h
        args_minus[i] -= h
        fd = (float(f(*args_plus)) - float(f(*args_minus))) / (2 * h)
        assert np.isfinite(float(grad[i]))
        assert abs(float(grad[i]) - fd) <= 1e-6 * abs(fd) + 1e-11


@pytest.mark.parametrize("coherent", [0.0, 2.0])
def test_displaced_thermal_gradient_at_zero_thermal_photons(coherent):
    # Source: one-sided second-order finite differences at the edge nbar = 0 (independent).
    for n in (0, 1, 3):
        f = lambda t: float(displaced_thermal_distribution(coherent, t, n + 1)[n])  # noqa: E731
        g = jax.grad(lambda a, t: displaced_thermal_distribution(a, t, n + 1)[n], argnums=(0, 1))(coherent, 0.0)
        assert all(np.isfinite(float(v)) for v in g)
        h = 1e-5
        fd = (-3 * f(0.0) + 4 * f(h) - f(2 * h)) / (2 * h)
        assert abs(float(g[1]) - fd) <= 1e-6 * abs(fd) + 1e-9


def test_probe_distributions_batch_matches_single_calls():
    # Source: common practice, no source (a batched call equals a loop of single calls).
    coherent, thermal = np.array([0.0, 1.0, 9.0]), np.array([0.5, 0.0, 2.0])
    batch = np.asarray(probe_distributions(coherent, thermal, 40))
    for i in range(3):
        np.testing.assert_allclose(batch[i], displaced_thermal_distribution(coherent[i], thermal[i], 40), rtol=0, atol=1e-15)


def test_fock_distribution_is_one_hot_and_refuses_out_of_range():
    # Source: common practice, no source.
    np.testing.assert_array_equal(np.asarray(fock_distribution(3, 6)), [0, 0, 0, 1, 0, 0])
    with pytest.raises(ValueError):
        fock_distribution(6, 6)


# ----- cutoff --------------------------------------------------------------------------
@pytest.mark.parametrize("tolerance", [1e-6, 1e-10, 1e-13])
def test_choose_cutoff_coherent_batch_against_scipy_tail(tolerance):
    # Source: scipy.stats.poisson.sf (survival function: mass at n >= cutoff is sf(cutoff - 1)).
    means = np.array([0.01, 1.0, 7.5, 60.0, 250.0])
    cutoff = choose_cutoff(means, np.zeros_like(means), tolerance)
    tails_at = scipy.stats.poisson.sf(cutoff - 1, means)
    tails_before = scipy.stats.poisson.sf(cutoff - 2, means)
    assert np.all(tails_at < tolerance)
    assert np.max(tails_before) >= tolerance
    np.testing.assert_allclose(tail_mass(means, np.zeros_like(means), cutoff), tails_at, rtol=1e-6, atol=1e-18)


def test_choose_cutoff_thermal_batch_against_geometric_tail():
    # Source: closed form of the geometric tail, mass at n >= c is (nbar/(1+nbar))^c (textbook).
    thermal = np.array([0.1, 2.0, 15.0])
    tolerance = 1e-10
    cutoff = choose_cutoff(np.zeros_like(thermal), thermal, tolerance)
    ratio = thermal / (1 + thermal)
    assert np.all(ratio**cutoff < tolerance)
    assert np.max(ratio ** (cutoff - 1)) >= tolerance
    np.testing.assert_allclose(tail_mass(np.zeros_like(thermal), thermal, cutoff), ratio**cutoff, rtol=1e-8)


def test_choose_cutoff_displaced_thermal_batch_against_mpmath_tail():
    # Source: mpmath, tail = 1 - sum_{n<c} p(n) with the Lachs formula at 50 digits.
    coherent, thermal = np.array([3.0, 20.0, 0.0]), np.array([0.5, 1.5, 4.0])
    tolerance = 1e-8
    cutoff = choose_cutoff(coherent, thermal, tolerance)

    def tail(a, t, c):
        with mpmath.workdps(50):
            return float(1 - mpmath.fsum(_lachs_mpmath(a, t, n) for n in range(c)))

    at = [tail(a, t, cutoff) for a, t in zip(coherent, thermal)]
    before = [tail(a, t, cutoff - 1) for a, t in zip(coherent, thermal)]
    assert max(at) < tolerance
    assert max(before) >= tolerance


def test_choose_cutoff_limit_raises():
    # Source: common practice, no source (a cutoff above the stated limit is refused).
    with pytest.raises(ValueError, match="limit"):
        choose_cutoff([100.0], [0.0], 1e-10, limit=50)


# ----- squeezed vacuum -------------------------------------------------------------------
@pytest.mark.parametrize("squeezing", [0.0, 0.3, 0.8, 1.5])
def test_squeezed_vacuum_closed_form(squeezing):
    # Source: p(2m) = (2m)!/(2^m m!)^2 tanh^{2m} r / cosh r, p(odd) = 0
    # (C. Gerry, P. Knight, Introductory Quantum Optics, squeezed vacuum number distribution;
    # also R. Loudon, The Quantum Theory of Light); mean sinh^2 r.
    mean = math.sinh(squeezing) ** 2
    n_photons = 400
    p = np.asarray(squeezed_vacuum_distribution(mean, n_photons))
    assert np.all(p[1::2] == 0.0)
    m = np.arange(n_photons // 2)
    log_even = gammaln(2 * m + 1) - m * np.log(4) - 2 * gammaln(m + 1) - np.log(np.cosh(squeezing))
    if squeezing > 0:
        log_even = log_even + 2 * m * np.log(np.tanh(squeezing))
    else:
        log_even[1:] = -np.inf  # tanh(0)^(2m) = 0 for m >= 1
    even = np.exp(log_even)
    np.testing.assert_allclose(p[::2], even, rtol=1e-11, atol=1e-300)
    assert abs(np.arange(n_photons) @ p - mean) < 1e-10 * max(mean, 1e-300) + 1e-13


def test_squeezed_vacuum_matches_fock_space_squeeze_operator(fock):
    # Source: independent brute force, S(r)|0> with S(r) = exp(r/2 (a^2 - a^dagger^2)) from
    # scipy.linalg.expm in 200 levels (r = 0.6, truncation effect < 1e-14 below n = 60).
    r, dim = 0.6, 200
    a = fock.annihilation(dim)
    state = scipy.linalg.expm(0.5 * r * (a @ a - a.T @ a.T))[:, 0]
    got = np.asarray(squeezed_vacuum_distribution(math.sinh(r) ** 2, 60))
    np.testing.assert_allclose(got, np.abs(state[:60]) ** 2, rtol=0, atol=1e-13)


def test_scaled_probe_distribution_slope_matches_jax_autodiff():
    # Source: JAX forward-mode differentiation of the JAX probe distributions (an independent
    # computation) against the generating-function identity dP_n/ds = (n P_n - (n+1) P_{n+1})/s.
    import jax

    from povmfit.fitting.inference.objective import scaled_probe_distributions
    from povmfit.models import probe_distributions

    coherent = np.array([0.0, 0.3, 2.0, 6.0, 1.0])
    thermal = np.array([0.0, 0.0, 0.5, 1.0, 0.0])
    n = 60
    for scale in (0.82, 1.0, 1.17):
        values, slope = scaled_probe_distributions(coherent, thermal, scale, n)
        reference = jax.jacfwd(lambda s: probe_distributions(s * coherent, s * thermal, n))(scale)
        np.testing.assert_allclose(values, np.asarray(probe_distributions(scale * coherent, scale * thermal, n)),
                                   rtol=0, atol=1e-14)
        np.testing.assert_allclose(slope, np.asarray(reference), rtol=0, atol=1e-12)
