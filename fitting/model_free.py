"""The model-free part of ``povmfit fit``, computed in a second process.

The reconstructions (full diagonal POVM, pointwise and smoothed Wigner values, phase test)
do not depend on the fit. :func:`start_model_free` launches the costly one, the POVM, in a
fresh Python process as soon as the command line is parsed, so it runs on the second core
while this process imports its libraries and ranks and fits the models;
:meth:`ModelFreeJob.result` computes the Wigner values here meanwhile and collects it. Then the fitted model's outcome probabilities go back to the helper, which
reconstructs scans simulated from them for the cross-check (:meth:`ModelFreeJob.under_model`)
while this process prepares the rest. The helper reads the
scan file itself and reports the file's SHA-256: results for a different file are not used.
Whenever the helper fails (or cannot start), everything is computed here instead, with the
same functions and seeds, so the outputs never depend on which process made them.

This module imports nothing heavy at import time: it is loaded before JAX.
"""
from __future__ import annotations

import os
import pickle
import select
import struct
import subprocess
import sys

__all__ = [
    "start_model_free", "model_free_reconstructions", "reconstructions_under_model", "ModelFreeJob", "ranking_request",
    "RECONSTRUCTION_BOOTSTRAP", "CROSS_CHECK_SIMULATIONS",
]

RECONSTRUCTION_BOOTSTRAP = 50  # fewer bootstrap resamples than `povmfit reconstruct` (100)
CROSS_CHECK_SIMULATIONS = 50  # scans simulated from the fitted model for the POVM cross-check


def model_free_reconstructions(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP) -> dict:
    """{reconstruction, pointwise, smoothed, phase_test} of a scan (no model involved)."""
    return {"reconstruction": povm_reconstruction(scan, seed, bootstrap), **wigner_reconstructions(scan, seed, bootstrap)}


def povm_reconstruction(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP):
    """The full diagonal POVM (cross-validated regularisation, bootstrap errors)."""
    from .reconstruct import reconstruct_povm

    return reconstruct_povm(scan.coherent_photons, scan.thermal_photons, scan.counts, bootstrap=bootstrap, seed=seed,
                            quiet=True)


def wigner_reconstructions(scan, seed: int, bootstrap: int = RECONSTRUCTION_BOOTSTRAP) -> dict:
    """{pointwise, smoothed, phase_test}: Wigner values point by point and smoothed, and the
    phase-insensitivity test (each seeded on its own, independent of the POVM's draws)."""
    import numpy as np

    from .pointwise_wigner import phase_insensitivity_test, pointwise_wigner, smoothed_wigner

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


class ModelFreeJob:
    """Handle of the reconstructions running in a helper process (or of none)."""

    def __init__(self, process, seed: int, bootstrap: int):
        self._process = process
        self._model_sent = False
        self.seed = seed
        self.bootstrap = bootstrap

    def result(self, scan, q=None) -> dict:
        """The reconstructions of ``scan``: the POVM from the helper when it succeeded for this
        very file (otherwise computed here), the Wigner values computed here. With the fitted
        model's outcome probabilities ``q`` the helper gets them as soon as its POVM is read,
        to reconstruct scans simulated from them (:meth:`under_model`) while the Wigner values
        are computed here."""
        parts = None
        if not self._output_ready():  # use the wait
            parts = wigner_reconstructions(scan, self.seed, self.bootstrap)
        reconstruction = self._collect(scan.sha256)
        if reconstruction is None:
            self.cancel()
            reconstruction = povm_reconstruction(scan, self.seed, self.bootstrap)
        elif q is not None:
            self._send_model(q)
        if parts is None:
            parts = wigner_reconstructions(scan, self.seed, self.bootstrap)
        return {"reconstruction": reconstruction, **parts}

    def _output_ready(self) -> bool:
        if self._process is None:
            return True
        try:
            return bool(select.select([self._process.stdout], [], [], 0)[0])
        except (OSError, ValueError):
            return True

    def _collect(self, sha256: str):
        if self._process is None:
            return None
        try:
            message = _receive(self._process.stdout)
        except Exception:  # noqa: BLE001 - any failure of the helper means: compute here
            return None
        return message["reconstruction"] if message and message.get("sha256") == sha256 else None

    def _send_model(self, q) -> None:
        # only after the helper's first message is read: neither side can then block the
        # other on a full pipe
        if self._process is None:
            return
        try:
            _send(self._process.stdin, {"q": q})
            self._model_sent = True
        except OSError:
            self.cancel()

    def under_model(self, scan, q, reconstruction):
        """(mean, spread) of :func:`reconstructions_under_model`: from the helper when it got
        ``q`` through :meth:`result`, otherwise computed here."""
        if self._process is not None and self._model_sent:
            try:
                message = _receive(self._process.stdout)
                if message is not None:
                    return message["mean"], message["spread"]
            except Exception:  # noqa: BLE001 - compute here instead
                pass
            self.cancel()
        return reconstructions_under_model(scan, q, reconstruction, self.seed)

    def cancel(self) -> None:
        """Stop the helper (bad input, an error here, or work of its that is no longer needed)."""
        if self._process is not None:
            self._process.kill()
            self._process.wait()
            for stream in (self._process.stdin, self._process.stdout):
                if stream is not None:
                    try:
                        stream.close()
                    except OSError:
                        pass
            self._process = None


