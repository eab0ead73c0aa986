"""Detector stages checked against reference libraries, published formulas and Monte Carlo."""
from __future__ import annotations

import itertools
import math
from fractions import Fraction

import mpmath
import numpy as np
import pytest
import scipy.stats

from povmfit.models import (
    borel_crosstalk_matrix,
    click_dark_matrix,
    coherent_distribution,
    loss_matrix,
    parse_model_spec,
    pixel_crosstalk_matrix,
    poisson_dark_matrix,
    readout_matrix,
    saturation_matrix,
    split_pixel_matrix,
    uniform_pixel_matrix,
)


def _five_sigma(probabilities, shots):
    """Allowed |frequency - p|: 5 binomial standard deviations sqrt(p(1-p)/shots), with a
    floor of 5/shots for outcomes whose probability is near zero."""
    p = np.clip(np.asarray(probabilities), 0.0, 1.0)
    return 5 * np.sqrt(p * (1 - p) / shots) + 5.0 / shots


def _array_chain(efficiency, dark, pixels, n_photons):
    return np.asarray(
        click_dark_matrix(dark, pixels) @ uniform_pixel_matrix(pixels, n_photons) @ loss_matrix(efficiency, n_photons)
    )


# ----- loss --------------------------------------------------------------------------------
@pytest.mark.parametrize("efficiency", [0.0, 1e-3, 0.37, 0.9, 1.0])
def test_loss_matrix_matches_scipy_binomial(efficiency):
    # Source: scipy.stats.binom.pmf (general-purpose reference library).
    n_photons = 300
    m, n = np.meshgrid(np.arange(n_photons), np.arange(n_photons), indexing="ij")
    expected = scipy.stats.binom.pmf(m, n, efficiency)
    got = np.asarray(loss_matrix(efficiency, n_photons))
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-300)


@pytest.mark.parametrize("efficiency", [0.5, 0.9, 1.0])
def test_loss_only_detector_registers_all_photons_with_eta_to_the_n(efficiency):
    # Source: a loss-only detector registers all n photons with probability eta^n
    # (common practice, no source).
    theta = np.asarray(parse_model_spec("pnr:8").povm([efficiency], 8))
    n = np.arange(8)
    np.testing.assert_allclose(theta[n, n], efficiency**n, rtol=1e-13)


# ----- pixels and dark clicks ---------------------------------------------------------------
def _sperling(pixels, efficiency, dark, n, k):
    """P(k|n) of J. Sperling, W. Vogel, G. S. Agarwal, PRL 108, 093601 (2012), in 60 digits."""
    with mpmath.workdps(60):
        eta, d = mpmath.mpf(efficiency), mpmath.mpf(dark)
        total = mpmath.fsum(
            (-1) ** j * mpmath.binomial(k, j) * (1 - d) ** (pixels - k + j) * (1 - eta + eta * mpmath.mpf(k - j) / pixels) ** n
            for j in range(k + 1)
        )
        return float(mpmath.binomial(pixels, k) * total)


@pytest.mark.parametrize("pixels, efficiency, dark", [(1, 0.8, 0.0), (2, 1.0, 0.0), (4, 0.55, 0.03), (8, 0.6, 0.01), (16, 0.93, 0.2)])
def test_uniform_pixels_with_dark_match_sperling_formula(pixels, efficiency, dark):
    # Source: Sperling, Vogel, Agarwal, PRL 108, 093601 (2012), evaluated with mpmath.
    n_photons = 25
    theta = _array_chain(efficiency, dark, pixels, n_photons)
    expected = np.array([[_sperling(pixels, efficiency, dark, n, k) for n in range(n_photons)] for k in range(pixels + 1)])
    np.testing.assert_allclose(theta, expected, rtol=0, atol=1e-13)


