"""Cross-check of a parametric fit against the model-free reconstructions.

``cross_check`` compares (1) the model POVM with the reconstructed POVM entry by entry and
(2) the model's Wigner values with the pointwise values, in standard-error units with the
two errors combined in quadrature, z = (model - reconstruction) / sqrt(se_model^2 + se_rec^2).

Only photon numbers the probes constrain are compared: where the expected number of shots
carrying n photons, sum_p shots_p P_p(n), is at least 1 % of its largest value
(``reconstruction.constrained``), and in the calibrated comparison below at least
:data:`COMPARED_FRACTION` (10 %). Further out the reconstruction is held mostly by its smoothness penalty and
the constraints, and its sampling distribution has a long tail: on a 10-probe scan of an
array detector, the statistic of 50 scans simulated from the model reached 28 times its
median when photon numbers down to 1 % of the peak were compared, and 5.5 times at 10 %.
The last outcome is left out of the chi-square (every column sums to 1).
The reconstruction's errors are correlated across n by the smoothness regulariser and do not
include its bias, so the chi-square is a summary, not an exact test.

Calibration: when the reconstructions of scans simulated from the model are given
(``null_draws``, what the whole job already computes), the POVM statistic's distribution
under the model is taken from them: each simulated reconstruction is scored exactly like the
data's (against the mean and spread of the other simulations, so that its own deviation does
not shrink its score), and the p-value comes from a scaled
chi-square a chi2_nu with the simulated statistics' mean and variance (a nu = mean,
2 a^2 nu = variance; Satterthwaite, Biometrics Bull. 2, 110 (1946)), so correlations,
smoothing and constraints are accounted for. The rank p-value among the simulations is
reported beside it.

By default the model's Wigner values are what the pointwise estimator would return for the
model's exact outcome probabilities (same probes, same saturation number M), so the
estimator's saturation bias cancels in the comparison.
"""
from __future__ import annotations


import numpy as np
from scipy.special import chdtrc

from povmfit.models import probe_distributions_numpy

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.tomography.reconstruct import CONSTRAINED_FRACTION
from povmfit.fitting.tomography.pointwise_wigner import _solve, thermal_design, wigner_from_p

__all__ = ["cross_check", "model_pointwise_wigner", "null_statistics", "calibrated_scale", "CONSISTENT_LEVEL", "COMPARED_FRACTION",
           "compared_photons"]

CONSISTENT_LEVEL = 0.01  # verdict "tension" when a p-value falls below this level
_ERROR_FLOOR = 1e-9
POVM_TOLERANCE = 1e-3  # absolute: smaller model-vs-reconstruction differences count as agreement
COMPARED_FRACTION = 0.1  # photon numbers compared: expected shots carrying n >= this fraction of the peak


def model_pointwise_wigner(model_theta, pointwise, coherent, thermal) -> np.ndarray:
    """Pointwise estimator applied to the model's exact probabilities: (n_outcomes, n_points).

    ``coherent``/``thermal`` are the scan's probe settings; ``model_theta`` (K, n_photons) must
    reach the probes' photon-number cutoff.
    """
    model_theta = np.asarray(model_theta, dtype=float)
    out = np.empty((model_theta.shape[0], len(pointwise.probes)))
    for i, idx in enumerate(pointwise.probes):
        distributions = probe_distributions_numpy(np.asarray(coherent)[idx], np.asarray(thermal)[idx], model_theta.shape[1])
        q = np.clip(distributions @ model_theta.T, 0.0, None)
        q /= q.sum(axis=1, keepdims=True)
        design = thermal_design(np.asarray(thermal)[idx], pointwise.saturation)
        out[:, i] = wigner_from_p(_solve(design, np.ones(len(idx)), q, pointwise.method))
    return out


def _summary(z: np.ndarray, dof: int) -> dict:
    chi_square = float(np.sum(z**2))
    return {"chi_square": chi_square, "dof": int(dof),
            "p_value": float(chdtrc(dof, chi_square)) if dof > 0 else None,
            "max_abs_z": float(np.max(np.abs(z))) if z.size else None}


