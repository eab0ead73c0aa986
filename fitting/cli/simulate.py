"""``povmfit simulate``: a synthetic scan from a fitted detector and a grid of probes.

Probe grid (``--probes GRID``), our compact syntax::

    coherent=0:4:21;thermal=0,0.5,1

``NAME=VALUES`` parts are joined by ``;``; NAME is ``coherent`` (|alpha|^2) or ``thermal``
(nbar), both mean photons per shot. VALUES is a comma list (``0,0.5,1``) or
``START:STOP:COUNT`` (COUNT evenly spaced values from START to STOP inclusive); a missing
NAME means 0. The probes are every combination of the coherent and thermal values (the
example gives 21 x 3 = 63 probes). Several grids can be joined with ``|``, e.g.
``coherent=0:4:9|thermal=0.5,1``.

GRID may instead be a CSV file with columns ``coherent_photons`` and ``thermal_photons``
(optional ``probe`` labels), one probe per row.

Every probe gets ``--shots`` shots, drawn from the detector's outcome probabilities
(multinomial); the scan is written in the wide scan layout (CSV or Parquet by suffix).
"""
from __future__ import annotations

import argparse
import math
from pathlib import Path

import numpy as np

from povmfit.fitting.data.files import data_rows, read_csv_rows
from povmfit.fitting.data.errors import ArgumentError

__all__ = ["register", "run", "parse_probe_grid", "load_probe_file", "simulate_counts"]

_EPILOG = """\
probe grid: NAME=VALUES parts joined by ';' (NAME coherent or thermal, mean photons);
VALUES a comma list or START:STOP:COUNT (inclusive); all combinations are probed;
several grids may be joined with '|'. GRID may also be a CSV file with columns
coherent_photons, thermal_photons.

examples:
  povmfit simulate scan.povmfit/detector.json --probes 'coherent=0:4:21;thermal=0,0.5,1' \\
      --shots 100000 --seed 3 -o synthetic.csv
  povmfit simulate detector.json --probes probes.csv --shots 50000 -o synthetic.parquet
"""
_MAX_PROBES = 100_000


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
    parser.add_argument("--shots", required=True, type=int, metavar="N", help="shots per probe")
    parser.add_argument("--seed", type=int, default=None, metavar="S",
                        help="random seed (default: fresh randomness from the operating system)")
    parser.add_argument("--povm-source", choices=("auto", "reconstruction", "model"), default="auto",
                        help="rows of a povm.csv to use (default auto: reconstruction if present, else model)")
    parser.add_argument("-o", "--out", required=True, metavar="SCAN", help="scan file to write (.csv or .parquet)")
    return parser


# ----- probe grid ------------------------------------------------------------------------
def _grid_values(text: str, where: str) -> np.ndarray:
    try:
        if ":" in text:
            start, stop, count = text.split(":")
            n = int(count)
            if n < 1:
                raise ValueError
            values = np.linspace(float(start), float(stop), n)
        else:
            values = np.array([float(v) for v in text.split(",")])
    except ValueError:
        raise ArgumentError(f"{where}: {text!r} is neither a comma list nor START:STOP:COUNT") from None
    if not np.all(np.isfinite(values)) or values.min() < 0:
        raise ArgumentError(f"{where}: photon numbers must be finite and >= 0, got {text!r}")
    return values


