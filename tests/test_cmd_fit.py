"""`povmfit fit` at the edge: bad input, the datasheet contract, the bundled example."""
import json

import numpy as np
import pytest

from povmfit.fitting.cli.main import main
from povmfit.fitting.data.demo import demo_scan_path, generate_demo_scan
from povmfit.fitting.data.scan import load_scan, write_scan

from simulated import Experiment


@pytest.fixture(scope="module")
def scan_file(tmp_path_factory):
    truth = {"efficiency": 0.55, "dark_probability": 4e-3}
    coherent = np.repeat([0.0, 0.5, 1.0, 2.0, 4.0], 2)
    thermal = np.tile([0.0, 0.5], 5)
    scan = Experiment("array:3+dark", truth, coherent, thermal, shots=20_000).scan(np.random.default_rng(4))
    path = tmp_path_factory.mktemp("scan") / "device.csv"
    write_scan(scan, path)
    return path


def test_bad_scan_is_refused_with_one_line_and_nothing_written(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("coherent_photons,thermal_photons,shots,count_0,count_1\n1.0,0,10,4,5\n")
    out = tmp_path / "out"
    assert main(["fit", str(bad), "--model", "threshold", "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bad.csv:2" in err[0] and "shots" in err[0]
    assert not out.exists()


@pytest.mark.parametrize("option", [["--model", "array:3+sparkle"], ["--model", "pnr:5"], ["--calibration-uncertainty", "2"]])
def test_bad_options_are_refused(scan_file, tmp_path, capsys, option):
    out = tmp_path / "out"
    args = ["fit", str(scan_file), "--out", str(out)] + (option if option[0] != "--calibration-uncertainty" else ["--model", "array:3+dark"] + option)
    assert main(args) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1
    assert not out.exists()


def test_datasheet_and_detector_follow_the_contract(scan_file, tmp_path):
    out = tmp_path / "out"
    code = main(["fit", str(scan_file), "--model", "array:3+dark", "--calibration-uncertainty", "0.05",
                 "--gate-duration", "1e-6", "--out", str(out), "--quiet", "--no-report"])
    assert code == 0
    sheet = json.loads((out / "datasheet.json").read_text())
    assert sheet["schema"] == "povmfit.datasheet/1"
    assert sheet["model"] == {"family": "array", "spec": "array:3+dark", "features": ["dark"], "pixels": 3}
    eff = sheet["figures"]["efficiency"]
    # combined = statistical (+) calibration in quadrature (definition, common practice)
    assert eff["stderr"] ** 2 == pytest.approx(eff["stat_stderr"] ** 2 + eff["calibration_stderr"] ** 2, rel=1e-6)
    # the truth (simulated) lies inside the reported interval
    assert eff["ci95"][0] < 0.55 < eff["ci95"][1]
    assert {"dark_count_rate_hz", "vacuum_click_probability"} <= set(sheet["figures"])
    assert set(sheet["goodness_of_fit"]) >= {"deviance", "dof", "p_value"}
    assert sheet["provenance"]["input_sha256"] == load_scan(scan_file).sha256
    # the fitted model is the simulated one, so the model-free cross-check must not object
    # (its verdict level is p < 0.01 on both statistics)
    assert sheet["cross_check"]["verdict"] == "consistent", sheet["cross_check"]
    detector = json.loads((out / "detector.json").read_text())
    assert detector["schema"] == "povmfit.detector/1"
    assert detector["parameter_order"] == ["efficiency", "dark_probability"]
    povm = (out / "povm.csv").read_text().splitlines()
    assert povm[0] == "photons,outcome,probability,stderr,source"
    assert not list(out.glob(".*.tmp"))


def test_bundled_demo_scan_is_the_documented_simulation():
    # the shipped file must be exactly what cmd_demo's generator produces (seeded simulation)
    shipped = load_scan(demo_scan_path())
    regenerated = generate_demo_scan()
    np.testing.assert_array_equal(shipped.counts, regenerated.counts)
    np.testing.assert_array_equal(shipped.coherent_photons, regenerated.coherent_photons)


def test_cross_check_objects_to_a_wrong_model(scan_file, tmp_path):
    # Loss only, no dark counts, on a detector with a 4e-3 dark probability per pixel: the
    # vacuum probes alone show ~240 dark clicks per 20,000 shots, far outside the model.
    out = tmp_path / "out"
    assert main(["fit", str(scan_file), "--model", "array:3", "--out", str(out), "--quiet", "--no-report"]) == 0
    sheet = json.loads((out / "datasheet.json").read_text())
    assert sheet["goodness_of_fit"]["p_value"] < 1e-6
    assert sheet["cross_check"]["verdict"].startswith("tension")


def test_calibration_uncertainty_zero_means_exact_probes(scan_file, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["fit", str(scan_file), "--model", "array:3+dark", "--calibration-uncertainty", "0",
                 "--out", str(out), "--quiet", "--no-report", "--jobs", "1"]) == 0
    sheet = json.loads((out / "datasheet.json").read_text())
    assert sheet["calibration"]["included"] is False and "exclude" in sheet["calibration"]["note"]
    for bad in ("-0.1", "nan", "0.5", "inf"):
        assert main(["fit", str(scan_file), "--model", "array:3+dark", "--calibration-uncertainty", bad,
                     "--out", str(tmp_path / "x")]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "--calibration-uncertainty" in err[0]
    assert not (tmp_path / "x").exists()


def test_rerun_into_results_needs_overwrite_which_replaces_the_whole_set(scan_file, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "report.html").write_text("another scan's report")
    args = ["fit", str(scan_file), "--model", "array:3+dark", "--out", str(out), "--quiet", "--no-report", "--jobs", "1"]
    assert main(args) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert main(args + ["--overwrite"]) == 0
    names = {p.name for p in out.iterdir()}
    assert "report.html" not in names and {"datasheet.json", "detector.json", "povm.csv"} <= names
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # no staging folder left
