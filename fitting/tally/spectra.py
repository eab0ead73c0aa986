"""The pulse-height peak model and its joint maximum-likelihood fit over all probes.

Model. A trigger on which the detector registered ``n`` photons gives a pulse height

    x ~ Normal(mu_n, s_n^2),   mu_n = offset + gain n + curvature n^2,   s_n = sqrt(width_0^2 + n width_1^2),

(``curvature`` is 0 unless the quadratic non-linearity is asked for). A probe (coherent
photons A, thermal photons N) seen through a detector of efficiency eta (binomial thinning)
registers n photons with the displaced-thermal probability ``P(n; eta A, eta N)`` (thinning
maps a displaced thermal state onto one with both photon numbers scaled by eta), so its
spectrum is the mixture ``sum_n P(n; eta A, eta N) Normal(x; mu_n, s_n^2)``. The peaks run over
n = 0 .. n_peaks - 1 with n_peaks the probes' photon-number cutoff at eta = 1 (tail below
1e-10), so no detectable peak is left out.

Likelihood. Every probe's heights are binned (an exact lattice histogram for raw heights,
the user's bins for histograms); the bins of each probe are multinomial given the triggers
inside them: ``log L = sum_pb c_pb log(P_pb / sum_b P_pb)`` with ``P_pb`` the model's mass in
bin b. The outer bins of raw heights are open (-inf, +inf), so there the normaliser is 1.
The negative log-likelihood and its exact gradient are written out in numpy (bin masses are
differences of normal CDFs, whose derivatives are normal densities; the efficiency enters
through the thinning identity of :func:`_weights`), so nothing is compiled;
``scipy.optimize.minimize`` (L-BFGS-B, bounds) finds the maximum; the covariance is the
inverse of the Hessian at the maximum (observed information; central differences of the
exact gradient), and 95 % intervals are
Wald intervals cut at the parameter bounds (efficiency <= 1, widths >= 0).

Thresholds and misassignment. The threshold between peaks n and n+1 is where their
densities cross (equal priors), which minimises ``P(n read as n+1) + P(n+1 read as n)``;
it does not depend on the probe. The misassignment matrix ``M[k, m] = P(outcome k | m photons
registered)`` follows from the Gaussian peaks and the thresholds, the top outcome K meaning
"K or more". Peaks n and n+1 are *separable* when the equal-prior misassignment
``(P(n -> above) + P(n+1 -> below))/2`` at their threshold is below :data:`SEPARABLE_ERROR`
(means about two widths apart).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, signal, special, stats

from povmfit.models import choose_cutoff, probe_distributions_numpy

__all__ = ["PARAMETERS", "Spectrum", "SpectrumFit", "fit_spectra", "peak_means", "peak_widths", "thresholds",
           "pair_errors", "misassignment_matrix", "separable_limit", "fit_bins", "merged_bins", "SEPARABLE_ERROR",
           "FIT_BINS"]

PARAMETERS = ("offset", "gain", "curvature", "width_0", "width_1", "efficiency")
SEPARABLE_ERROR = 0.16  # equal-prior misassignment between neighbours; Phi(-1) ~ 0.16 at 2 widths apart
FIT_BINS = 512  # most bins per probe in the likelihood (raw heights are re-binned exactly)
CURVATURE_LIMIT = 0.1  # |curvature| / gain at most this ("a small quadratic term")
_TINY = 1e-300
_FAR = 1e6  # in units of the starting gain


@dataclass(frozen=True)
class Spectrum:
    """One probe's binned pulse heights: bins ``[lo[b], hi[b])`` with ``counts[b]`` triggers
    (lo[0] may be -inf and hi[-1] +inf), the probe's photon numbers and its name in messages."""

    label: str
    coherent_photons: float
    thermal_photons: float
    lo: np.ndarray
    hi: np.ndarray
    counts: np.ndarray
    name: str

    @property
    def triggers(self) -> int:
        return int(self.counts.sum())


@dataclass(frozen=True)
class SpectrumFit:
    """The joint fit: ``values`` {parameter: value}, ``covariance`` over ``free`` (in that
    order), ``n_peaks``, ``negative_log_likelihood``, ``converged`` and ``message`` of the
    optimiser, and the pooled goodness of fit (``deviance``, ``dof``, ``p_value``; bins
    merged until each expects at least 5 triggers)."""

    values: dict
    free: tuple
    covariance: np.ndarray
    n_peaks: int
    negative_log_likelihood: float
    converged: bool
    message: str
    deviance: float
    dof: int
    p_value: float

    def stderr(self, name: str) -> float:
        if name not in self.free:
            return 0.0
        i = self.free.index(name)
        return float(math.sqrt(max(self.covariance[i, i], 0.0)))