def test_array_check_values():
    # Source: check values of the project reference list (independent computation of the
    # Sperling-Vogel-Agarwal formula, PRL 108, 093601 (2012)); 6 decimals.
    model = parse_model_spec("array:8+dark")
    theta = np.asarray(model.povm([0.6, 0.01], 40))
    coherent = np.asarray(coherent_distribution(2.0, 40)) @ theta.T
    np.testing.assert_allclose(coherent[:4], [0.277925, 0.385916, 0.234442, 0.081384], atol=6e-7)
    np.testing.assert_allclose(theta[:2, 1], [0.369098, 0.589065], atol=6e-7)
    # ideal pixels: N=2, n=2 -> P(1) = P(2) = 1/2; N=4, n=3 -> 1/16, 9/16, 3/8 (same list)
    np.testing.assert_allclose(np.asarray(uniform_pixel_matrix(2, 3))[:, 2], [0, 0.5, 0.5], atol=1e-15)
    np.testing.assert_allclose(np.asarray(uniform_pixel_matrix(4, 4))[:, 3], [0, 1 / 16, 9 / 16, 3 / 8, 0], atol=1e-15)


@pytest.mark.parametrize("pixels, efficiency, dark, mean", [(8, 0.6, 0.01, 2.0), (4, 0.9, 0.0, 0.5), (16, 0.3, 0.1, 30.0)])
def test_coherent_probe_gives_binomial_click_law(pixels, efficiency, dark, mean):
    # Source: binomial click law P(k) = C(N,k)(1-q)^k q^(N-k), q = (1-d) exp(-eta m/N)
    # (Sperling, Vogel, Agarwal, PRL 108, 093601 (2012)), pmf by scipy.stats.binom.
    n_photons = 150
    theta = _array_chain(efficiency, dark, pixels, n_photons)
    got = np.asarray(coherent_distribution(mean, n_photons)) @ theta.T
    q = (1 - dark) * math.exp(-efficiency * mean / pixels)
    np.testing.assert_allclose(got, scipy.stats.binom.pmf(np.arange(pixels + 1), pixels, 1 - q), rtol=1e-10, atol=1e-15)


def test_pixels_with_dark_match_monte_carlo():
    # Source: independent Monte Carlo (numpy, seed 1): photons lost with 1 - eta, survivors land
    # on uniformly random pixels, silent pixels click with probability d. Tolerance: 5 binomial
    # standard deviations per outcome frequency.
    rng = np.random.default_rng(1)
    pixels, efficiency, dark, shots = 5, 0.7, 0.04, 200_000
    theta = _array_chain(efficiency, dark, pixels, 8)
    for n in (0, 1, 3, 7):
        survives = rng.random((shots, n)) < efficiency
        lands = rng.integers(0, pixels, (shots, n))
        hit = np.zeros((shots, pixels), dtype=bool)
        for i in range(n):
            hit[np.arange(shots), lands[:, i]] |= survives[:, i]
        hit |= rng.random((shots, pixels)) < dark
        freq = np.bincount(hit.sum(axis=1), minlength=pixels + 1) / shots
        assert np.all(np.abs(freq - theta[:, n]) < _five_sigma(theta[:, n], shots)), n


@pytest.mark.parametrize("dark", [0.0, 0.02, 0.5, 1.0])
def test_click_dark_matrix_matches_scipy_binomial(dark):
    # Source: scipy.stats.binom: each of the N - j silent pixels clicks with probability d.
    pixels = 6
    k, j = np.meshgrid(np.arange(pixels + 1), np.arange(pixels + 1), indexing="ij")
    expected = scipy.stats.binom.pmf(k - j, pixels - j, dark)
    np.testing.assert_allclose(np.asarray(click_dark_matrix(dark, pixels)), expected, rtol=1e-12, atol=1e-300)


# ----- unequal split ----------------------------------------------------------------------
@pytest.mark.parametrize("pixels", [1, 2, 5, 16])
def test_equal_split_reproduces_uniform_pixels(pixels):
    # Source: common practice, no source (equal ratios are the uniform case).
    n_photons = 120
    got = np.asarray(split_pixel_matrix(np.full(pixels, 1.0 / pixels), n_photons))
    np.testing.assert_allclose(got, np.asarray(uniform_pixel_matrix(pixels, n_photons)), rtol=0, atol=1e-12)


