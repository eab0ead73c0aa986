"""Wigner functions of POVM elements checked against mpmath, Fock-space brute force and
closed forms."""
from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
import scipy.special

from povmfit.models import fock_wigner_table, fock_wigner_table_numpy, parse_model_spec, povm_wigner, saturating_wigner

ALPHAS = np.array([0.0, 0.1 + 0.05j, -0.4j, 0.7 - 0.7j, 1.5, -2.2 + 0.9j, 3.5j, 5.0 - 1.0j])


def _wigner_fock_mpmath(n, alpha):
    """W_n(alpha) = (2/pi)(-1)^n exp(-2|alpha|^2) L_n(4|alpha|^2) in 50 digits (mpmath)."""
    with mpmath.workdps(50):
        x = 4 * mpmath.mpf(abs(alpha)) ** 2
        return float(2 / mpmath.pi * (-1) ** n * mpmath.exp(-x / 2) * mpmath.laguerre(n, 0, x))


@pytest.mark.parametrize("table_of", [fock_wigner_table, fock_wigner_table_numpy], ids=["jax", "numpy"])
def test_fock_wigner_table_matches_mpmath(table_of):
    # Source: mpmath (general-purpose reference library); W_n from the Laguerre form above.
    n_photons = 80
    table = np.asarray(table_of(ALPHAS, n_photons))
    assert table.shape == (n_photons, ALPHAS.size)
    for n in range(n_photons):
        for i, alpha in enumerate(ALPHAS):
            ref = _wigner_fock_mpmath(n, alpha)
            assert abs(table[n, i] - ref) <= 1e-10 * abs(ref) + 1e-14, (n, alpha, table[n, i], ref)


def _parity_wigner(diagonal, alpha, fock, dim=160):
    """(2/pi) Tr[A D(alpha) (-1)^N D(alpha)^dagger] for A = diag(diagonal), brute force."""
    d = fock.displacement(alpha, dim)
    parity = np.diag((-1.0) ** np.arange(dim))
    displaced_parity = d @ parity @ d.conj().T
    a = np.zeros(dim)
    a[: len(diagonal)] = diagonal
    return float(np.real(2 / math.pi * np.sum(a * np.diag(displaced_parity))))


@pytest.mark.parametrize("n", [0, 1, 2, 5])
def test_fock_wigner_matches_parity_operator_formula(fock, n):
    # Source: independent brute force, W_A(alpha) = (2/pi) Tr[A D (-1)^N D^dagger] with D from
    # scipy.linalg.expm in 160 levels (small |alpha|, so truncation is negligible for n <= 5).
    alphas = ALPHAS[:5]
    table = np.asarray(fock_wigner_table(alphas, n + 1))
    for i, alpha in enumerate(alphas):
        assert abs(table[n, i] - _parity_wigner(np.eye(n + 1)[n], alpha, fock)) < 1e-12


def test_lossy_no_click_element_matches_parity_operator_formula(fock):
    # Source: independent brute force as above for A = sum_n (1-eta)^n |n><n| (eta = 0.6).
    eta, n_photons = 0.6, 60
    theta = np.asarray(parse_model_spec("threshold").povm([eta], n_photons))
    got = np.asarray(povm_wigner(theta, ALPHAS[:5]))[0]
    expected = [_parity_wigner((1 - eta) ** np.arange(n_photons), a, fock) for a in ALPHAS[:5]]
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-12)


def test_identity_is_one_over_pi_everywhere():
    # Source: Wigner normalisation of the identity operator (W = 1/pi), common practice.
    theta = np.asarray(parse_model_spec("array:4+dark+crosstalk").povm([0.7, 0.05, 0.1], 30))
    grid = (np.linspace(-4, 4, 9)[:, None] + 1j * np.linspace(-4, 4, 9)[None, :])
    per_outcome = np.asarray(povm_wigner(theta, grid))
    np.testing.assert_allclose(per_outcome.sum(axis=0), 1 / math.pi, rtol=0, atol=1e-13)
    np.testing.assert_allclose(np.asarray(povm_wigner(np.ones((2, 7)) / 2, grid)), 0.5 / math.pi, atol=1e-15)