# ----- peak geometry (numpy) -----------------------------------------------------------------
def peak_means(values: dict, n) -> np.ndarray:
    n = np.asarray(n, dtype=float)
    return values["offset"] + values["gain"] * n + values.get("curvature", 0.0) * n * n


def peak_widths(values: dict, n) -> np.ndarray:
    n = np.asarray(n, dtype=float)
    return np.sqrt(values["width_0"] ** 2 + n * values["width_1"] ** 2)


def _crossing(m1, s1, m2, s2) -> float:
    """Where Normal(m1, s1) and Normal(m2, s2) densities are equal, between m1 < m2."""
    a = 0.5 / s2**2 - 0.5 / s1**2
    b = m1 / s1**2 - m2 / s2**2
    c = 0.5 * m2**2 / s2**2 - 0.5 * m1**2 / s1**2 + math.log(s2 / s1)
    if abs(a) < 1e-12 * (abs(b) + 1e-300) / max(abs(m2 - m1), 1e-300):
        return -c / b
    disc = b * b - 4 * a * c
    if disc < 0:
        return 0.5 * (m1 + m2)
    roots = [(-b + sign * math.sqrt(disc)) / (2 * a) for sign in (1, -1)]
    inside = [r for r in roots if m1 <= r <= m2]
    return inside[0] if inside else 0.5 * (m1 + m2)


def thresholds(values: dict, max_outcome: int) -> np.ndarray:
    """Thresholds t_1 .. t_K (t_k between peaks k-1 and k), shape (K,)."""
    means = peak_means(values, np.arange(max_outcome + 1))
    widths = peak_widths(values, np.arange(max_outcome + 1))
    return np.array([_crossing(means[k], widths[k], means[k + 1], widths[k + 1]) for k in range(max_outcome)])


def pair_errors(values: dict, count: int) -> np.ndarray:
    """Equal-prior misassignment between peaks n and n+1, n = 0..count-1 (1 where the means
    do not increase)."""
    out = np.ones(count)
    means = peak_means(values, np.arange(count + 1))
    widths = peak_widths(values, np.arange(count + 1))
    for n in range(count):
        if means[n + 1] <= means[n]:
            continue
        t = _crossing(means[n], widths[n], means[n + 1], widths[n + 1])
        out[n] = 0.5 * (special.ndtr(-(t - means[n]) / widths[n]) + special.ndtr((t - means[n + 1]) / widths[n + 1]))
    return out


def separable_limit(values: dict, top: int) -> int:
    """Largest K <= top such that peaks 0..K are pairwise (neighbour) separable; 0 if none."""
    errors = pair_errors(values, top)
    bad = np.nonzero(errors >= SEPARABLE_ERROR)[0]
    return int(bad[0]) if bad.size else top


def misassignment_matrix(values: dict, cuts: np.ndarray, n_columns: int) -> np.ndarray:
    """M[k, m] = P(outcome k | m photons registered), shape (len(cuts)+1, n_columns); outcome
    k is a height in [t_k, t_{k+1}) with t_0 = -inf and t_{K+1} = +inf."""
    m = np.arange(n_columns)
    means, widths = peak_means(values, m), peak_widths(values, m)
    edges = np.concatenate([[-np.inf], np.asarray(cuts, dtype=float), [np.inf]])
    z = (edges[:, None] - means[None, :]) / widths[None, :]
    upper = special.ndtr(z)  # P(height < edge)
    lower_tail = special.ndtr(-z)  # P(height > edge), accurate far above the mean
    above = z > 0
    return np.where(above[:-1] & above[1:], lower_tail[:-1] - lower_tail[1:], upper[1:] - upper[:-1]).clip(0.0, 1.0)


