"""The result of the shared reconstruction entry point: files, tables, plain data and text.

The numbers compared here are the result's own arrays (the files and tables must carry them
unchanged: common practice, no source); the scan is simulated from an invented 2-pixel array
detector with a fixed seed.
"""
from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.data.scan import scan_from_arrays, write_scan
from povmfit.fitting.display import format_number
from povmfit.fitting.tomography.model_free import reconstruct_scan
from povmfit.fitting.tomography.scan_reconstruction import RECONSTRUCTION_SCHEMA, ScanReconstruction
from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions


def invented_scan():
    """Coherent ramp, displaced-thermal probes at |alpha|^2 = 0 and 1 (three levels each), and
    |alpha|^2 = 2 at two phases (for the phase test); 4000 shots per probe."""
    coherent = np.r_[np.linspace(0.0, 5.0, 12), np.repeat([0.0, 1.0], 3), 2.0, 2.0, 2.0, 2.0]
    thermal = np.r_[np.zeros(12), np.tile([0.0, 0.4, 1.0], 2), 0.0, 0.0, 0.5, 0.5]
    phase = np.r_[np.zeros(18), 0.0, 1.5, 0.0, 1.5]
    model = parse_model_spec("array:2+dark")
    n_photons = choose_cutoff(coherent, thermal)
    theta = np.asarray(model.povm(model.pack({"efficiency": 0.6, "dark_probability": 0.01}), n_photons))
    q = np.clip(np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T, 0, None)
    counts = np.random.default_rng(17).multinomial(4000, q / q.sum(axis=1, keepdims=True))
    return scan_from_arrays(coherent, thermal, counts, phase=phase)


@pytest.fixture(scope="module")
def result():
    return reconstruct_scan(invented_scan(), bootstrap=6, seed=4)


def read(path):
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def test_write_puts_the_arrays_into_the_files(result, tmp_path):
    files = result.write(tmp_path / "out")
    assert files == {"povm": tmp_path / "out" / "povm.csv", "wigner": tmp_path / "out" / "wigner.csv",
                     "reconstruction": tmp_path / "out" / "reconstruction.json"}
    rec = result.reconstruction
    povm = read(files["povm"])
    assert len(povm) == rec.n_outcomes * rec.n_photons
    theta, stderr = np.full(rec.theta.shape, np.nan), np.full(rec.theta.shape, np.nan)
    for row in povm:
        n, k = int(row["photons"]), int(row["outcome"])
        theta[k, n], stderr[k, n] = float(row["probability"]), float(row["stderr"])
        assert row["source"] == "reconstruction"
    np.testing.assert_array_equal(theta, rec.theta)  # repr of a float reads back exactly
    np.testing.assert_array_equal(stderr, rec.stderr)
    wigner = read(files["wigner"])
    for source, part in (("pointwise", result.pointwise), ("smoothed", result.smoothed)):
        rows = [r for r in wigner if r["source"] == source]
        assert len(rows) == part.values.size
        alpha = np.array([complex(float(r["re_alpha"]), float(r["im_alpha"])) for r in rows]).reshape(-1, part.values.shape[0])
        np.testing.assert_array_equal(alpha[:, 0], part.alpha)
        values = np.array([float(r["value"]) for r in rows]).reshape(alpha.shape).T
        errors = np.array([float(r["stderr"]) for r in rows]).reshape(alpha.shape).T
        np.testing.assert_array_equal(values, part.values)
        np.testing.assert_array_equal(errors, part.stderr)
    assert {r["source"] for r in wigner} == {"pointwise", "smoothed"}
    assert json.loads(files["reconstruction"].read_text()) == result.to_dict()
    assert not list((tmp_path / "out").glob("*.tmp"))  # no temporary files left behind


