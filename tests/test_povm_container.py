"""The validated POVM container."""
from __future__ import annotations

import numpy as np
import pytest

from povmfit.models import POVM, parse_model_spec


def _array_povm():
    return POVM(np.asarray(parse_model_spec("array:4+dark").povm([0.7, 0.02], 12)))


def test_accepts_a_model_povm_and_reports_its_shape():
    # Source: common practice, no source.
    povm = _array_povm()
    assert (povm.n_outcomes, povm.n_photons) == (5, 12)
    assert not povm.elements.flags.writeable


@pytest.mark.parametrize("bad", [-2e-12, -0.1])
def test_rejects_negative_entries(bad):
    # Source: definition of a POVM (positive elements); tolerance 1e-12 as documented.
    theta = np.array([[0.5, 1.0], [0.5, 0.0]])
    theta[0, 1] += -bad
    theta[1, 1] = bad
    with pytest.raises(ValueError, match="negative"):
        POVM(theta)


def test_accepts_rounding_level_negative_entries():
    # Source: documented tolerance (entries negative by < 1e-12 are rounding).
    POVM(np.array([[1.0 + 5e-13, 0.5], [-5e-13, 0.5]]))


@pytest.mark.parametrize("offset", [2e-12, -1e-6])
def test_rejects_columns_not_summing_to_one(offset):
    # Source: completeness, sum_k theta_k(n) = 1 within 1e-12 (documented tolerance).
    theta = np.array([[0.25, 1.0], [0.75, 0.0]])
    theta[1, 0] += offset
    with pytest.raises(ValueError, match="sum"):
        POVM(theta)


def test_rejects_nan_and_bad_shapes():
    # Source: common practice, no source.
    with pytest.raises(ValueError, match="NaN"):
        POVM(np.array([[np.nan, 1.0], [0.0, 0.0]]))
    with pytest.raises(ValueError, match="shape"):
        POVM(np.ones((1, 3)))


def test_coarse_grain_sums_grouped_elements():
    # Source: common practice, no source (merging outcomes adds their elements).
    povm = _array_povm()
    merged = povm.coarse_grain([[0, 2], [1], [3, 4]])
    theta = povm.elements
    np.testing.assert_allclose(merged.elements, [theta[0] + theta[2], theta[1], theta[3] + theta[4]], atol=0)
    with pytest.raises(ValueError, match="partition"):
        povm.coarse_grain([[0, 1], [1, 2, 3, 4]])
    with pytest.raises(ValueError, match="partition"):
        povm.coarse_grain([[0], [1, 2, 3]])


def test_to_threshold_equals_threshold_model():
    # Source: independent construction: an array with one click threshold is a threshold
    # detector whose no-click element is (1-d)^N (1-eta)^n for uniform pixels (any N).
    eta, d, pixels = 0.7, 0.02, 4
    threshold = _array_povm().to_threshold()
    n = np.arange(12)
    np.testing.assert_allclose(threshold.elements[0], (1 - d) ** pixels * (1 - eta) ** n, rtol=1e-12)
    assert abs(threshold.vacuum_click_probability - (1 - (1 - d) ** pixels)) < 1e-14


def test_outcome_probabilities():
    # Source: common practice, no source (q = P theta^T): a Fock state picks a column.
    povm = _array_povm()
    fock3 = np.eye(12)[3]
    np.testing.assert_allclose(povm.outcome_probabilities(fock3), povm.elements[:, 3], atol=0)
