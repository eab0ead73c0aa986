"""``povmfit reconstruct``: model-free POVM and point-by-point Wigner values of a scan.

Writes ``povm.csv`` (photons, outcome, probability, stderr, source) and ``wigner.csv``
(re_alpha, im_alpha, outcome, value, stderr, source) as DESIGN section 4 describes, both
atomically, plus ``reconstruction.json`` with the solver, cross-validation and test details.
"""
from __future__ import annotations

import argparse
import io
import json
from pathlib import Path

import numpy as np

from povmfit.fitting.data.files import atomic_write_text, json_safe, write_json
from povmfit.fitting.data.errors import ArgumentError

__all__ = ["register", "run", "write_reconstruction_csvs", "povm_rows", "wigner_rows", "reconstruct_scan"]

EPILOG = """examples:
  povmfit reconstruct scan.csv                       # results in ./scan.povmfit/
  povmfit reconstruct scan.csv --out rec/ --bootstrap 200 --seed 7 --json

povm.csv lists every (photons, outcome) pair up to the photon-number cutoff; wigner.csv has
pointwise rows for every displacement probed at two or more thermal levels and the smoothed
curve (alpha is the complex amplitude; W normalised so that the identity is 1/pi)."""


def register(subparsers):
    parser = subparsers.add_parser(
        "reconstruct",
        help="model-free POVM and point-by-point Wigner values",
        description="Reconstruct the detector's diagonal POVM from SCAN without a model "
        "(regularised least squares, strength chosen by cross-validation) and the Wigner values "
        "of every POVM element from displaced-thermal probes; write povm.csv and wigner.csv.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("scan", help="scan file (CSV or Parquet)")
    parser.add_argument("--out", default=None, help="output folder (default: SCAN_STEM.povmfit/)")
    parser.add_argument("--bootstrap", type=int, default=100, metavar="N", help="parametric bootstrap resamples (default 100)")
    parser.add_argument("--seed", type=int, default=0, help="seed for cross-validation folds and bootstrap")
    parser.add_argument("--saturation", type=int, default=None, metavar="M",
                        help="saturation photon number of the smoothed Wigner curve (default: chosen by AIC)")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    return parser


def _number(value) -> str:
    return repr(float(value))


def povm_rows(theta, stderr, source: str):
    """Rows (photons, outcome, probability, stderr, source) for every (n, k) pair."""
    n_outcomes, n_photons = theta.shape
    return [(n, k, theta[k, n], stderr[k, n], source) for n in range(n_photons) for k in range(n_outcomes)]


def wigner_rows(alpha, values, stderr, source: str):
    """Rows (re_alpha, im_alpha, outcome, value, stderr, source) for every point and outcome."""
    return [(alpha[i].real, alpha[i].imag, k, values[k, i], stderr[k, i], source)
            for i in range(alpha.size) for k in range(values.shape[0])]


def _csv(header, rows) -> str:
    out = io.StringIO()
    out.write(",".join(header) + "\n")
    for row in rows:
        out.write(",".join(str(c) if isinstance(c, (int, str)) else _number(c) for c in row) + "\n")
    return out.getvalue()


def write_reconstruction_csvs(out_dir, reconstruction, pointwise, smoothed, model_rows=None, model_wigner_rows=None):
    """Write povm.csv and wigner.csv atomically into ``out_dir``; returns {name: path}.

    ``model_rows`` / ``model_wigner_rows`` are extra rows built with :func:`povm_rows` /
    :func:`wigner_rows` and source "model" (e.g. from a fit).
    """
    out_dir = Path(out_dir)
    povm = povm_rows(reconstruction.theta, reconstruction.stderr, "reconstruction") + list(model_rows or [])
    wigner = list(model_wigner_rows or [])
    if pointwise is not None:
        wigner += wigner_rows(pointwise.alpha, pointwise.values, pointwise.stderr, "pointwise")
    if smoothed is not None:
        wigner += wigner_rows(smoothed.alpha, smoothed.values, smoothed.stderr, "smoothed")
    files = {"povm": out_dir / "povm.csv", "wigner": out_dir / "wigner.csv"}
    texts = {
        "povm": _csv(("photons", "outcome", "probability", "stderr", "source"), povm),
        "wigner": _csv(("re_alpha", "im_alpha", "outcome", "value", "stderr", "source"), wigner),
    }
    for name, path in files.items():
        atomic_write_text(path, texts[name])
    return files


def reconstruct_scan(scan, bootstrap: int = 100, seed: int = 0, saturation=None, quiet: bool = False) -> dict:
    """All reconstructions of a scan: {reconstruction, pointwise, smoothed, phase_test}."""
    from povmfit.fitting.tomography.pointwise_wigner import phase_insensitivity_test, pointwise_wigner, smoothed_wigner
    from povmfit.fitting.tomography.reconstruct import reconstruct_povm

    reconstruction = reconstruct_povm(scan.coherent_photons, scan.thermal_photons, scan.counts,
                                      bootstrap=bootstrap, seed=seed, quiet=quiet)
    pointwise = pointwise_wigner(scan.coherent_photons, scan.thermal_photons, scan.counts, scan.phase_rad,
                                 bootstrap=bootstrap, seed=seed, quiet=quiet)
    smoothed = smoothed_wigner(pointwise, saturation) if pointwise is not None and pointwise.alpha.size >= 2 else None
    phase_test = phase_insensitivity_test(scan.coherent_photons, scan.thermal_photons, scan.counts, scan.phase_rad)
    return {"reconstruction": reconstruction, "pointwise": pointwise, "smoothed": smoothed, "phase_test": phase_test}


def _summary(parts, files, scan) -> dict:
    rec, pointwise, smoothed, phase = (parts[k] for k in ("reconstruction", "pointwise", "smoothed", "phase_test"))
    return {
        "scan": scan.source, "sha256": scan.sha256,
        "povm": {"n_outcomes": rec.n_outcomes, "n_photons": rec.n_photons, "regularisation": rec.regularisation,
                 "cv_folds": rec.cv_folds, "converged": rec.converged,
                 "constrained_photons": [int(np.nonzero(rec.constrained)[0].min()), int(np.nonzero(rec.constrained)[0].max())]},
        "wigner_points": 0 if pointwise is None else int(pointwise.alpha.size),
        "wigner_saturation": None if pointwise is None else pointwise.saturation,
        "smoothed_saturation": None if smoothed is None else smoothed.saturation,
        "phase_test": None if phase is None else phase.to_dict(),
        "outputs": {k: str(v) for k, v in files.items()},
    }


def run(args) -> int:
    if args.bootstrap < 0:
        raise ArgumentError(f"--bootstrap: expected a non-negative number of resamples, got {args.bootstrap}")
    if args.saturation is not None and args.saturation < 1:
        raise ArgumentError(f"--saturation: expected a photon number >= 1, got {args.saturation}")
    from povmfit.fitting.data.scan import load_scan

    scan = load_scan(args.scan)
    out_dir = Path(args.out) if args.out else Path.cwd() / f"{Path(args.scan).stem}.povmfit"
    parts = reconstruct_scan(scan, args.bootstrap, args.seed, args.saturation, quiet=args.quiet or args.json)
    files = write_reconstruction_csvs(out_dir, parts["reconstruction"], parts["pointwise"], parts["smoothed"])
    details = {k: (None if v is None else v.to_dict()) for k, v in parts.items()}
    files["details"] = out_dir / "reconstruction.json"
    write_json(files["details"], json_safe({"schema": "povmfit.reconstruction/1", **details}))
    summary = _summary(parts, files, scan)
    if args.json:
        print(json.dumps(json_safe(summary), indent=2))
    elif not args.quiet:
        rec = parts["reconstruction"]
        lo, hi = summary["povm"]["constrained_photons"]
        print(f"POVM: {rec.n_outcomes} outcomes x {rec.n_photons} photon numbers "
              f"(probes constrain n = {lo}..{hi}); regularisation {rec.regularisation:.3g} "
              f"by {rec.cv_folds}-fold cross-validation{'' if rec.converged else ' (solver did not converge)'}")
        print(f"Wigner: {summary['wigner_points']} pointwise displacements"
              + ("" if parts["smoothed"] is None else f", smoothed curve with M = {parts['smoothed'].saturation}"))
        if parts["phase_test"] is not None:
            print(f"phase insensitivity: chi2 = {parts['phase_test'].chi_square:.3g} "
                  f"({parts['phase_test'].dof} dof), p = {parts['phase_test'].p_value:.3g}")
        print(f"wrote {', '.join(str(p) for p in files.values())}")
    return 0