def reconstructions_under_model(scan, q, reconstruction, seed: int, simulations: int = CROSS_CHECK_SIMULATIONS):
    """Mean and spread of the reconstruction under a model: (n_outcomes, n_photons) each.

    ``simulations`` scans are simulated from the model's outcome probabilities q[p, k] (same
    probes and shots, seeded) and reconstructed with the data's regularisation strength, so
    the smoothing bias and the constraint effects of the reconstruction act on the model
    exactly as on the data.
    """
    import numpy as np

    from .reconstruct import build_layout, solve_povm_batch, weighted_operator

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


def _send(stream, message) -> None:
    data = pickle.dumps(message)
    stream.write(struct.pack(">Q", len(data)) + data)
    stream.flush()


def _receive(stream):
    """One length-prefixed pickled message, or None at the end of the stream."""
    head = stream.read(8)
    if len(head) < 8:
        return None
    size = struct.unpack(">Q", head)[0]
    data = stream.read(size)
    if len(data) < size:
        return None
    return pickle.loads(data)


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
    request = {"scan": str(scan_path), "seed": int(seed), "bootstrap": int(bootstrap), "ranking": ranking}
    try:
        process = subprocess.Popen(
            [sys.executable, "-m", "povmfit.fitting.model_free"],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
        )
        _send(process.stdin, request)
    except OSError:
        process = None
    return ModelFreeJob(process, seed, bootstrap)


def _serve() -> int:
    """Helper process: messages (length-prefixed pickles) on stdin and stdout.

    in: the request; out: the POVM reconstruction; then, with a ranking request, programs are
    compiled; in: the fitted model's q (or the end of input); out: the reconstructions
    under the model.
    """
    output = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)  # stray prints cannot corrupt the messages
    request = _receive(sys.stdin.buffer)
    from ._cache import enable_compilation_cache
    from .scan import load_scan

    enable_compilation_cache()
    scan = load_scan(request["scan"])
    reconstruction = povm_reconstruction(scan, request["seed"], request["bootstrap"])
    _send(output, {"sha256": scan.sha256, "reconstruction": reconstruction})
    if request.get("ranking"):
        try:
            _prepare_ranking_programs(scan, **request["ranking"])
        except Exception:  # noqa: BLE001 - an optimisation only; the ranking compiles what it lacks
            pass
    model = _receive(sys.stdin.buffer)
    if model is not None:
        mean, spread = reconstructions_under_model(scan, model["q"], reconstruction, request["seed"])
        _send(output, {"mean": mean, "spread": spread})
    output.close()
    return 0


def _prepare_ranking_programs(scan, candidates=None, calibration_uncertainty=None) -> None:
    from .candidates import programs_needed
    from .objective import prepare_programs

    # last needed first: the main process works from the other end, claims keep the two apart
    prepare_programs(scan, programs_needed(scan, "auto", candidates)[1:][::-1], calibration_uncertainty or None)


if __name__ == "__main__":
    code = _serve()
    os._exit(code)  # nothing left to flush: skip the interpreter's teardown
