"""``povmfit fit``: fit, rank models, cross-check, write the datasheet and the detector file."""
from __future__ import annotations

import argparse
import json
from pathlib import Path


from povmfit.fitting.data.files import json_safe
from povmfit.fitting.tomography.model_free import ranking_request, start_model_free
from povmfit.fitting.data.errors import ArgumentError

EPILOG = """examples:
  povmfit fit scan.csv                                   # choose the model automatically
  povmfit fit scan.csv --model array:8+dark+crosstalk --calibration-uncertainty 0.05
  povmfit fit scan.parquet --gate-duration 1e-6 --out results/

model spec: FAMILY[:SIZE][+FEATURE...], families threshold, pnr:K, array:N;
features dark, crosstalk, readout, unequal_split, saturation:K (see the README)."""


def register(subparsers):
    parser = subparsers.add_parser(
        "fit",
        help="fit detector models to a scan and write the datasheet",
        description="Fit parametric detector models directly to the raw probe counts of SCAN, "
        "rank them, cross-check the chosen one against model-free reconstructions and write "
        "datasheet.json, detector.json, povm.csv, wigner.csv and report.html.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_fit_arguments(parser)
    return parser


def add_fit_arguments(parser, scan_required: bool = True):
    if scan_required:
        parser.add_argument("scan", help="scan file (CSV or Parquet)")
    parser.add_argument("--model", default="auto", help="'auto' (default) or a model spec, e.g. array:8+dark")
    parser.add_argument("--candidates", default=None,
                        help="with --model auto: comma-separated model specs to rank instead of the default set")
    parser.add_argument("--calibration-uncertainty", type=float, default=None, metavar="REL",
                        help="relative 1-sigma uncertainty of the probe photon numbers (e.g. 0.05)")
    parser.add_argument("--gate-duration", type=float, default=None, metavar="SECONDS",
                        help="gate or counting-window duration, to turn dark probabilities into rates")
    parser.add_argument("--weighting", choices=("deviance", "pearson"), default="deviance",
                        help="residual weighting (deviance = maximum likelihood)")
    parser.add_argument("--bootstrap", type=int, default=0, metavar="N", help="parametric bootstrap resamples")
    parser.add_argument("--seed", type=int, default=0, help="seed for bootstrap and cross-validation")
    parser.add_argument("--out", default=None, help="output folder (default: SCAN_STEM.povmfit/)")
    parser.add_argument("--no-report", action="store_true", help="skip report.html and the plots")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")


def validate_options(args):
    if args.calibration_uncertainty is not None and not 0 < args.calibration_uncertainty < 0.5:
        raise ArgumentError(f"--calibration-uncertainty: expected a relative width between 0 and 0.5, got {args.calibration_uncertainty}")
    if args.gate_duration is not None and not args.gate_duration > 0:
        raise ArgumentError(f"--gate-duration: expected a positive number of seconds, got {args.gate_duration}")
    if args.bootstrap < 0:
        raise ArgumentError(f"--bootstrap: expected a non-negative number of resamples, got {args.bootstrap}")


def run(args) -> int:
    validate_options(args)
    out_dir = Path(args.out) if args.out else Path.cwd() / f"{Path(args.scan).stem}.povmfit"
    # on the second core, before the heavy imports
    model_free = start_model_free(args.scan, args.seed, ranking=ranking_request(args))
    try:
        outcome = run_fit_command(args.scan, out_dir, args, model_free)
    finally:
        model_free.cancel()
    print_summary(outcome, args)
    return 0


def run_fit_command(scan_path, out_dir, args, model_free):
    """Load the scan, load the compiled programs in the background while the fitting libraries
    are imported, then run the pipeline."""
    from povmfit.fitting.inference.candidates import programs_needed
    from povmfit.fitting.inference.objective import load_programs_in_background
    from povmfit.fitting.data.scan import load_scan

    scan = load_scan(scan_path)
    # the modules that receive the helper's reconstructions come after the programs: their
    # imports fill the gaps the ranking leaves while JAX computes
    load_programs_in_background(scan, programs_needed(scan, args.model, args.candidates), args.calibration_uncertainty,
                                then_import=("povmfit.fitting.tomography.reconstruct", "povmfit.fitting.tomography.pointwise_wigner",
                                             "povmfit.fitting.tomography.cross_check", "povmfit.fitting.outputs.report"))
    from povmfit.fitting.workflow.characterise import run_fit_pipeline

    return run_fit_pipeline(scan_path, out_dir, args, model_free, scan=scan)


def print_summary(outcome, args) -> None:
    sheet = outcome["datasheet"]
    if args.json:
        summary = {
            "model": sheet["model"],
            "verdict": sheet["verdict"],
            "figures": sheet["figures"],
            "goodness_of_fit": {k: sheet["goodness_of_fit"][k] for k in ("deviance", "dof", "p_value")},
            "outputs": {k: str(v) for k, v in outcome["files"].items()},
        }
        print(json.dumps(json_safe(summary), indent=2))
        return
    if args.quiet:
        return
    from povmfit.fitting.outputs.terminal import format_summary

    print(format_summary(sheet, outcome["files"]))