# ----- the likelihood (JAX) --------------------------------------------------------------------
def _padded(spectra, origin: float, scale: float):
    width = max(s.counts.size for s in spectra)
    lo = np.zeros((len(spectra), width))
    hi = np.zeros((len(spectra), width))
    counts = np.zeros((len(spectra), width))
    for p, s in enumerate(spectra):
        lo[p, : s.counts.size] = (s.lo - origin) / scale
        hi[p, : s.counts.size] = (s.hi - origin) / scale
        counts[p, : s.counts.size] = s.counts
    # open outer edges become edges far beyond every peak: the same masses, finite gradients
    lo[np.isneginf(lo)] = -_FAR
    hi[np.isposinf(hi)] = _FAR
    return lo, hi, counts


_SQRT_2PI = math.sqrt(2 * math.pi)


def _peak_masses_numpy(peaks, lo, hi, n_peaks):
    """Mass of every peak in every bin, shape (P, B, n_peaks); ``peaks`` = offset, gain,
    curvature, width_0, width_1 (scaled units)."""
    return _masses_and_slopes(peaks, lo, hi, n_peaks)[0]


def _masses_and_slopes(peaks, lo, hi, n_peaks):
    """Masses (P, B, n), their derivatives in each peak's mean and width, and the widths."""
    n = np.arange(n_peaks, dtype=float)
    mu = peaks[0] + peaks[1] * n + peaks[2] * n * n
    sd = np.sqrt(peaks[3] ** 2 + n * peaks[4] ** 2)
    z_lo = (lo[:, :, None] - mu) / sd
    z_hi = (hi[:, :, None] - mu) / sd
    # upper-tail differences above the mean: no cancellation far out
    mass = np.where(z_lo > 0, special.ndtr(-z_lo) - special.ndtr(-z_hi), special.ndtr(z_hi) - special.ndtr(z_lo))
    pdf_lo = np.exp(-0.5 * z_lo * z_lo) / _SQRT_2PI
    pdf_hi = np.exp(-0.5 * z_hi * z_hi) / _SQRT_2PI
    d_mean = (pdf_lo - pdf_hi) / sd  # d mass / d mu_n
    d_width = (z_lo * pdf_lo - z_hi * pdf_hi) / sd  # d mass / d sd_n
    return mass, d_mean, d_width, n, sd


def _nll_and_gradient(peaks, weights, lo, hi, counts, n_peaks):
    """Negative log-likelihood and its exact gradient in the five peak parameters and in the
    weights (P, n): the chain rule written out (bin masses are differences of normal CDFs,
    whose derivatives are normal densities)."""
    mass, d_mean, d_width, n, sd = _masses_and_slopes(peaks, lo, hi, n_peaks)
    prob = np.einsum("pbn,pn->pb", mass, weights)
    covered = np.maximum(prob.sum(axis=1), _TINY)
    totals = counts.sum(axis=1)
    observed = counts > 0
    safe = np.where(observed, np.maximum(prob, _TINY), 1.0)
    value = -np.sum(counts * np.log(safe)) + np.sum(totals * np.log(covered))
    slope = np.where(observed, -counts / safe, 0.0) + (totals / covered)[:, None]  # d value / d prob
    grad_weights = np.einsum("pb,pbn->pn", slope, mass)
    weighted = slope[:, :, None] * weights[:, None, :]
    g_mean = np.sum(weighted * d_mean, axis=(0, 1))
    g_width = np.sum(weighted * d_width, axis=(0, 1))
    grad_peaks = np.array([g_mean.sum(), (g_mean * n).sum(), (g_mean * n * n).sum(),
                           (g_width * peaks[3] / sd).sum(), (g_width * n * peaks[4] / sd).sum()])
    return float(value), grad_peaks, grad_weights


def _weights(efficiency: float, coherent, thermal, n_peaks: int) -> tuple[np.ndarray, np.ndarray]:
    """Registered-photon distributions P(n; eta A, eta N), n < n_peaks, and their derivative in
    eta from the thinning identity dP(n)/deta = (n P(n) - (n+1) P(n+1)) / eta (differentiate
    the generating function G(1 - eta + eta z) in eta)."""
    p = probe_distributions_numpy(efficiency * np.asarray(coherent), efficiency * np.asarray(thermal), n_peaks + 1)
    n = np.arange(n_peaks + 1)
    derivative = (n[:-1] * p[:, :-1] - n[1:] * p[:, 1:]) / efficiency
    return p[:, :-1], derivative


# ----- starting values -------------------------------------------------------------------------
def _centres(s: Spectrum):
    finite = np.isfinite(s.lo) & np.isfinite(s.hi)
    return 0.5 * (s.lo[finite] + s.hi[finite]), s.counts[finite]


