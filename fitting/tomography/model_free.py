"""The model-free reconstructions of a scan, as the whole job uses them.

The full diagonal POVM (the costly part), the pointwise and smoothed Wigner values with the
phase-insensitivity test, and the reconstructions of scans simulated from a fitted model for
the cross-check. Each is a plain function of picklable arguments, so the whole job can run
the POVM in a worker process beside the model ranking.
"""
from __future__ import annotations

__all__ = [
    "model_free_reconstructions", "povm_reconstruction", "wigner_reconstructions", "reconstructions_under_model",
    "RECONSTRUCTION_BOOTSTRAP", "CROSS_CHECK_SIMULATIONS",
]

RECONSTRUCTION_BOOTSTRAP = 50  # fewer bootstrap resamples than `povmfit reconstruct` (100)
CROSS_CHECK_SIMULATIONS = 50  # scans simulated from the fitted model for the POVM cross-check


def model_free_reconstructions(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP) -> dict:
    """{reconstruction, pointwise, smoothed, phase_test} of a scan (no model involved)."""
    return {"reconstruction": povm_reconstruction(scan, seed, bootstrap), **wigner_reconstructions(scan, seed, bootstrap)}


def povm_reconstruction(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP):
    """The full diagonal POVM (cross-validated regularisation, bootstrap errors)."""
    from povmfit.fitting.tomography.reconstruct import reconstruct_povm

    return reconstruct_povm(scan.coherent_photons, scan.thermal_photons, scan.counts, bootstrap=bootstrap, seed=seed,
                            quiet=True)


def wigner_reconstructions(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP) -> dict:
    """{pointwise, smoothed, phase_test}: Wigner values point by point and smoothed, and the
    phase-insensitivity test (each seeded on its own, independent of the POVM's draws)."""
    import numpy as np

    from povmfit.fitting.tomography.pointwise_wigner import phase_insensitivity_test, pointwise_wigner, smoothed_wigner

    coherent, thermal, counts = scan.coherent_photons, scan.thermal_photons, scan.counts
    with np.errstate(over="ignore", invalid="ignore"):  # scipy's trust-region internals (benign)
        # the published box-constrained estimator (per outcome) keeps the pipeline fast
        pointwise = pointwise_wigner(coherent, thermal, counts, scan.phase_rad, method="box",
                                     bootstrap=bootstrap, seed=seed, quiet=True)
        smoothed = None
        if pointwise is not None and pointwise.alpha.size >= 2:
            # the smoothed curve keeps the saturation prior of the pointwise values it summarises
            smoothed = smoothed_wigner(pointwise, max_saturation=pointwise.saturation)
        phase_test = phase_insensitivity_test(coherent, thermal, counts, scan.phase_rad)
    return {"pointwise": pointwise, "smoothed": smoothed, "phase_test": phase_test}


def reconstructions_under_model(scan, q, reconstruction, seed: int, simulations: int = CROSS_CHECK_SIMULATIONS):
    """Mean and spread of the reconstruction under a model: (n_outcomes, n_photons) each.

    ``simulations`` scans are simulated from the model's outcome probabilities q[p, k] (same
    probes and shots, seeded) and reconstructed with the data's regularisation strength, so
    the smoothing bias and the constraint effects of the reconstruction act on the model
    exactly as on the data.
    """
    import numpy as np

    from povmfit.fitting.tomography.reconstruct import build_layout, solve_povm_batch, weighted_operator

    shots = np.asarray(scan.shots)
    operator = weighted_operator(build_layout(scan.coherent_photons, scan.thermal_photons, reconstruction.n_photons),
                                 shots / shots.mean())
    q = np.clip(np.asarray(q, dtype=float), 0.0, None)
    q = q / q.sum(axis=1, keepdims=True)
    rng = np.random.default_rng([seed, 1])
    simulated = np.stack([rng.multinomial(shots, q) for _ in range(simulations)]) / shots[:, None]
    # warm start at the data's reconstruction (a solution of the same problem for a nearby
    # scan): the solutions do not depend on the start (checked against cold starts), only the
    # time does
    draws, _, _ = solve_povm_batch(operator, simulated, reconstruction.regularisation, reconstruction.theta, rtol=1e-11)
    return draws.mean(axis=0), draws.std(axis=0, ddof=1)
