"""``povmfit emulate``: sample outcomes of a fitted (or tabulated) detector for an input state.

Output: CSV with columns ``outcome``, ``count``, ``probability`` (one row per outcome), and
with ``--ensemble`` a fourth column ``probability_sd``; printed on stdout, or written
atomically to the file ``-o/--out``. ``probability`` is the model's probability of the
outcome (the ensemble mean with ``--ensemble``; the probabilities sum to one, the state's cut
tail below 1e-10 being added to the top outcome); ``count`` is one run of ``--shots`` shots.
With ``--ensemble N`` the run's detector is one of the N parameter draws (the detector is
fixed but known only within the fit's uncertainty), so repeated runs scatter by that
uncertainty as well as by shot noise; ``probability_sd`` is the sample standard deviation
(N - 1 in the denominator) of the outcome's probability over the N draws (``nan`` for N = 1).

Header: one line on stderr, before the table, naming the detector, the input state, the
shots and the seed (and the ensemble size), e.g. ``povmfit emulate: detector d.json
(array:4+dark), state coherent:2.0, shots 10000, seed 0``. It goes to stderr, not stdout, so
that stdout (or the ``--out`` file) stays plain CSV for any CSV reader; ``--quiet`` leaves it
out. ``--seed`` defaults to 0, as on every verb: the same command gives the same counts. The
ensemble draw and the counts use separate random streams of the seed, so ``--ensemble``
does not shift the shot-noise stream.
"""
from __future__ import annotations

import argparse
import sys

import numpy as np

from povmfit.fitting.data.files import atomic_write_text
from povmfit.fitting.data.errors import ArgumentError

__all__ = ["register", "run", "format_table", "format_header", "ensemble_spread"]

_EPILOG = """\
states (values are mean photon numbers per shot):
  fock:3  coherent:2.0  thermal:0.5  displaced_thermal:2.0,0.5  squeezed_vacuum:0.8
  FILE.csv[:COLUMN]  a photon-number distribution, row i = p(i)

The header line (detector, state, shots, seed) goes to stderr, so stdout stays plain CSV.

examples:
  povmfit emulate scan.povmfit/detector.json --input coherent:2.0 --shots 100000 --seed 7
  povmfit emulate scan.povmfit/detector.json --input fock:3 --ensemble 200 -o fock3.csv
  povmfit emulate scan.povmfit/povm.csv --input thermal:0.5 --povm-source reconstruction
"""

COUNTS_STREAM = 1
"""The counts are drawn from the random stream ``[seed, COUNTS_STREAM]``, the ensemble from ``seed``."""


def register(subparsers) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "emulate",
        help="sample outcomes of a fitted detector for an input state",
        description=__doc__.split("\n\n")[0].removeprefix("``povmfit emulate``: ")
        + " Writes CSV outcome,count,probability (and probability_sd with --ensemble).",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("detector", metavar="DETECTOR", help="detector.json from a fit, or a povm.csv table")
    parser.add_argument("--input", default="coherent:1.0", metavar="STATE",
                        help="input state KIND:VALUES or FILE.csv[:COLUMN] (default: coherent:1.0)")
    parser.add_argument("--shots", type=int, default=10000, metavar="N", help="number of shots (default: 10000)")
    parser.add_argument("--seed", type=int, default=0, metavar="S",
                        help="random seed of the ensemble draw and the counts (default 0)")
    parser.add_argument("--ensemble", type=int, default=None, metavar="N",
                        help="draw N detectors from the fit's covariance; probability = ensemble mean, "
                        "probability_sd = its spread over the draws")
    parser.add_argument("--povm-source", choices=("auto", "reconstruction", "model"), default="auto",
                        help="rows of a povm.csv to use (default auto: reconstruction if present, else model)")
    parser.add_argument("-o", "--out", metavar="FILE", default=None,
                        help="CSV file to write (default: print the table on stdout)")
    parser.add_argument("--quiet", action="store_true", help="leave out the header line on stderr")
    return parser