def _starts(spectra) -> list[dict] | None:
    """Candidate starting values from the summed spectrum's peaks, or None with fewer than two."""
    xs, ws = zip(*(_centres(s) for s in spectra))
    x, w = np.concatenate(xs), np.concatenate(ws).astype(float)
    if w.sum() <= 0:
        return None
    order = np.argsort(x)
    cdf = np.cumsum(w[order]) / w.sum()
    lo, hi = x[order][np.searchsorted(cdf, 5e-4)], x[order][min(np.searchsorted(cdf, 1 - 5e-4), x.size - 1)]
    if not hi > lo:
        return None
    grid, step = np.linspace(lo, hi, 2049, retstep=True)
    summed = np.histogram(x, bins=grid, weights=w)[0]
    kernel = np.exp(-0.5 * (np.arange(-8, 9) / 2.5) ** 2)
    smooth = np.convolve(summed, kernel / kernel.sum(), mode="same")
    peaks, _ = signal.find_peaks(smooth, prominence=0.01 * smooth.max(), distance=8)
    if peaks.size < 2:
        return None
    positions = 0.5 * (grid[peaks] + grid[peaks + 1])
    gain = float(np.median(np.diff(positions[:4])))
    first = peaks[0]
    half = smooth[first] / 2
    left = first
    while left > 0 and smooth[left] > half:
        left -= 1
    right = first
    while right < smooth.size - 1 and smooth[right] > half and right - first < 0.5 * gain / step:
        right += 1
    width = max((right - left) * step / 2.355, 0.02 * gain, step)
    means = np.array([np.sum(c * k) / max(k.sum(), 1) for c, k in (_centres(s) for s in spectra)])
    photons = np.array([s.coherent_photons + s.thermal_photons for s in spectra])
    starts = []
    for j in range(3):
        offset = positions[0] - j * gain
        detected = (means - offset) / gain
        eta = float(np.clip(np.sum(detected * photons) / max(np.sum(photons**2), 1e-12), 0.02, 1.0))
        starts.append({"offset": offset, "gain": gain, "curvature": 0.0, "width_0": width, "width_1": 0.3 * width,
                       "efficiency": eta})
    return starts


# ----- the fit -------------------------------------------------------------------------------
def fit_spectra(spectra, quadratic: bool = False) -> SpectrumFit | None:
    """Joint maximum-likelihood fit of the peak model to every probe's spectrum; None when
    the summed spectrum shows fewer than two peaks to start from."""
    starts = _starts(spectra)
    if starts is None:
        return None
    coherent = np.array([s.coherent_photons for s in spectra])
    thermal = np.array([s.thermal_photons for s in spectra])
    n_peaks = choose_cutoff(coherent, thermal, 1e-10)
    origin, scale = starts[0]["offset"], starts[0]["gain"]
    lo, hi, counts = _padded(spectra, origin, scale)
    free = tuple(p for p in PARAMETERS if quadratic or p != "curvature")
    index = [PARAMETERS.index(p) for p in free]

    def evaluate(theta):
        weights, derivative = _weights(theta[5], coherent, thermal, n_peaks)
        value, grad_peaks, grad_weights = _nll_and_gradient(theta[:5], weights, lo, hi, counts, n_peaks)
        return value, np.append(grad_peaks, np.sum(grad_weights * derivative))

    def scaled(values: dict) -> np.ndarray:
        return np.array([(values["offset"] - origin) / scale, values["gain"] / scale, values["curvature"] / scale,
                         values["width_0"] / scale, values["width_1"] / scale, values["efficiency"]])

    def full(x, base):
        theta = base.copy()
        theta[index] = x
        return theta

    total = float(counts.sum())

    def objective(x, base):  # per trigger, so the optimiser's tolerances are relative ones
        value, grad = evaluate(full(x, base))
        return value / total, grad[index] / total

    base = scaled(starts[0])
    candidates = [scaled(s) for s in starts]
    best_start = min(candidates, key=lambda theta: objective(theta[index], theta)[0])
    bounds = {"offset": (None, None), "gain": (1e-6, None), "curvature": (-CURVATURE_LIMIT, CURVATURE_LIMIT),
              "width_0": (1e-6, None), "width_1": (0.0, None), "efficiency": (1e-6, 1.0)}
    x0 = best_start[index]
    base = best_start
    result = optimize.minimize(objective, x0, args=(base,), jac=True, method="L-BFGS-B",
                               bounds=[bounds[p] for p in free], options={"maxiter": 5000, "ftol": 1e-15, "gtol": 1e-10})
    theta = full(result.x, base)
    hessian = _hessian(lambda x: objective(x, base)[1] * total, result.x)
    try:
        covariance_scaled = np.linalg.inv(hessian)
    except np.linalg.LinAlgError:
        covariance_scaled = np.full_like(hessian, np.nan)
    units = np.array([scale, scale, scale, scale, scale, 1.0])[index]
    covariance = covariance_scaled * np.outer(units, units)
    values = {"offset": origin + scale * theta[0], "gain": scale * theta[1], "curvature": scale * theta[2],
              "width_0": scale * theta[3], "width_1": scale * theta[4], "efficiency": float(theta[5])}
    values = {k: float(v) for k, v in values.items()}
    masses = _peak_masses_numpy(theta[:5], lo, hi, n_peaks)
    prob = np.einsum("pbn,pn->pb", masses, _weights(theta[5], coherent, thermal, n_peaks)[0])
    deviance, dof = _pooled_deviance(prob, counts, len(free))
    p_value = float(stats.chi2.sf(deviance, dof)) if dof > 0 else float("nan")
    return SpectrumFit(values, free, covariance, n_peaks, float(result.fun) * total, bool(result.success),
                       str(result.message), deviance, dof, p_value)


