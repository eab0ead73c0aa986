"""The ``povmfit reconstruct`` command."""
from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from povmfit.fitting.cli.main import main
from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions


def write_scan(path, seed=3):
    """An invented scan of a 2-pixel click detector: coherent ramp + displaced-thermal grid."""
    coherent = np.r_[np.linspace(0.0, 5.0, 12), np.repeat([0.0, 1.0], 3)]
    thermal = np.r_[np.zeros(12), np.tile([0.0, 0.4, 1.0], 2)]
    model = parse_model_spec("array:2+dark")
    n_photons = choose_cutoff(coherent, thermal)
    theta = np.asarray(model.povm(model.pack({"efficiency": 0.6, "dark_probability": 0.01}), n_photons))
    q = np.clip(np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T, 0, None)
    counts = np.random.default_rng(seed).multinomial(4000, q / q.sum(axis=1, keepdims=True))
    with open(path, "w", newline="") as handle:
        out = csv.writer(handle)
        out.writerow(["coherent_photons", "thermal_photons", "shots", "count_0", "count_1", "count_2"])
        for a, t, c in zip(coherent, thermal, counts):
            out.writerow([repr(float(a)), repr(float(t)), int(c.sum()), *map(int, c)])
    return n_photons


def read(path):
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def test_reconstruct_writes_both_tables(tmp_path, capsys):
    scan = tmp_path / "device.csv"
    n_photons = write_scan(scan)
    code = main(["reconstruct", str(scan), "--out", str(tmp_path / "out"), "--bootstrap", "4", "--json"])
    assert code == 0
    summary = json.loads(capsys.readouterr().out)
    povm = read(tmp_path / "out" / "povm.csv")
    assert list(povm[0]) == ["photons", "outcome", "probability", "stderr", "source"]
    assert len(povm) == 3 * n_photons and {r["source"] for r in povm} == {"reconstruction"}  # every (n, k)
    pairs = {(int(r["photons"]), int(r["outcome"])) for r in povm}
    assert pairs == {(n, k) for n in range(n_photons) for k in range(3)}
    wigner = read(tmp_path / "out" / "wigner.csv")
    assert list(wigner[0]) == ["re_alpha", "im_alpha", "outcome", "value", "stderr", "source"]
    pointwise = [r for r in wigner if r["source"] == "pointwise"]
    assert {float(r["re_alpha"]) for r in pointwise} == {0.0, 1.0}  # the two displacements with 3 levels
    assert {r["source"] for r in wigner} == {"pointwise", "smoothed"}
    assert summary["wigner_points"] == 2
    assert summary["povm"]["method"] == "likelihood"  # the default estimator


def test_method_option_selects_the_estimator(tmp_path, capsys):
    # Source: the library call with the same keyword (the verb is a thin layer over it).
    from povmfit.fitting.data.scan import load_scan
    from povmfit.fitting.tomography.model_free import reconstruct_scan

    scan = tmp_path / "device.csv"
    write_scan(scan)
    code = main(["reconstruct", str(scan), "--out", str(tmp_path / "out"), "--bootstrap", "0", "--json",
                 "--method", "least-squares"])
    assert code == 0
    assert json.loads(capsys.readouterr().out)["povm"]["method"] == "least_squares"
    expected = reconstruct_scan(load_scan(scan), bootstrap=0, seed=0, method="least_squares")
    written = read(tmp_path / "out" / "povm.csv")
    np.testing.assert_allclose([float(r["probability"]) for r in written],
                               expected.reconstruction.theta.T.ravel(), atol=1e-12)


def test_default_output_folder_and_bad_input(tmp_path, monkeypatch, capsys):
    scan = tmp_path / "device.csv"
    write_scan(scan)
    monkeypatch.chdir(tmp_path)
    assert main(["reconstruct", str(scan), "--bootstrap", "0", "--quiet"]) == 0
    assert (tmp_path / "device.povmfit" / "povm.csv").exists()
    assert capsys.readouterr().out == ""
    bad = tmp_path / "bad.csv"
    bad.write_text("coherent_photons,thermal_photons,shots,count_0,count_1\n1.0,0.0,10,4,x\n")
    assert main(["reconstruct", str(bad), "--out", str(tmp_path / "bad_out")]) == 2
    err = capsys.readouterr().err
    assert "bad.csv" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "bad_out").exists()  # nothing written


def rows_of(path, sources):
    return [r for r in read(path) if r["source"] in sources]


