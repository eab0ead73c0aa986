"""Predicted outcome probabilities, deviance residuals and Fisher information, compiled once.

Data flow: probe photon numbers (scaled by the probe-calibration factor) -> displaced thermal
photon-number distributions P[p, n] -> model POVM theta[k, n] -> q[p, k] = sum_n P[p, n]
theta[k, n] -> residuals against the raw counts. A model with a fixed readout matrix M
(``DetectorModel.fixed_readout``) returns the observed POVM M @ theta_registered, so its
Jacobian is M @ dtheta_registered (M is a constant of the compiled program).

The residual of cell (p, k) is the signed square root of its multinomial deviance,

    r = sign(o - e) sqrt(2 [o log(o/e) - (o - e)]),   e = shots_p q[p, k],

so sum r^2 is the deviance and least squares on r is maximum likelihood. The Pearson option
uses r = (o - e)/sqrt(e). With a calibration prior one more residual (s - 1)/sigma is
appended (a Gaussian prior on the probe scale s).

``FitProblem`` holds the one residual function (and its exact Jacobian and the Fisher
information) of a model on a scan; the fit, its profile-likelihood intervals and its
bootstrap refits all minimise it through ``solver.solve``. The one compiled JAX part is the
POVM and its Jacobian, cached per (model, cutoff): the probe distributions (and, with a
calibration prior, their exact derivative in the probe scale) are formed in numpy, so
refits (bootstrap, profiles, cross-validation), the datasheet and the cross-check all reuse
that one program.
"""
from __future__ import annotations

import copy
from functools import lru_cache

import jax
import numpy as np

from povmfit.fitting.data.errors import ArgumentError
from povmfit.models import DetectorModel, choose_cutoff, null_value, probe_distributions, probe_distributions_numpy

__all__ = [
    "predicted_probabilities", "scaled_probe_distributions", "povm_and_jacobian", "compile_programs", "fixed_probe_distributions", "fit_cutoff",
    "SCALE_SPAN", "PROBABILITY_FLOOR", "cell_residuals", "cell_residual_derivative", "FitProblem",
]

PROBABILITY_FLOOR = 1e-300
SCALE_SPAN = 6.0  # a fitted probe-calibration scale is explored within 1 +- 6 sigma
_CUTOFFS: dict = {}


def fit_cutoff(scan, calibration_uncertainty=None, tolerance: float = 1e-10) -> int:
    """Photon-number cutoff of a fit to the scan's probes, wide enough for the largest probe
    scale the fit explores (remembered per probe set: refits of the same probes, as in
    bootstraps and cross-validation, do not recompute it)."""
    top = 1.0 + SCALE_SPAN * calibration_uncertainty if calibration_uncertainty else 1.0
    coherent = np.asarray(scan.coherent_photons, float) * top
    thermal = np.asarray(scan.thermal_photons, float) * top
    key = (coherent.tobytes(), thermal.tobytes(), float(tolerance))
    if key not in _CUTOFFS:
        if len(_CUTOFFS) > 256:
            _CUTOFFS.clear()
        _CUTOFFS[key] = choose_cutoff(coherent, thermal, tolerance)
    return _CUTOFFS[key]


def predicted_probabilities(model: DetectorModel, params, scale, coherent, thermal, n_photons: int):
    """q[p, k]: outcome probabilities of every probe, shape (n_probes, n_outcomes).

    ``scale`` multiplies both photon numbers of every probe (probe calibration).
    """
    distributions = probe_distributions(scale * coherent, scale * thermal, n_photons)
    theta = model.povm(params, n_photons)
    return distributions @ theta.T


def scaled_probe_distributions(coherent, thermal, scale: float, n_photons: int):
    """P[p, n] of the probes with both photon numbers multiplied by ``scale``, and its exact
    derivative d P[p, n] / d scale, shapes (n_probes, n_photons) each, in numpy.

    Scaling a displaced thermal state (A, N) -> (sA, sN) maps its generating function
    G(z) to G(1 + s(z - 1)), so dG/ds = ((z - 1)/s) dG/dz and, term by term,
    dP_n/ds = (n P_n - (n + 1) P_{n+1}) / s.
    """
    extended = probe_distributions_numpy(scale * np.asarray(coherent, float), scale * np.asarray(thermal, float),
                                         n_photons + 1)
    n = np.arange(n_photons)
    distributions = extended[:, :n_photons]
    return distributions, (n * distributions - (n + 1) * extended[:, 1:]) / scale


_DISTRIBUTIONS: dict = {}


