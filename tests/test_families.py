"""Property tests over the catalogue of detector models, and the model-spec syntax."""
from __future__ import annotations

import functools
import math

import jax
import numpy as np
import pytest
from catalogue import ALL_CASES, SPECS
from hypothesis import given
from hypothesis import strategies as hs

from povmfit.models import DetectorModel, parse_model_spec

N_PHOTONS = 10  # small, so the whole catalogue compiles quickly


@functools.lru_cache(maxsize=None)
def _compiled(spec):
    """(model, jitted POVM, jitted Jacobian) for a spec, compiled once per test session."""
    model = parse_model_spec(spec)
    povm = jax.jit(lambda p: model.povm(p, N_PHOTONS))
    return model, povm, jax.jit(jax.jacfwd(povm))


def _params(case):
    model = parse_model_spec(case.spec)
    values = case.parameter_values(model.parameter_names)
    bounds = model.bounds()
    for name, value in values.items():
        lo, hi = bounds[name]
        assert lo <= value <= hi, f"catalogue value {name}={value} outside {bounds[name]}"
    return model.pack(values)


@pytest.mark.parametrize("case", ALL_CASES, ids=lambda c: c.id)
def test_columns_sum_to_one_and_are_non_negative(case):
    # Source: definition of a POVM (column-stochastic matrix); common practice, no source.
    model, povm, _ = _compiled(case.spec)
    theta = np.asarray(povm(_params(case)))
    assert theta.shape == (model.n_outcomes, N_PHOTONS)
    assert np.all(np.isfinite(theta))
    assert theta.min() >= -1e-15
    np.testing.assert_allclose(theta.sum(axis=0), 1.0, rtol=0, atol=1e-12)


@pytest.mark.parametrize("case", ALL_CASES, ids=lambda c: c.id)
def test_jit_agrees_with_direct_call(case):
    # Source: common practice, no source (compilation must not change the numbers).
    model, povm, _ = _compiled(case.spec)
    params = _params(case)
    np.testing.assert_allclose(np.asarray(povm(params)), np.asarray(model.povm(params, N_PHOTONS)), rtol=0, atol=1e-14)


def _batch(model, params, size=3):
    """Points on the segment from ``params`` to the starting values (inside the bounds)."""
    start = model.pack(model.starting_values())
    return np.stack([params + (start - params) * t for t in np.linspace(0.0, 0.8, size)])


@pytest.mark.parametrize("case", ALL_CASES[:len(SPECS)], ids=lambda c: c.id)
def test_vmap_agrees_with_loop(case):
    # Source: common practice, no source (a batched call equals a loop of single calls).
    model, povm, _ = _compiled(case.spec)
    batch = _batch(model, np.asarray(_params(case)))
    stacked = np.asarray(jax.vmap(povm)(batch))
    for i, p in enumerate(batch):
        np.testing.assert_allclose(stacked[i], np.asarray(povm(p)), rtol=0, atol=1e-14)


def _finite_difference_jacobian(povm, params, bounds):
    """Central differences (error ~h^2 ~1e-10) inside the bounds; at a bound a second-order
    one-sided difference pointing into the range."""
    params = np.asarray(params, dtype=float)
    columns = []
    f = lambda p: np.asarray(povm(p))  # noqa: E731
    for i, (lo, hi) in enumerate(bounds):
        h = 1e-5 * max(1.0, abs(params[i]))
        e = np.zeros_like(params)
        e[i] = h
        if params[i] - h >= lo and params[i] + h <= hi:
            columns.append((f(params + e) - f(params - e)) / (2 * h))
        elif params[i] + 2 * h <= hi:
            columns.append((-3 * f(params) + 4 * f(params + e) - f(params + 2 * e)) / (2 * h))
        else:
            columns.append((3 * f(params) - 4 * f(params - e) + f(params - 2 * e)) / (2 * h))
    return np.stack(columns, axis=-1)