def test_fit_and_reconstruct_write_the_same_reconstruction(tmp_path, capsys):
    # Source: the fit command's own povm.csv and wigner.csv (one estimator, same seed and
    # resamples, so the rows must be equal character for character; common practice, no source).
    scan = tmp_path / "device.csv"
    write_scan(scan, seed=5)
    assert main(["fit", str(scan), "--model", "array:2+dark", "--out", str(tmp_path / "fit"), "--quiet",
                 "--no-report"]) == 0
    assert main(["reconstruct", str(scan), "--out", str(tmp_path / "rec"), "--quiet"]) == 0
    fitted = rows_of(tmp_path / "fit" / "povm.csv", {"reconstruction"})
    reconstructed = rows_of(tmp_path / "rec" / "povm.csv", {"reconstruction"})
    assert fitted == reconstructed and len(fitted) > 0
    assert {r["source"] for r in read(tmp_path / "fit" / "povm.csv")} == {"reconstruction", "model"}
    wigner_sources = {"pointwise", "smoothed"}
    assert rows_of(tmp_path / "fit" / "wigner.csv", wigner_sources) == rows_of(tmp_path / "rec" / "wigner.csv", wigner_sources)
    details = json.loads((tmp_path / "rec" / "reconstruction.json").read_text())
    assert details["reconstruction"]["bootstrap"] == 50 and details["pointwise"]["method"] == "box"


def test_text_summary_and_flag_errors(tmp_path, capsys):
    scan = tmp_path / "device.csv"
    write_scan(scan)
    assert main(["reconstruct", str(scan), "--out", str(tmp_path / "out"), "--bootstrap", "3", "--saturation", "1"]) == 0
    captured = capsys.readouterr()
    assert "outcomes x" in captured.out and "smoothed curve  M = 1" in captured.out
    assert str(tmp_path / "out" / "povm.csv") in captured.out
    assert captured.err == ""  # no progress bar: stderr is not a terminal here
    for flag, value in (("--bootstrap", "-1"), ("--seed", "-2"), ("--saturation", "0")):
        assert main(["reconstruct", str(scan), "--out", str(tmp_path / "bad"), flag, value]) == 2
        err = capsys.readouterr().err
        assert flag in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "bad").exists()  # nothing written


def test_progress_bar_only_on_a_terminal():
    # Source: common practice, no source (no control characters in logs and pipes).
    import io

    from povmfit.fitting.outputs.terminal import TerminalProgress

    class FakeTerminal(io.StringIO):
        def isatty(self):
            return True

    silent, shown = io.StringIO(), FakeTerminal()
    for stream in (silent, shown):
        bar = TerminalProgress(stream)
        for i in range(4):
            bar("bootstrap (POVM)", i + 1, 4)
    assert silent.getvalue() == ""
    assert "4/4" in shown.getvalue()


# ----- the output set -------------------------------------------------------------------------
def test_folder_with_other_results_is_refused_before_any_work(tmp_path, monkeypatch, capsys):
    import povmfit.fitting.tomography.model_free as model_free

    monkeypatch.setattr(model_free, "reconstruct_scan", lambda *a, **k: pytest.fail("work started"))
    scan = tmp_path / "device.csv"
    write_scan(scan)
    out = tmp_path / "out"
    out.mkdir()
    (out / "report.html").write_text("another scan's report")
    assert main(["reconstruct", str(scan), "-o", str(out), "--bootstrap", "0"]) == 2
    line = capsys.readouterr().err.strip()
    assert len(line.splitlines()) == 1 and str(out) in line and "--overwrite" in line
    assert sorted(p.name for p in out.iterdir()) == ["report.html"]  # untouched
    assert sorted(p.name for p in tmp_path.iterdir()) == ["device.csv", "out"]  # no staging left


def test_overwrite_replaces_the_whole_set_and_o_is_out(tmp_path, capsys):
    scan = tmp_path / "device.csv"
    write_scan(scan)
    out = tmp_path / "out"
    assert main(["reconstruct", str(scan), "-o", str(out), "--bootstrap", "0", "--quiet"]) == 0
    first = (out / "povm.csv").read_text()
    (out / "notes.txt").write_text("left from an earlier run")
    assert main(["reconstruct", str(scan), "-o", str(out), "--bootstrap", "0", "--quiet"]) == 2
    assert "already holds files" in capsys.readouterr().err
    assert main(["reconstruct", str(scan), "-o", str(out), "--bootstrap", "0", "--quiet", "--overwrite"]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["povm.csv", "reconstruction.json", "wigner.csv"]
    assert (out / "povm.csv").read_text() == first  # same scan and seed: the same set (deterministic estimator)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["device.csv", "out"]
