"""``povmfit demo``: the whole job on the bundled example scan (simulated data of an invented
eight-bin click detector; see :mod:`povmfit.fitting.data.demo`)."""
from __future__ import annotations

import argparse
import shutil
from pathlib import Path

from povmfit.fitting.data.demo import DEMO_CALIBRATION, DEMO_GATE_S, DEMO_TRUTH, demo_scan_path

EPILOG = """example:
  povmfit demo --out demo-output
  then open demo-output/report.html in a browser."""


def register(subparsers):
    parser = subparsers.add_parser(
        "demo",
        help="run the whole job on the bundled (simulated) example scan",
        description="Fit, rank models, reconstruct, cross-check and write the report for the bundled "
        "example scan (simulated data of an invented eight-bin click detector).",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--out", default="povmfit-demo", help="output folder (default: povmfit-demo)")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    return parser


def run(args) -> int:
    from povmfit.fitting.cli.fit import characterise_for_cli, print_summary

    out_dir = Path(args.out)
    out_dir.mkdir(parents=True, exist_ok=True)
    scan_copy = out_dir / "demo_scan.csv"
    shutil.copyfile(demo_scan_path(), scan_copy)
    fit_args = argparse.Namespace(
        model="auto", candidates=None, calibration_uncertainty=DEMO_CALIBRATION, gate_duration=DEMO_GATE_S,
        weighting="deviance", bootstrap=0, seed=0, jobs=2, quiet=args.quiet, json=args.json,
    )
    talk = not args.quiet and not args.json
    if talk:
        print(f"povmfit demo: simulated scan of an invented 8-bin click detector -> {scan_copy}")
        print(f"true values: {DEMO_TRUTH}\n")
    result = characterise_for_cli(scan_copy, fit_args)
    files = result.write(out_dir)
    print_summary(result, files, fit_args)
    if talk:
        print(f"\nopen {out_dir / 'report.html'} in a browser to see the fit, the POVM and the Wigner functions.")
    return 0