def fixed_probe_distributions(coherent, thermal, n_photons: int) -> np.ndarray:
    """P[p, n] of probes taken as exact, shape (n_probes, n_photons), remembered per probe set."""
    coherent = np.asarray(coherent, dtype=float)
    thermal = np.asarray(thermal, dtype=float)
    key = (coherent.tobytes(), thermal.tobytes(), n_photons)
    if key not in _DISTRIBUTIONS:
        if len(_DISTRIBUTIONS) > 64:
            _DISTRIBUTIONS.clear()
        _DISTRIBUTIONS[key] = probe_distributions_numpy(coherent, thermal, n_photons)
    return _DISTRIBUTIONS[key]


@lru_cache(maxsize=64)
def povm_and_jacobian(model: DetectorModel, n_photons: int):
    """Compiled ``x -> (theta[k, n], d theta[k, n] / d x[i])``, shapes (K, N) and (K, N, P).

    One function per model and cutoff serves the fits with exact probes (whose probe
    distributions are constant), the datasheet figures and the cross-check.
    """
    def povm(x):
        theta = model.povm(x, n_photons)
        return theta, theta

    return jax.jit(lambda x: jax.jacfwd(povm, has_aux=True)(x)[::-1])


def compile_programs(models, n_photons: int, progress=None) -> None:
    """Compile (or load from JAX's persistent compilation cache) the program of
    :func:`povm_and_jacobian` for each model at ``n_photons`` photon numbers, reporting task
    "compiling models" through ``progress(task, done, total)``. Tracing and compiling are most of
    the first fit of a model family; done here, the fits that follow find the programs ready."""
    models = list(dict.fromkeys(models))
    if progress is not None:
        progress("compiling models", 0, len(models))
    for i, model in enumerate(models):
        start = np.asarray(model.pack(model.starting_values()), dtype=float)
        jax.block_until_ready(povm_and_jacobian(model, n_photons)(start))
        if progress is not None:
            progress("compiling models", i + 1, len(models))


def cell_residuals(q, counts, shots, weighting: str = "deviance") -> np.ndarray:
    """Deviance (or Pearson) residual of every cell, shape (n_probes, n_outcomes)."""
    expected = shots[:, None] * np.maximum(q, PROBABILITY_FLOOR)
    difference = counts - expected
    if weighting == "pearson":
        return difference / np.sqrt(expected)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_term = np.where(counts > 0, counts * np.log(np.where(counts > 0, counts, 1.0) / expected), 0.0)
    cell = np.maximum(2.0 * (log_term - difference), 0.0)
    small = np.abs(difference) < 1e-6 * expected
    return np.where(small, difference / np.sqrt(expected), np.sign(difference) * np.sqrt(cell))


def cell_residual_derivative(q, residuals, counts, shots, weighting: str = "deviance") -> np.ndarray:
    """d r / d q for every cell (r depends on its own q only), shape (n_probes, n_outcomes)."""
    expected = shots[:, None] * np.maximum(q, PROBABILITY_FLOOR)
    difference = counts - expected
    if weighting == "pearson":
        # r = (o - e) e^(-1/2): dr/de = -e^(-1/2) - (o - e) e^(-3/2) / 2
        dr_de = -1.0 / np.sqrt(expected) - 0.5 * difference / expected**1.5
    else:
        small = np.abs(difference) < 1e-6 * expected
        safe_r = np.where(small, 1.0, residuals)
        dr_de = np.where(small, -1.0 / np.sqrt(expected), -(difference / expected) / safe_r)
    return dr_de * shots[:, None]