def _povm_part(model_theta, model_stderr, reconstruction, reconstruction_stderr, null_draws=None) -> dict:
    n = min(model_theta.shape[1], reconstruction.n_photons)
    calibrate = null_draws is not None and len(null_draws) >= 3
    photons = np.nonzero(compared_photons(reconstruction, calibrate)[:n])[0]
    sigma = np.sqrt(model_stderr[:, photons] ** 2 + reconstruction_stderr[:, photons] ** 2)
    # Resolution floor: with N expected shots carrying n photons, an entry cannot be known
    # better than about 3/N (the 95 % upper limit after zero events, "rule of three"), and
    # entries pinned at 0 or 1 by the constraints have no bootstrap spread at all; differences
    # below POVM_TOLERANCE are treated as agreement.
    floor = np.maximum(3.0 / np.maximum(reconstruction.probe_weight[photons], 1.0), POVM_TOLERANCE)[None, :]
    calibrate = calibrate and photons.size > 0
    if calibrate:
        draws = np.asarray(null_draws, dtype=float)[:, :, photons]
        spread = draws.var(axis=0, ddof=1)
        # the part of the data's variance that is not the simulations' spread (the fit's own
        # uncertainty, the reconstruction's errors), kept in the simulations' scores
        other_variance = np.maximum(sigma**2 - spread, 0.0)
        scale = calibrated_scale(spread, other_variance, floor)
    else:
        scale = np.maximum(sigma, floor)
    z = (model_theta[:, photons] - reconstruction.theta[:, photons]) / scale
    out = _summary(z[:-1], z[:-1].size)
    if calibrate:
        out["chi_square_nominal_p_value"] = out["p_value"]
        out.update(_calibrated(float(np.sum(z[:-1] ** 2)), draws, floor, other_variance))
    if z.size:
        # the last outcome is fixed by completeness; it is left out of the statistic and the search
        k, j = np.unravel_index(int(np.argmax(np.abs(z[:-1]))), z[:-1].shape)
        out["largest"] = {"outcome": int(k), "photons": int(photons[j]), "z": float(z[k, j])}
    out["photons_compared"] = photons.tolist()
    out["z"] = z.tolist()
    return out


def compared_photons(reconstruction, calibrated: bool) -> np.ndarray:
    """Photon numbers the POVM comparison uses, (n_photons,) bool: ``reconstruction.constrained``
    (expected shots carrying n at least 1 % of the peak); with the calibrated comparison only
    those at least :data:`COMPARED_FRACTION` of the peak (module docstring)."""
    if not calibrated:
        return np.asarray(reconstruction.constrained, dtype=bool)
    weight = np.asarray(reconstruction.probe_weight, dtype=float)
    return weight >= COMPARED_FRACTION * weight.max()


def calibrated_scale(variance, other_variance, floor):
    """z denominators of the calibrated comparison: (..., K, m).

    ``variance`` (..., K, m) is the simulated reconstructions' variance on the m compared
    photon numbers, combined in quadrature with ``other_variance`` and kept at least ``floor``.
    It is not pooled over neighbouring photon numbers: an entry the model pins (no spread in
    its simulations, such as the no-click probability at zero photons of a model without dark
    counts) is where a wrong model shows most plainly.
    """
    return np.maximum(np.sqrt(np.asarray(variance, dtype=float) + other_variance), floor)


def null_statistics(draws, floor, other_variance=0.0) -> np.ndarray:
    """The POVM statistic of each simulated reconstruction under the model: (n_simulations,).

    ``draws`` (S, K, m) are the simulated reconstructions on the compared photon numbers
    (S >= 3). Simulation s is scored exactly as the data's reconstruction is: against the mean
    of the other S - 1 (it is independent of them, as the data's reconstruction is of all S),
    in units of :func:`calibrated_scale` of their variance (ddof 1). Its own deviation must
    not enter its scale: an estimator with rare large excursions would otherwise score them
    at most sqrt(S - 1) standard deviations, and the calibration would miss the tail that the
    data's score sees in full.
    """
    s = draws.shape[0]
    mean = draws.mean(axis=0)
    deviation = draws - mean[None]
    others_mean = mean[None] - deviation / (s - 1)
    # sum of squares of the other S - 1 about their own mean, from the deviations about all S
    others_squares = np.sum(deviation**2, axis=0)[None] - deviation**2 * s / (s - 1)
    others_variance = np.maximum(others_squares, 0.0) / (s - 2)
    z = (others_mean - draws) / calibrated_scale(others_variance, other_variance, floor)
    return np.sum(z[:, :-1] ** 2, axis=(1, 2))


def _calibrated(statistic: float, draws, floor, other_variance) -> dict:
    """p-values of ``statistic`` under the distribution simulated from the model."""
    null = null_statistics(draws, floor, other_variance)
    mean, variance = float(null.mean()), float(null.var(ddof=1))
    out = {"null": {
        "simulations": int(null.size), "mean": mean, "sd": float(np.sqrt(variance)),
        "rank_p_value": float((1 + np.sum(null >= statistic)) / (null.size + 1))}}
    if mean > 0 and variance > 0:
        a, nu = variance / (2.0 * mean), 2.0 * mean * mean / variance
        out["null"].update({"scale": a, "dof": nu})
        out["p_value"] = float(chdtrc(nu, statistic / a))
        out["calibration"] = "scaled chi-square fitted to the statistics of the simulated reconstructions"
    return out


