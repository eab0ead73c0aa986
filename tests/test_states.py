"""Input states: KIND:VALUES text and CSV columns -> photon-number distributions."""
from __future__ import annotations


import mpmath
import numpy as np
import pytest
from scipy import stats

from povmfit.fitting.data.errors import StateError
from povmfit.fitting.data.states import distribution_from_array, parse_state, state_distribution


def test_parse_state_kinds():
    assert parse_state("fock:3") == ("fock", (3.0,))
    assert parse_state(" Displaced_Thermal:2.0, 0.5") == ("displaced_thermal", (2.0, 0.5))
    assert parse_state("squeezed_vacuum:0.8") == ("squeezed_vacuum", (0.8,))


@pytest.mark.parametrize(
    "text", ["coherent", "laser:2", "coherent:two", "coherent:-1", "thermal:1,2", "fock:2.5", "coherent:nan",
             "displaced_thermal:1"],
)
def test_bad_state_text_is_refused_in_one_line(text):
    with pytest.raises(StateError) as caught:
        state_distribution(text)
    assert "\n" not in str(caught.value) and repr(text) in str(caught.value)


def test_fock_state_is_one_hot():
    np.testing.assert_array_equal(state_distribution("fock:3"), [0, 0, 0, 1])


def test_coherent_and_thermal_match_scipy_with_small_tail():
    # scipy.stats reference: Poisson(m) and Bose-Einstein = geometric with p = 1/(1+nbar), from 0
    p = state_distribution("coherent:2.0")
    np.testing.assert_allclose(p, stats.poisson.pmf(np.arange(p.size), 2.0), rtol=1e-12, atol=1e-300)
    assert 1 - p.sum() < 1e-10  # DESIGN: neglected tail mass below 1e-10
    q = state_distribution("thermal:0.5")
    np.testing.assert_allclose(q, stats.geom.pmf(np.arange(q.size) + 1, 1 / 1.5), rtol=1e-12)
    assert 1 - q.sum() < 1e-10


def test_displaced_thermal_matches_reference_values():
    # REFERENCES.md check values (independent computation of the Lachs formula): N=0.5, A=2
    p = state_distribution("displaced_thermal:2.0,0.5")
    np.testing.assert_allclose(p[:4], [0.175731, 0.214783, 0.193088, 0.148572], atol=1e-6)
    assert 1 - p.sum() < 1e-10


@pytest.mark.parametrize("mean", [0.0, 0.8, 3.0])
def test_squeezed_vacuum_matches_published_closed_form(mean):
    # Squeezed vacuum (Gerry & Knight, Introductory Quantum Optics, eq. 7.77 -- cited from memory):
    # p(2m) = (2m)! / (2^m m!)^2 tanh(r)^(2m) / cosh(r), p(2m+1) = 0, with sinh^2 r = mean.
    # Evaluated independently with mpmath at 30 digits.
    p = state_distribution(f"squeezed_vacuum:{mean}")
    mpmath.mp.dps = 30
    r = mpmath.asinh(mpmath.sqrt(mean))
    for n in range(min(p.size, 60)):
        if n % 2:
            assert p[n] == 0.0
            continue
        m = n // 2
        exact = mpmath.factorial(2 * m) / (2**m * mpmath.factorial(m)) ** 2 * mpmath.tanh(r) ** (2 * m) / mpmath.cosh(r)
        assert p[n] == pytest.approx(float(exact), rel=1e-12, abs=1e-300)
    assert 1 - p.sum() < 1e-10
    # photon statistics of squeezed vacuum: mean sinh^2 r, variance 2 sinh^2 r cosh^2 r = 2 s (1+s)
    # (same textbook, from memory)
    n = np.arange(p.size)
    assert n @ p == pytest.approx(mean, rel=1e-9, abs=1e-12)
    assert (n**2 @ p - (n @ p) ** 2) == pytest.approx(2 * mean * (1 + mean), rel=1e-8, abs=1e-12)


def test_array_distributions_are_checked():
    np.testing.assert_array_equal(state_distribution([0.25, 0.75]), [0.25, 0.75])
    for bad in ([0.5, 0.6], [[0.5, 0.5]], [1.5, -0.5], []):
        with pytest.raises(ValueError):
            distribution_from_array(bad)


def test_csv_columns(tmp_path):
    path = tmp_path / "dist.csv"
    path.write_text("photons,heralded,probability\n0,0.1,0.5\n1,0.9,0.5\n")
    np.testing.assert_array_equal(state_distribution(str(path)), [0.5, 0.5])
    np.testing.assert_array_equal(state_distribution(f"{path}:heralded"), [0.1, 0.9])
    with pytest.raises(StateError, match="no column 'missing'"):
        state_distribution(f"{path}:missing")
    path.write_text("photons,probability\n0,0.5\n2,0.5\n")
    with pytest.raises(StateError, match=r"line 3, column 'photons'"):
        state_distribution(str(path))
    path.write_text("probability\n0.5\n0.4\n")
    with pytest.raises(StateError, match="sum to 0.9"):
        state_distribution(str(path))
    path.write_text("probability\n0.5\nx\n")
    with pytest.raises(StateError, match=r"line 3, column 'probability'"):
        state_distribution(str(path))