@pytest.mark.parametrize("eta, at_origin", [(1.0, 0.636620), (0.9, 0.578745), (0.5, 0.424413)])
def test_lossy_no_click_element_check_values_and_closed_form(eta, at_origin):
    # Source: check values of the project reference list (independent computation), 6 decimals;
    # closed form W(alpha) = (2/pi)/(2-eta) exp(-2 eta |alpha|^2/(2-eta)) (Gaussian integral of
    # the loss-only no-click operator (1-eta)^N).
    n_photons = 400  # (1-eta)^n is below 1e-120 at the last column for eta >= 0.5
    theta = np.asarray(parse_model_spec("threshold").povm([eta], n_photons))
    real_axis = np.linspace(0.0, 3.0, 13)
    w = np.asarray(povm_wigner(theta, real_axis))[0]
    assert abs(w[0] - at_origin) < 6e-7
    closed = (2 / math.pi) / (2 - eta) * np.exp(-2 * eta * real_axis**2 / (2 - eta))
    np.testing.assert_allclose(w, closed, rtol=1e-10, atol=1e-15)


def test_fock_wigner_integrates_to_one():
    # Source: normalisation Tr|n><n| = 1 = integral of W_n over the plane; Gauss-Legendre
    # quadrature (scipy.special.roots_legendre, 300 nodes on 0 <= |alpha| <= 8) in polar
    # coordinates, since W_n depends on |alpha| only.
    nodes, weights = scipy.special.roots_legendre(300)
    radius = 4.0 * (nodes + 1.0)  # map [-1, 1] to [0, 8]
    table = np.asarray(fock_wigner_table(radius, 10))
    integrals = table @ (4.0 * weights * 2 * math.pi * radius)
    np.testing.assert_allclose(integrals, 1.0, rtol=0, atol=1e-10)


def test_saturating_wigner_top_outcome_is_complement_of_fock_projectors():
    # Source: completeness: for an ideal pnr:K detector outcomes k < K are |k><k| and the top
    # outcome is 1 - sum_{k<K}|k><k|, so W_top = 1/pi - sum_k W_k (W_k from mpmath).
    top = 4
    theta = np.asarray(parse_model_spec(f"pnr:{top}").povm([1.0], top + 1))  # constant beyond K
    got = np.asarray(saturating_wigner(theta, ALPHAS))
    for i, alpha in enumerate(ALPHAS):
        fock_parts = [_wigner_fock_mpmath(k, alpha) for k in range(top)]
        np.testing.assert_allclose(got[:top, i], fock_parts, rtol=0, atol=1e-13)
        assert abs(got[top, i] - (1 / math.pi - sum(fock_parts))) < 1e-13


def test_povm_wigner_equals_saturating_wigner_when_constant_beyond_m():
    # Source: common practice, no source: extending a POVM that is constant beyond M by more
    # copies of its last column must not change the Wigner values.
    head = np.asarray(parse_model_spec("array:3+dark").povm([1.0, 0.05], 3))
    m = head.shape[1] - 1
    # with efficiency 1 the pixel matrix is not constant beyond 2, so build the tail explicitly
    extended = np.concatenate([head, np.repeat(head[:, -1:], 40, axis=1)], axis=1)
    np.testing.assert_allclose(
        np.asarray(povm_wigner(extended, ALPHAS[:6])), np.asarray(saturating_wigner(head[:, : m + 1], ALPHAS[:6])), rtol=0, atol=1e-12
    )


def test_saturating_wigner_numpy_and_jax_paths_agree():
    # Source: the JAX path, itself checked against mpmath and the parity formula above.
    import jax.numpy as jnp

    theta = parse_model_spec("array:3+dark").povm(np.array([0.7, 0.01]), 30)
    alpha = np.linspace(-3, 3, 13) + 0.2j
    numpy_values = saturating_wigner(np.asarray(theta), alpha)
    assert isinstance(numpy_values, np.ndarray)
    np.testing.assert_allclose(numpy_values, np.asarray(saturating_wigner(theta, jnp.asarray(alpha))), rtol=1e-12, atol=1e-15)
