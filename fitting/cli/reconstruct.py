"""``povmfit reconstruct``: model-free POVM and point-by-point Wigner values of a scan.

A thin layer over :func:`povmfit.fitting.tomography.model_free.reconstruct_scan` (the same
estimator the fit command's cross-check uses): checks the options and the output folder
(refused before any work when it already holds files, unless ``--overwrite``), reconstructs,
writes ``povm.csv``, ``wigner.csv`` and ``reconstruction.json`` as one set (a temporary
sibling folder renamed into place) and prints the summary, or the key numbers as JSON with
``--json``.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.tomography.model_free import POVM_METHOD, RECONSTRUCTION_BOOTSTRAP

__all__ = ["register", "run"]

EPILOG = """examples:
  povmfit reconstruct scan.csv                       # results in ./scan.povmfit/
  povmfit reconstruct scan.csv -o rec/ --bootstrap 200 --seed 7 --json
  povmfit reconstruct scan.csv -o rec/ --overwrite      # replace an earlier set in rec/
  povmfit reconstruct scan.csv --method least-squares  # the regularised least-squares estimator

povm.csv lists every (photons, outcome) pair up to the photon-number cutoff; wigner.csv has
pointwise rows for every displacement probed at two or more thermal levels and the smoothed
curve (alpha is the complex amplitude; W normalised so that the identity is 1/pi). The
estimator and its defaults are those of `povmfit fit`, so both write the same numbers."""


def register(subparsers):
    parser = subparsers.add_parser(
        "reconstruct",
        help="model-free POVM and point-by-point Wigner values",
        description="Reconstruct the detector's diagonal POVM from SCAN without a model "
        "(maximum likelihood on the counts, smoothness penalty chosen by held-out-probe log-likelihood; "
        "or regularised least squares) and the Wigner values "
        "of every POVM element from displaced-thermal probes; write povm.csv, wigner.csv and "
        "reconstruction.json.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("scan", help="scan file (CSV or Parquet)")
    parser.add_argument("-o", "--out", default=None, help="output folder (default: SCAN_STEM.povmfit/); refused "
                        "when it already holds files, unless --overwrite")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the whole --out folder if it already holds results")
    parser.add_argument("--bootstrap", type=int, default=RECONSTRUCTION_BOOTSTRAP, metavar="N",
                        help=f"parametric bootstrap resamples (default {RECONSTRUCTION_BOOTSTRAP}, as in `povmfit fit`)")
    parser.add_argument("--seed", type=int, default=0, help="seed for cross-validation folds and bootstrap (default 0)")
    parser.add_argument("--saturation", type=int, default=None, metavar="M",
                        help="saturation photon number of the smoothed Wigner curve "
                             "(default: chosen by AIC up to the pointwise values' M)")
    parser.add_argument("--method", choices=("likelihood", "least-squares"), default=POVM_METHOD.replace("_", "-"),
                        help="POVM estimator: multinomial maximum likelihood (default, as in `povmfit fit`) or "
                             "regularised least squares on the frequencies")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    return parser


def _check_options(args) -> None:
    if args.bootstrap < 0:
        raise ArgumentError(f"--bootstrap: expected a non-negative number of resamples, got {args.bootstrap}")
    if args.seed < 0:
        raise ArgumentError(f"--seed: expected a non-negative whole number, got {args.seed}")
    if args.saturation is not None and args.saturation < 1:
        raise ArgumentError(f"--saturation: expected a photon number >= 1, got {args.saturation}")


def run(args) -> int:
    _check_options(args)
    from povmfit.fitting.data.files import check_output_folder
    from povmfit.fitting.data.scan import load_scan
    from povmfit.fitting.outputs.terminal import TerminalProgress
    from povmfit.fitting.tomography.model_free import reconstruct_scan

    out_dir = Path(args.out) if args.out else Path.cwd() / f"{Path(args.scan).stem}.povmfit"
    check_output_folder(out_dir, args.overwrite)  # before any work
    scan = load_scan(args.scan)
    progress = None if args.quiet or args.json else TerminalProgress()
    result = reconstruct_scan(scan, bootstrap=args.bootstrap, seed=args.seed, saturation=args.saturation,
                              progress=progress, method=args.method.replace("-", "_"))
    files = result.write(out_dir, overwrite=args.overwrite)
    if args.json:
        print(json.dumps({**result.overview(), "outputs": {k: str(v) for k, v in files.items()}}, indent=2))
    elif not args.quiet:
        print(result.summary())
        print()
        print(f"wrote {', '.join(str(p) for p in files.values())}")
    return 0
