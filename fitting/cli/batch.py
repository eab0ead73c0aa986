"""``povmfit batch``: characterise every scan of a manifest on Dask and collect the figures."""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.data.files import json_safe

EPILOG = """examples:
  povmfit batch sweep.csv --model array:8+dark --dark-limit 1e-3 --out sweep-results
  povmfit batch fleet.parquet --calibration-uncertainty 0.03 --workers 4
  povmfit batch fleet.csv --scheduler tcp://cluster-head:8786

MANIFEST: CSV or Parquet, a 'scan' column (paths relative to the manifest), any number of
condition columns (numbers or text, e.g. bias_current_ua, wavelength_nm, channel), and
optional per-row 'model' and 'calibration_uncertainty' columns that override the options.
Outputs: figures.csv, figures.parquet, sweeps.csv (with a bias condition), batch_report.html
and scans/NAME/ per scan (what 'povmfit fit' writes). Exit code 2 when a scan was refused."""


def register(subparsers):
    parser = subparsers.add_parser(
        "batch",
        help="characterise many scans (sweeps, fleets) on Dask",
        description="Run the whole job of 'povmfit fit' on every scan of MANIFEST in parallel on Dask, "
        "collect the figures with their conditions, and compute the sweep figures of a bias condition "
        "(efficiency plateau, dark-limit crossing).",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("manifest", help="manifest file (CSV or Parquet)")
    parser.add_argument("--model", default="auto", help="'auto' (default) or a model spec, for rows without their own")
    parser.add_argument("--calibration-uncertainty", type=float, default=None, metavar="REL",
                        help="relative 1-sigma uncertainty of the probe photon numbers, for rows without their own")
    parser.add_argument("--gate-duration", type=float, default=None, metavar="SECONDS",
                        help="gate or counting-window duration, to turn dark probabilities into rates")
    parser.add_argument("--bias", default=None, metavar="COLUMN",
                        help="the condition swept as bias current (default: the numeric condition named *bias*)")
    parser.add_argument("--plateau", type=float, default=0.01, metavar="FRACTION",
                        help="plateau: efficiency within this fraction of its maximum (default 0.01)")
    parser.add_argument("--dark-limit", type=float, default=None, metavar="P",
                        help="report the bias where the vacuum click probability reaches P")
    parser.add_argument("--scheduler", default="local", metavar="ADDRESS|local|processes",
                        help="'local' (default: a local Dask cluster), 'processes' (Dask's multiprocessing "
                        "scheduler) or the address of a running cluster, e.g. tcp://host:8786")
    parser.add_argument("--workers", type=int, default=None, metavar="N",
                        help="worker processes for local/processes (default: one per available core)")
    parser.add_argument("--seed", type=int, default=0, help="seed for cross-validation, bootstrap and sweep draws")
    parser.add_argument("-o", "--out", default=None, metavar="FOLDER",
                        help="output folder (default: MANIFEST_STEM.povmfit/)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the results of an earlier batch in --out (refused otherwise)")
    parser.add_argument("--no-report", action="store_true", help="skip the HTML reports and plots")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    return parser


def validate_options(args) -> None:
    if args.calibration_uncertainty is not None and not 0 <= args.calibration_uncertainty < 0.5:
        raise ArgumentError(f"--calibration-uncertainty: expected a relative width from 0 (exact probes) to below 0.5, "
                            f"got {args.calibration_uncertainty}")
    if args.gate_duration is not None and not args.gate_duration > 0:
        raise ArgumentError(f"--gate-duration: expected a positive number of seconds, got {args.gate_duration}")
    if not 0 < args.plateau < 0.5:
        raise ArgumentError(f"--plateau: expected a fraction above 0 and below 0.5, got {args.plateau}")
    if args.dark_limit is not None and not 0 < args.dark_limit < 1:
        raise ArgumentError(f"--dark-limit: expected a probability between 0 and 1, got {args.dark_limit}")
    if not (args.scheduler in ("local", "processes") or "://" in args.scheduler):
        raise ArgumentError(f"--scheduler: expected local, processes or an address such as tcp://host:8786, "
                            f"got {args.scheduler!r}")
    if args.workers is not None and args.workers < 1:
        raise ArgumentError(f"--workers: expected a whole number >= 1, got {args.workers}")
    if args.workers is not None and "://" in args.scheduler:
        raise ArgumentError("--workers: a running cluster has its own workers (use with local or processes)")
    if args.seed < 0:
        raise ArgumentError(f"--seed: expected a whole number >= 0, got {args.seed}")


def run(args) -> int:
    from povmfit.fitting.cli.cache import enable_compilation_cache
    from povmfit.fitting.outputs.terminal import TerminalProgress
    from povmfit.fitting.workflow.batch import characterise_many

    validate_options(args)
    out_dir = Path(args.out) if args.out else Path.cwd() / f"{Path(args.manifest).stem}.povmfit"
    if out_dir.exists() and (not out_dir.is_dir() or (any(out_dir.iterdir()) and not args.overwrite)):
        raise ArgumentError(f"--out {out_dir}: " + ("exists and is not a folder" if not out_dir.is_dir() else
                            "the folder already holds files (other results?); give --overwrite to replace the "
                            "batch's results, or choose another folder"))
    result = characterise_many(
        args.manifest, out_dir, model=args.model, calibration_uncertainty=args.calibration_uncertainty,
        gate_duration=args.gate_duration, bias=args.bias, plateau=args.plateau, dark_limit=args.dark_limit,
        seed=args.seed, report=not args.no_report, overwrite=args.overwrite, scheduler=args.scheduler, workers=args.workers,
        worker_setup=enable_compilation_cache, progress=None if args.quiet or args.json else TerminalProgress(),
    )
    if args.json:
        print(json.dumps(json_safe({
            "counts": {s: result.count(s) for s in ("ok", "refused", "not_converged", "failed")},
            "sweeps": list(result.sweeps),
            "refused": [{"scan": r["scan"], "reason": r["reason"]} for r in result.rows if r["status"] != "ok"],
            "outputs": {k: str(v) for k, v in result.files.items()},
        }), indent=2))
    elif not args.quiet:
        print(result.summary())
        print()
        for name, path in result.files.items():
            print(f"wrote {name:<16} {path}")
    for row in result.rows:
        if row["status"] in ("refused", "failed"):
            print(f"povmfit batch: {row['status']}: {row['scan']}: {row['reason']}", file=sys.stderr)
    if result.count("refused"):
        return 2
    return 1 if result.count("failed") else 0
