"""``povmfit fit``: fit, rank models, cross-check, write the datasheet and the detector file."""
from __future__ import annotations

import argparse
import json
import sys
from contextlib import contextmanager
from pathlib import Path

from povmfit.fitting.data.files import json_safe
from povmfit.fitting.data.errors import ArgumentError

EPILOG = """examples:
  povmfit fit scan.csv                                   # choose the model automatically
  povmfit fit scan.csv --model array:8+dark+crosstalk --calibration-uncertainty 0.05
  povmfit fit scan.parquet --gate-duration 1e-6 --out results/
  povmfit fit scan.csv --readout readout.json             # a fixed readout from a pulse-height tally

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
    parser.add_argument("--readout", default=None, metavar="FILE",
                        help="readout.json of a pulse-height tally: its misassignment matrix is put after the "
                        "model as a fixed readout stage (models with the readout feature are ranked beside it)")
    parser.add_argument("--weighting", choices=("deviance", "pearson"), default="deviance",
                        help="residual weighting (deviance = maximum likelihood)")
    parser.add_argument("--bootstrap", type=int, default=0, metavar="N", help="parametric bootstrap resamples")
    parser.add_argument("--seed", type=int, default=0, help="seed for bootstrap and cross-validation")
    parser.add_argument("--meta", action="append", default=None, metavar="KEY=VALUE",
                        help="a condition of the measurement for the datasheet and report, repeatable "
                        "(device, serial, wavelength_nm, temperature_k, bias_current_ua, overvoltage_v, "
                        "repetition_rate_hz, operator, notes; also read from SCAN.meta.json beside the scan)")
    parser.add_argument("--jobs", type=int, default=2, metavar="N",
                        help="processes (default 2: the model-free POVM beside the model ranking; 1: one process)")
    parser.add_argument("-o", "--out", default=None, help="output folder (default: SCAN_STEM.povmfit/); refused when it "
                        "already holds files, unless --overwrite")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the whole --out folder if it already holds results")
    parser.add_argument("--no-report", action="store_true", help="skip report.html and the plots")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")


def validate_options(args):
    if args.calibration_uncertainty is not None and not 0 <= args.calibration_uncertainty < 0.5:
        raise ArgumentError(f"--calibration-uncertainty: expected a relative width from 0 (exact probes) to below 0.5, "
                            f"got {args.calibration_uncertainty}")
    if args.gate_duration is not None and not args.gate_duration > 0:
        raise ArgumentError(f"--gate-duration: expected a positive number of seconds, got {args.gate_duration}")
    if args.bootstrap < 0:
        raise ArgumentError(f"--bootstrap: expected a non-negative number of resamples, got {args.bootstrap}")
    if args.seed < 0:
        raise ArgumentError(f"--seed: expected a whole number >= 0, got {args.seed}")
    if args.jobs < 1 and args.jobs != -1:
        raise ArgumentError(f"--jobs: expected a positive number of processes or -1 (all cores), got {args.jobs}")
    if args.candidates and args.model != "auto":
        raise ArgumentError("--candidates is only used with --model auto")


def run(args) -> int:
    from povmfit.fitting.data.files import check_output_folder

    validate_options(args)
    out_dir = Path(args.out) if args.out else Path.cwd() / f"{Path(args.scan).stem}.povmfit"
    check_output_folder(out_dir, args.overwrite)  # before any work
    with job_worker(args) as (worker, progress):
        result = characterise_for_cli(args.scan, args, worker, progress)
        files = result.write(out_dir, report=not args.no_report, overwrite=args.overwrite)
    print_summary(result, files, args)
    return 0


@contextmanager
def job_worker(args):
    """(worker pool or None, progress display or None) of the whole job, the worker started
    before this process imports the numerical libraries (its start-up overlaps theirs)."""
    from povmfit.fitting.workflow.worker import worker_pool

    progress = None
    if not (args.quiet or args.json):
        from povmfit.fitting.outputs.terminal import TerminalProgress

        progress = TerminalProgress()
    with worker_pool(args.jobs, progress) as worker:
        yield worker, progress


def characterise_for_cli(scan, args, worker, progress):
    """The whole job with the command line's options; warnings of the fit become one line
    each. The worker is let go as soon as the job is done (see ``worker.release``)."""
    import warnings

    from povmfit.fitting.data.metadata import parse_meta_pairs
    from povmfit.fitting.workflow.characterise import characterise
    from povmfit.fitting.workflow.worker import release

    metadata = {**getattr(args, "metadata", {}), **parse_meta_pairs(getattr(args, "meta", None))}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", UserWarning)
        result = characterise(
            scan, args.model, candidates=args.candidates, calibration_uncertainty=args.calibration_uncertainty,
            gate_duration=args.gate_duration, weighting=args.weighting, bootstrap=args.bootstrap, seed=args.seed,
            n_jobs=args.jobs, metadata=metadata, readout=getattr(args, "readout", None), progress=progress,
            worker=worker,
        )
    release(worker)
    for warning in caught:
        if issubclass(warning.category, UserWarning) and warning.category.__module__.startswith("povmfit"):
            print(f"povmfit: warning: {warning.message}", file=sys.stderr)
    return result


def print_summary(result, files, args) -> None:
    sheet = result.datasheet()
    if args.json:
        summary = {
            "model": sheet["model"],
            "verdict": sheet["verdict"],
            "figures": sheet["figures"],
            "goodness_of_fit": {k: sheet["goodness_of_fit"][k] for k in ("deviance", "dof", "p_value")},
            "outputs": {k: str(v) for k, v in files.items()},
        }
        print(json.dumps(json_safe(summary), indent=2))
        return
    if args.quiet:
        return
    from povmfit.fitting.outputs.terminal import format_summary

    print(format_summary(sheet, files))
