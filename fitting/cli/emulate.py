"""``povmfit emulate``: sample outcomes of a fitted (or tabulated) detector for an input state.

Output: CSV with columns ``outcome``, ``count``, ``probability`` (one row per outcome),
printed, or written atomically with ``--out``. ``probability`` is the model's probability
of the outcome (the ensemble mean with ``--ensemble``; the probabilities sum to one, the
state's cut tail below 1e-10 being added to the top outcome); ``count`` is one run of ``--shots``
shots. With ``--ensemble N`` the run's detector is one of the N parameter draws (the
detector is fixed but known only within the fit's uncertainty), so repeated runs scatter
by that uncertainty as well as by shot noise.
"""
from __future__ import annotations

import argparse
import sys

from povmfit.fitting.data.files import atomic_write_text
from povmfit.fitting.data.errors import ArgumentError

__all__ = ["register", "run", "format_table"]

_EPILOG = """\
states (values are mean photon numbers per shot):
  fock:3  coherent:2.0  thermal:0.5  displaced_thermal:2.0,0.5  squeezed_vacuum:0.8
  FILE.csv[:COLUMN]  a photon-number distribution, row i = p(i)

examples:
  povmfit emulate scan.povmfit/detector.json --input coherent:2.0 --shots 100000 --seed 7
  povmfit emulate scan.povmfit/detector.json --input fock:3 --ensemble 200 --out fock3.csv
  povmfit emulate scan.povmfit/povm.csv --input thermal:0.5 --povm-source reconstruction
"""


def register(subparsers) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "emulate",
        help="sample outcomes of a fitted detector for an input state",
        description=__doc__.split("\n\n")[0].removeprefix("``povmfit emulate``: ")
        + " Writes CSV outcome,count,probability.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("detector", metavar="DETECTOR", help="detector.json from a fit, or a povm.csv table")
    parser.add_argument("--input", default="coherent:1.0", metavar="STATE",
                        help="input state KIND:VALUES or FILE.csv[:COLUMN] (default: coherent:1.0)")
    parser.add_argument("--shots", type=int, default=10000, metavar="N", help="number of shots (default: 10000)")
    parser.add_argument("--seed", type=int, default=None, metavar="S",
                        help="random seed (default: fresh randomness from the operating system)")
    parser.add_argument("--ensemble", type=int, default=None, metavar="N",
                        help="draw N detectors from the fit's covariance; probability = ensemble mean")
    parser.add_argument("--povm-source", choices=("auto", "reconstruction", "model"), default="auto",
                        help="rows of a povm.csv to use (default auto: reconstruction if present, else model)")
    parser.add_argument("--out", metavar="FILE", default=None, help="write the CSV here instead of printing it")
    return parser


def format_table(counts, probabilities) -> str:
    """CSV text ``outcome,count,probability``; probabilities with full float precision."""
    lines = ["outcome,count,probability"]
    lines += [f"{k},{int(c)},{float(q)!r}" for k, (c, q) in enumerate(zip(counts, probabilities))]
    return "\n".join(lines) + "\n"


def run(args) -> int:
    import warnings

    from povmfit.fitting.emulation.emulator import MAX_ENSEMBLE, MAX_SHOTS, Emulator, ExtrapolationWarning

    if not 0 <= args.shots <= MAX_SHOTS:
        raise ArgumentError(f"--shots: expected a whole number from 0 to {MAX_SHOTS}, got {args.shots}")
    if args.ensemble is not None and not 1 <= args.ensemble <= MAX_ENSEMBLE:
        raise ArgumentError(f"--ensemble: expected a whole number from 1 to {MAX_ENSEMBLE}, got {args.ensemble}")
    if args.seed is not None and not 0 <= args.seed < 2**128:
        raise ArgumentError(f"--seed must be a whole number from 0 to 2^128 - 1, got {args.seed}")
    emulator = Emulator.from_file(args.detector, args.povm_source)
    if args.ensemble is not None:
        emulator = emulator.ensemble(args.ensemble, seed=args.seed)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ExtrapolationWarning)
        try:
            probabilities = emulator.probabilities(args.input)
        except ValueError as error:
            if isinstance(error, ArgumentError):
                raise
            raise ArgumentError(f"--input {args.input}: {error}") from None
        # a separate stream for the counts, so the ensemble draw does not shift them
        counts = emulator.sample(args.input, args.shots, seed=None if args.seed is None else [args.seed, 1])
    for warning in [w for w in caught if issubclass(w.category, ExtrapolationWarning)][:1]:  # one line
        if issubclass(warning.category, ExtrapolationWarning):
            print(f"povmfit emulate: warning: {warning.message}", file=sys.stderr)
    text = format_table(counts, probabilities)
    if args.out:
        atomic_write_text(args.out, text)
    else:
        sys.stdout.write(text)
    return 0
