"""The model-free reconstructions give the same numbers whichever process computes them."""
import subprocess
import sys

import numpy as np
import pytest

from povmfit.fitting.cli.demo import demo_scan_path
from povmfit.fitting.tomography.model_free import (
    ModelFreeJob, model_free_reconstructions, reconstructions_under_model, start_model_free,
)
from povmfit.fitting.data.scan import load_scan


@pytest.fixture(scope="module")
def scan():
    return load_scan(demo_scan_path())


def _assert_same(a, b):
    np.testing.assert_array_equal(a["reconstruction"].theta, b["reconstruction"].theta)
    np.testing.assert_array_equal(a["reconstruction"].stderr, b["reconstruction"].stderr)
    np.testing.assert_array_equal(a["pointwise"].values, b["pointwise"].values)
    np.testing.assert_array_equal(a["smoothed"].values, b["smoothed"].values)
    assert a["phase_test"] is None and b["phase_test"] is None  # the demo scan has no phases


def test_helper_process_matches_in_process_computation(scan):
    # Source: the in-process computation with the same seeds (common practice, no source).
    job = start_model_free(demo_scan_path(), seed=3, bootstrap=5)
    try:
        q = scan.counts / scan.shots[:, None]  # a model: the observed frequencies themselves
        from_helper = job.result(scan, q)
        assert job._process is not None, "the helper process did not deliver"
        here = model_free_reconstructions(scan, seed=3, bootstrap=5)
        _assert_same(from_helper, here)
        helper_mean, helper_spread = job.under_model(scan, q, here["reconstruction"])
        assert job._process is not None, "the helper did not answer; the values were computed here"
    finally:
        job.cancel()
    mean, spread = reconstructions_under_model(scan, q, here["reconstruction"], seed=3)
    np.testing.assert_array_equal(helper_mean, mean)
    np.testing.assert_array_equal(helper_spread, spread)


def test_results_for_another_file_are_not_used(scan, tmp_path):
    other = tmp_path / "other.csv"
    other.write_text(demo_scan_path().read_text().replace("\n", "\r\n"))  # same numbers, other bytes
    job = start_model_free(other, seed=3, bootstrap=5)
    try:
        assert job._collect(scan.sha256) is None
    finally:
        job.cancel()


def test_failed_helper_falls_back_to_this_process(scan):
    failing = subprocess.Popen([sys.executable, "-c", "import sys; sys.exit(1)"], stdout=subprocess.PIPE)
    parts = ModelFreeJob(failing, seed=3, bootstrap=5).result(scan)
    _assert_same(parts, model_free_reconstructions(scan, seed=3, bootstrap=5))


def test_cancel_stops_the_helper():
    job = start_model_free(demo_scan_path(), seed=0)
    process = job._process
    job.cancel()
    assert process.poll() is not None


@pytest.mark.parametrize("order", ["import povmfit, jax", "import jax, povmfit"])
def test_importing_povmfit_switches_jax_to_float64(order):
    # Source: common practice, no source (the package contract: double precision throughout).
    code = f"{order}; import jax.numpy as jnp; print(jnp.ones(1).dtype)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "float64"
