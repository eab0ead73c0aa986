"""detector.json: byte-identical round trip, one-line refusals, parameter ensembles.

The file tests are plumbing (values written are the values read). The ensemble tests use
the sampling theory of the normal distribution (standard error of a mean sd/sqrt(n), of a
variance sqrt(2/n) relative) and the half-normal mean s sqrt(2/pi) of a normal truncated at
its centre (standard results, from memory), with the tolerances stated beside each test.
"""
from __future__ import annotations

import json
import pickle
import warnings

import numpy as np
import pytest

from povmfit.fitting.data.errors import DetectorFileError
from povmfit.fitting.data.detector_file import (
    DetectorRecord,
    EnsembleClippingWarning,
    draw_parameter_ensemble,
    load_detector,
    save_detector,
)
from povmfit.models import parse_model_spec


def _record(spec="array:8+dark+crosstalk", values=None, covariance=None, gate=None):
    model = parse_model_spec(spec)
    names = model.parameter_names
    values = values or {n: v for n, v in zip(names, [0.61, 0.0012, 0.04, 0.3, 0.1, -0.2, 0.05])}
    if covariance is None:
        a = np.random.default_rng(1).normal(size=(len(names), len(names))) * 1e-3
        covariance = a @ a.T
    provenance = {"software": "povmfit 0.1.0", "input_sha256": "ab" * 32, "options": {"model": "auto", "gamma": 0.1}}
    return DetectorRecord(model, {n: values[n] for n in names}, covariance, gate, provenance)


@pytest.mark.parametrize(
    "spec", ["array:8+dark+crosstalk", "threshold+dark", "pnr:6+dark+crosstalk+readout", "array:5+dark+saturation:3"]
)
def test_load_then_save_is_byte_identical(tmp_path, spec):
    first, second = tmp_path / "a.json", tmp_path / "b.json"
    save_detector(_record(spec, gate=2.5e-9), first)
    record = load_detector(first)
    save_detector(record, second)
    assert first.read_bytes() == second.read_bytes()
    data = json.loads(first.read_text())
    size_key = "max_outcome" if spec.startswith("pnr") else "pixels"
    assert data["model"][size_key] == record.model.size
    assert data["parameter_order"] == list(record.model.parameter_names)
    assert ("saturation" in data["model"]["features"]) == ("saturation" in spec)


def _edited(tmp_path, edit):
    path = tmp_path / "detector.json"
    save_detector(_record(), path)
    data = json.loads(path.read_text())
    edit(data)
    path.write_text(json.dumps(data))
    return path


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda d: d.update(schema="povmfit.detector/2"), "newer povmfit"),
        (lambda d: d.pop("covariance"), "missing field"),
        (lambda d: d.update(extra=1), "unknown field"),
        (lambda d: d["model"].update(pixels=4), "model.pixels"),
        (lambda d: d["model"].update(features=["dark"]), "model.features"),
        (lambda d: d["model"].update(spec="array:8+sparkle"), "model.spec"),
        (lambda d: d.update(parameter_order=["dark_probability", "efficiency", "crosstalk_probability"]), "parameter_order"),
        (lambda d: d["parameters"].update(efficiency=1.5), "outside its bounds"),
        (lambda d: d["parameters"].update(efficiency="0.6"), "finite number"),
        (lambda d: d["covariance"][0].append(0.0), "3 x 3"),
        (lambda d: d["covariance"][0].__setitem__(1, 1.0), "not symmetric"),
        (lambda d: d.update(covariance=[[1, 0, 0], [0, -1, 0], [0, 0, 1]]), "positive semi-definite"),
        (lambda d: d["bounds"].update(efficiency=[0.0, 2.0]), "bounds.efficiency"),
        (lambda d: d.update(gate_duration_s=-1), "gate_duration_s"),
        (lambda d: d.update(provenance=[]), "provenance"),
    ],
)
def test_bad_files_are_refused_with_one_line(tmp_path, edit, message):
    path = _edited(tmp_path, edit)
    with pytest.raises(DetectorFileError, match=message) as caught:
        load_detector(path)
    assert "\n" not in str(caught.value) and str(path) in str(caught.value)


def test_non_json_content_is_refused_without_executing_it(tmp_path):
    path = tmp_path / "detector.json"
    path.write_bytes(pickle.dumps({"schema": "povmfit.detector/1"}))
    with pytest.raises(DetectorFileError, match="not"):
        load_detector(path)
    path.write_text('{"schema": "povmfit.detector/1", "covariance": NaN}')
    with pytest.raises(DetectorFileError, match="not valid JSON"):
        load_detector(path)
    with pytest.raises(DetectorFileError, match="cannot read"):
        load_detector(tmp_path / "missing.json")