class FitProblem:
    """The least-squares problem of one model on one scan: the one residual function of the
    fit, its profiles and its bootstrap.

    The POVM is computed by ``compute_model`` (a model with the same family, size and fixed
    readout matrix and a superset of the features); parameters of features the model lacks are held at values
    that switch the feature off. The parameter vector ``x`` runs over ``names`` (the model's
    parameters, then ``probe_scale`` with a calibration prior). Probes outside ``active``
    are predicted but not fitted.
    """

    def __init__(self, scan, model, compute_model, n_photons, weighting, calibration_uncertainty, active=None):
        self.model = model
        self.calibrated = calibration_uncertainty is not None
        self.width = float(calibration_uncertainty) if self.calibrated else 1.0
        self.weighting = weighting
        full = list(compute_model.parameter_names) + (["probe_scale"] if self.calibrated else [])
        self.names = tuple(model.parameter_names) + (("probe_scale",) if self.calibrated else ())
        missing = [n for n in self.names if n not in full]
        if (missing or compute_model.family != model.family or compute_model.n_outcomes != model.n_outcomes
                or compute_model.fixed_readout != model.fixed_readout):
            raise ArgumentError(f"compute_model: {compute_model.spec} cannot stand in for {model.spec}")
        self.free_index = np.array([full.index(n) for n in self.names])
        self.template = np.array([0.0 if n in self.names else null_value(n) for n in full])
        self.coherent = np.asarray(scan.coherent_photons, float)
        self.thermal = np.asarray(scan.thermal_photons, float)
        self._probabilities_and_jacobian = self._compiled_predictions(compute_model, n_photons)
        # probes outside ``active`` are predicted but not fitted (cross-validation keeps the
        # compiled shapes of the whole scan)
        self.active = np.ones(scan.n_probes, bool) if active is None else np.asarray(active, bool)
        self.counts = np.asarray(scan.counts, float)[self.active]
        self.shots = np.asarray(scan.shots, float)[self.active]
        bounds = model.bounds()
        if self.calibrated:
            bounds["probe_scale"] = (max(1.0 - SCALE_SPAN * self.width, 0.05), 1.0 + SCALE_SPAN * self.width)
        self.bounds = bounds
        self.bounds_list = [bounds[n] for n in self.names]

    @property
    def lower(self) -> np.ndarray:
        return np.array([lo for lo, _ in self.bounds_list], dtype=float)

    @property
    def upper(self) -> np.ndarray:
        return np.array([hi for _, hi in self.bounds_list], dtype=float)

    def with_counts(self, counts) -> "FitProblem":
        """The same problem for another count table of the fitted probes (same shots per
        probe), shape (n_active_probes, n_outcomes): a bootstrap resample."""
        other = copy.copy(self)
        other.counts = np.asarray(counts, float)
        return other

    def _compiled_predictions(self, compute_model, n_photons):
        """full parameter vector -> (q[p, k], dq/dx[p, k, i]) for every probe."""
        povm = povm_and_jacobian(compute_model, n_photons)
        if self.calibrated:
            # the probe distributions move with the fitted probe scale s (the last entry):
            # q = P(s) theta^T, dq/dx = P(s) dtheta/dx, dq/ds = (dP/ds) theta^T
            def predictions(full):
                theta, jac = (np.asarray(a) for a in povm(full[:-1]))
                distributions, slope = scaled_probe_distributions(self.coherent, self.thermal, full[-1], n_photons)
                jac = np.concatenate([np.tensordot(distributions, jac, axes=(1, 1)), (slope @ theta.T)[..., None]], axis=-1)
                return distributions @ theta.T, jac

            return predictions
        # exact probes: constant distributions times the compiled POVM and its Jacobian
        distributions = fixed_probe_distributions(self.coherent, self.thermal, n_photons)

        def predictions(full):
            theta, jac = povm(full)
            return distributions @ np.asarray(theta).T, np.tensordot(distributions, np.asarray(jac), axes=(1, 1))

        return predictions

    def full_vector(self, x):
        full = self.template.copy()
        full[self.free_index] = x
        return full

    def _evaluate(self, x):
        q, jac = self._probabilities_and_jacobian(self.full_vector(x))
        return np.asarray(q)[self.active], np.asarray(jac)[self.active][..., self.free_index]

    def all_probabilities(self, x):
        """q[p, k] for every probe of the scan, fitted or not."""
        # the probability+Jacobian function is the one compiled: reuse it rather than compile twice
        q, _ = self._probabilities_and_jacobian(self.full_vector(x))
        return np.asarray(q)

    def probabilities(self, x):
        return self.all_probabilities(x)[self.active]

    def residuals(self, x):
        r = cell_residuals(self.probabilities(x), self.counts, self.shots, self.weighting).ravel()
        if self.calibrated:
            r = np.append(r, (x[-1] - 1.0) / self.width)
        return r

    def residuals_and_jacobian(self, x):
        q, jac = self._evaluate(x)
        r = cell_residuals(q, self.counts, self.shots, self.weighting)
        dr_dq = cell_residual_derivative(q, r, self.counts, self.shots, self.weighting)
        rjac = (dr_dq[..., None] * jac).reshape(-1, len(x))
        r = r.ravel()
        if self.calibrated:
            r = np.append(r, (x[-1] - 1.0) / self.width)
            prior_row = np.zeros(len(x))
            prior_row[-1] = 1.0 / self.width
            rjac = np.vstack([rjac, prior_row])
        return r, rjac

    def deviance(self, x):
        return float(np.sum(self.residuals(x) ** 2))

    def fisher(self, x):
        """Expected Fisher information of the multinomial counts, plus the prior."""
        q, jac = self._evaluate(x)
        q = np.maximum(q, PROBABILITY_FLOOR)
        info = np.einsum("p,pki,pkj->ij", self.shots, jac / q[..., None], jac)
        if self.calibrated:
            info[-1, -1] += 1.0 / self.width**2
        return info