def _hessian(gradient, x: np.ndarray) -> np.ndarray:
    """Hessian by central differences of the exact gradient (steps 1e-5 in the scaled
    parameters, which are of order one), symmetrised."""
    step = 1e-5
    columns = []
    for i in range(x.size):
        up, down = x.copy(), x.copy()
        up[i] += step
        down[i] -= step
        columns.append((gradient(up) - gradient(down)) / (2 * step))
    hessian = np.array(columns)
    return 0.5 * (hessian + hessian.T)


def _pooled_deviance(prob: np.ndarray, counts: np.ndarray, n_parameters: int) -> tuple[float, int]:
    """Deviance over bins merged (in order) until each expects >= 5 triggers; dof = pooled
    bins - one per probe - fitted parameters."""
    deviance, cells = 0.0, 0
    for p in range(counts.shape[0]):
        total = counts[p].sum()
        expected = total * prob[p] / max(prob[p].sum(), _TINY)
        pooled_e, pooled_c = [], []
        e_acc = c_acc = 0.0
        for e, c in zip(expected, counts[p]):
            e_acc += e
            c_acc += c
            if e_acc >= 5:
                pooled_e.append(e_acc)
                pooled_c.append(c_acc)
                e_acc = c_acc = 0.0
        if pooled_e:
            pooled_e[-1] += e_acc
            pooled_c[-1] += c_acc
        e, c = np.array(pooled_e), np.array(pooled_c)
        deviance += 2 * float(np.sum(np.where(c > 0, c * np.log(np.where(c > 0, c, 1) / e), 0.0) - (c - e)))
        cells += max(len(e) - 1, 0)
    return deviance, cells - n_parameters


def fit_bins(edges: np.ndarray, counts: np.ndarray, limit: int = FIT_BINS) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(lo, hi, counts) of a contiguous histogram merged exactly to at most ``limit`` bins,
    with open outer edges (-inf and +inf: every trigger lies inside)."""
    factor = max(1, math.ceil(counts.size / limit))
    starts = np.arange(0, counts.size, factor)
    merged = np.add.reduceat(counts, starts)
    lo = edges[starts].astype(float)
    hi = np.append(edges[starts[1:]], edges[-1]).astype(float)
    lo[0], hi[-1] = -np.inf, np.inf
    return lo, hi, merged


def merged_bins(lo: np.ndarray, hi: np.ndarray, counts: np.ndarray, limit: int = FIT_BINS):
    """(lo, hi, counts) of a user histogram with runs of touching bins merged exactly, about
    ``ceil(n / limit)`` at a time (a gap between bins always ends a merged bin)."""
    factor = math.ceil(counts.size / limit)
    if factor <= 1:
        return lo, hi, counts
    starts = [0]
    for b in range(1, counts.size):
        if lo[b] != hi[b - 1] or b - starts[-1] >= factor:
            starts.append(b)
    starts = np.array(starts)
    ends = np.append(starts[1:], counts.size) - 1
    return lo[starts], hi[ends], np.add.reduceat(counts, starts)
