"""``povmfit simulate``: a synthetic scan from a fitted detector and a grid of probes
(see :mod:`povmfit.fitting.emulation.simulate` for the grid syntax).

``--seed`` defaults to 0, as on every verb, so the same command writes the same counts. The
scan file has no place for provenance, so on success one line names what was written, the
probes, the shots and the seed (``--quiet`` leaves it out)."""
from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from povmfit.fitting.data.errors import ArgumentError

__all__ = ["register", "run"]

_EPILOG = """\
probe grid: NAME=VALUES parts joined by ';' (NAME coherent or thermal, mean photons);
VALUES a comma list or START:STOP:COUNT (inclusive); all combinations are probed;
several grids may be joined with '|'. GRID may also be a CSV file with columns
coherent_photons, thermal_photons (optional probe, shots); with a shots column, such as
a plan.csv from 'povmfit plan', each probe gets its own shots and --shots is left out.

examples:
  povmfit simulate scan.povmfit/detector.json --probes 'coherent=0:4:21;thermal=0,0.5,1' \\
      --shots 100000 --seed 3 -o synthetic.csv
  povmfit simulate detector.json --probes probes.csv --shots 50000 -o synthetic.parquet
  povmfit simulate detector.json --probes plan.csv --seed 1 -o planned.csv
"""


def register(subparsers) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "simulate",
        help="write a synthetic scan from a fitted detector",
        description="Write a synthetic scan: counts drawn from a fitted detector for a grid of probes.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("detector", metavar="DETECTOR", help="detector.json from a fit, or a povm.csv table")
    parser.add_argument("--probes", required=True, metavar="GRID", help="probe grid spec or CSV file (see below)")
    parser.add_argument("--shots", type=int, default=None, metavar="N",
                        help="shots per probe (required unless the probe file has a shots column)")
    parser.add_argument("--seed", type=int, default=0, metavar="S", help="random seed of the counts (default 0)")
    parser.add_argument("--povm-source", choices=("auto", "reconstruction", "model"), default="auto",
                        help="rows of a povm.csv to use (default auto: reconstruction if present, else model)")
    parser.add_argument("-o", "--out", required=True, metavar="SCAN", help="scan file to write (.csv or .parquet)")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    return parser


def success_line(path, scan, seed: int) -> str:
    """One line: the scan file written, its probes, its shots and the seed."""
    shots = np.asarray(scan.shots)
    each = f"{int(shots[0]):,} shots each" if np.all(shots == shots[0]) else f"{int(shots.sum()):,} shots in all"
    return f"povmfit simulate: wrote {path}: {scan.n_probes} probes, {each}, seed {seed}"


def run(args) -> int:
    if args.shots is not None and args.shots < 1:
        raise ArgumentError(f"--shots must be >= 1, got {args.shots}")
    if args.seed < 0:
        raise ArgumentError(f"--seed: expected a whole number >= 0, got {args.seed}")
    if Path(args.out).suffix.lower() not in (".csv", ".parquet"):
        raise ArgumentError(f"-o {args.out}: the scan file must end in .csv or .parquet")
    from povmfit.fitting.data.scan import write_scan
    from povmfit.fitting.emulation.simulate import simulate_scan

    try:
        scan = simulate_scan(args.detector, args.probes, args.shots, args.seed, args.povm_source)
    except ArgumentError as error:
        if str(error).startswith("shots:"):  # name the flag, not the keyword argument
            raise ArgumentError("--shots" + str(error)[len("shots"):]) from None
        raise
    write_scan(scan, args.out)
    if not args.quiet:
        print(success_line(args.out, scan, args.seed))
    return 0