@pytest.mark.parametrize("ratios", [(0.5, 0.3, 0.2), (0.7, 0.1, 0.1, 0.1), (0.05, 0.95)])
def test_split_pixels_match_enumeration_of_all_assignments(ratios):
    # Source: independent brute force, sum over all N^m assignments of m photons to pixels
    # (exact fractions).
    ratios = np.array(ratios)
    pixels, n_photons = ratios.size, 7
    got = np.asarray(split_pixel_matrix(ratios, n_photons))
    exact = [Fraction(float(r)) for r in ratios]  # exact rational arithmetic, no rounding
    for m in range(n_photons):
        expected = [Fraction(0)] * (pixels + 1)
        for assignment in itertools.product(range(pixels), repeat=m):
            expected[len(set(assignment))] += math.prod((exact[i] for i in assignment), start=Fraction(1))
        np.testing.assert_allclose(got[:, m], [float(e) for e in expected], rtol=0, atol=1e-14)


def test_split_pixels_match_monte_carlo():
    # Source: independent Monte Carlo (numpy.random choice with the ratios, seed 2); tolerance
    # 5 binomial standard deviations per outcome.
    rng = np.random.default_rng(2)
    ratios = np.array([0.4, 0.25, 0.15, 0.1, 0.06, 0.04])
    shots = 100_000
    got = np.asarray(split_pixel_matrix(ratios, 31))
    for m in (1, 4, 12, 30):
        lands = rng.choice(ratios.size, size=(shots, m), p=ratios)
        distinct = (np.eye(ratios.size, dtype=bool)[lands].any(axis=1)).sum(axis=1)
        freq = np.bincount(distinct, minlength=ratios.size + 1) / shots
        assert np.all(np.abs(freq - got[:, m]) < _five_sigma(got[:, m], shots)), m


def _split_inclusion_exclusion(ratios, m, hit):
    """P(exactly ``hit`` pixels hit | m photons) by inclusion-exclusion over pixel sets, in
    mpmath at 60 digits: P(exactly the set S) = sum_{T in S} (-1)^(|S|-|T|) (sum_T r)^m."""
    with mpmath.workdps(60):
        r = [mpmath.mpf(x) for x in ratios]
        total = mpmath.mpf(0)
        for subset in itertools.combinations(range(len(r)), hit):
            for size in range(hit + 1):
                for inner in itertools.combinations(subset, size):
                    total += (-1) ** (hit - size) * mpmath.fsum(r[i] for i in inner) ** m
        return total


def test_split_pixels_match_inclusion_exclusion_at_a_thousand_photons():
    # Source: inclusion-exclusion closed form (textbook occupancy law), evaluated in mpmath at
    # 60 digits; entries below 1e-280 (near the bottom of the double range, e.g. one pixel
    # hit by 1000 photons, 9e-302) are compared absolutely
    ratios = np.array([0.5, 0.3, 0.2])
    got = np.asarray(split_pixel_matrix(ratios, 1001))
    for m in (0, 1, 2, 10, 100, 1000):
        expected = [float(_split_inclusion_exclusion(ratios, m, j)) for j in range(4)]
        np.testing.assert_allclose(got[:, m], expected, rtol=1e-13, atol=1e-280)


def test_split_derivative_matches_closed_form():
    # Source: two pixels with ratios (r, 1-r): P(one hit | m) = r^m + (1-r)^m for m >= 1, so
    # d/dr = m (r^(m-1) - (1-r)^(m-1)) (inclusion-exclusion, common practice)
    import jax
    import jax.numpy as jnp

    r, n_photons = 0.35, 200
    jac = np.asarray(jax.jacfwd(lambda x: split_pixel_matrix(jnp.stack([x, 1.0 - x]), n_photons))(r))
    m = np.arange(1, n_photons)
    expected = m * (r ** (m - 1) - (1 - r) ** (m - 1))
    # r + (1 - r) rounds to 1 within an ulp, so derivatives of order m carry ~m ulps absolute
    np.testing.assert_allclose(jac[1, 1:], expected, rtol=1e-11, atol=1e-14)
    np.testing.assert_allclose(jac[2, 1:], -expected, rtol=1e-11, atol=1e-14)
    assert np.all(jac[:, 0] == 0)


