"""The model-free reconstructions of a scan: one estimator for the reconstruct verb and the
whole job.

:func:`reconstruct_scan` is the shared entry point: the full diagonal POVM
(:func:`povm_reconstruction`, the costly part) and the pointwise and smoothed Wigner values
with the phase-insensitivity test (:func:`wigner_reconstructions`), assembled into a
:class:`ScanReconstruction`. The whole job calls the two parts itself, to run the POVM in a
worker process beside the model ranking, and :func:`reconstructions_under_model` for the
cross-check. These three are module-level functions of picklable arguments (a ``Scan``,
numbers, arrays) that print nothing and return picklable results; the ``progress`` callback
stays None when they run in another process.
"""
from __future__ import annotations

import numbers
import os
from dataclasses import dataclass

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.tomography.scan_reconstruction import ScanReconstruction

__all__ = [
    "reconstruct_scan", "povm_reconstruction", "wigner_reconstructions", "reconstructions_under_model",
    "RECONSTRUCTION_BOOTSTRAP", "CROSS_CHECK_SIMULATIONS", "WIGNER_METHOD", "POVM_METHOD", "UnderModel",
]

RECONSTRUCTION_BOOTSTRAP = 50  # parametric-bootstrap resamples of the POVM and of the Wigner values
CROSS_CHECK_SIMULATIONS = 50  # scans simulated from the fitted model for the POVM cross-check
WIGNER_METHOD = "box"  # the published box-constrained pointwise estimator, outcome by outcome
POVM_METHOD = "likelihood"  # the default POVM estimator: "likelihood" (multinomial maximum likelihood) or "least_squares"


def reconstruct_scan(scan, *, bootstrap: int = RECONSTRUCTION_BOOTSTRAP, seed: int = 0, saturation: int | None = None,
                     progress=None, method: str = POVM_METHOD) -> ScanReconstruction:
    """Model-free reconstructions of a scan: POVM, pointwise and smoothed Wigner values, phase test.

    Args:
        scan: a ``Scan`` or the path of a scan file (CSV or Parquet).
        bootstrap: parametric-bootstrap resamples for the standard errors (0: none).
        seed: seeds the cross-validation folds and the bootstraps (the POVM's and the Wigner
            values' draws are seeded independently).
        saturation: saturation photon number M of the smoothed Wigner curve; default: chosen
            by AIC among 1..M of the pointwise values.
        progress: optional callback ``progress(task, done, total)``; nothing is printed.
        method: POVM estimator, "likelihood" (multinomial maximum likelihood, the default)
            or "least_squares" (regularised least squares on the frequencies).
    Returns:
        :class:`ScanReconstruction` (``write(out_dir)`` gives povm.csv, wigner.csv and
        reconstruction.json).
    """
    scan = _as_scan(scan)
    bootstrap = _whole_number(bootstrap, "bootstrap", 0)
    seed = _whole_number(seed, "seed", 0)
    if saturation is not None:
        saturation = _whole_number(saturation, "saturation", 1)
    if method not in ("likelihood", "least_squares"):
        raise ArgumentError(f"method: expected 'likelihood' or 'least_squares', got {method!r}")
    reconstruction = povm_reconstruction(scan, seed, bootstrap, progress=progress, method=method)
    return ScanReconstruction.from_parts(
        scan, reconstruction, wigner_reconstructions(scan, seed, bootstrap, saturation=saturation, progress=progress))


def povm_reconstruction(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP, progress=None,
                        method: str = POVM_METHOD):
    """The full diagonal POVM (cross-validated regularisation, bootstrap errors): a ``Reconstruction``."""
    from povmfit.fitting.tomography.reconstruct import reconstruct_povm

    return reconstruct_povm(scan.coherent_photons, scan.thermal_photons, scan.counts, method=method,
                            bootstrap=bootstrap, seed=seed, progress=progress)


