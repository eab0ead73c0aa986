"""The ``emulate`` and ``simulate`` commands: output format, refusals (exit 2, nothing written).

Mostly plumbing (the command line must print what the library computes). The one physics
value, the click distribution of a coherent probe, is checked against the closed form for N
uniform on/off pixels (Sperling, Vogel, Agarwal, PRL 108, 093601 (2012); REFERENCES.md).
"""
from __future__ import annotations

import io
import json
from contextlib import redirect_stderr, redirect_stdout

import numpy as np
import pytest
from scipy import stats

from povmfit.fitting.cli.main import build_parser, main
from povmfit.fitting.emulation.simulate import parse_probe_grid
from povmfit.fitting.data.detector_file import DetectorRecord, save_detector
from povmfit.fitting.emulation.emulator import Emulator
from povmfit.fitting.data.scan import load_scan
from povmfit.models import parse_model_spec


@pytest.fixture()
def detector(tmp_path):
    model = parse_model_spec("array:4+dark")
    record = DetectorRecord(model, {"efficiency": 0.7, "dark_probability": 0.02}, np.diag([1e-4, 1e-6]), None, {})
    path = tmp_path / "detector.json"
    save_detector(record, path)
    return path


def _run(argv):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


def test_emulate_prints_outcome_count_probability(detector):
    code, out, err = _run(["emulate", detector, "--input", "coherent:2.0", "--shots", 5000, "--seed", 3])
    assert code == 0
    assert err == f"povmfit emulate: detector {detector} (array:4+dark), state coherent:2.0, shots 5000, seed 3\n"
    lines = out.strip().splitlines()
    assert lines[0] == "outcome,count,probability"
    rows = [line.split(",") for line in lines[1:]]
    assert [int(r[0]) for r in rows] == list(range(5))
    assert sum(int(r[1]) for r in rows) == 5000
    expected = Emulator.from_detector_file(detector).probabilities("coherent:2.0")
    np.testing.assert_array_equal([float(r[2]) for r in rows], expected)  # full precision text
    # coherent mean m on N pixels, efficiency eta, dark d: Binomial(N, 1 - q) clicks with
    # q = (1 - d) exp(-eta m / N) (source above); the 1e-10 photon-number tail bounds the error
    q = (1 - 0.02) * np.exp(-0.7 * 2.0 / 4)
    np.testing.assert_allclose([float(r[2]) for r in rows], stats.binom.pmf(np.arange(5), 4, 1 - q), rtol=0, atol=1e-9)
    assert _run(["emulate", detector, "--input", "coherent:2.0", "--shots", 5000, "--seed", 3])[1] == out
    quiet = _run(["emulate", detector, "--input", "coherent:2.0", "--shots", 5000, "--seed", 3, "--quiet"])
    assert quiet[1:] == (out, "")


def test_emulate_counts_repeat_without_a_seed_and_the_header_names_seed_0(detector):
    argv = ["emulate", detector, "--input", "thermal:1.0", "--shots", 5000]
    first, again, zero, other = (_run(argv + extra) for extra in ([], [], ["--seed", 0], ["--seed", 4]))
    assert first == again and first[1] == zero[1] and first[2].endswith("seed 0\n")
    # another seed: 5000 shots over 5 outcomes, identical counts would be a ~1e-6 coincidence (Monte Carlo, no source)
    assert other[1] != first[1] and other[2].endswith("seed 4\n")
    counts = [int(line.split(",")[1]) for line in first[1].strip().splitlines()[1:]]
    # the counts are the library's draw from the counts stream of seed 0 (the documented seed rule)
    from povmfit.fitting.cli.emulate import COUNTS_STREAM
    expected = Emulator.from_detector_file(detector).sample("thermal:1.0", 5000, seed=[0, COUNTS_STREAM])
    np.testing.assert_array_equal(counts, expected)


