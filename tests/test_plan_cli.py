"""The ``plan`` command: plan.csv, the summary and --json, the report, refusals (one line, exit 2,
nothing written), and ``simulate`` reading the plan's per-probe shots. Plumbing: the numbers
printed are the library's (tested in test_plan.py, against closed forms and cvxpy).
Source of every other expected value: the plan contract in the README (common practice, no source)."""
from __future__ import annotations

import csv
import io
import json
from contextlib import redirect_stderr, redirect_stdout

import numpy as np
import pytest

from povmfit.fitting.cli.main import build_parser, main
from povmfit.fitting.data.detector_file import DetectorRecord, save_detector
from povmfit.fitting.data.scan import load_scan
from povmfit.models import parse_model_spec

SPEC = ["threshold+dark", "--guess", "efficiency=0.8,dark=0.01"]


def _run(argv):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


@pytest.fixture()
def detector(tmp_path):
    record = DetectorRecord(parse_model_spec("threshold+dark"), {"efficiency": 0.8, "dark_probability": 0.01},
                            np.diag([1e-4, 1e-6]), None, {})
    path = tmp_path / "detector.json"
    save_detector(record, path)
    return path


def test_plan_writes_plan_csv_report_and_summary(tmp_path):
    target = tmp_path / "out" / "plan.csv"
    code, out, err = _run(["plan", *SPEC, "--target", "efficiency:0.01", "--calibration-uncertainty", "0.01",
                           "--shots-per-second", "1e5", "--out", target, "--report"])
    assert code == 0, err
    rows = list(csv.DictReader(target.open()))
    assert list(rows[0]) == ["coherent_photons", "thermal_photons", "shots", "probe"]
    total = sum(int(r["shots"]) for r in rows)
    assert f"{total:,} shots in total" in out and "at 100000 shots/s" in out
    assert "0.008" in out  # the calibration floor is named
    page = (tmp_path / "out" / "plan.html").read_text()
    assert "<svg" in page and "Planned and uniform" in page


def test_plan_json_summary(tmp_path):
    code, out, _ = _run(["plan", *SPEC, "--target", "efficiency:0.01", "--out", tmp_path / "p.csv", "--json"])
    assert code == 0
    data = json.loads(out)
    assert data["total_shots"] == sum(data["shots"])
    assert data["figures"]["efficiency"]["met"] is True
    assert data["outputs"]["plan"].endswith("p.csv")


def test_simulate_takes_the_plans_shots(detector, tmp_path):
    plan_file = tmp_path / "plan.csv"
    assert _run(["plan", detector, "--target", "efficiency:0.01", "--cross-check", "-o", plan_file])[0] == 0
    rows = list(csv.DictReader(plan_file.open()))
    scan_file = tmp_path / "sim.csv"
    code, _, err = _run(["simulate", detector, "--probes", plan_file, "--seed", 4, "-o", scan_file])
    assert code == 0, err
    scan = load_scan(scan_file)
    np.testing.assert_array_equal(scan.shots, [int(r["shots"]) for r in rows])
    np.testing.assert_array_equal(scan.coherent_photons, [float(r["coherent_photons"]) for r in rows])
    assert list(scan.labels) == [r["probe"] for r in rows]
    # --shots beside a shots column is ambiguous: refused
    code, _, err = _run(["simulate", detector, "--probes", plan_file, "--shots", 10, "-o", tmp_path / "no.csv"])
    assert code == 2 and err.count("\n") == 1 and "--shots" in err and not (tmp_path / "no.csv").exists()


def test_simulate_refuses_a_bad_shots_column(detector, tmp_path):
    probes = tmp_path / "probes.csv"
    probes.write_text("coherent_photons,thermal_photons,shots\n0,0,100\n1,0,-5\n")
    code, _, err = _run(["simulate", detector, "--probes", probes, "-o", tmp_path / "s.csv"])
    assert code == 2 and "line 3" in err and "'shots'" in err and err.count("\n") == 1


def test_simulate_without_shots_anywhere_is_refused(detector, tmp_path):
    code, _, err = _run(["simulate", detector, "--probes", "coherent=0,1", "-o", tmp_path / "s.csv"])
    assert code == 2 and "--shots" in err and err.count("\n") == 1


@pytest.mark.parametrize("extra, needle", [
    (["--target", "eff:0.01"], "unknown figure"),
    (["--target", "efficiency:0.001", "--calibration-uncertainty", "0.01"], "cannot be reached"),
    (["--target", "efficiency:0.01", "--coherent", "5:1"], "--coherent"),
    (["--target", "efficiency:0.01", "--thermal", "x"], "--thermal"),
    (["--target", "efficiency:0.01", "--coherent", "0:0", "--thermal", "0:0"], "no light"),
    (["--target", "efficiency:0.01", "--max-probes", "0"], "--max-probes"),
    (["--target", "efficiency:0.01", "--shots-per-second", "0"], "--shots-per-second"),
    (["--target", "efficiency"], "--target"),
])
def test_plan_refusals_are_one_line_exit_2_and_write_nothing(tmp_path, extra, needle):
    target = tmp_path / "plan.csv"
    code, out, err = _run(["plan", *SPEC, *extra, "--out", target])
    assert code == 2 and out == "" and not target.exists()
    assert err.count("\n") == 1 and needle in err


def test_plan_needs_guesses_for_a_spec(tmp_path):
    code, _, err = _run(["plan", "threshold+dark", "--target", "efficiency:0.01", "--out", tmp_path / "p.csv"])
    assert code == 2 and "--guess" in err and err.count("\n") == 1


def test_plan_help_carries_an_example():
    actions = {a.dest: a for a in build_parser()._actions}["verb"].choices
    assert "povmfit plan " in actions["plan"].format_help()
