"""The public library API: one entry point per task, strings and paths accepted, frozen
result objects with their views, typed errors naming the argument."""
from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

import povmfit
from simulated import Experiment

# an invented 3-pixel array with dark clicks, probed with coherent and displaced-thermal light
# (two thermal levels at alpha = 0 and alpha = 1, as the pointwise Wigner values need)
COHERENT = [0.0, 0.2, 0.5, 1.0, 2.0, 4.0, 0.0, 0.0, 1.0, 1.0]
THERMAL = [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.3, 0.8, 0.3, 0.8]
TRUTH = {"efficiency": 0.7, "dark_probability": 5e-3}


@pytest.fixture(scope="module")
def scan_file(tmp_path_factory):
    experiment = Experiment("array:3+dark", TRUTH, COHERENT, THERMAL, shots=20_000)
    scan = experiment.scan(np.random.default_rng(5))
    path = tmp_path_factory.mktemp("api") / "scan.csv"
    from povmfit.fitting.data.scan import write_scan

    write_scan(scan, path)
    return path


@pytest.fixture(scope="module")
def characterised(scan_file):
    return povmfit.characterise(str(scan_file), "array:3+dark", gate_duration=1e-7, n_jobs=1)


def test_every_public_name_resolves():
    for name in povmfit.__all__:
        assert getattr(povmfit, name) is not None, name
    with pytest.raises(AttributeError):
        povmfit.no_such_name  # noqa: B018


def test_paths_strings_and_objects_give_the_same_fit(scan_file):
    # Source: the same computation reached through two argument forms (common practice, no source).
    from_strings = povmfit.fit(str(scan_file), "array:3+dark")
    from_objects = povmfit.fit(povmfit.load_scan(scan_file), povmfit.parse_model_spec("array:3+dark"))
    assert from_strings.values == from_objects.values
    assert from_strings.deviance == from_objects.deviance
    # the fit recovers the invented device: 4 standard errors of shot noise
    assert abs(from_strings.values["efficiency"] - TRUTH["efficiency"]) < 4 * from_strings.stderr["efficiency"]


def test_calibration_uncertainty_zero_means_exact_probes(scan_file):
    # "0" is how a lab says its probes are exact: the same fit as leaving the option out
    exact = povmfit.fit(scan_file, "array:3+dark")
    zero = povmfit.fit(scan_file, "array:3+dark", calibration_uncertainty=0)
    assert zero.values == exact.values and zero.calibration_uncertainty is None


@pytest.mark.parametrize("kwargs, error, start", [
    ({"model": "array:3+sparkle"}, povmfit.ArgumentError, "model: "),
    ({"model": "array:5"}, povmfit.NotIdentifiable, ""),
    ({"calibration_uncertainty": -0.1}, povmfit.ArgumentError, "calibration_uncertainty: "),
    ({"calibration_uncertainty": float("nan")}, povmfit.ArgumentError, "calibration_uncertainty: "),
    ({"weighting": "chi"}, povmfit.ArgumentError, "weighting: "),
    ({"bootstrap": -1}, povmfit.ArgumentError, "bootstrap: "),
    ({"model": "array:3", "candidates": ["array:3"]}, povmfit.ArgumentError, "candidates: "),
])
def test_bad_arguments_raise_typed_errors_naming_the_argument(scan_file, kwargs, error, start):
    kwargs = {"model": "array:3+dark", **kwargs}
    with pytest.raises(error) as caught:
        povmfit.fit(scan_file, **kwargs)
    message = str(caught.value)
    assert message.startswith(start) and "\n" not in message and "--" not in message


def test_characterisation_is_frozen_and_its_views_agree(characterised, tmp_path):
    with pytest.raises(dataclasses.FrozenInstanceError):
        characterised.fit = None
    sheet = characterised.datasheet()
    assert characterised.to_dict()["figures"] == sheet["figures"]
    frame = characterised.to_dataframe()
    for name, figure in sheet["figures"].items():
        assert frame.loc[name, "value"] == figure["value"] and frame.loc[name, "stderr"] == figure["stderr"]
    text = characterised.summary()
    assert "array:3+dark" in text and "efficiency" in text and "cross-check" in text
    assert "<table>" in characterised._repr_html_()
    files = characterised.write(tmp_path / "out")
    written = json.loads(files["datasheet"].read_text())
    assert written["figures"]["efficiency"]["value"] == sheet["figures"]["efficiency"]["value"]
    assert {"datasheet", "detector", "povm", "wigner", "report"} <= set(files)
    # the model-free part is exactly what povmfit.reconstruct gives with the same seed
    alone = povmfit.reconstruct(characterised.scan, seed=0)
    np.testing.assert_array_equal(alone.reconstruction.theta, characterised.model_free.reconstruction.theta)


def test_two_processes_give_the_same_characterisation(scan_file, characterised):
    # Source: the one-process computation with the same functions and seeds (common practice).
    reports = []
    two = povmfit.characterise(scan_file, "array:3+dark", gate_duration=1e-7, n_jobs=2,
                               progress=lambda task, done, total: reports.append((task, done, total)))
    # the worker's progress is relayed, its tasks marked as the worker's
    worker = [r for r in reports if r[0].endswith("(worker)")]
    assert worker and worker[-1][1] == worker[-1][2]
    assert two.datasheet()["figures"] == characterised.datasheet()["figures"]
    np.testing.assert_array_equal(two.model_free.reconstruction.theta, characterised.model_free.reconstruction.theta)
    assert two.cross_check["povm"]["chi_square"] == characterised.cross_check["povm"]["chi_square"]


def test_auto_ranks_and_keeps_the_comparison(scan_file):
    result = povmfit.characterise(scan_file, candidates=["array:3", "array:3+dark"], n_jobs=1)
    assert result.comparison is not None and result.model.spec == "array:3+dark"
    assert "array:3+dark" in result.comparison.summary()


def test_progress_reaches_the_callback(scan_file):
    calls = []
    povmfit.fit(scan_file, "auto", candidates="array:3,array:3+dark", bootstrap=5,
                progress=lambda task, done, total: calls.append((task, done, total)))
    tasks = {task for task, _, _ in calls}
    assert {"compiling models", "model ranking", "bootstrap"} <= tasks
    assert all(0 <= done <= total for _, done, total in calls)


@pytest.mark.parametrize("n_jobs", [0, -2, 1.5])
def test_a_bad_number_of_processes_is_refused_before_any_work(n_jobs):
    # Source: the documented argument (n_jobs >= 1 or -1); common practice, no source.
    from povmfit.fitting.workflow.worker import worker_pool

    with pytest.raises(povmfit.ArgumentError, match="n_jobs"):
        with worker_pool(n_jobs):
            pass
