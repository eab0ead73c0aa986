"""The ``povmfit reconstruct`` command."""
from __future__ import annotations

import csv
import json

import numpy as np

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
