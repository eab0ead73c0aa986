"""Shared test helpers: float64 JAX, a quick hypothesis profile and brute-force Fock-space
operators (independent of povmfit: built from the matrix exponential of scipy)."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import HealthCheck, settings

import povmfit  # noqa: F401  (switches JAX to float64 before any test builds an array)

settings.register_profile(
    "povmfit-quick",
    max_examples=15,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.load_profile("povmfit-quick")


def annihilation_operator(dim: int) -> np.ndarray:
    """a|n> = sqrt(n)|n-1> in a Fock space truncated at dim - 1 photons."""
    return np.diag(np.sqrt(np.arange(1, dim, dtype=float)), k=1)


def displacement_operator(alpha: complex, dim: int) -> np.ndarray:
    """D(alpha) = exp(alpha a^dagger - alpha^* a) by scipy.linalg.expm (brute force)."""
    a = annihilation_operator(dim)
    return scipy.linalg.expm(alpha * a.conj().T - np.conj(alpha) * a)


def thermal_density_matrix(nbar: float, dim: int) -> np.ndarray:
    """Diagonal Bose-Einstein state nbar^n/(1+nbar)^(n+1) (textbook form)."""
    n = np.arange(dim)
    return np.diag(nbar**n / (1.0 + nbar) ** (n + 1))


@pytest.fixture(scope="session")
def fock():
    """Namespace of the brute-force Fock-space helpers above."""

    class _Fock:
        annihilation = staticmethod(annihilation_operator)
        displacement = staticmethod(displacement_operator)
        thermal = staticmethod(thermal_density_matrix)

    return _Fock
