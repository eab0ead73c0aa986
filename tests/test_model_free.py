"""The model-free reconstructions give the same numbers whichever process computes them, and
the reconstruct verb's entry point is built from the very parts the whole job runs."""
import multiprocessing
import pickle
import subprocess
import sys
from concurrent.futures import ProcessPoolExecutor
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from povmfit.fitting.data.scan import load_scan
from povmfit.fitting.tomography.model_free import (
    RECONSTRUCTION_BOOTSTRAP, povm_reconstruction, reconstruct_scan, reconstructions_under_model,
    wigner_reconstructions,
)

SEED, BOOTSTRAP = 3, 5


def demo_scan_path() -> Path:
    return Path(str(resources.files("povmfit.fitting.data") / "demo_scan.csv"))


@pytest.fixture(scope="module")
def scan():
    return load_scan(demo_scan_path())


@pytest.fixture(scope="module")
def here(scan):
    """The reconstructions computed in this process."""
    reconstruction = povm_reconstruction(scan, SEED, BOOTSTRAP)
    return reconstruction, wigner_reconstructions(scan, SEED, BOOTSTRAP)


def _assert_same_wigner(a, b):
    for name in ("values", "stderr", "p", "replicate_values"):
        np.testing.assert_array_equal(getattr(a["pointwise"], name), getattr(b["pointwise"], name))
    np.testing.assert_array_equal(a["smoothed"].values, b["smoothed"].values)
    np.testing.assert_array_equal(a["smoothed"].stderr, b["smoothed"].stderr)
    assert a["phase_test"] is None and b["phase_test"] is None  # the demo scan has no phases


def test_a_spawned_worker_computes_the_same_numbers(scan, here):
    # Source: the in-process computation with the same seeds (common practice, no source).
    reconstruction, wigner = here
    q = scan.counts / scan.shots[:, None]  # a model: the observed frequencies themselves
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=1, mp_context=context) as pool:
        povm_future = pool.submit(povm_reconstruction, scan, SEED, BOOTSTRAP)
        wigner_future = pool.submit(wigner_reconstructions, scan, SEED, BOOTSTRAP)
        remote = povm_future.result()
        under_model_future = pool.submit(reconstructions_under_model, scan, q, remote, SEED)
        remote_wigner = wigner_future.result()
        remote_mean, remote_spread = under_model_future.result()
    for name in ("theta", "stderr", "cv_scores", "regularisation_grid", "probe_weight", "constrained"):
        np.testing.assert_array_equal(getattr(remote, name), getattr(reconstruction, name))
    assert (remote.regularisation, remote.iterations, remote.converged) == (
        reconstruction.regularisation, reconstruction.iterations, reconstruction.converged)
    _assert_same_wigner(remote_wigner, wigner)
    mean, spread = reconstructions_under_model(scan, q, reconstruction, SEED)
    np.testing.assert_array_equal(remote_mean, mean)
    np.testing.assert_array_equal(remote_spread, spread)


def test_reconstruct_scan_is_the_whole_jobs_parts(scan, here):
    # Source: the parts the whole job runs (povm_reconstruction, wigner_reconstructions) with
    # the same seed and resamples (common practice, no source).
    reconstruction, wigner = here
    result = reconstruct_scan(scan, bootstrap=BOOTSTRAP, seed=SEED)
    np.testing.assert_array_equal(result.reconstruction.theta, reconstruction.theta)
    np.testing.assert_array_equal(result.reconstruction.stderr, reconstruction.stderr)
    _assert_same_wigner({"pointwise": result.pointwise, "smoothed": result.smoothed, "phase_test": result.phase_test},
                        wigner)
    assert result.pointwise.method == "box" and result.smoothed.saturation <= result.pointwise.saturation
    assert (result.source, result.sha256) == (scan.source, scan.sha256)
    copy = pickle.loads(pickle.dumps(result))  # picklable, to come back from a worker whole
    np.testing.assert_array_equal(copy.reconstruction.theta, result.reconstruction.theta)


def test_defaults_are_the_whole_jobs():
    # Source: common practice, no source (one estimator, one default, in both verbs).
    import inspect

    defaults = inspect.signature(reconstruct_scan).parameters
    assert defaults["bootstrap"].default == RECONSTRUCTION_BOOTSTRAP == 50
    assert inspect.signature(povm_reconstruction).parameters["bootstrap"].default == RECONSTRUCTION_BOOTSTRAP
    assert inspect.signature(wigner_reconstructions).parameters["bootstrap"].default == RECONSTRUCTION_BOOTSTRAP


@pytest.mark.parametrize("order", ["import povmfit, jax", "import jax, povmfit"])
def test_importing_povmfit_switches_jax_to_float64(order):
    # Source: common practice, no source (the package contract: double precision throughout).
    code = f"{order}; import jax.numpy as jnp; print(jnp.ones(1).dtype)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "float64"


def test_the_worker_entry_module_does_not_load_jax():
    # Source: common practice, no source (a spawned worker imports only what it runs).
    code = ("import sys, povmfit.fitting.tomography.model_free; "
            "print(sorted(m for m in ('jax', 'scipy', 'pandas') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_simulated_scans_shared_out_in_parts_join_into_the_whole_set(scan, here):
    # Source: the whole set computed at once (common practice, no source). Each simulated
    # scan has its own seed, so the whole job may reconstruct half of them in the worker.
    from povmfit.fitting.tomography.model_free import UnderModel

    reconstruction, _ = here
    q = scan.counts / scan.shots[:, None]
    whole = reconstructions_under_model(scan, q, reconstruction, SEED, 6)
    joined = UnderModel.joined([reconstructions_under_model(scan, q, reconstruction, SEED, 4),
                                reconstructions_under_model(scan, q, reconstruction, SEED, 2, first=4)])
    np.testing.assert_allclose(joined.draws, whole.draws, rtol=0, atol=1e-10)
    np.testing.assert_allclose(joined.spread, whole.spread, rtol=0, atol=1e-10)
    assert not np.allclose(whole.draws[0], whole.draws[1])  # the scans differ from one another


def test_the_library_reconstruct_takes_the_estimator(scan):
    # Source: the tomography entry point with the same keyword (the API is a thin layer).
    import povmfit

    result = povmfit.reconstruct(scan, bootstrap=0, method="likelihood")
    assert result.reconstruction.method == "likelihood"
    assert povmfit.reconstruct(scan, bootstrap=0).reconstruction.method == "likelihood"  # the default