# ----- pixel crosstalk -----------------------------------------------------------------------
def _crosstalk_monte_carlo(x, pixels, fired, shots, rng):
    """The docstring's model, simulated: each initially fired pixel, with probability x, tries
    to fire one other pixel chosen uniformly among the remaining N-1; secondaries do not
    trigger further crosstalk. Returns the frequencies of the final number fired."""
    order = np.argsort(rng.random((shots, pixels)), axis=1)
    initial = np.zeros((shots, pixels), dtype=bool)
    np.put_along_axis(initial, order[:, :fired], True, axis=1)
    final = initial.copy()
    rows = np.arange(shots)
    for source in range(pixels):
        tries = initial[:, source] & (rng.random(shots) < x)
        target = (source + 1 + rng.integers(0, pixels - 1, shots)) % pixels
        final[rows[tries], target[tries]] = True
    return np.bincount(final.sum(axis=1), minlength=pixels + 1) / shots


@pytest.mark.parametrize("pixels, x", [(2, 0.3), (5, 0.15), (8, 0.6)])
def test_pixel_crosstalk_matches_monte_carlo_of_documented_model(pixels, x):
    # Source: independent Monte Carlo of the verbal model (numpy, seed 3); tolerance 5 binomial
    # standard deviations per outcome.
    rng = np.random.default_rng(3)
    shots = 100_000
    matrix = np.asarray(pixel_crosstalk_matrix(x, pixels))
    for fired in range(pixels + 1):
        freq = _crosstalk_monte_carlo(x, pixels, fired, shots, rng)
        assert np.all(np.abs(freq - matrix[:, fired]) < _five_sigma(matrix[:, fired], shots)), fired


@pytest.mark.parametrize("x", [0.0, 0.07, 0.5, 0.999])
def test_pixel_crosstalk_probability_is_second_click_probability(x):
    # Source: definition of the model (docstring): one fired pixel gives a second click with
    # probability x (common practice, no source).
    matrix = np.asarray(pixel_crosstalk_matrix(x, 6))
    np.testing.assert_allclose(matrix[:, 1], [0, 1 - x, x, 0, 0, 0, 0], atol=1e-15)
    np.testing.assert_allclose(matrix[:, 0], np.eye(7)[0], atol=0)


# ----- Borel crosstalk ----------------------------------------------------------------------
def test_borel_crosstalk_check_values():
    # Source: check values of the project reference list (independent computation); Borel
    # distribution (S. Vinogradov, arXiv:1109.2014), parameter p = 1 - exp(-L); 6 decimals.
    branching = 0.2
    p = 1 - math.exp(-branching)
    size = 200
    matrix = np.asarray(borel_crosstalk_matrix(p, size, size))
    one = matrix[:, 1]
    assert abs(one[1] - 0.818731) < 6e-7
    assert abs(np.arange(size) @ one - 1.25) < 1e-10  # mean 1/(1-L)
    primaries = np.asarray(coherent_distribution(1.0, size))  # Poisson(mu = 1) primaries
    total = matrix @ primaries
    np.testing.assert_allclose(total[:3], [0.367879, 0.301194, 0.172618], atol=6e-7)
    k = np.arange(size)
    mean = k @ total
    assert abs(mean - 1.25) < 1e-10  # mu/(1-L)
    assert abs(k**2 @ total - mean**2 - 1.953125) < 1e-9  # mu/(1-L)^3


@pytest.mark.parametrize("branching", [0.05, 0.5, 0.9])
def test_borel_crosstalk_matches_generalised_poisson_closed_form(branching):
    # Source: Poisson primaries with Borel branching give the generalised Poisson law
    # P(n) = mu (mu + nL)^(n-1) exp(-(mu + nL))/n! (Vinogradov, arXiv:1109.2014).
    mu, size = 1.7, 400
    matrix = np.asarray(borel_crosstalk_matrix(1 - math.exp(-branching), size, size))
    total = matrix @ np.asarray(coherent_distribution(mu, size))
    n = np.arange(60)
    log_expected = np.log(mu) + (n - 1) * np.log(mu + n * branching) - (mu + n * branching) - scipy.special.gammaln(n + 1)
    np.testing.assert_allclose(total[:60], np.exp(log_expected), rtol=1e-10)


