"""Pulse-height tally: the peak model's fit, thresholds, misassignment and the lattice histogram.

Spectra are simulated here without povmfit's photon statistics: a displaced thermal state is
a Gaussian mixture of coherent states (Glauber-Sudarshan P function), so the photon number is
Poisson(|beta|^2) with beta ~ alpha + complex Gaussian of variance nbar; loss is binomial
thinning; a pulse height is Normal(offset + gain m, width_0^2 + m width_1^2).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import special, stats

import povmfit
from povmfit.fitting.tally import spectra as sp
from povmfit.fitting.tally.lattice import LatticeHistogram
from povmfit.fitting.tally.readout import apply_readout, load_readout
from povmfit.models import probe_distributions_numpy

TRUE = {"offset": 0.12, "gain": 1.0, "curvature": 0.0, "width_0": 0.07, "width_1": 0.045, "efficiency": 0.68}
PROBES = ((0.0, 0.0), (0.6, 0.0), (2.0, 0.0), (5.0, 0.0), (0.0, 1.0), (2.0, 0.5))
Z_999 = 3.29  # two-sided 99.9 % normal quantile (scipy.stats.norm.ppf(0.9995))


def registered_photons(rng, coherent, thermal, efficiency, size):
    """Monte Carlo of the registered photon number (independent of povmfit's probe code)."""
    beta = math.sqrt(coherent) + math.sqrt(thermal / 2) * (rng.standard_normal(size) + 1j * rng.standard_normal(size))
    return rng.binomial(rng.poisson(np.abs(beta) ** 2), efficiency)


def simulate_heights(rng, coherent, thermal, params, size):
    m = registered_photons(rng, coherent, thermal, params["efficiency"], size)
    means = params["offset"] + params["gain"] * m + params.get("curvature", 0.0) * m * m
    return rng.normal(means, np.sqrt(params["width_0"] ** 2 + m * params["width_1"] ** 2))


def write_lab(folder: Path, params=TRUE, probes=PROBES, triggers=60_000, seed=0, npy_every=2) -> Path:
    """Heights files (text and .npy alternating) and a PROBES file; returns its path."""
    rng = np.random.default_rng(seed)
    rows = ["probe,coherent_photons,thermal_photons,heights"]
    for i, (coherent, thermal) in enumerate(probes):
        x = simulate_heights(rng, coherent, thermal, params, triggers)
        if i % npy_every == 1:
            np.save(folder / f"p{i}.npy", x)
            rows.append(f"p{i},{coherent},{thermal},p{i}.npy")
        else:
            np.savetxt(folder / f"p{i}.txt", x, fmt="%.7f")
            rows.append(f"p{i},{coherent},{thermal},p{i}.txt")
    (folder / "probes.csv").write_text("\n".join(rows) + "\n")
    return folder / "probes.csv"


@pytest.fixture(scope="module")
def tally(tmp_path_factory):
    return povmfit.tally_pulse_heights(write_lab(tmp_path_factory.mktemp("lab")))


def test_fit_recovers_gain_offset_widths_and_efficiency_within_their_intervals(tally):
    # source: independent Monte Carlo (module docstring); each parameter within 3.29 stderr
    # (false failure 1e-3 each, 5e-3 for the five, normal approximation of the ML estimate)
    for name in ("offset", "gain", "width_0", "width_1", "efficiency"):
        entry = tally.parameters[name]
        assert entry["stderr"] > 0
        assert abs(entry["value"] - TRUE[name]) < Z_999 * entry["stderr"], name
        lo, hi = entry["ci95"]
        assert lo < entry["value"] < hi
    assert tally.goodness_of_fit["converged"]
    # the pooled deviance of the right model is chi2(dof): p below 1e-3 would be a false
    # failure with probability 1e-3 (common practice, no source)
    assert tally.goodness_of_fit["p_value"] > 1e-3


def test_counts_cover_every_trigger_and_default_top_outcome(tally):
    assert (tally.scan.shots == 60_000).all()
    # default K: every probe registers more than K photons with probability < 1e-3 at the
    # fitted efficiency; recomputed here from the Lachs distribution (povmfit.models) of the
    # brightest probe, which sets it
    p = probe_distributions_numpy([5.0 * 0.68], [0.0], 40)[0]
    expected = int(np.nonzero(1 - np.cumsum(p) < 1e-3)[0][0])
    assert tally.max_outcome == expected


def test_misassignment_matrix_agrees_with_a_monte_carlo(tally):
    # source: Monte Carlo of heights for m registered photons at the fitted peak parameters,
    # classified with the fitted thresholds; 200,000 draws per column: binomial sd <= 1.1e-3,
    # tolerance 5 sd (false failure < 1e-5 per entry)
    rng = np.random.default_rng(7)
    values, cuts = tally.values, tally.thresholds
    for m in range(tally.max_outcome + 3):
        x = rng.normal(sp.peak_means(values, m), sp.peak_widths(values, m), 200_000)
        observed = np.bincount(np.searchsorted(cuts, x, side="right"), minlength=cuts.size + 1) / x.size
        assert np.abs(observed - tally.misassignment[:, m]).max() < 5 * 1.2e-3, m
    np.testing.assert_allclose(tally.misassignment.sum(axis=0), 1.0, atol=1e-12)
    assert tally.misassignment[-1, -1] > 1 - 1e-12  # the last column already reports K for sure


def test_fitted_matrix_is_close_to_the_true_detectors_matrix(tally):
    # the true misassignment at the true peaks and the true thresholds (closed form of the
    # Gaussian peaks); the fitted one differs by the parameters' errors, about 1e-4 here
    true_cuts = sp.thresholds(TRUE, tally.max_outcome)
    true_matrix = sp.misassignment_matrix(TRUE, true_cuts, tally.misassignment.shape[1])
    assert np.abs(true_matrix - tally.misassignment).max() < 2e-3


def test_thresholds_minimise_the_misassignment_of_neighbouring_peaks():
    # source: brute force over a fine grid of thresholds (equal priors)
    values = dict(TRUE, width_1=0.2)
    cuts = sp.thresholds(values, 3)
    for n in range(3):
        m1, m2 = sp.peak_means(values, [n, n + 1])
        s1, s2 = sp.peak_widths(values, [n, n + 1])
        grid = np.linspace(m1, m2, 200_001)
        error = special.ndtr(-(grid - m1) / s1) + special.ndtr((grid - m2) / s2)
        assert cuts[n] == pytest.approx(grid[np.argmin(error)], abs=2e-5)
        # and the densities cross there (scipy.stats.norm)
        assert stats.norm.pdf(cuts[n], m1, s1) == pytest.approx(stats.norm.pdf(cuts[n], m2, s2), rel=1e-9)


def test_thinning_derivative_identity_matches_finite_differences():
    # d/deta P(n; eta A, eta N) = (n P(n) - (n+1) P(n+1)) / eta: against central differences
    # of povmfit's Lachs distribution (independent computation)
    eta, step = 0.6, 1e-6
    weights, derivative = sp._weights(eta, [2.0, 0.0], [0.5, 1.5], 30)
    up = probe_distributions_numpy(np.array([2.0, 0.0]) * (eta + step), np.array([0.5, 1.5]) * (eta + step), 30)
    down = probe_distributions_numpy(np.array([2.0, 0.0]) * (eta - step), np.array([0.5, 1.5]) * (eta - step), 30)
    np.testing.assert_allclose(derivative, (up - down) / (2 * step), atol=1e-8)


def test_lattice_histogram_is_exact_whatever_the_blocks():
    # source: numpy's histogram of all values at once on the same edges
    rng = np.random.default_rng(3)
    x = np.concatenate([rng.normal(0, 1, 50_000), rng.normal(40, 2, 1_000), [-300.0, 2e4]])
    lattice = LatticeHistogram()
    for block in np.array_split(x, 7):
        lattice.add(block)
    edges, counts = lattice.trimmed()
    assert counts.sum() == x.size and counts.size <= (1 << 21)
    np.testing.assert_array_equal(counts, np.histogram(x, bins=edges)[0])


def test_quadratic_term_is_recovered(tmp_path):
    # source: independent Monte Carlo; curvature within 3.29 stderr (false failure 1e-3)
    params = dict(TRUE, curvature=0.015)
    result = povmfit.tally_pulse_heights(write_lab(tmp_path, params, triggers=40_000, seed=5), quadratic=True)
    entry = result.parameters["curvature"]
    assert abs(entry["value"] - 0.015) < Z_999 * entry["stderr"]
    assert abs(result.parameters["gain"]["value"] - 1.0) < Z_999 * result.parameters["gain"]["stderr"]


def test_readout_json_round_trip_and_apply_readout(tally, tmp_path):
    files = tally.write(tmp_path / "scan.csv")
    matrix = load_readout(files["readout"])
    np.testing.assert_allclose(matrix, tally.misassignment, rtol=1e-15)
    assert povmfit.load_scan(files["scan"]).counts.tolist() == tally.scan.counts.tolist()
    # a loss-only detector (binomial thinning, eta = 0.5) followed by the readout: columns
    # still sum to one, and photon number 0 is read as 0 with M[0, 0] (matrix product by hand)
    n = np.arange(12)
    theta = np.array([[special.comb(k, m) * 0.5**k if m <= k else 0.0 for k in n] for m in n])
    out = np.asarray(apply_readout(theta, matrix))
    assert out.shape == (matrix.shape[0], 12)
    np.testing.assert_allclose(out.sum(axis=0), 1.0, atol=1e-12)
    assert out[0, 0] == pytest.approx(matrix[0, 0])
    assert out[:, 3] == pytest.approx(matrix[:, :4] @ theta[:4, 3])


@pytest.mark.parametrize("edit, message", [
    (lambda r: r.__setitem__("schema", "other"), "expected schema"),
    (lambda r: r["misassignment"]["matrix"][0].__setitem__(0, 0.5), "column 0 sums to"),
    (lambda r: r["misassignment"].__setitem__("matrix", [[1.0]]), "expected shape"),
])
def test_load_readout_refuses_bad_files(tally, tmp_path, edit, message):
    import json

    record = tally.to_dict()
    edit(record)
    path = tmp_path / "readout.json"
    path.write_text(json.dumps(record))
    with pytest.raises(povmfit.PovmfitError, match=message):
        load_readout(path)


@pytest.mark.slow
def test_standard_errors_are_calibrated_over_many_seeds(tmp_path):
    # 20 simulated labs: the z-scores of the efficiency have mean square 1 (chi2_20/20 lies
    # in [0.39, 1.97] with probability 0.99, scipy.stats.chi2.ppf)
    z = []
    for seed in range(20):
        folder = tmp_path / str(seed)
        folder.mkdir()
        result = povmfit.tally_pulse_heights(write_lab(folder, triggers=20_000, seed=100 + seed))
        entry = result.parameters["efficiency"]
        z.append((entry["value"] - TRUE["efficiency"]) / entry["stderr"])
    assert 0.39 < np.mean(np.square(z)) < 1.97


def test_histogram_input_gives_the_counts_of_the_raw_heights(tmp_path):
    # the same simulated heights, once raw and once as a histogram of 0.01-wide bins: the
    # thresholds lie where the density is ~1e-8 per unit, so snapping them to bin edges
    # moves no trigger (binning by hand with numpy.histogram)
    four = PROBES[:4]
    probes = write_lab(tmp_path, probes=four, triggers=20_000, seed=4, npy_every=1)  # text heights only
    rows = ["probe,coherent_photons,thermal_photons,histogram"]
    for i, (coherent, thermal) in enumerate(four):
        x = np.loadtxt(tmp_path / f"p{i}.txt")
        edges = np.round(np.arange(-2.0, 20.0, 0.01), 2)
        counts = np.histogram(x, bins=edges)[0]
        assert counts.sum() == x.size
        lines = ["bin_lo,bin_hi,count"] + [f"{a:.2f},{b:.2f},{c}" for a, b, c in zip(edges[:-1], edges[1:], counts)]
        (tmp_path / f"h{i}.csv").write_text("\n".join(lines) + "\n")
        rows.append(f"p{i},{coherent},{thermal},h{i}.csv")
    (tmp_path / "hist.csv").write_text("\n".join(rows) + "\n")
    calls = []
    raw = povmfit.tally_pulse_heights(probes, max_photons=5, progress=lambda *a: calls.append(a))
    binned = povmfit.tally_pulse_heights(tmp_path / "hist.csv", max_photons=5)
    assert binned.scan.counts.tolist() == raw.scan.counts.tolist()
    # the same triggers binned two ways: the estimates differ by the binning only, far less
    # than their statistical error (common practice, no source: a third of a standard error)
    for name in ("gain", "width_0", "efficiency"):
        assert abs(binned.parameters[name]["value"] - raw.parameters[name]["value"]) < raw.parameters[name]["stderr"] / 3
    # progress: bytes of every file, ending at its size, then the fit
    reads = [c for c in calls if c[0] == "reading p0"]
    assert reads[-1][1] == reads[-1][2] == (tmp_path / "p0.txt").stat().st_size
    assert ("fitting the peaks", 1, 1) in calls


def test_coarse_histogram_bins_are_refused(tmp_path):
    x = simulate_heights(np.random.default_rng(1), 2.0, 0.0, TRUE, 20_000)
    edges = np.arange(-1.0, 12.0, 0.5)  # bin edges at ...0.5, 1.0, ...: thresholds ~0.56, 1.57 fall mid-bin
    counts = np.histogram(x, bins=edges)[0]
    (tmp_path / "h.csv").write_text("bin_lo,bin_hi,count\n" + "".join(f"{a},{b},{c}\n" for a, b, c in zip(edges[:-1], edges[1:], counts)))
    y = simulate_heights(np.random.default_rng(2), 0.5, 0.0, TRUE, 20_000)
    np.save(tmp_path / "y.npy", y)
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,heights,histogram\n"
                                         "a,2,0,,h.csv\nb,0.5,0,y.npy,\n")
    with pytest.raises(povmfit.PovmfitError, match="h.csv: the histogram's bins are too coarse"):
        povmfit.tally_pulse_heights(tmp_path / "probes.csv", max_photons=3)