def test_to_dataframe_is_the_povm_long_table(result):
    frame = result.to_dataframe()
    rec = result.reconstruction
    assert list(frame.columns) == ["photons", "outcome", "probability", "stderr"]
    assert len(frame) == rec.theta.size
    table = frame.pivot(index="outcome", columns="photons", values="probability").to_numpy()
    errors = frame.pivot(index="outcome", columns="photons", values="stderr").to_numpy()
    np.testing.assert_array_equal(table, rec.theta)
    np.testing.assert_array_equal(errors, rec.stderr)
    assert frame["photons"].dtype.kind == "i" and frame["outcome"].dtype.kind == "i"


def test_to_dict_is_plain_json(result):
    data = result.to_dict()
    assert json.loads(json.dumps(data, allow_nan=False)) == data  # strict JSON, unchanged by a round trip
    assert data["schema"] == RECONSTRUCTION_SCHEMA
    assert data["scan"] == {"source": "<memory>", "sha256": None}
    assert data["reconstruction"]["theta"] == result.reconstruction.theta.tolist()
    assert data["pointwise"]["values"] == result.pointwise.values.tolist()
    assert data["smoothed"]["saturation"] == result.smoothed.saturation
    assert data["phase_test"]["settings"] == 2  # |alpha|^2 = 2 at nbar = 0 and at nbar = 0.5
    overview = result.overview()
    assert json.loads(json.dumps(overview, allow_nan=False)) == overview
    assert overview["wigner_points"] == result.pointwise.alpha.size


def test_from_parts_assembles_the_same_result(result):
    scan = invented_scan()
    parts = {"pointwise": result.pointwise, "smoothed": result.smoothed, "phase_test": result.phase_test}
    again = ScanReconstruction.from_parts(scan, result.reconstruction, parts)
    assert again.to_dict() == result.to_dict()


def test_summary_states_the_numbers(result):
    text = result.summary()
    rec, pointwise = result.reconstruction, result.pointwise
    lo, hi = result.constrained_photons
    assert lo == 0 and hi >= 5  # coherent probes up to 5 photons inform n = 0..5 at least
    assert f"{rec.n_outcomes} outcomes x {rec.n_photons} photon numbers" in text
    assert f"n = {lo}..{hi}" in text
    assert f"g = {format_number(rec.regularisation, 3)}" in text
    assert f"{rec.cv_folds}-fold cross-validation" in text
    assert f"converged after {rec.iterations} iterations" in text
    assert f"{pointwise.alpha.size} displacements" in text and f"M = {pointwise.saturation}" in text
    assert f"p = {format_number(result.phase_test.p_value, 3)}" in text
    assert "P(k|0)" in text and "W_k(0)" in text  # the table: alpha = 0 was probed
    html = result._repr_html_()
    assert "&lt;memory&gt;" in html and "<memory>" not in html  # escaped
    assert "<table>" in html and f"g = {format_number(rec.regularisation, 3)}" in html


@pytest.mark.parametrize("keywords, argument", [
    ({"bootstrap": -1}, "bootstrap"), ({"bootstrap": 2.5}, "bootstrap"), ({"seed": -3}, "seed"),
    ({"seed": True}, "seed"), ({"saturation": 0}, "saturation"),
])
def test_bad_arguments_are_named(keywords, argument):
    # Source: common practice, no source (errors name the keyword argument, not a flag).
    with pytest.raises(ArgumentError, match=f"^{argument}: "):
        reconstruct_scan(invented_scan(), **keywords)


def test_a_path_is_accepted_and_anything_else_refused(tmp_path):
    path = tmp_path / "scan.csv"
    write_scan(invented_scan(), path)
    from_path = reconstruct_scan(str(path), bootstrap=0, seed=4)
    from_arrays = reconstruct_scan(invented_scan(), bootstrap=0, seed=4)
    # Source: the reconstruction of the same numbers given as arrays (common practice, no source)
    np.testing.assert_array_equal(from_path.reconstruction.theta, from_arrays.reconstruction.theta)
    assert from_path.sha256 is not None and from_path.source == str(path)
    assert from_path.reconstruction.regularisation == from_arrays.reconstruction.regularisation
    with pytest.raises(ArgumentError, match="^scan: "):
        reconstruct_scan(42)