# ----- Poisson dark, readout, saturation ----------------------------------------------------
@pytest.mark.parametrize("mean", [0.0, 0.01, 0.8, 6.0])
def test_poisson_dark_matrix_matches_scipy(mean):
    # Source: scipy.stats.poisson; the last row holds the survival function (lumped tail).
    n_in, n_out = 10, 14
    k, m = np.meshgrid(np.arange(n_out), np.arange(n_in), indexing="ij")
    expected = scipy.stats.poisson.pmf(k - m, mean) if mean > 0 else (k == m).astype(float)
    expected[-1] = scipy.stats.poisson.sf(n_out - 2 - np.arange(n_in), mean) if mean > 0 else expected[-1]
    np.testing.assert_allclose(np.asarray(poisson_dark_matrix(mean, n_in, n_out)), expected, rtol=1e-10, atol=1e-15)


@pytest.mark.parametrize("width", [1e-3, 0.2, 0.45, 1.3])
def test_readout_matrix_matches_scipy_normal_bins(width):
    # Source: scipy.stats.norm: bins [k - 1/2, k + 1/2) of Normal(m, w^2), outer bins open.
    n_in, n_out = 12, 8
    edges = np.concatenate([[-np.inf], np.arange(n_out - 1) + 0.5, [np.inf]])
    m = np.arange(n_in)
    expected = np.array([[scipy.stats.norm.cdf(edges[k + 1], mi, width) - scipy.stats.norm.cdf(edges[k], mi, width) for mi in m] for k in range(n_out)])
    np.testing.assert_allclose(np.asarray(readout_matrix(width, n_in, n_out)), expected, rtol=1e-9, atol=1e-15)


def test_saturation_matrix_reports_top_outcome():
    # Source: definition (outcomes >= K reported as K); common practice, no source.
    got = np.asarray(saturation_matrix(7, 4))
    expected = np.zeros((5, 7))
    for m in range(7):
        expected[min(m, 4), m] = 1.0
    np.testing.assert_array_equal(got, expected)


# ----- loss accuracy at large photon numbers ------------------------------------------------
_EPS = np.finfo(float).eps


def _binomial_mpmath(n, k, p):
    """C(n, k) p^k (1-p)^(n-k) for the double p, in 60 digits (mpmath)."""
    with mpmath.workdps(60):
        p = mpmath.mpf(float(p))
        return float(mpmath.binomial(n, k) * p**k * (1 - p) ** (n - k))


def _points(n, p):
    """Successes from the far left tail through the mode to the far right tail."""
    mean, sd = n * p, math.sqrt(n * p * (1 - p))
    offsets = np.array([-40, -8, -3, -1, 0, 0.5, 1, 3, 8, 40])
    return np.unique(np.clip(np.round(mean + sd * offsets), 0, n).astype(np.int64))


@pytest.mark.parametrize("trials, p", [(1, 0.37), (7, 0.999), (1001, 0.37), (10**4, 1e-3), (10**5, 0.5), (10**6, 0.73), (10**6, 0.999)])
def test_binomial_pmf_within_a_few_ulps_of_mpmath_up_to_a_million_trials(trials, p):
    # Source: mpmath in 60 digits. The pmf as a function of its exact inputs has relative
    # condition number about 1 + |ln pmf| (it is exp of a sum of that size), so the allowed
    # error is 4 ulps times that: a few ulps in the bulk, whatever the number of trials.
    from povmfit.models._stages import _binomial_pmf

    k = _points(trials, p)
    got = np.asarray(_binomial_pmf(p, np.full(k.shape, trials), k, trials + 1))
    exact = np.array([_binomial_mpmath(trials, int(j), p) for j in k])
    shown = exact > 1e-300
    allowed = 4 * _EPS * (1 + np.abs(np.log(exact[shown]))) * exact[shown]
    assert np.all(np.abs(got[shown] - exact[shown]) <= allowed), (k[shown], got[shown], exact[shown])
    assert np.all(got[~shown] <= 1e-290)


@pytest.mark.parametrize("efficiency", [0.05, 0.6])
def test_loss_matrix_matches_scipy_binomial_at_two_thousand_photons(efficiency):
    # Source: scipy.stats.binom.pmf (general-purpose reference library). scipy itself is off
    # by up to about 20 ulps times the condition number 1 + |ln pmf| here (checked against
    # mpmath at m = 994, n = 1999: 2e-13 relative), so 32 times that bounds the difference.
    n_photons = 2000
    n = np.array([1, 17, 640, 1999])
    m = np.arange(n_photons)[:, None]
    got = np.asarray(loss_matrix(efficiency, n_photons))[:, n]
    expected = scipy.stats.binom.pmf(m, n[None, :], efficiency)
    shown = expected > 1e-290
    allowed = 32 * _EPS * (1 + np.abs(np.log(expected[shown]))) * expected[shown]
    assert np.all(np.abs(got[shown] - expected[shown]) <= allowed)
    assert np.abs(got.sum(axis=0) - 1).max() < 1e-14  # columns sum to one (probability law)


