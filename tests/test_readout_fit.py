"""A fixed readout stage: ``fit(scan, model, readout=M)`` and ``povmfit fit SCAN --readout FILE``.

The scans here are simulated shot by shot without povmfit's photon statistics or detector
stages (independent Monte Carlo): a displaced thermal state is a Gaussian mixture of coherent
states (Glauber-Sudarshan P function), so the photon number is Poisson(|beta|^2) with beta ~
alpha + complex Gaussian of variance nbar; loss is binomial thinning; the reported outcome of
m registered photons is drawn from column m of the readout matrix (outcome K beyond its last
column). The readout matrix is invented: reading one low is likelier than reading one high,
as with a threshold set high between pulse-height peaks.
"""
from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pytest
from scipy import stats

import povmfit
from povmfit.fitting.cli.main import main
from povmfit.fitting.data.detector_file import load_detector, save_detector
from povmfit.fitting.data.errors import ArgumentError, DetectorFileError, InputFileError
from povmfit.fitting.data.scan import scan_from_arrays, write_scan
from povmfit.fitting.emulation.emulator import Emulator
from povmfit.fitting.inference.objective import povm_and_jacobian
from povmfit.models import DetectorModel, parse_model_spec

Z_999 = 3.29  # two-sided 99.9 % normal quantile (scipy.stats.norm.ppf(0.9995))
EFFICIENCY = 0.62
TOP = 4  # outcomes 0..4
PROBES = ((0.0, 0.0), (0.3, 0.0), (0.8, 0.0), (1.5, 0.0), (2.5, 0.0), (4.0, 0.0), (0.0, 1.0), (1.0, 0.5))
SHOTS = 20_000


def invented_readout(top: int = TOP, columns: int = 6) -> np.ndarray:
    """M[k, m]: m registered photons are read as min(m, top), one lower with probability
    0.05 + 0.02 m, one higher with 0.02 (not above ``top``); shape (top + 1, columns)."""
    matrix = np.zeros((top + 1, columns))
    for m in range(columns):
        read = min(m, top)
        down = 0.05 + 0.02 * m if read >= 1 else 0.0
        up = 0.02 if read < top else 0.0
        matrix[read, m] += 1.0 - down - up
        if down:
            matrix[read - 1, m] += down
        if up:
            matrix[read + 1, m] += up
    return matrix


def monte_carlo_counts(rng, matrix, efficiency=EFFICIENCY, probes=PROBES, shots=SHOTS) -> np.ndarray:
    """Outcome counts per probe, shot by shot (module docstring), shape (n_probes, K+1)."""
    top, columns = matrix.shape[0] - 1, matrix.shape[1]
    cumulative = np.cumsum(matrix, axis=0)
    rows = []
    for coherent, thermal in probes:
        noise = rng.standard_normal(shots) + 1j * rng.standard_normal(shots)
        beta = math.sqrt(coherent) + math.sqrt(thermal / 2) * noise
        registered = rng.binomial(rng.poisson(np.abs(beta) ** 2), efficiency)
        inside = registered < columns
        outcome = np.full(shots, top)
        u = rng.random(shots)
        outcome[inside] = np.minimum((u[inside, None] > cumulative[:, registered[inside]].T).sum(axis=1), top)
        rows.append(np.bincount(outcome, minlength=top + 1))
    return np.array(rows)


def monte_carlo_scan(seed: int, matrix):
    counts = monte_carlo_counts(np.random.default_rng(seed), matrix)
    coherent, thermal = np.array(PROBES).T
    return scan_from_arrays(coherent, thermal, counts, source="simulated")


def registered_poisson_then_readout(matrix, mean_registered: float, n_terms: int = 80) -> np.ndarray:
    """Outcome probabilities of a coherent probe: loss thins Poisson(mu) to Poisson(eta mu)
    (common practice, no source), then M by numpy with columns past its last reporting K."""
    m = np.arange(n_terms)
    registered = stats.poisson.pmf(m, mean_registered)
    columns = matrix.shape[1]
    q = matrix @ registered[:columns]
    q[-1] += registered[columns:].sum()
    return q


@pytest.fixture(scope="module")
def matrix():
    return invented_readout()


@pytest.fixture(scope="module")
def scan(matrix):
    return monte_carlo_scan(11, matrix)


@pytest.fixture(scope="module")
def fitted(scan, matrix):
    return povmfit.fit(scan, f"pnr:{TOP}", readout=matrix)


