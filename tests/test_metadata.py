"""Conditions of a measurement: read from a sidecar file or given, checked, carried into the
datasheet and the detector file (plumbing; no numbers from outside).
Source of every expected value: the metadata contract in the README (common practice, no source)."""
from __future__ import annotations

import json

import numpy as np
import pytest

import povmfit
from povmfit.fitting.data.metadata import metadata_for_scan, parse_meta_pairs
from simulated import Experiment


@pytest.fixture
def scan_file(tmp_path):
    experiment = Experiment("threshold+dark", {"efficiency": 0.6, "dark_probability": 1e-3},
                            [0.0, 0.5, 1.0, 2.0, 4.0], shots=5_000)
    from povmfit.fitting.data.scan import write_scan

    path = tmp_path / "scan.csv"
    write_scan(experiment.scan(np.random.default_rng(1)), path)
    return path


def test_sidecar_json_and_toml_are_read_and_typed(scan_file):
    scan_file.with_name("scan.csv.meta.json").write_text(json.dumps({"device": "KX-3", "wavelength_nm": "1550"}))
    assert metadata_for_scan(scan_file) == {"device": "KX-3", "wavelength_nm": 1550.0}
    scan_file.with_name("scan.csv.meta.json").unlink()
    scan_file.with_name("scan.csv.meta.toml").write_text('[meta]\ntemperature_k = 0.8\noperator = "R. Ames"\n')
    assert metadata_for_scan(scan_file, {"serial": 17}) == {"temperature_k": 0.8, "operator": "R. Ames", "serial": "17"}


@pytest.mark.parametrize("pairs, fragment", [
    (["wavelength_nm=-3"], "wavelength_nm"),
    (["temperature_k=warm"], "temperature_k"),
    (["bias_current_ua=nan"], "bias_current_ua"),
    (["novalue"], "KEY=VALUE"),
    (["bad key=1"], "bad key"),
])
def test_bad_metadata_is_refused_naming_the_key(pairs, fragment):
    with pytest.raises(povmfit.ArgumentError, match=fragment):
        parse_meta_pairs(pairs)


def test_bad_sidecar_names_the_file(scan_file):
    sidecar = scan_file.with_name("scan.csv.meta.json")
    sidecar.write_text("{not json")
    with pytest.raises(povmfit.PovmfitError, match="scan.csv.meta.json"):
        metadata_for_scan(scan_file)


def test_conditions_reach_datasheet_and_detector_file(scan_file):
    scan_file.with_name("scan.csv.meta.json").write_text(json.dumps({"device": "KX-3", "wavelength_nm": 1550}))
    result = povmfit.characterise(scan_file, "threshold+dark", metadata={"bias_current_ua": 11.5})
    sheet = result.datasheet()
    assert sheet["conditions"] == {"device": "KX-3", "wavelength_nm": 1550.0, "bias_current_ua": 11.5}
    assert result.detector().provenance["metadata"] == sheet["conditions"]