@pytest.mark.parametrize("efficiency", [0.0, 1.0, 0.4])
def test_loss_derivative_matches_closed_form(efficiency):
    # Source: d/d eta C(n,m) eta^m (1-eta)^(n-m) = pmf * (m/eta - (n-m)/(1-eta)), with the
    # one-sided limits n (m = 1, n - m = n-1 ...) at the edges written out by hand; mpmath
    # evaluates the interior value. Second derivative at the edges: 2 C(n, 2) for m = 2
    # at eta = 0 (common practice, no source).
    import jax

    n_photons = 12
    jac = np.asarray(jax.jacfwd(lambda e: loss_matrix(e, n_photons))(efficiency))
    m, n = np.meshgrid(np.arange(n_photons), np.arange(n_photons), indexing="ij")
    if efficiency == 0.0:
        expected = np.where(m == 0, -n, np.where(m == 1, n, 0)).astype(float)
    elif efficiency == 1.0:
        expected = np.where(m == n, n, np.where(m == n - 1, -n, 0)).astype(float)
    else:
        with mpmath.workdps(40):
            e = mpmath.mpf(efficiency)
            expected = np.array([[float(mpmath.binomial(j, i) * e**i * (1 - e) ** (j - i) * (i / e - (j - i) / (1 - e)))
                                  if i <= j else 0.0 for j in range(n_photons)] for i in range(n_photons)])
    np.testing.assert_allclose(jac, expected, rtol=1e-13, atol=1e-13)
    if efficiency == 0.0:
        hessian = np.asarray(jax.hessian(lambda e: loss_matrix(e, n_photons)[2, 9])(0.0))
        assert hessian == pytest.approx(2 * 36, rel=1e-14)


def test_loss_derivative_at_a_million_photons_matches_mpmath():
    # Source: mpmath (60 digits) of pmf * (m/eta - (n-m)/(1-eta)) at n = 10^6.
    import jax

    from povmfit.models._stages import _binomial_pmf

    n, eta = 10**6, 0.73
    k = np.array([729000, 730000, 731500])
    got = np.asarray(jax.jacfwd(lambda e: _binomial_pmf(e, np.full(3, n), k, n + 1))(eta))
    expected = [_binomial_mpmath(n, int(j), eta) * (j / eta - (n - j) / (1 - eta)) for j in k]
    # the derivative is a difference of two terms of size pmf * n / eta (about 1e3 here, and
    # nearly cancelling at the mode): 1e-9 relative plus 1e-12 absolute is ample
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-12)


def _catalogue_column_sums(n_photons, specs):
    from catalogue import Case

    worst = {}
    for spec in specs:
        model = parse_model_spec(spec)
        values = Case(spec).parameter_values(model.parameter_names)
        theta = np.asarray(model.povm(model.pack(values), n_photons))
        worst[spec] = float(np.abs(theta.sum(axis=0) - 1).max())
    return worst


def test_catalogue_columns_sum_to_one_at_a_thousand_photons():
    # Source: probability law (columns of a POVM sum to one); common practice, no source.
    # 1,001 photon numbers is where the former log-gamma loss stage drifted by 1.2e-12 and
    # the former log-gamma unequal split by 3e-13.
    from catalogue import SPECS

    worst = _catalogue_column_sums(1001, SPECS)
    assert max(worst.values()) < 1e-13, worst


@pytest.mark.slow
def test_catalogue_columns_sum_to_one_at_ten_thousand_photons():
    # Source: probability law; common practice, no source. One POVM per catalogue model at
    # 10^4 photon numbers, unequal splits included.
    from catalogue import SPECS

    worst = _catalogue_column_sums(10_000, SPECS)
    assert max(worst.values()) < 1e-13, worst