def readout_file(path, matrix) -> str:
    """A minimal ``povmfit.readout/1`` record holding ``matrix``."""
    record = {"schema": "povmfit.readout/1", "max_outcome": matrix.shape[0] - 1,
              "misassignment": {"matrix": np.asarray(matrix).tolist()}}
    path.write_text(json.dumps(record))
    return str(path)


# ----- the stage itself -----------------------------------------------------------------
def test_fixed_stage_is_the_matrix_after_the_registered_povm(matrix):
    # source: independent computation. pnr loss + Poisson dark: registered counts are the
    # binomial thinning of n convolved with Poisson(d) (scipy.stats); then M by numpy, with
    # registered counts past M's last column reporting K
    eta, dark, n_photons = 0.7, 0.3, 12
    model = parse_model_spec(f"pnr:{TOP}+dark+fixed_readout", fixed_readout=matrix)
    theta = np.asarray(model.povm(model.pack({"efficiency": eta, "dark_mean": dark}), n_photons))
    m = np.arange(60)
    for n in range(n_photons):
        registered = np.convolve(stats.binom.pmf(m, n, eta), stats.poisson.pmf(m, dark))[: m.size]
        expected = matrix @ registered[: matrix.shape[1]]
        expected[-1] += registered[matrix.shape[1]:].sum()
        np.testing.assert_allclose(theta[:, n], expected, atol=1e-12)
    # array of 3 uniform on/off pixels with dark clicks: registered = pixels fired, the
    # click formula of Sperling, Vogel, Agarwal, PRL 108, 093601 (2012); M cut to 4 columns
    pixels, d = 3, 0.02
    model = DetectorModel("array", pixels, ("dark",), fixed_readout=matrix[:4, :5] / matrix[:4, :5].sum(axis=0))
    theta = np.asarray(model.povm(model.pack({"efficiency": eta, "dark_probability": d}), 6))
    fired = np.array([[math.comb(pixels, k) * sum((-1) ** j * math.comb(k, j) * (1 - d) ** (pixels - k + j)
                                                   * (1 - eta + eta * (k - j) / pixels) ** n for j in range(k + 1))
                       for n in range(6)] for k in range(pixels + 1)])
    np.testing.assert_allclose(theta, model.fixed_readout_matrix[:, :4] @ fired, atol=1e-12)
    assert model.spec == "array:3+dark+fixed_readout" and model.n_outcomes == 4


def test_jacobian_is_the_matrix_times_the_registered_jacobian(matrix):
    # chain rule of a constant linear map (common practice, no source): J_obs = M @ J
    plain = DetectorModel("array", TOP, ("dark",))
    fixed = plain.with_fixed_readout(matrix)
    x = np.array([0.6, 0.01])
    theta, jac = (np.asarray(a) for a in povm_and_jacobian(plain, 9)(x))
    theta_f, jac_f = (np.asarray(a) for a in povm_and_jacobian(fixed, 9)(x))
    cut = matrix[:, : TOP + 1]
    np.testing.assert_allclose(theta_f, cut @ theta, atol=1e-14)
    np.testing.assert_allclose(jac_f, np.einsum("km,mni->kni", cut, jac), atol=1e-14)


def test_bad_fixed_readouts_are_refused(matrix):
    with pytest.raises(ValueError, match="replaces the readout feature"):
        DetectorModel("pnr", TOP, ("readout",), fixed_readout=matrix)
    with pytest.raises(ValueError, match="column 0 sums to"):
        DetectorModel("pnr", TOP, fixed_readout=matrix * 0.9)
    with pytest.raises(ValueError, match="rows"):
        DetectorModel("pnr", TOP + 1, fixed_readout=matrix)
    with pytest.raises(ValueError, match="needs the readout matrix"):
        parse_model_spec("pnr:4+fixed_readout")