def test_likelihood_gradient_matches_finite_differences():
    # the hand-written chain rule against central differences of the likelihood (independent
    # computation), in the five peak parameters and in the weights
    rng = np.random.default_rng(5)
    n_peaks = 12
    edges = np.linspace(-1.0, 9.0, 41)
    lo = np.tile(edges[:-1], (2, 1))
    hi = np.tile(edges[1:], (2, 1))
    lo[:, 0], hi[:, -1] = -1e6, 1e6
    counts = rng.integers(0, 50, lo.shape).astype(float)
    peaks = np.array([0.1, 0.95, 0.01, 0.2, 0.1])
    weights = rng.random((2, n_peaks))
    value, grad_peaks, grad_weights = sp._nll_and_gradient(peaks, weights, lo, hi, counts, n_peaks)
    # the value against a direct evaluation with scipy.special.ndtr and no tail branches
    n = np.arange(n_peaks)
    mu, sd = peaks[0] + peaks[1] * n + peaks[2] * n * n, np.sqrt(peaks[3] ** 2 + n * peaks[4] ** 2)
    prob = np.einsum("pbn,pn->pb", special.ndtr((hi[:, :, None] - mu) / sd) - special.ndtr((lo[:, :, None] - mu) / sd),
                     weights)
    direct = -np.sum(counts * np.log(prob)) + np.sum(counts.sum(axis=1) * np.log(prob.sum(axis=1)))
    assert value == pytest.approx(direct, rel=1e-10)
    step = 1e-6
    for i in range(5):
        up, down = peaks.copy(), peaks.copy()
        up[i] += step
        down[i] -= step
        numeric = (sp._nll_and_gradient(up, weights, lo, hi, counts, n_peaks)[0]
                   - sp._nll_and_gradient(down, weights, lo, hi, counts, n_peaks)[0]) / (2 * step)
        assert grad_peaks[i] == pytest.approx(numeric, rel=1e-5, abs=1e-4)
    for p, k in ((0, 0), (1, 3), (0, 7)):
        up, down = weights.copy(), weights.copy()
        up[p, k] += step
        down[p, k] -= step
        numeric = (sp._nll_and_gradient(peaks, up, lo, hi, counts, n_peaks)[0]
                   - sp._nll_and_gradient(peaks, down, lo, hi, counts, n_peaks)[0]) / (2 * step)
        assert grad_weights[p, k] == pytest.approx(numeric, rel=1e-5, abs=1e-4)
