"""``povmfit tally``: turn the data instruments give into a scan (a thin layer over
:func:`povmfit.tally_pulse_heights` and :func:`povmfit.tally_click_log`)."""
from __future__ import annotations

import argparse
from pathlib import Path

from povmfit.fitting.data.errors import ArgumentError, PovmfitError
from povmfit.fitting.cli.printing import print_result

__all__ = ["register", "run"]

EPILOG = """examples:
  povmfit tally pulse-heights probes.csv --out scan.csv                  # also writes readout.json
  povmfit tally pulse-heights probes.csv --out scan.csv --max-photons 8 --quadratic --report
  povmfit tally click-log probes.csv --out scan.csv --channels 8         # + scan.patterns.csv, scan.channels.csv
  povmfit fit scan.csv

PROBES is a CSV with columns probe, coherent_photons, thermal_photons and, per row, a file
relative to it: heights (one pulse height per line, or a .npy array) or histogram (a CSV with
bin_lo, bin_hi, count) for pulse heights; log (one trigger per line: a bitmask integer, bit i
= channel i, or a 0/1 pattern, channel 0 first; or a .npy integer array) for click logs."""

_FLAGS = {"max_photons": "--max-photons", "channels": "--channels", "log_format": "--log-format", "out": "--out"}


def register(subparsers) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "tally", help="turn pulse heights or click logs into a scan",
        description="Turn per-trigger instrument data (pulse heights or click logs) into a scan file.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    jobs = parser.add_subparsers(dest="job", metavar="JOB", required=True)
    heights = jobs.add_parser(
        "pulse-heights", help="fit the pulse-height peaks of all probes, set thresholds, count",
        description="Fit one peak model to every probe's pulse-height spectrum by maximum likelihood (peak n at "
        "offset + gain n, width sqrt(w0^2 + n w1^2), weights from the probes' photon statistics through a free "
        "efficiency), set the thresholds between peaks at minimum misassignment, and write the scan and "
        "readout.json (the misassignment matrix and the peak parameters).",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    heights.add_argument("--max-photons", type=int, default=None, metavar="K",
                         help="largest outcome, meaning K or more (default: from the probes and the separable peaks)")
    heights.add_argument("--quadratic", action="store_true", help="fit a small quadratic term in the peak positions")
    heights.add_argument("--readout-out", default=None, metavar="FILE",
                         help="where to write readout.json (default: readout.json beside the scan)")
    heights.add_argument("--report", nargs="?", const=True, default=None, metavar="FILE",
                         help="also write an HTML report of the spectra and the fit (default: SCAN_STEM.tally.html)")
    click = jobs.add_parser(
        "click-log", help="count click patterns per probe",
        description="Count every probe's triggers per click pattern; write the click-number scan, the pattern "
        "layout (SCAN_STEM.patterns.csv) and per-channel click probabilities (SCAN_STEM.channels.csv).",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    click.add_argument("--channels", type=int, default=None, metavar="N",
                       help="number of channels (default: the pattern width or the highest channel that fired)")
    click.add_argument("--log-format", default="auto", choices=("auto", "bitmask", "pattern"),
                       help="how text logs are read (default auto: 0/1 strings of the first line's width are patterns)")
    for sub in (heights, click):
        sub.add_argument("probes", metavar="PROBES", help="the PROBES file (CSV)")
        sub.add_argument("-o", "--out", required=True, metavar="SCAN", help="scan file to write (.csv or .parquet)")
        sub.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
        sub.add_argument("--quiet", action="store_true", help="print nothing but errors")
    return parser


def _check(args) -> None:
    from povmfit.fitting.workflow.tally import check_scan_path

    check_scan_path(args.out, "--out")
    if getattr(args, "max_photons", None) is not None and args.max_photons < 1:
        raise ArgumentError(f"--max-photons: expected a whole number >= 1, got {args.max_photons}")
    if getattr(args, "channels", None) is not None and not 1 <= args.channels <= 62:
        raise ArgumentError(f"--channels: expected a whole number from 1 to 62, got {args.channels}")
    report = getattr(args, "report", None)
    if isinstance(report, str) and Path(report).suffix.lower() not in (".html", ".htm"):
        raise ArgumentError(f"--report {report}: the report must end in .html")
    readout = getattr(args, "readout_out", None)
    if readout is not None and Path(readout).suffix.lower() != ".json":
        raise ArgumentError(f"--readout-out {readout}: the readout file must end in .json")


def run(args) -> int:
    _check(args)
    from povmfit.fitting.outputs.terminal import TerminalProgress
    from povmfit.fitting.workflow.tally import tally_click_log, tally_pulse_heights

    progress = None if args.quiet or args.json else TerminalProgress()
    try:
        if args.job == "pulse-heights":
            result = tally_pulse_heights(args.probes, max_photons=args.max_photons, quadratic=args.quadratic,
                                         progress=progress)
        else:
            result = tally_click_log(args.probes, channels=args.channels, log_format=args.log_format, progress=progress)
    except PovmfitError as error:  # name the flag instead of the keyword argument
        name, sep, rest = str(error).partition(":")
        if sep and name in _FLAGS:
            raise type(error)(f"{_FLAGS[name]}:{rest}") from None
        raise
    if args.job == "pulse-heights":
        files = result.write(args.out, readout=args.readout_out, report=args.report)
    else:
        files = result.write(args.out)
    print_result(result, files, args)
    return 0