def _wigner_part(model_values, model_stderr, pointwise) -> dict:
    sigma = np.sqrt(np.asarray(model_stderr) ** 2 + pointwise.stderr**2)
    z = (np.asarray(model_values) - pointwise.values) / np.maximum(sigma, _ERROR_FLOOR)
    out = _summary(z[:-1], z[:-1].size)
    k, i = np.unravel_index(int(np.argmax(np.abs(z[:-1]))), z[:-1].shape)
    out["largest"] = {"outcome": int(k), "re_alpha": float(pointwise.alpha[i].real),
                      "im_alpha": float(pointwise.alpha[i].imag), "z": float(z[k, i])}
    return out


def cross_check(model_theta, model_theta_stderr, reconstruction, pointwise, model_wigner=None,
                model_wigner_stderr=None, probes=None, reconstruction_stderr=None, null_draws=None) -> dict:
    """Compare a fitted model with the reconstructions.

    Args:
        model_theta, model_theta_stderr: (n_outcomes, n_photons) model POVM and its standard
            errors (e.g. propagated from the fit covariance).
        reconstruction: :class:`~povmfit.fitting.tomography.reconstruct.Reconstruction`.
        pointwise: :class:`~povmfit.fitting.tomography.pointwise_wigner.PointwiseWigner` or None.
        model_wigner: (n_outcomes, n_points) model Wigner values at ``pointwise.alpha``; default:
            the pointwise estimator applied to the model's probabilities (needs ``probes`` =
            (coherent_photons, thermal_photons) arrays of the scan).
        model_wigner_stderr: optional errors of ``model_wigner`` (default 0).
        reconstruction_stderr: errors of the reconstruction to combine with the model's
            (default ``reconstruction.stderr``; pass zeros when ``model_theta_stderr`` already
            is the spread of reconstructions under the model).
        null_draws: optional (n_simulations, n_outcomes, n_photons) reconstructions of scans
            simulated from the model (``model_theta`` then is their mean): the POVM p-value is
            calibrated on them (module docstring) instead of the nominal chi-square.
    Returns:
        JSON-able dict: ``povm`` {chi_square, dof, p_value, max_abs_z, largest {outcome,
        photons, z}, photons_compared, z (n_outcomes x compared)}; ``wigner`` (or None)
        {chi_square, dof, p_value, max_abs_z, largest {outcome, re_alpha, im_alpha, z}};
        ``error_combination`` "quadrature"; ``constrained_rule``; ``level``; ``verdict``
        ("consistent" or "tension at outcome k, n photons" / "tension in the Wigner values of
        outcome k at alpha = ...").
    """
    model_theta = np.asarray(model_theta, dtype=float)
    model_stderr = np.zeros_like(model_theta) if model_theta_stderr is None else np.asarray(model_theta_stderr, dtype=float)
    rec_stderr = reconstruction.stderr if reconstruction_stderr is None else np.asarray(reconstruction_stderr, dtype=float)
    povm = _povm_part(model_theta, model_stderr, reconstruction, rec_stderr, null_draws)
    wigner = None
    if pointwise is not None:
        if model_wigner is None:
            if probes is None:
                raise ArgumentError("probes: cross_check needs probes=(coherent, thermal) to forward-model the "
                                    "Wigner values (or model_wigner)")
            model_wigner = model_pointwise_wigner(model_theta, pointwise, *probes)
        stderr = np.zeros_like(pointwise.values) if model_wigner_stderr is None else model_wigner_stderr
        wigner = _wigner_part(model_wigner, stderr, pointwise)
    verdict = "consistent"
    if povm["p_value"] is not None and povm["p_value"] < CONSISTENT_LEVEL:
        verdict = f"tension at outcome {povm['largest']['outcome']}, {povm['largest']['photons']} photons"
    elif wigner is not None and wigner["p_value"] is not None and wigner["p_value"] < CONSISTENT_LEVEL:
        at = wigner["largest"]
        verdict = (f"tension in the Wigner values of outcome {at['outcome']} at alpha = "
                   f"{complex(at['re_alpha'], at['im_alpha']):.3g}")
    return {
        "povm": povm, "wigner": wigner, "error_combination": "quadrature",
        "constrained_rule": "photon numbers with expected shots sum_p shots_p P_p(n) >= "
                            f"{COMPARED_FRACTION if 'null' in povm else CONSTRAINED_FRACTION:.0%} of the maximum",
        "level": CONSISTENT_LEVEL, "verdict": verdict,
    }