def ensemble_spread(member_probabilities: np.ndarray) -> np.ndarray:
    """Sample standard deviation (ddof 1) of each outcome's probability over the members,
    shape (n_outcomes,) from (n_members, n_outcomes); NaN for a single member."""
    members = np.asarray(member_probabilities, dtype=float)
    if members.shape[0] < 2:
        return np.full(members.shape[1], np.nan)
    return members.std(axis=0, ddof=1)


def format_table(counts, probabilities, probability_sd=None) -> str:
    """CSV text ``outcome,count,probability[,probability_sd]``; numbers with full float precision."""
    columns = [counts, probabilities] + ([] if probability_sd is None else [probability_sd])
    lines = ["outcome,count,probability" + ("" if probability_sd is None else ",probability_sd")]
    for k, cells in enumerate(zip(*columns)):
        lines.append(",".join([str(k), str(int(cells[0]))] + [repr(float(v)) for v in cells[1:]]))
    return "\n".join(lines) + "\n"


def format_header(detector, described: str, state: str, shots: int, seed: int, ensemble: int | None) -> str:
    """One line: ``povmfit emulate: detector PATH (WHAT), state STATE, shots N, seed S[, ensemble N]``."""
    parts = [f"detector {detector} ({described})", f"state {state}", f"shots {shots}", f"seed {seed}"]
    if ensemble is not None:
        parts.append(f"ensemble {ensemble}")
    return "povmfit emulate: " + ", ".join(parts)


def _describe(emulator) -> str:
    """The model spec of a fitted detector, or the size of a POVM table."""
    if emulator.model is not None:
        return emulator.model.spec
    outcomes, photons = emulator.table.shape
    return f"POVM table, {outcomes} outcomes x {photons} photon numbers"


def _check_options(args, max_shots: int, max_ensemble: int) -> None:
    if not 0 <= args.shots <= max_shots:
        raise ArgumentError(f"--shots: expected a whole number from 0 to {max_shots}, got {args.shots}")
    if args.ensemble is not None and not 1 <= args.ensemble <= max_ensemble:
        raise ArgumentError(f"--ensemble: expected a whole number from 1 to {max_ensemble}, got {args.ensemble}")
    if not 0 <= args.seed < 2**128:
        raise ArgumentError(f"--seed: expected a whole number from 0 to 2^128 - 1, got {args.seed}")


def run(args) -> int:
    import warnings

    from povmfit.fitting.emulation.emulator import MAX_ENSEMBLE, MAX_SHOTS, Emulator, ExtrapolationWarning

    _check_options(args, MAX_SHOTS, MAX_ENSEMBLE)
    emulator = Emulator.from_file(args.detector, args.povm_source)
    if args.ensemble is not None:
        emulator = emulator.ensemble(args.ensemble, seed=args.seed)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ExtrapolationWarning)
        try:
            members = emulator.member_probabilities(args.input)
        except ValueError as error:
            if isinstance(error, ArgumentError):
                raise
            raise ArgumentError(f"--input {args.input}: {error}") from None
        # a separate stream for the counts, so the ensemble draw does not shift them
        counts = emulator.sample(args.input, args.shots, seed=[args.seed, COUNTS_STREAM])
    spread = ensemble_spread(members) if args.ensemble is not None else None
    text = format_table(counts, members.mean(axis=0), spread)
    if not args.quiet:
        print(format_header(args.detector, _describe(emulator), args.input, args.shots, args.seed, args.ensemble),
              file=sys.stderr)
    for warning in [w for w in caught if issubclass(w.category, ExtrapolationWarning)][:1]:  # one line
        print(f"povmfit emulate: warning: {warning.message}", file=sys.stderr)
    if args.out:
        atomic_write_text(args.out, text)
    else:
        sys.stdout.write(text)
    return 0
