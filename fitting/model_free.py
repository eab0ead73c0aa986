"""The model-free part of ``povmfit fit``, computed in a second process.

The reconstructions (full diagonal POVM, pointwise and smoothed Wigner values, phase test)
do not depend on the fit. :func:`start_model_free` launches them in a fresh Python process as
soon as the command line is parsed, so they run on the second core while this process
imports its libraries and ranks and fits the models; :meth:`ModelFreeJob.result` collects
them. The helper process reads the scan file itself and reports the file's SHA-256: results
for a different file are not used. Whenever the helper fails (or cannot start), the
reconstructions are computed here instead, with the same functions and seed, so the outputs
never depend on which process made them.

This module imports nothing heavy at import time: it is loaded before JAX.
"""
from __future__ import annotations

import json
import os
import pickle
import subprocess
import sys

__all__ = ["start_model_free", "model_free_reconstructions", "ModelFreeJob", "ranking_request", "RECONSTRUCTION_BOOTSTRAP"]

RECONSTRUCTION_BOOTSTRAP = 50  # fewer bootstrap resamples than `povmfit reconstruct` (100)


def model_free_reconstructions(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP) -> dict:
    """{reconstruction, pointwise, smoothed, phase_test} of a scan (no model involved)."""
    import numpy as np

    from .pointwise_wigner import phase_insensitivity_test, pointwise_wigner, smoothed_wigner
    from .reconstruct import reconstruct_povm

    coherent, thermal, counts = scan.coherent_photons, scan.thermal_photons, scan.counts
    with np.errstate(over="ignore", invalid="ignore"):  # scipy's trust-region internals (benign)
        reconstruction = reconstruct_povm(coherent, thermal, counts, bootstrap=bootstrap, seed=seed, quiet=True)
        # the published box-constrained estimator (per outcome) keeps the pipeline fast
        pointwise = pointwise_wigner(coherent, thermal, counts, scan.phase_rad, method="box",
                                     bootstrap=bootstrap, seed=seed, quiet=True)
        smoothed = None
        if pointwise is not None and pointwise.alpha.size >= 2:
            # the smoothed curve keeps the saturation prior of the pointwise values it summarises
            smoothed = smoothed_wigner(pointwise, max_saturation=pointwise.saturation)
        phase_test = phase_insensitivity_test(coherent, thermal, counts, scan.phase_rad)
    return {"reconstruction": reconstruction, "pointwise": pointwise, "smoothed": smoothed, "phase_test": phase_test}


class ModelFreeJob:
    """Handle of the reconstructions running in a helper process (or of none)."""

    def __init__(self, process, seed: int, bootstrap: int):
        self._process = process
        self.seed = seed
        self.bootstrap = bootstrap

    def result(self, scan) -> dict:
        """The reconstructions of ``scan``: from the helper when it succeeded for this very
        file, otherwise computed here."""
        parts = self._collect(scan.sha256)
        return parts if parts is not None else model_free_reconstructions(scan, self.seed, self.bootstrap)

    def _collect(self, sha256: str):
        if self._process is None:
            return None
        try:
            # the helper closes its output once the reconstructions are written (it may go on
            # compiling programs for the ranking): read to the end of the output, not of the process
            message = pickle.loads(self._process.stdout.read())
        except Exception:  # noqa: BLE001 - any failure of the helper means: compute here
            return None
        return message["parts"] if message.get("sha256") == sha256 else None

    def cancel(self) -> None:
        """Stop the helper (bad input, an error here, or work of its that is no longer needed)."""
        if self._process is not None:
            self._process.kill()
            self._process.wait()
            self._process.stdout.close()
            self._process = None


def ranking_request(args):
    """What the helper process needs to prepare a model ranking (None with an explicit model)."""
    if args.model != "auto":
        return None
    return {"candidates": args.candidates, "calibration_uncertainty": args.calibration_uncertainty}


def start_model_free(scan_path, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP, ranking=None) -> ModelFreeJob:
    """Launch the reconstructions of the scan file in a helper process.

    ``ranking`` ({"candidates": comma-separated specs or None, "calibration_uncertainty": REL
    or None}) asks the helper, once the reconstructions are delivered, to compile the
    programs a model ranking will need after its first one, last needed first, while this
    process ranks from the other end (programs already stored are skipped).
    """
    request = json.dumps({"scan": str(scan_path), "seed": int(seed), "bootstrap": int(bootstrap), "ranking": ranking})
    try:
        process = subprocess.Popen(
            [sys.executable, "-m", "povmfit.fitting.model_free"],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
        )
        process.stdin.write(request.encode())
        process.stdin.close()
    except OSError:
        process = None
    return ModelFreeJob(process, seed, bootstrap)


def _serve() -> int:
    """Helper process: read the request on stdin, write the pickled result on stdout."""
    request = json.loads(sys.stdin.read())
    from ._cache import enable_compilation_cache
    from .scan import load_scan

    enable_compilation_cache()
    scan = load_scan(request["scan"])
    parts = model_free_reconstructions(scan, request["seed"], request["bootstrap"])
    sys.stdout.flush()
    with os.fdopen(os.dup(1), "wb") as output:
        output.write(pickle.dumps({"sha256": scan.sha256, "parts": parts}))
    os.close(1)  # end of output for the reader, also while programs are compiled below
    if request.get("ranking"):
        try:
            _prepare_ranking_programs(scan, **request["ranking"])
        except Exception:  # noqa: BLE001 - an optimisation only; the ranking compiles what it lacks
            pass
    return 0


def _prepare_ranking_programs(scan, candidates=None, calibration_uncertainty=None) -> None:
    from .candidates import programs_needed
    from .objective import prepare_programs

    # last needed first: the main process works from the other end, claims keep the two apart
    prepare_programs(scan, programs_needed(scan, "auto", candidates)[1:][::-1], calibration_uncertainty or None)


if __name__ == "__main__":
    code = _serve()
    os._exit(code)  # nothing left to flush: skip the interpreter's teardown
