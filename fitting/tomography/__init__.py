"""Model-free reconstructions of a detector and their comparison with a fitted model.

Modules:
    model_free: :func:`reconstruct_scan`, the one entry point shared by the reconstruct verb
        and the whole job, and its picklable parts for a worker process.
    scan_reconstruction: :class:`ScanReconstruction`, the frozen result (summary, tables, files).
    reconstruct: the diagonal POVM, by regularised constrained least squares (default; solver
        in povm_solver) or by penalised maximum likelihood (solver in likelihood_solver: a
        primal-dual interior-point method for dense problems up to 200 photon numbers, EM
        accelerated by SQUAREM beyond).
    pointwise_wigner: Wigner values point by point from displaced-thermal probes, the smoothed
        curve and the phase-insensitivity test.
    cross_check: a fitted model against the reconstructions.
    tables: the long CSV tables povm.csv and wigner.csv.

The names below are loaded on first use, so that importing one light module (as a worker
process does) does not load JAX. The functions ``pointwise_wigner`` and ``cross_check`` share
their modules' names and are imported from those modules.
"""
from __future__ import annotations

import importlib

_EXPORTS = {
    "reconstruct_scan": "model_free",
    "RECONSTRUCTION_BOOTSTRAP": "model_free",
    "ScanReconstruction": "scan_reconstruction",
    "Reconstruction": "reconstruct",
    "reconstruct_povm": "reconstruct",
    "PointwiseWigner": "pointwise_wigner",
    "SmoothedWigner": "pointwise_wigner",
    "PhaseTest": "pointwise_wigner",
    "smoothed_wigner": "pointwise_wigner",
    "phase_insensitivity_test": "pointwise_wigner",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name not in _EXPORTS:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
