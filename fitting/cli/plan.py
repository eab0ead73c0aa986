"""``povmfit plan``: choose probes and shots that reach target standard errors with the fewest
shots, and write them as ``plan.csv`` (a thin layer over :func:`povmfit.plan`)."""
from __future__ import annotations

import argparse
import math
from pathlib import Path

from povmfit.fitting.data.errors import ArgumentError, PovmfitError
from povmfit.fitting.cli.printing import print_result

__all__ = ["register", "run"]

EPILOG = """examples:
  povmfit plan scan.povmfit/detector.json --target efficiency:0.002
  povmfit plan threshold+dark --guess efficiency=0.8,dark=1e-3 --target efficiency:0.002 \\
      --calibration-uncertainty 0.01 --shots-per-second 1e5 --out plan.csv --report
  povmfit plan array:8+dark+crosstalk --guess efficiency=0.6,dark=2e-3,crosstalk=0.04 \\
      --target efficiency:0.005,crosstalk_probability:0.002 --coherent 0:10 --cross-check
  povmfit simulate detector.json --probes plan.csv --seed 1 -o planned.csv   # try the plan

FIGURE: efficiency, vacuum_click_probability, dark_count_rate_hz (needs a gate duration),
crosstalk_probability, or a model parameter; STDERR is an absolute standard error.
--guess names parameters or features: efficiency, dark, crosstalk, readout, ..."""

_FLAGS = {"targets": "--target", "guess": "--guess", "coherent": "--coherent", "thermal": "--thermal",
          "max_probes": "--max-probes", "min_shots": "--min-shots", "shots_per_second": "--shots-per-second",
          "gate_duration": "--gate-duration",
          "cross_check": "--cross-check", "calibration_uncertainty": "--calibration-uncertainty",
          "detector": "DETECTOR"}


def register(subparsers) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "plan",
        help="plan probes and shots for target uncertainties",
        description="Choose probe settings and shots that reach target standard errors on the datasheet figures "
        "with the fewest shots (optimal design from the expected Fisher information), and write plan.csv.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("detector", metavar="DETECTOR", help="detector.json from a fit, or a model spec with --guess")
    parser.add_argument("--target", action="append", required=True, metavar="FIGURE:STDERR[,...]",
                        help="target standard errors (repeatable)")
    parser.add_argument("--guess", default=None, metavar="NAME=VALUE[,...]",
                        help="guessed parameter values (required with a model spec; overrides a detector file)")
    parser.add_argument("--calibration-uncertainty", type=float, default=None, metavar="REL",
                        help="relative 1-sigma uncertainty of the probe photon numbers (e.g. 0.03)")
    parser.add_argument("--coherent", default="0:20", metavar="MIN:MAX", help="allowed coherent photons (default 0:20)")
    parser.add_argument("--thermal", default="0:5", metavar="MIN:MAX", help="allowed thermal photons (default 0:5)")
    parser.add_argument("--max-probes", type=int, default=6, metavar="N", help="most distinct probes (default 6)")
    parser.add_argument("--min-shots", type=int, default=1000, metavar="N", help="fewest shots on any probe (default 1000)")
    parser.add_argument("--shots-per-second", type=float, default=None, metavar="R", help="acquisition rate for the bench time")
    parser.add_argument("--gate-duration", type=float, default=None, metavar="SECONDS",
                        help="gate or window duration (for dark count rate targets)")
    parser.add_argument("--cross-check", action="store_true",
                        help="add the cheapest probes that allow the model-free pointwise Wigner cross-check")
    parser.add_argument("-o", "--out", default="plan.csv", metavar="FILE", help="plan file to write (default plan.csv)")
    parser.add_argument("--report", nargs="?", const="", default=None, metavar="FILE",
                        help="also write an HTML report with the planned-vs-uniform plot (default: beside --out)")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    return parser


def _photon_range(text: str, flag: str) -> tuple[float, float]:
    lo, sep, hi = text.partition(":")
    try:
        values = (float(lo), float(hi)) if sep else (float(text), float(text))
    except ValueError:
        raise ArgumentError(f"{flag}: expected MIN:MAX photon numbers, got {text!r}") from None
    if not all(math.isfinite(v) for v in values) or values[0] < 0 or values[1] < values[0]:
        raise ArgumentError(f"{flag}: expected 0 <= MIN <= MAX, got {text!r}")
    return values


def _check(args) -> None:
    if args.calibration_uncertainty is not None and not 0 <= args.calibration_uncertainty < 0.5:
        raise ArgumentError(f"--calibration-uncertainty: expected a relative width from 0 (exact probes) to below 0.5, "
                            f"got {args.calibration_uncertainty}")
    if args.max_probes < 1:
        raise ArgumentError(f"--max-probes: expected a whole number >= 1, got {args.max_probes}")
    if args.min_shots < 1:
        raise ArgumentError(f"--min-shots: expected a whole number >= 1, got {args.min_shots}")
    if args.shots_per_second is not None and not (math.isfinite(args.shots_per_second) and args.shots_per_second > 0):
        raise ArgumentError(f"--shots-per-second: expected a positive rate, got {args.shots_per_second}")
    if args.gate_duration is not None and not (math.isfinite(args.gate_duration) and args.gate_duration > 0):
        raise ArgumentError(f"--gate-duration: expected a positive number of seconds, got {args.gate_duration}")
    if Path(args.out).suffix.lower() != ".csv":
        raise ArgumentError(f"--out {args.out}: the plan file must end in .csv")
    if args.report and Path(args.report).suffix.lower() not in (".html", ".htm"):
        raise ArgumentError(f"--report {args.report}: the report must end in .html")


def run(args) -> int:
    _check(args)
    coherent = _photon_range(args.coherent, "--coherent")
    thermal = _photon_range(args.thermal, "--thermal")
    from povmfit.fitting.outputs.terminal import TerminalProgress
    from povmfit.fitting.workflow.plan import plan

    progress = None if args.quiet or args.json else TerminalProgress()
    try:
        result = plan(args.detector, ",".join(args.target), calibration_uncertainty=args.calibration_uncertainty,
                      coherent=coherent, thermal=thermal, max_probes=args.max_probes, min_shots=args.min_shots,
                      shots_per_second=args.shots_per_second, cross_check=args.cross_check, guess=args.guess,
                      gate_duration=args.gate_duration, progress=progress)
    except PovmfitError as error:  # name the flag instead of the keyword argument
        text = str(error)
        name, sep, rest = text.partition(":")
        if sep and name in _FLAGS:
            raise type(error)(f"{_FLAGS[name]}:{rest}") from None
        raise
    files = {"plan": result.write_csv(args.out)}
    if args.report is not None:
        files["report"] = result.write_report(args.report or Path(args.out).with_suffix(".html"))
    print_result(result, files, args, leave_out=("curve",))
    return 0