@pytest.mark.parametrize("case", ALL_CASES, ids=lambda c: c.id)
def test_jacobian_matches_finite_differences(case):
    # Source: independent finite differences (central, or one-sided at a bound), 1e-6 relative.
    # The edge cases (efficiency 1, dark 0, crosstalk 0) check that the Jacobian stays finite.
    model, povm, jacobian = _compiled(case.spec)
    params = _params(case)
    exact = np.asarray(jacobian(params))
    assert np.all(np.isfinite(exact))
    bounds = [model.bounds()[n] for n in model.parameter_names]
    numeric = _finite_difference_jacobian(povm, params, bounds)
    scale = np.abs(exact).max()
    np.testing.assert_allclose(exact, numeric, rtol=1e-6, atol=1e-8 * max(scale, 1.0))


def _random_inside(model, data):
    values = []
    for name in model.parameter_names:
        lo, hi = model.bounds()[name]
        values.append(data.draw(hs.floats(lo, hi, allow_nan=False), label=name))
    return np.array(values)


@pytest.mark.parametrize(
    "spec", ["threshold+dark", "pnr:5+dark+crosstalk+readout", "array:4+unequal_split+dark", "array:8+dark+crosstalk+readout+saturation:5"]
)
@given(data=hs.data())
def test_random_parameters_give_a_valid_povm(spec, data):
    # Source: definition of a POVM; hypothesis draws parameters anywhere inside the bounds,
    # edges included (common practice, no source).
    model, povm, _ = _compiled(spec)
    theta = np.asarray(povm(_random_inside(model, data)))
    assert np.all(np.isfinite(theta))
    assert theta.min() >= -1e-15
    np.testing.assert_allclose(theta.sum(axis=0), 1.0, rtol=0, atol=1e-12)


@pytest.mark.parametrize("spec", SPECS)
def test_spec_round_trip(spec):
    # Source: common practice, no source (spec -> model -> spec -> model is the same model).
    model = parse_model_spec(spec)
    again = parse_model_spec(model.spec)
    assert again == model
    assert again.spec == model.spec
    assert parse_model_spec(f"  {spec.upper()} ") == model


def test_spec_describes_family_size_and_features():
    # Source: the spec syntax documented in models/_families.py.
    model = parse_model_spec("array:8+crosstalk+dark+readout+saturation:5")
    assert (model.family, model.size, model.max_outcome, model.n_outcomes) == ("array", 8, 5, 6)
    assert model.feature_list == ["dark", "crosstalk", "readout", "saturation"]
    assert model.spec == "array:8+dark+crosstalk+readout+saturation:5"
    assert parse_model_spec("pnr:6+dark").parameter_names == ("efficiency", "dark_mean")
    assert parse_model_spec("array:3+unequal_split").parameter_names == ("efficiency", "split_log_ratio_1", "split_log_ratio_2")
    assert isinstance(parse_model_spec("threshold"), DetectorModel)


@pytest.mark.parametrize(
    "spec, message",
    [
        ("", "empty"),
        ("detector", "expected threshold"),
        ("array", "needs a size"),
        ("pnr+dark", "needs a size"),
        ("threshold:2", "no size"),
        ("array:0", ">= 1"),
        ("array:8+magic", "unknown feature"),
        ("array:8+dark:3", "unknown feature"),
        ("pnr:5+unequal_split", "not available"),
        ("threshold+crosstalk", "not available"),
        ("pnr:5+saturation:3", "saturation"),
        ("array:8+saturation", "top outcome"),
        ("array:8+saturation:8", "between 1 and 7"),
        ("array:1+crosstalk", "at least 2 pixels"),
        ("array:17+unequal_split", "2..16"),
    ],
)
def test_bad_specs_give_clear_errors(spec, message):
    # Source: common practice, no source (the message names the offending part).
    with pytest.raises(ValueError, match=message):
        parse_model_spec(spec)


@pytest.mark.parametrize("dark", [0.0, 0.013, 0.4])
def test_vacuum_click_probability(dark):
    # Source: common practice, no source: a threshold detector clicks on vacuum with its dark
    # probability; a PNR detector with Poisson(mu) dark counts with 1 - exp(-mu).
    assert abs(float(parse_model_spec("threshold+dark").vacuum_click_probability([0.8, dark])) - dark) < 1e-14
    got = float(parse_model_spec("pnr:4+dark").vacuum_click_probability([0.8, dark]))
    assert abs(got - (1 - math.exp(-dark))) < 1e-14