# ----- fits -------------------------------------------------------------------------------
def test_fit_through_the_known_readout_recovers_the_efficiency(fitted, scan, matrix):
    # source: independent Monte Carlo (module docstring); within 3.29 stderr (false failure
    # 1e-3, normal approximation of the ML estimate)
    assert fitted.model.spec == f"pnr:{TOP}+fixed_readout"
    assert abs(fitted.values["efficiency"] - EFFICIENCY) < Z_999 * fitted.stderr["efficiency"]
    lo, hi = fitted.ci95["efficiency"]
    assert lo < fitted.values["efficiency"] < hi
    # the right model: deviance ~ chi2(dof), p below 1e-3 would be a false failure with
    # probability 1e-3 (common practice, no source)
    assert fitted.p_value > 1e-3
    # the fitted probabilities are M after Poisson thinning (independent computation)
    eta = fitted.values["efficiency"]
    for p, (coherent, thermal) in enumerate(PROBES):
        if thermal == 0:
            np.testing.assert_allclose(fitted.predicted[p], registered_poisson_then_readout(matrix, eta * coherent),
                                       atol=1e-9)


def test_the_same_scan_without_the_readout_fits_worse_and_is_biased(fitted, scan):
    # the readout reads low 5-15 % of the time, so a loss-only model sees fewer photons: its
    # efficiency lies more than 5 stderr below the truth and its deviance is far off chi2(dof)
    # (p < 1e-6); both would be false with the right model (module docstring's Monte Carlo)
    plain = povmfit.fit(scan, f"pnr:{TOP}")
    assert EFFICIENCY - plain.values["efficiency"] > 5 * plain.stderr["efficiency"]
    assert plain.p_value < 1e-6
    assert plain.deviance > fitted.deviance + 100


def test_ranking_puts_the_fixed_readout_beside_the_fitted_one(scan, matrix):
    # structural (common practice, no source): candidates without the readout feature get the
    # matrix, those with it are fitted without; likelihood-ratio tests pair only candidates
    # that agree on the fixed readout, so no test is about the readout feature here
    comparison = povmfit.compare(scan, [f"pnr:{TOP}", f"pnr:{TOP}+dark", f"pnr:{TOP}+readout"], readout=matrix,
                                 cv_folds=0)
    specs = {row["model"] for row in comparison.table}
    assert specs == {f"pnr:{TOP}+fixed_readout", f"pnr:{TOP}+dark+fixed_readout", f"pnr:{TOP}+readout"}
    assert [t["feature"] for t in comparison.tests] == ["dark"]
    # the data were made through the matrix: the fixed-readout model without dark counts wins
    assert comparison.chosen.spec == f"pnr:{TOP}+fixed_readout"


def test_readout_rows_must_match_the_scan(scan, tmp_path):
    with pytest.raises(ArgumentError, match="readout: the readout matrix has 4 rows .* has 5 outcomes"):
        povmfit.fit(scan, f"pnr:{TOP}", readout=invented_readout(top=3))
    path = readout_file(tmp_path / "r.json", invented_readout(top=3))
    with pytest.raises(InputFileError, match=r"r\.json: the readout matrix has 4 rows"):
        povmfit.fit(scan, f"pnr:{TOP}", readout=path)


# ----- detector file and emulator -----------------------------------------------------------
def test_detector_file_round_trip_carries_the_matrix(fitted, matrix, tmp_path):
    path = tmp_path / "detector.json"
    save_detector(fitted.to_detector(), path)
    record = load_detector(path)
    assert record.model == fitted.model
    np.testing.assert_array_equal(record.model.fixed_readout_matrix, matrix)
    text = path.read_text()
    save_detector(record, tmp_path / "again.json")
    assert (tmp_path / "again.json").read_text() == text  # byte for byte
    # a matrix whose column does not sum to one, or a spec that lost its matrix, is refused
    data = json.loads(text)
    data["model"]["fixed_readout"][0][0] = 0.5
    (tmp_path / "bad.json").write_text(json.dumps(data))
    with pytest.raises(DetectorFileError, match="model.fixed_readout': column 0 sums to"):
        load_detector(tmp_path / "bad.json")
    data = json.loads(text)
    del data["model"]["fixed_readout"]
    (tmp_path / "bad.json").write_text(json.dumps(data))
    with pytest.raises(DetectorFileError, match="needs the readout matrix"):
        load_detector(tmp_path / "bad.json")


def test_emulator_gives_the_fits_probabilities(fitted, matrix, tmp_path):
    # the same model and parameters from detector.json: the fit's predictions for its probes
    # (both cut their tails below 1e-10), and M after Poisson thinning (independent computation)
    save_detector(fitted.to_detector(), tmp_path / "detector.json")
    emulator = Emulator.from_detector_file(tmp_path / "detector.json")
    eta = fitted.values["efficiency"]
    for p in (5, 7):  # the brightest coherent probe and a displaced thermal one
        coherent, thermal = PROBES[p]
        state = f"displaced_thermal:{coherent},{thermal}"
        np.testing.assert_allclose(emulator.probabilities(state), fitted.predicted[p], atol=1e-9)
    np.testing.assert_allclose(emulator.probabilities("coherent:2.0"), registered_poisson_then_readout(matrix, 2 * eta),
                               atol=1e-9)


