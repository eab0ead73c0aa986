"""``povmfit demo``: the whole job on the bundled example scan (simulated data of an invented
eight-bin click detector; see :mod:`povmfit.fitting.data.demo`)."""
from __future__ import annotations

import argparse
import dataclasses
from pathlib import Path

from povmfit.fitting.data.demo import DEMO_METADATA, DEMO_CALIBRATION, DEMO_GATE_S, DEMO_TRUTH, demo_scan_path

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
    parser.add_argument("-o", "--out", default="povmfit-demo", metavar="FOLDER",
                        help="output folder (default: povmfit-demo); refused when it already holds files, "
                        "unless --overwrite")
    parser.add_argument("--overwrite", action="store_true", help="replace the whole --out folder")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    return parser


def fit_defaults() -> argparse.Namespace:
    """The options of ``povmfit fit`` at their defaults, so that the demo runs the same job."""
    from povmfit.fitting.cli.fit import add_fit_arguments

    parser = argparse.ArgumentParser(add_help=False)
    add_fit_arguments(parser, scan_required=False)
    return parser.parse_args([])


def run(args) -> int:
    from povmfit.fitting.cli.fit import job_worker, print_summary
    from povmfit.fitting.data.files import check_output_folder

    out_dir = Path(args.out)
    check_output_folder(out_dir, args.overwrite)  # before any work
    fit_args = fit_defaults()  # the options of `povmfit fit` at their defaults (seed, bootstrap, jobs, ...)
    fit_args.__dict__.update(calibration_uncertainty=DEMO_CALIBRATION, gate_duration=DEMO_GATE_S, quiet=args.quiet,
                             json=args.json, metadata=DEMO_METADATA)
    with job_worker(fit_args) as (worker, progress):
        files, result = _demo_job(args, fit_args, out_dir, worker, progress)
    print_summary(result, files, fit_args)
    if not args.quiet and not args.json:
        print(f"\nopen {out_dir / 'report.html'} in a browser to see the fit, the POVM and the Wigner functions.")
    return 0


def _demo_job(args, fit_args, out_dir, worker, progress):
    from povmfit.fitting.cli.fit import characterise_for_cli
    from povmfit.fitting.data.scan import load_scan
    from povmfit.fitting.outputs.files import write_characterisation

    scan_copy = out_dir / "demo_scan.csv"  # written with the other outputs, as one set
    scan = dataclasses.replace(load_scan(demo_scan_path()), source=str(scan_copy))
    talk = not args.quiet and not args.json
    if talk:
        print(f"povmfit demo: simulated scan of an invented 8-bin click detector -> {scan_copy}")
        print(f"simulated with efficiency {100 * DEMO_TRUTH['efficiency']:g} %, dark_click_probability_per_pixel "
              f"{100 * DEMO_TRUTH['dark_probability']:g} %, crosstalk_probability {100 * DEMO_TRUTH['crosstalk_probability']:g} %; "
              f"analysed with a {100 * DEMO_CALIBRATION:g} % probe calibration and a {DEMO_GATE_S * 1e9:g} ns gate\n")
    result = characterise_for_cli(scan, fit_args, worker, progress)
    files = write_characterisation(result, out_dir, report=True, overwrite=args.overwrite,
                                   extra_files={"demo_scan.csv": demo_scan_path()})
    return files, result