def wigner_reconstructions(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP, saturation: int | None = None,
                           progress=None) -> dict:
    """{pointwise, smoothed, phase_test}: Wigner values point by point (box method) and
    smoothed, and the phase-insensitivity test (seeded on their own, independent of the POVM's
    draws). The smoothed curve has ``saturation`` M when given, else M chosen by AIC up to
    the pointwise values' M (the saturation prior of the values it summarises)."""
    import numpy as np

    from povmfit.fitting.tomography.pointwise_wigner import phase_insensitivity_test, pointwise_wigner, smoothed_wigner

    coherent, thermal, counts = scan.coherent_photons, scan.thermal_photons, scan.counts
    with np.errstate(over="ignore", invalid="ignore"):  # scipy's trust-region internals (benign)
        pointwise = pointwise_wigner(coherent, thermal, counts, scan.phase_rad, method=WIGNER_METHOD,
                                     bootstrap=bootstrap, seed=seed, progress=progress)
        smoothed = None
        if pointwise is not None and pointwise.alpha.size >= 2:
            if saturation is None:
                smoothed = smoothed_wigner(pointwise, max_saturation=pointwise.saturation)
            else:
                smoothed = smoothed_wigner(pointwise, saturation)
        phase_test = phase_insensitivity_test(coherent, thermal, counts, scan.phase_rad)
    return {"pointwise": pointwise, "smoothed": smoothed, "phase_test": phase_test}


@dataclass(frozen=True, eq=False)
class UnderModel:
    """Reconstructions of scans simulated from a model.

    Unpacks as ``expected, spread = under_model`` (the mean and standard deviation over the
    simulations, (n_outcomes, n_photons) each); ``draws`` (n_simulations, n_outcomes,
    n_photons) holds every simulated scan's reconstruction (the cross-check's null
    distribution is computed from them).
    """

    expected: object
    spread: object
    draws: object

    def __iter__(self):
        return iter((self.expected, self.spread))

    @classmethod
    def from_draws(cls, draws) -> "UnderModel":
        return cls(draws.mean(axis=0), draws.std(axis=0, ddof=1), draws)

    @classmethod
    def joined(cls, parts) -> "UnderModel":
        """One set from parts computed apart (in the order of their simulation numbers)."""
        import numpy as np

        return cls.from_draws(np.concatenate([part.draws for part in parts]))


def reconstructions_under_model(scan, q, reconstruction, seed: int, simulations: int = CROSS_CHECK_SIMULATIONS,
                                first: int = 0):
    """Reconstructions of scans simulated under a model: an :class:`UnderModel` (unpacks into
    the mean and spread over the simulations, (n_outcomes, n_photons) each).

    ``simulations`` scans (numbers ``first``, ``first + 1``, ..., each drawn from its own
    generator seeded by (seed, 1, number), so a set can be shared out between processes and
    joined with :meth:`UnderModel.joined`) are simulated from the model's outcome probabilities q[p, k] (same
    probes and shots, seeded) and reconstructed by the data's estimator (``reconstruction.method``)
    with the data's regularisation strength, so the smoothing bias and the constraint effects
    of the reconstruction act on the model exactly as on the data.
    """
    import numpy as np

    from povmfit.fitting.tomography.reconstruct import (
        RESAMPLE_ATOL, RESAMPLE_CYCLES, RESAMPLE_RTOL, build_layout, solve_likelihood_batch, solve_povm_batch, weighted_operator,
    )

    shots = np.asarray(scan.shots)
    layout = build_layout(scan.coherent_photons, scan.thermal_photons, reconstruction.n_photons)
    q = np.clip(np.asarray(q, dtype=float), 0.0, None)
    q = q / q.sum(axis=1, keepdims=True)
    simulated = np.stack([np.random.default_rng([seed, 1, number]).multinomial(shots, q)
                          for number in range(first, first + simulations)])
    # warm start at the data's reconstruction (a solution of the same problem for a nearby
    # scan): the solutions do not depend on the start, only the time does
    if getattr(reconstruction, "method", "least_squares") == "likelihood":
        draws = solve_likelihood_batch(layout, simulated.astype(float), reconstruction.regularisation,
                                       reconstruction.theta, rtol=RESAMPLE_RTOL, atol=RESAMPLE_ATOL,
                                       max_cycles=RESAMPLE_CYCLES)[0]
    else:
        operator = weighted_operator(layout, shots / shots.mean())
        draws, _, _ = solve_povm_batch(operator, simulated / shots[:, None], reconstruction.regularisation,
                                       reconstruction.theta, rtol=1e-11)
    return UnderModel.from_draws(draws)


def _as_scan(scan):
    from povmfit.fitting.data.scan import Scan, load_scan

    if isinstance(scan, (str, os.PathLike)):
        return load_scan(scan)
    if not isinstance(scan, Scan):
        raise ArgumentError(f"scan: expected a Scan or the path of a scan file, got {type(scan).__name__}")
    return scan


def _whole_number(value, argument: str, smallest: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < smallest:
        raise ArgumentError(f"{argument}: expected a whole number >= {smallest}, got {value!r}")
    return int(value)