def test_click_patterns_are_read_through_the_fixed_readout(matrix):
    # reported outcomes of 20000 pattern shots against the model's probabilities: chi-square
    # test (scipy.stats), p below 1e-3 a false failure with probability 1e-3
    readout = matrix[:4, :5] / matrix[:4, :5].sum(axis=0)
    model = DetectorModel("array", 3, ("dark",), fixed_readout=readout)
    emulator = Emulator(model=model, members=[[0.6, 0.02]])
    patterns, outcomes = emulator.patterns("coherent:1.5", 20_000, seed=3)
    observed = np.bincount(outcomes, minlength=4)
    expected = emulator.probabilities("coherent:1.5") * 20_000
    assert stats.chisquare(observed, expected).pvalue > 1e-3
    assert (outcomes != patterns.sum(axis=1)).mean() > 0.05  # misassignment happened


# ----- command line -----------------------------------------------------------------------
def test_cli_refuses_a_readout_with_other_outcomes(scan, tmp_path, capsys):
    scan_path = tmp_path / "scan.csv"
    write_scan(scan, scan_path)
    before = scan_path.read_bytes()
    readout = readout_file(tmp_path / "readout.json", invented_readout(top=3))
    out = tmp_path / "out"
    assert main(["fit", str(scan_path), "--readout", readout, "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert "readout.json" in err and "4 rows" in err and "5 outcomes" in err
    assert not out.exists() or not any(out.iterdir())
    assert scan_path.read_bytes() == before


def test_cli_fit_with_readout_records_it_and_writes_the_matrix(scan, matrix, tmp_path):
    scan_path = tmp_path / "scan.csv"
    write_scan(scan, scan_path)
    readout = readout_file(tmp_path / "readout.json", matrix)
    out = tmp_path / "out"
    assert main(["fit", str(scan_path), "--model", f"pnr:{TOP}", "--readout", readout, "--out", str(out),
                 "--jobs", "1", "--no-report", "--quiet"]) == 0
    sheet = json.loads((out / "datasheet.json").read_text())
    digest = hashlib.sha256((tmp_path / "readout.json").read_bytes()).hexdigest()
    assert sheet["provenance"]["options"]["readout"] == {"file": readout, "sha256": digest}
    assert sheet["model"]["spec"] == f"pnr:{TOP}+fixed_readout"
    detector = json.loads((out / "detector.json").read_text())
    np.testing.assert_array_equal(detector["model"]["fixed_readout"], matrix)
    # the datasheet's vacuum click probability is that of the observed POVM: 1 - M[0, 0]
    # for no light (M's column 0 is what vacuum gives; independent computation)
    vacuum = sheet["figures"]["vacuum_click_probability"]["value"]
    assert vacuum == pytest.approx(1.0 - matrix[0, 0], abs=1e-12)


# ----- the whole chain ----------------------------------------------------------------------
def test_chain_pulse_heights_to_tally_to_fit_with_readout(tmp_path):
    # overlapping peaks (widths up to a quarter of the gain): the tally's misassignment is
    # not negligible, and the fit through readout.json recovers the efficiency of the
    # simulated heights (independent Monte Carlo of test_tally_spectra) within 3.29 stderr
    # (false failure 1e-3; the matrix's own uncertainty, from 6 x 40000 triggers, is ignored)
    from test_tally_spectra import TRUE, write_lab

    params = dict(TRUE, width_0=0.16, width_1=0.08)
    tally = povmfit.tally_pulse_heights(write_lab(tmp_path, params, triggers=40_000, seed=21))
    files = tally.write(tmp_path / "scan.csv")
    assert tally.separation.max() > 1e-3
    fit = povmfit.fit(files["scan"], f"pnr:{tally.max_outcome}", readout=files["readout"])
    assert fit.model.fixed_readout is not None
    assert abs(fit.values["efficiency"] - TRUE["efficiency"]) < Z_999 * fit.stderr["efficiency"]
    assert fit.p_value > 1e-3