def parse_probe_grid(spec: str) -> tuple[np.ndarray, np.ndarray]:
    """Grid text -> (coherent, thermal) arrays of equal length (see module docstring)."""
    coherent, thermal = [], []
    for block in spec.split("|"):
        values = {"coherent": np.zeros(1), "thermal": np.zeros(1)}
        seen = set()
        for part in filter(None, (p.strip() for p in block.split(";"))):
            name, sep, text = part.partition("=")
            name = name.strip().lower()
            where = f"--probes {spec!r}"
            if not sep or name not in values:
                raise ArgumentError(f"{where}: expected coherent=VALUES or thermal=VALUES, got {part!r}")
            if name in seen:
                raise ArgumentError(f"{where}: {name} given twice in one grid")
            seen.add(name)
            values[name] = _grid_values(text.strip(), where)
        if not seen:
            raise ArgumentError(f"--probes {spec!r}: empty grid")
        a, t = np.meshgrid(values["coherent"], values["thermal"], indexing="ij")
        coherent.append(a.ravel())
        thermal.append(t.ravel())
    coherent, thermal = np.concatenate(coherent), np.concatenate(thermal)
    if coherent.size > _MAX_PROBES:
        raise ArgumentError(f"--probes {spec!r}: {coherent.size} probes, at most {_MAX_PROBES}")
    return coherent, thermal


def load_probe_file(path) -> tuple[np.ndarray, np.ndarray, list[str] | None]:
    """Probe list CSV -> (coherent, thermal, labels or None). ArgumentError names line and column."""
    path = Path(path)
    rows = read_csv_rows(path, "probe file")
    header = [h.strip() for h in rows[0]] if rows else []
    allowed = {"coherent_photons", "thermal_photons", "probe"}
    if "coherent_photons" not in header or "thermal_photons" not in header:
        raise ArgumentError(f"{path}: line 1: need columns coherent_photons and thermal_photons")
    unknown = [h for h in header if h not in allowed]
    if unknown:
        raise ArgumentError(f"{path}: line 1: unknown column(s) {', '.join(unknown)}")
    columns = {name: [] for name in header}
    for line, row in data_rows(rows, path):
        for name, cell in zip(header, row):
            if name == "probe":
                columns[name].append(cell.strip())
                continue
            try:
                value = float(cell)
            except ValueError:
                value = math.nan
            if not math.isfinite(value) or value < 0:
                raise ArgumentError(f"{path}: line {line}, column {name!r}: expected a number >= 0, got {cell!r}")
            columns[name].append(value)
    if not columns["coherent_photons"]:
        raise ArgumentError(f"{path}: no probes")
    labels = columns.get("probe")
    return np.array(columns["coherent_photons"]), np.array(columns["thermal_photons"]), labels


# ----- simulation ------------------------------------------------------------------------
def simulate_counts(emulator, coherent, thermal, shots: int, seed=None) -> np.ndarray:
    """Counts (n_probes, n_outcomes): Multinomial(shots, q_p) for every probe p.

    q_p uses one detector (one ensemble member, chosen with ``seed``) for all probes.
    """
    from povmfit.models import choose_cutoff, probe_distributions, sample_counts

    rng = np.random.default_rng(seed)
    n_photons = choose_cutoff(coherent, thermal)
    distributions = np.asarray(probe_distributions(coherent, thermal, n_photons))
    member = int(rng.integers(emulator.n_members)) if emulator.n_members > 1 else 0
    q = distributions @ emulator.povms(n_photons)[member].T
    return sample_counts(q, shots, rng)


def run(args) -> int:
    if args.shots < 1:
        raise ArgumentError(f"--shots must be >= 1, got {args.shots}")
    if args.seed is not None and args.seed < 0:
        raise ArgumentError(f"--seed must be >= 0, got {args.seed}")
    if Path(args.out).suffix.lower() not in (".csv", ".parquet"):
        raise ArgumentError(f"-o {args.out}: the scan file must end in .csv or .parquet")
    labels = None
    if Path(args.probes).is_file():
        coherent, thermal, labels = load_probe_file(args.probes)
    else:
        coherent, thermal = parse_probe_grid(args.probes)
    from povmfit.fitting.emulation.emulator import Emulator
    from povmfit.fitting.data.scan import scan_from_arrays, write_scan

    emulator = Emulator.from_file(args.detector, args.povm_source)
    counts = simulate_counts(emulator, coherent, thermal, args.shots, args.seed)
    scan = scan_from_arrays(coherent, thermal, counts, labels=labels, source=f"simulate {args.detector}")
    write_scan(scan, args.out)
    return 0
