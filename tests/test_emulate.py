"""Emulation: samplers against exact probabilities, click patterns against per-pixel click
probabilities, povm.csv tables, ensembles, and a simulated scan fed back to the fitter.

Statistical tests use fixed seeds. Histograms are compared with Pearson's chi-square
(scipy.stats.chisquare, bins with expected count < 5 merged) and must reach p > 1e-3: a
correct sampler fails that with probability 1e-3 per seed, a wrong one with enough shots
fails almost surely. Single frequencies are compared by their binomial z-score.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from povmfit.fitting.data.errors import PovmfitError
from povmfit.fitting.data.detector_file import DetectorRecord
from povmfit.fitting.emulation.emulator import Emulator, load_povm_csv
from povmfit.models import (
    coherent_distribution,
    parse_model_spec,
    response_table,
    sample_outcomes,
    uniform_subset_patterns,
)


def _record(spec, values, gate=None, sd=1e-3):
    model = parse_model_spec(spec)
    names = model.parameter_names
    return DetectorRecord(model, {n: values[n] for n in names}, np.eye(len(names)) * sd**2, gate, {})


def chi_square_p(observed, expected_probabilities):
    """Pearson chi-square p-value; bins with expected count < 5 are merged into one."""
    observed = np.asarray(observed, float)
    expected = np.asarray(expected_probabilities, float) * observed.sum()
    small = expected < 5
    if small.any():
        observed = np.append(observed[~small], observed[small].sum())
        expected = np.append(expected[~small], expected[small].sum())
        if expected[-1] == 0:
            assert observed[-1] == 0
            observed, expected = observed[:-1], expected[:-1]
    expected *= observed.sum() / expected.sum()
    return stats.chisquare(observed, expected).pvalue


ARRAY8 = _record("array:8+dark+crosstalk", {"efficiency": 0.6, "dark_probability": 0.01, "crosstalk_probability": 0.05})


def test_probabilities_match_published_coherent_click_values():
    # REFERENCES.md check values (independent computation): N=8, eta=0.6, d=0.01, coherent m=2
    # gives P(k=0..3) = 0.277925, 0.385916, 0.234442, 0.081384 (no crosstalk).
    emulator = Emulator.from_record(_record("array:8+dark", {"efficiency": 0.6, "dark_probability": 0.01}))
    q = emulator.probabilities("coherent:2")
    np.testing.assert_allclose(q[:4], [0.277925, 0.385916, 0.234442, 0.081384], atol=2e-6)
    # binomial closed form for coherent light (Sperling, Vogel, Agarwal, PRL 108, 093601 (2012)):
    # P(k) = C(N,k) (1-s)^k s^(N-k), s = (1-d) exp(-eta m / N)
    s = 0.99 * np.exp(-0.6 * 2 / 8)
    # (atol: the state's photon-number cutoff leaves a tail below 1e-10)
    np.testing.assert_allclose(q, stats.binom.pmf(np.arange(9), 8, 1 - s), atol=1e-9)


def test_respond_histograms_follow_the_povm_columns():
    # exact reference: the POVM columns themselves; chi-square per photon number (200k shots each)
    emulator = Emulator.from_record(ARRAY8)
    photons = np.repeat(np.arange(7), 200_000)
    outcomes = emulator.respond(photons, seed=11)
    theta = emulator.povms(7)[0]
    for n in range(7):
        counts = np.bincount(outcomes[photons == n], minlength=9)
        assert chi_square_p(counts, theta[:, n]) > 1e-3, n


def test_respond_never_gives_impossible_outcomes_and_keeps_shape():
    # exact property of inverse-CDF sampling (common practice, no source): zero-probability
    # outcomes never occur, certain ones always do; edges exactly on guide-bin borders included
    theta = np.array([[1.0, 0.0, 0.25, 0.5], [0.0, 0.0, 0.5, 0.0], [0.0, 1.0, 0.25, 0.5]])
    photons = np.tile(np.arange(4), (500, 25))
    out = sample_outcomes(response_table(theta), photons, np.random.default_rng(5))
    assert out.shape == photons.shape
    assert np.all(out[photons == 0] == 0) and np.all(out[photons == 1] == 2)
    assert set(np.unique(out[photons == 3])) == {0, 2}
    with pytest.raises(ValueError):
        sample_outcomes(response_table(theta), np.array([4]), np.random.default_rng(0))


def test_sample_counts_follow_probabilities_and_repeat_with_seed():
    emulator = Emulator.from_record(ARRAY8)
    counts = emulator.sample("thermal:1.5", 300_000, seed=3)
    assert counts.sum() == 300_000
    assert chi_square_p(counts, emulator.probabilities("thermal:1.5")) > 1e-3
    np.testing.assert_array_equal(counts, emulator.sample("thermal:1.5", 300_000, seed=3))


def test_uniform_array_pattern_marginals_match_per_pixel_click_probability():
    # For a uniform array every pixel is equally likely to fire (exchangeability), so the
    # per-pixel click probability is E[fired]/N with the fired-pixel distribution of the model
    # POVM (independent of the pattern sampler). z-score of each pixel's frequency < 4.5
    # (16 pixels: chance of a false alarm about 1e-4).
    record = _record("array:16+dark+crosstalk", {"efficiency": 0.55, "dark_probability": 0.02, "crosstalk_probability": 0.1})
    emulator = Emulator.from_record(record)
    shots = 200_000
    patterns, outcomes = emulator.patterns("coherent:3", shots, seed=8)
    assert patterns.shape == (shots, 16) and patterns.dtype == bool
    np.testing.assert_array_equal(patterns.sum(axis=1), outcomes)
    q = emulator.probabilities("coherent:3")
    p_pixel = (np.arange(17) @ q) / 16
    z = (patterns.mean(axis=0) - p_pixel) / np.sqrt(p_pixel * (1 - p_pixel) / shots)
    assert np.max(np.abs(z)) < 4.5
    assert chi_square_p(np.bincount(outcomes, minlength=17), q) > 1e-3


def test_uniform_subsets_are_uniform_over_patterns():
    # every 2-subset of 5 pixels has probability 1/C(5,2) = 1/10 (exact; chi-square, 100k shots)
    patterns = uniform_subset_patterns(np.full(100_000, 2), 5, np.random.default_rng(2))
    codes = patterns @ (1 << np.arange(5))
    values, counts = np.unique(codes, return_counts=True)
    assert len(values) == 10 and np.all(patterns.sum(axis=1) == 2)
    assert chi_square_p(counts, np.full(10, 0.1)) > 1e-3


def test_unequal_split_pixels_follow_poisson_splitting():
    # Coherent light split over pixels: pixel i receives Poisson(eta r_i m) photons independently
    # (Poisson splitting, textbook property), so P(pixel i fires) = 1 - (1-d) exp(-eta r_i m).
    record = _record(
        "array:4+dark+unequal_split",
        {"efficiency": 0.7, "dark_probability": 0.03, "split_log_ratio_1": 0.8, "split_log_ratio_2": -0.5, "split_log_ratio_3": 0.1},
    )
    emulator = Emulator.from_record(record)
    shots = 200_000
    patterns, outcomes = emulator.patterns("coherent:1.5", shots, seed=21)
    ratios = np.asarray(record.model.split_ratios(record.parameter_vector()))
    expected = 1 - 0.97 * np.exp(-0.7 * ratios * 1.5)
    z = (patterns.mean(axis=0) - expected) / np.sqrt(expected * (1 - expected) / shots)
    assert np.max(np.abs(z)) < 4.5
    # the fired-pixel histogram matches the model POVM (split_pixel_matrix, independent code)
    assert chi_square_p(np.bincount(outcomes, minlength=5), emulator.probabilities("coherent:1.5")) > 1e-3


def test_unequal_split_with_crosstalk_and_readout_matches_model_povm():
    # independent computation: the numpy physical chain (photon sharing, dark, crosstalk, readout)
    # against the JAX stage matrices of the model, thermal light, chi-square on 200k shots
    record = _record(
        "array:4+dark+crosstalk+readout+unequal_split",
        {"efficiency": 0.8, "dark_probability": 0.02, "crosstalk_probability": 0.2, "readout_width": 0.4,
         "split_log_ratio_1": 0.5, "split_log_ratio_2": -0.4, "split_log_ratio_3": 0.2},
    )
    emulator = Emulator.from_record(record)
    _, outcomes = emulator.patterns("thermal:1.2", 200_000, seed=4)
    assert chi_square_p(np.bincount(outcomes, minlength=5), emulator.probabilities("thermal:1.2")) > 1e-3


def test_saturated_array_reports_capped_counts():
    record = _record("array:6+dark+saturation:3", {"efficiency": 0.9, "dark_probability": 0.01})
    patterns, outcomes = Emulator.from_record(record).patterns("coherent:4", 50_000, seed=9)
    np.testing.assert_array_equal(outcomes, np.minimum(patterns.sum(axis=1), 3))


def test_pnr_model_has_no_patterns_but_responds():
    record = _record("pnr:5+dark", {"efficiency": 0.9, "dark_mean": 0.01})
    emulator = Emulator.from_record(record)
    with pytest.raises(PovmfitError):
        emulator.patterns("coherent:1", 10, seed=0)
    out = emulator.respond(np.full(100_000, 2), seed=1)
    theta = emulator.povms(3)[0]
    assert chi_square_p(np.bincount(out, minlength=6), theta[:, 2]) > 1e-3
    # two photons reported as 2: binomial loss (all n detected w.p. eta^n, REFERENCES) convolved
    # with Poisson(mu) dark counts: sum_m C(2,m) eta^m (1-eta)^(2-m) mu^(2-m) e^-mu / (2-m)!
    expected = sum(stats.binom.pmf(m, 2, 0.9) * stats.poisson.pmf(2 - m, 0.01) for m in range(3))
    assert theta[2, 2] == pytest.approx(expected, rel=1e-12)


def _write_povm_csv(path, theta, source, extra=()):
    lines = ["photons,outcome,probability,stderr,source"]
    for n in range(theta.shape[1]):
        for k in range(theta.shape[0]):
            lines.append(f"{n},{k},{float(theta[k, n])!r},0.001,{source}")
    lines += list(extra)
    path.write_text("\n".join(lines) + "\n")


def test_povm_csv_emulator_prefers_reconstruction_rows(tmp_path):
    model_theta = np.asarray(ARRAY8.model.povm(ARRAY8.parameter_vector(), 30))
    recon = model_theta.copy()
    recon[:, 5] = np.roll(recon[:, 5], 1)  # a visibly different column
    path = tmp_path / "povm.csv"
    _write_povm_csv(path, model_theta, "model")
    text = path.read_text()
    _write_povm_csv(tmp_path / "r.csv", recon, "reconstruction")
    path.write_text(text + "\n".join((tmp_path / "r.csv").read_text().splitlines()[1:]) + "\n")
    np.testing.assert_allclose(load_povm_csv(path), recon, atol=1e-15)
    np.testing.assert_allclose(load_povm_csv(path, "model"), model_theta, atol=1e-15)
    emulator = Emulator.from_povm_csv(path)
    p = np.asarray(coherent_distribution(2.0, 30))
    np.testing.assert_allclose(emulator.probabilities("coherent:2"), recon @ p / p.sum() * p.sum(), atol=1e-9)
    with pytest.raises(PovmfitError, match="beyond the POVM table"):
        emulator.probabilities("coherent:20")
    with pytest.raises(PovmfitError, match="needs a fitted detector file"):
        emulator.ensemble(3)


def test_povm_csv_refusals_name_the_line(tmp_path):
    theta = np.array([[0.9, 0.4], [0.1, 0.6]])
    path = tmp_path / "bad.csv"
    _write_povm_csv(path, theta, "model", extra=["1,1,0.6,0.0,magic"])
    with pytest.raises(PovmfitError, match=r"line 6, column 'source'"):
        load_povm_csv(path)
    _write_povm_csv(path, theta, "model", extra=["1,1,0.6,0.0,model"])
    with pytest.raises(PovmfitError, match=r"line 6: second model row"):
        load_povm_csv(path)
    _write_povm_csv(path, np.array([[0.9, 0.4], [0.1, 0.5]]), "model")
    with pytest.raises(PovmfitError, match="sum to 0.9"):
        load_povm_csv(path)


def test_ensemble_probabilities_are_member_means_and_runs_use_one_member():
    emulator = Emulator.from_record(_record("threshold+dark", {"efficiency": 0.5, "dark_probability": 0.01}, sd=0.05))
    ensemble = emulator.ensemble(40, seed=2)
    assert ensemble.n_members == 40
    members = ensemble.member_probabilities("fock:1")
    np.testing.assert_allclose(ensemble.probabilities("fock:1"), members.mean(axis=0), rtol=1e-12)
    # loss + dark on one photon: P(no click) = (1 - eta)(1 - d) (REFERENCES formula, N = 1)
    eta, d = ensemble.members[:, 0], ensemble.members[:, 1]
    np.testing.assert_allclose(members[:, 0], (1 - eta) * (1 - d), atol=1e-12)
    # one run = one member: with a seed, sample equals a multinomial draw from one member's q
    counts = ensemble.sample("fock:1", 1000, seed=5)
    rng = np.random.default_rng(5)
    member = int(rng.integers(40))
    np.testing.assert_array_equal(counts, rng.multinomial(1000, members[member] / members[member].sum()))


def test_simulated_scan_fed_to_the_fitter_recovers_the_detector():
    # Monte Carlo round trip: truth within 3 standard errors for every parameter (fixed seed)
    from povmfit.fitting.emulation.simulate import parse_probe_grid, simulate_counts
    from povmfit.fitting.inference.fit import fit_scan
    from povmfit.fitting.data.scan import scan_from_arrays

    truth = {"efficiency": 0.62, "dark_probability": 0.004, "crosstalk_probability": 0.06}
    record = _record("array:4+dark+crosstalk", truth)
    coherent, thermal = parse_probe_grid("coherent=0:3:7;thermal=0,0.5")
    counts = simulate_counts(Emulator.from_record(record), coherent, thermal, 50_000, seed=17)
    result = fit_scan(scan_from_arrays(coherent, thermal, counts), record.model)
    for name, value in truth.items():
        assert abs(result.values[name] - value) < 3 * result.stderr[name], name


# ----- normalisation, limits and extrapolation ----------------------------------------------
@pytest.mark.parametrize("state", ["coherent:3.0", "thermal:2.0", "displaced_thermal:1.5,0.4", "squeezed_vacuum:0.8"])
def test_probabilities_sum_to_one_to_rounding(state):
    # Source: probability law; the state's cut tail (< 1e-10) goes to the top outcome
    # (common practice, no source). pnr:4 keeps "4 or more" in the top outcome, so the
    # renormalised top outcome must equal 1 - P(0..3), the exact law of the other outcomes.
    emulator = Emulator.from_record(_record("pnr:4+dark", {"efficiency": 0.8, "dark_mean": 0.05}))
    q = emulator.probabilities(state)
    assert abs(q.sum() - 1.0) <= 4 * np.finfo(float).eps
    assert q[-1] == pytest.approx(1.0 - q[:-1].sum(), abs=4e-16)


def test_limits_on_shots_ensemble_and_photons_are_named():
    emulator = Emulator.from_record(_record("threshold+dark", {"efficiency": 0.5, "dark_probability": 1e-3}))
    for call, name in ((lambda: emulator.sample("coherent:1", 2**60), "shots"),
                       (lambda: emulator.sample("coherent:1", float("inf")), "shots"),
                       (lambda: emulator.ensemble(10**9), "ensemble"),
                       (lambda: emulator.probabilities("coherent:1e7"), r"1e\+07"),
                       (lambda: emulator.probabilities("fock:5000"), "limit of 4000")):
        with pytest.raises(PovmfitError, match=name) as caught:
            call()
        assert "\n" not in str(caught.value)


def test_fock_input_beyond_the_scanned_photon_numbers_warns():
    from povmfit.fitting.emulation.emulator import ExtrapolationWarning

    record = _record("threshold+dark", {"efficiency": 0.5, "dark_probability": 1e-3})
    record = DetectorRecord(record.model, record.parameters, record.covariance, None, {"constrained_photons": 12})
    emulator = Emulator.from_record(record)
    with pytest.warns(ExtrapolationWarning, match="above 12 photons"):
        emulator.probabilities("fock:13")
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", ExtrapolationWarning)
        emulator.probabilities("fock:12")