def test_emulate_ensemble_and_out_file(detector, tmp_path):
    target = tmp_path / "sub" / "out.csv"
    code, out, err = _run(["emulate", detector, "--input", "fock:2", "--ensemble", 30, "--seed", 1, "-o", target])
    assert code == 0 and out == "" and err.strip().endswith("seed 1, ensemble 30")
    lines = target.read_text().strip().splitlines()
    assert lines[0] == "outcome,count,probability,probability_sd"
    rows = [line.split(",") for line in lines[1:]]
    members = Emulator.from_detector_file(detector).ensemble(30, seed=1).member_probabilities("fock:2")
    np.testing.assert_allclose([float(r[2]) for r in rows], members.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose([float(r[3]) for r in rows], members.std(axis=0, ddof=1), rtol=1e-12)
    assert sum(int(r[1]) for r in rows) == 10000  # default shots
    assert _run(["emulate", detector, "--input", "fock:2", "--ensemble", 30, "--seed", 1])[1] == target.read_text()


def _emulated_ensemble(detector, members: int):
    code, out, _ = _run(["emulate", detector, "--input", "coherent:2.0", "--ensemble", members, "--seed", 5])
    assert code == 0
    return np.array([[float(x) for x in line.split(",")] for line in out.strip().splitlines()[1:]])


def _array_clicks(efficiency, dark, mean_photons=2.0, pixels=4):
    """Click distribution of a coherent probe on N uniform pixels: Binomial(N, 1 - q),
    q = (1 - d) exp(-eta m / N) (Sperling, Vogel, Agarwal, PRL 108, 093601 (2012))."""
    q = (1 - np.asarray(dark)) * np.exp(-np.asarray(efficiency) * mean_photons / pixels)
    return stats.binom.pmf(np.arange(pixels + 1)[None, :], pixels, 1 - np.atleast_1d(q)[:, None])


def test_ensemble_sd_is_the_spread_of_the_closed_form_over_the_drawn_detectors(detector):
    table = _emulated_ensemble(detector, 200)
    drawn = Emulator.from_detector_file(detector).ensemble(200, seed=5).members  # the same draws (seed 5)
    # brute force over the drawn (efficiency, dark) pairs with the closed form above; the
    # 1e-10 photon-number tail of the emulator bounds the difference
    closed = _array_clicks(drawn[:, 0], drawn[:, 1])
    np.testing.assert_allclose(table[:, 2], closed.mean(axis=0), rtol=0, atol=1e-9)
    np.testing.assert_allclose(table[:, 3], closed.std(axis=0, ddof=1), rtol=0, atol=1e-9)


def test_ensemble_sd_matches_linear_error_propagation(detector):
    table = _emulated_ensemble(detector, 4000)
    # delta method: sd(p_k) = sqrt(g^T C g), g the gradient of the closed form in (eta, d)
    # (central differences), C = diag(1e-4, 1e-6) the detector file's covariance
    step = 1e-6
    gradient = np.stack([(_array_clicks(0.7 + step, 0.02) - _array_clicks(0.7 - step, 0.02))[0] / (2 * step),
                         (_array_clicks(0.7, 0.02 + step) - _array_clicks(0.7, 0.02 - step))[0] / (2 * step)])
    linear = np.sqrt(1e-4 * gradient[0] ** 2 + 1e-6 * gradient[1] ** 2)
    # the sample sd of 4000 draws has relative standard error 1/sqrt(2 * 3999) = 1.1 %; 4 of
    # them (false failure ~6e-5 per outcome, normal tails) plus 1 % for the curvature the
    # linearisation leaves out (second order in sigma_eta / eta ~ 1.4 %)
    np.testing.assert_allclose(table[:, 3], linear, rtol=0.055)


@pytest.mark.parametrize(
    "extra", [["--input", "coherent:x"], ["--shots", "-1"], ["--ensemble", "0"], ["--input", "missing.csv"]]
)
def test_emulate_refusals_exit_2_and_write_nothing(detector, tmp_path, extra):
    target = tmp_path / "never.csv"
    code, out, err = _run(["emulate", detector, *extra, "--out", target])
    assert code == 2 and out == "" and not target.exists()
    assert err.count("\n") == 1 and "error" in err


def test_emulate_refuses_newer_detector_file(detector):
    data = json.loads(detector.read_text())
    data["schema"] = "povmfit.detector/7"
    detector.write_text(json.dumps(data))
    code, _, err = _run(["emulate", detector])
    assert code == 2 and "povmfit.detector/7" in err and err.count("\n") == 1


def test_probe_grid_syntax():
    coherent, thermal = parse_probe_grid("coherent=0:4:21;thermal=0,0.5,1")
    assert coherent.size == 63
    np.testing.assert_allclose(np.unique(coherent), np.linspace(0, 4, 21))
    np.testing.assert_array_equal(np.unique(thermal), [0, 0.5, 1])
    coherent, thermal = parse_probe_grid("coherent=0:4:9|thermal=0.5,1")
    assert coherent.size == 11 and np.count_nonzero(thermal) == 2


def test_simulate_writes_a_scan_that_loads(detector, tmp_path):
    target = tmp_path / "synthetic.csv"
    code, out, err = _run(["simulate", detector, "--probes", "coherent=0:3:4;thermal=0,0.5", "--shots", 2000,
                           "--seed", 2, "-o", target])
    assert code == 0, err
    assert out == f"povmfit simulate: wrote {target}: 8 probes, 2,000 shots each, seed 2\n"
    scan = load_scan(target)
    assert scan.n_probes == 8 and scan.n_outcomes == 5
    assert np.all(np.asarray(scan.shots) == 2000)


def test_simulate_is_reproducible_without_a_seed_and_quiet_prints_nothing(detector, tmp_path):
    argv = ["simulate", detector, "--probes", "coherent=0,1,2", "--shots", 500]
    outputs = [tmp_path / name for name in ("a.csv", "b.csv", "zero.csv", "other.csv")]
    options = ([], ["--quiet"], ["--seed", 0], ["--seed", 9])
    runs = [_run(argv + extra + ["-o", path]) for extra, path in zip(options, outputs)]
    assert [code for code, _, _ in runs] == [0] * 4
    assert runs[0][1].endswith("seed 0\n") and runs[1][1:] == ("", "")
    assert outputs[0].read_bytes() == outputs[1].read_bytes() == outputs[2].read_bytes()
    # another seed: identical counts on 3 probes x 500 shots would be a ~1e-6 coincidence (Monte Carlo, no source)
    assert outputs[3].read_bytes() != outputs[0].read_bytes() and runs[3][1].endswith("seed 9\n")


def test_simulate_reads_a_probe_file(detector, tmp_path):
    probes = tmp_path / "probes.csv"
    probes.write_text("coherent_photons,thermal_photons,probe\n0,0,dark\n1.5,0,weak\n0,0.8,warm\n")
    target = tmp_path / "s.parquet"
    assert _run(["simulate", detector, "--probes", probes, "--shots", 100, "-o", target])[0] == 0
    assert load_scan(target).n_probes == 3


@pytest.mark.parametrize("grid", ["coherent=1:2", "photons=1,2", "coherent=-1", "coherent=1;coherent=2", "",
                                  "missing-plan.csv"])
def test_simulate_refuses_bad_grids(detector, tmp_path, grid):
    target = tmp_path / "s.csv"
    code, _, err = _run(["simulate", detector, "--probes", grid, "--shots", 10, "-o", target])
    assert code == 2 and not target.exists() and err.count("\n") == 1
    assert ("no such probe file" in err) == grid.endswith(".csv")


def test_help_texts_carry_examples():
    parser = build_parser()
    actions = {a.dest: a for a in parser._actions}["verb"].choices
    for verb in ("emulate", "simulate"):
        assert f"povmfit {verb} " in actions[verb].format_help()


@pytest.mark.parametrize("extra, field", [(["--shots", str(10**20)], "--shots"), (["--shots", "-5"], "--shots"),
                                          (["--ensemble", str(10**9)], "--ensemble"), (["--ensemble", "0"], "--ensemble")])
def test_absurd_shots_and_ensembles_are_refused_naming_the_flag(detector, tmp_path, extra, field):
    code, out, err = _run(["emulate", detector, "--input", "coherent:1", *extra, "--out", tmp_path / "x.csv"])
    assert code == 2 and out == "" and not (tmp_path / "x.csv").exists()
    assert len(err.strip().splitlines()) == 1 and field in err


def test_fock_beyond_the_scan_gives_one_warning_line(tmp_path):
    model = parse_model_spec("array:4+dark")
    record = DetectorRecord(model, {"efficiency": 0.7, "dark_probability": 0.02}, np.diag([1e-4, 1e-6]), None,
                            {"constrained_photons": 9})
    path = tmp_path / "detector.json"
    save_detector(record, path)
    code, out, err = _run(["emulate", path, "--input", "fock:20", "--shots", "10", "--seed", "1", "--quiet"])
    assert code == 0 and out.startswith("outcome,count,probability")
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "warning" in lines[0] and "above 9 photons" in lines[0]
    probabilities = [float(line.split(",")[2]) for line in out.strip().splitlines()[1:]]
    assert abs(sum(probabilities) - 1) < 1e-15  # the emulator's probabilities sum to one