def test_ensemble_reproduces_mean_and_covariance_inside_the_bounds():
    # Source: sampling theory of the normal distribution (standard result, from memory).
    # Interior point, bounds far away: the draws are Normal(values, covariance). With n = 20000
    # the mean is off by about sd/sqrt(n) (checked at 5 sd/sqrt(n)) and each variance by about
    # sqrt(2/n) = 1 % relative (checked at 6 %) -- sampling theory of the normal distribution.
    covariance = np.array([[4e-4, 1e-5, 0.0], [1e-5, 1e-6, 0.0], [0.0, 0.0, 1e-4]])
    record = _record(values={"efficiency": 0.6, "dark_probability": 0.01, "crosstalk_probability": 0.1}, covariance=covariance)
    draws = draw_parameter_ensemble(record, 20_000, seed=4)
    assert draws.shape == (20_000, 3)
    sd = np.sqrt(np.diag(covariance))
    assert np.all(np.abs(draws.mean(axis=0) - record.parameter_vector()) < 5 * sd / np.sqrt(20_000))
    np.testing.assert_allclose(np.diag(np.cov(draws.T)), np.diag(covariance), rtol=0.06)
    np.testing.assert_array_equal(draws, draw_parameter_ensemble(record, 20_000, seed=4))


def test_ensemble_at_a_bound_is_the_truncated_normal():
    # Source: the half-normal distribution's mean s*sqrt(2/pi) and sd s*sqrt(1 - 2/pi) ~ 0.6 s
    # (standard results, from memory). Dark probability fitted at its lower bound 0 with sd s:
    # rejection gives the half-normal; 20000 draws: standard error 0.6 s/sqrt(n), checked at 5x
    s = 1e-3
    record = _record(values={"efficiency": 0.6, "dark_probability": 0.0, "crosstalk_probability": 0.1},
                     covariance=np.diag([1e-4, s**2, 1e-4]))
    draws = draw_parameter_ensemble(record, 20_000, seed=9)
    assert draws[:, 1].min() >= 0.0
    assert abs(draws[:, 1].mean() - s * np.sqrt(2 / np.pi)) < 5 * 0.6 * s / np.sqrt(20_000)


def test_ensemble_falls_back_to_clipping_with_a_warning():
    # Source: common practice, no source (plumbing of the fallback). Six parameters on a bound:
    # acceptance 2^-6 < 1/50, so rejection cannot fill 2000 draws
    spec = "array:4+dark+crosstalk+unequal_split"
    values = {"efficiency": 1.0, "dark_probability": 0.0, "crosstalk_probability": 0.0,
              "split_log_ratio_1": 10.0, "split_log_ratio_2": -10.0, "split_log_ratio_3": 10.0}
    record = _record(spec, values=values, covariance=np.eye(6) * 1e-4)
    with pytest.warns(EnsembleClippingWarning, match="clipped"):
        draws = draw_parameter_ensemble(record, 2000, seed=1)
    bounds = record.model.bounds()
    for i, name in enumerate(record.model.parameter_names):
        assert bounds[name][0] <= draws[:, i].min() and draws[:, i].max() <= bounds[name][1]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert draw_parameter_ensemble(record, 5, seed=1).shape == (5, 6)  # 5 draws fit by rejection


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda d: d["parameters"].update(dark_probability=-1e-3), "parameters.dark_probability.*outside its bounds"),
        (lambda d: d["parameters"].update(efficiency=1.0000001), "parameters.efficiency.*outside its bounds"),
        (lambda d: d.update(schema="someone.else/1"), "field 'schema'"),
        (lambda d: d["covariance"][1].__setitem__(1, -0.5), "covariance"),
    ],
)
def test_tampered_values_are_refused_naming_the_field(tmp_path, edit, message):
    # fault study: efficiency > 1, negative dark values, unknown schema, non-PSD covariance
    path = _edited(tmp_path, edit)
    with pytest.raises(DetectorFileError, match=message) as caught:
        load_detector(path)
    assert "\n" not in str(caught.value)


def test_overflowing_and_nan_numbers_are_refused(tmp_path):
    path = _edited(tmp_path, lambda d: None)
    text = path.read_text()
    for bad in ("1e400", "NaN", "-Infinity"):
        path.write_text(text.replace('"efficiency": 0.61', f'"efficiency": {bad}', 1))
        with pytest.raises(DetectorFileError) as caught:
            load_detector(path)
        assert "\n" not in str(caught.value)


def test_deeply_nested_json_is_refused_with_one_line(tmp_path):
    path = tmp_path / "detector.json"
    path.write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(DetectorFileError, match="nested too deeply"):
        load_detector(path)
