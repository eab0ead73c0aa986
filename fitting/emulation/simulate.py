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
(optional ``probe`` labels and ``shots``), one probe per row: a ``plan.csv`` from
``povmfit plan`` is such a file.

Every probe gets ``--shots`` shots (or its own ``shots`` from the probe file; giving both is
refused), drawn from the detector's outcome probabilities (multinomial); the scan is written
in the wide scan layout (CSV or Parquet by suffix).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from povmfit.fitting.data.errors import ArgumentError, InputFileError
from povmfit.fitting.data.files import data_rows, read_csv_rows

__all__ = ["parse_probe_grid", "load_probe_file", "simulate_counts", "simulate_scan", "MAX_PROBES"]

MAX_PROBES = 100_000


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
            where = f"probes {spec!r}"
            if not sep or name not in values:
                raise ArgumentError(f"{where}: expected coherent=VALUES or thermal=VALUES, got {part!r}")
            if name in seen:
                raise ArgumentError(f"{where}: {name} given twice in one grid")
            seen.add(name)
            values[name] = _grid_values(text.strip(), where)
        if not seen:
            raise ArgumentError(f"probes {spec!r}: empty grid")
        a, t = np.meshgrid(values["coherent"], values["thermal"], indexing="ij")
        coherent.append(a.ravel())
        thermal.append(t.ravel())
    coherent, thermal = np.concatenate(coherent), np.concatenate(thermal)
    if coherent.size > MAX_PROBES:
        raise ArgumentError(f"probes {spec!r}: {coherent.size} probes, at most {MAX_PROBES}")
    return coherent, thermal


def load_probe_file(path, with_shots: bool = False):
    """Probe list CSV -> (coherent, thermal, labels or None), and with ``with_shots`` also the
    per-probe shots (int array, or None without a ``shots`` column). InputFileError names the
    line and column."""
    path = Path(path)
    rows = read_csv_rows(path, "probe file")
    header = [h.strip() for h in rows[0]] if rows else []
    allowed = {"coherent_photons", "thermal_photons", "probe", "shots"}
    if "coherent_photons" not in header or "thermal_photons" not in header:
        raise InputFileError(f"{path}: line 1: need columns coherent_photons and thermal_photons")
    unknown = [h for h in header if h not in allowed]
    if unknown:
        raise InputFileError(f"{path}: line 1: unknown column(s) {', '.join(unknown)}")
    columns = {name: [] for name in header}
    for line, row in data_rows(rows, path):
        for name, cell in zip(header, row):
            if name == "probe":
                columns[name].append(cell.strip())
                continue
            if name == "shots":
                text = cell.strip()
                if not text.isdigit() or int(text) < 1:
                    raise InputFileError(f"{path}: line {line}, column 'shots': expected a whole number >= 1, got {cell!r}")
                columns[name].append(int(text))
                continue
            try:
                value = float(cell)
            except ValueError:
                value = math.nan
            if not math.isfinite(value) or value < 0:
                raise InputFileError(f"{path}: line {line}, column {name!r}: expected a number >= 0, got {cell!r}")
            columns[name].append(value)
    if not columns["coherent_photons"]:
        raise InputFileError(f"{path}: no probes")
    labels = columns.get("probe")
    out = (np.array(columns["coherent_photons"]), np.array(columns["thermal_photons"]), labels)
    if with_shots:
        return out + (np.array(columns["shots"], dtype=np.int64) if "shots" in columns else None,)
    return out


def simulate_counts(emulator, coherent, thermal, shots, seed=None) -> np.ndarray:
    """Counts (n_probes, n_outcomes): Multinomial(shots_p, q_p) for every probe p; ``shots``
    is one whole number for every probe or an array (n_probes,) of them.

    q_p uses one detector (one ensemble member, chosen with ``seed``) for all probes;
    ``seed=None`` draws fresh randomness from the operating system.
    """
    from povmfit.models import choose_cutoff, probe_distributions, sample_counts

    rng = np.random.default_rng(seed)
    n_photons = choose_cutoff(coherent, thermal)
    distributions = np.asarray(probe_distributions(coherent, thermal, n_photons))
    member = int(rng.integers(emulator.n_members)) if emulator.n_members > 1 else 0
    q = distributions @ emulator.povms(n_photons)[member].T
    if np.ndim(shots) == 0:
        return sample_counts(q, shots, rng)
    q = np.clip(q, 0.0, None)
    return rng.multinomial(np.asarray(shots, dtype=np.int64), q / q.sum(axis=1, keepdims=True))


def simulate_scan(detector, probes, shots=None, seed=None, povm_source: str = "auto"):
    """A synthetic :class:`Scan`: ``shots`` multinomial draws per probe from a detector.

    Args:
        detector: an :class:`Emulator`, or the path of a detector.json or povm.csv.
        probes: a grid spec (see the module docstring), the path of a probe CSV file (with an
            optional ``shots`` column, as in a ``plan.csv``), or a pair of arrays
            (coherent_photons, thermal_photons), mean photons per shot.
        shots: shots per probe (>= 1); None when the probe file gives them (giving both is
            refused). seed: random seed; the same seed gives the same counts, None draws
            fresh randomness from the operating system (``povmfit simulate`` defaults to 0).
    """
    from povmfit.fitting.data.scan import scan_from_arrays
    from povmfit.fitting.emulation.emulator import Emulator

    if shots is not None and (isinstance(shots, bool) or not isinstance(shots, int) or shots < 1):
        raise ArgumentError(f"shots: expected a whole number >= 1, got {shots!r}")
    labels = None
    file_shots = None
    if isinstance(probes, (str, Path)) and Path(probes).is_file():
        coherent, thermal, labels, file_shots = load_probe_file(probes, with_shots=True)
        if file_shots is not None and shots is not None:
            raise ArgumentError(f"shots: the probe file {probes} gives the shots of every probe; leave shots out")
    elif isinstance(probes, Path) or (isinstance(probes, str) and Path(probes).suffix.lower() == ".csv"):
        raise ArgumentError(f"probes {str(probes)!r}: no such probe file")
    elif isinstance(probes, str):
        coherent, thermal = parse_probe_grid(probes)
    else:
        coherent, thermal = (np.asarray(v, dtype=float).ravel() for v in probes)
    if file_shots is not None:
        shots = file_shots
    elif shots is None:
        raise ArgumentError("shots: expected a whole number >= 1 (the probes give no shots of their own)")
    emulator = detector if isinstance(detector, Emulator) else Emulator.from_file(detector, povm_source)
    counts = simulate_counts(emulator, coherent, thermal, shots, seed)
    return scan_from_arrays(coherent, thermal, counts, labels=labels, source=f"simulate {detector}")
