"""An emulated detector: outcome probabilities, sampled histograms, per-shot responses and
per-pixel click patterns, from a fitted model (``detector.json``) or a POVM table (``povm.csv``).

Sources:

- :meth:`Emulator.from_detector_file` / :meth:`Emulator.from_record`: the fitted model at
  its point estimate; :meth:`Emulator.ensemble` replaces it by ``n`` parameter vectors
  drawn from the fit's covariance within the bounds (see
  :func:`povmfit.fitting.detector_file.draw_parameter_ensemble`).
- :meth:`Emulator.from_povm_csv`: the long-layout ``povm.csv`` (photons, outcome,
  probability, stderr, source). ``source="auto"`` (default) takes the ``reconstruction``
  rows when the file has any — the model-free POVM is what a table adds over
  ``detector.json`` — and the ``model`` rows otherwise; ``"reconstruction"`` or ``"model"``
  choose explicitly. The chosen rows must cover every (photons, outcome) pair of a full
  grid exactly once; each column must sum to one within ``POVM_SUM_TOLERANCE`` and no entry
  may be below ``-POVM_SUM_TOLERANCE`` (solver rounding); within that tolerance negative
  entries are set to zero and columns rescaled to sum to one. A table covers photon
  numbers 0..N-1 only: a state with more than 1e-10 of its mass above N is refused.
  Click patterns need a model, so a table-based emulator has none.

Normalisation: a state's photon-number distribution is cut where its tail falls below 1e-10;
the probabilities of the outcomes are renormalised by adding the missing tail mass (at most
1e-10) to the top outcome -- the outcome high photon numbers end in -- so they sum to one to
rounding.

Limits (ArgumentError naming the argument): at most :data:`MAX_SHOTS` shots per run, at most
:data:`MAX_ENSEMBLE` ensemble members, states needing at most :data:`MAX_PHOTONS` photon
numbers (the POVM is a dense table). A state with more than 1e-6 of its mass above the
photon numbers the fitted scan constrained (``provenance.constrained_photons`` of the
detector file, when present) gives an :class:`ExtrapolationWarning`.

Ensembles: the detector in one experiment is fixed but not exactly known. So
:meth:`probabilities` returns the ensemble mean, while :meth:`sample`, :meth:`respond` and
:meth:`patterns` model one experimental run: they draw one ensemble member (with the
given seed) and use it for every shot of the call. Repeated runs with different seeds then
scatter by shot noise plus the detector's uncertainty; :meth:`sample_ensemble` gives one run
per member at once.

Seeds: every method that draws (``ensemble``, ``sample``, ``sample_ensemble``, ``respond``,
``patterns``) takes ``seed``, anything :func:`numpy.random.default_rng` accepts; the same seed
gives the same draws, and ``seed=None`` draws fresh randomness from the operating system (the
command line never does: its ``--seed`` defaults to 0).
"""
from __future__ import annotations

import functools
import math
import warnings
from pathlib import Path

import jax
import numpy as np

from povmfit.models import (
    DetectorModel,
    fixed_readout_columns,
    readout_matrix,
    response_table,
    sample_counts,
    sample_outcomes,
    saturation_matrix,
    split_array_patterns,
    uniform_subset_patterns,
)

from povmfit.fitting.data.files import data_rows, read_csv_rows
from povmfit.fitting.data.detector_file import DetectorRecord, draw_parameter_ensemble, load_detector
from povmfit.fitting.data.states import state_distribution
from povmfit.fitting.data.errors import ArgumentError, DetectorFileError

__all__ = ["Emulator", "load_povm_csv", "POVM_SUM_TOLERANCE", "ExtrapolationWarning", "MAX_SHOTS", "MAX_ENSEMBLE",
           "MAX_PHOTONS"]

POVM_SUM_TOLERANCE = 1e-6
MAX_SHOTS = 2**53
"""Most shots of one emulated run (counts stay exact whole numbers in double precision)."""
MAX_ENSEMBLE = 100_000
"""Most parameter draws of an ensemble."""
MAX_PHOTONS = 4000
"""Most photon numbers an emulated state may need (the POVM is evaluated as a dense table)."""
_EXTRAPOLATION_MASS = 1e-6


class ExtrapolationWarning(UserWarning):
    """The input state reaches photon numbers the fitted scan did not constrain."""
_TAIL_TOLERANCE = 1e-10
_POVM_COLUMNS = ("photons", "outcome", "probability", "stderr", "source")


@functools.lru_cache(maxsize=64)
def _batched_povm(model: DetectorModel, n_photons: int):
    return jax.jit(jax.vmap(lambda params: model.povm(params, n_photons)))


def _pixel_level_model(model: DetectorModel) -> DetectorModel:
    """The same array without readout, fixed readout and saturation: outcome = number of pixels
    fired."""
    features = tuple(f for f in model.features if f != "readout")
    return DetectorModel(model.family, model.size, features, None)


class Emulator:
    """An emulated detector. Build with the ``from_*`` class methods.

    Attributes:
        model: DetectorModel, or None for a table-based emulator.
        members: (n_members, n_params) parameter vectors (one row at the point estimate).
        table: (n_outcomes, n_photons) POVM for a table-based emulator, else None.
        n_outcomes: number of outcomes 0..n_outcomes-1.
    """

    def __init__(self, model: DetectorModel | None = None, members=None, table=None, record=None):
        if (model is None) == (table is None):
            raise ValueError("give either a model with parameter vectors or a POVM table")
        self.model = model
        self.record = record
        self.members = None if members is None else np.atleast_2d(np.asarray(members, dtype=float))
        self.table = None if table is None else np.asarray(table, dtype=float)
        self.n_outcomes = model.n_outcomes if model is not None else self.table.shape[0]

    # ----- construction -------------------------------------------------------------
    @classmethod
    def from_record(cls, record: DetectorRecord) -> "Emulator":
        return cls(model=record.model, members=record.parameter_vector()[None, :], record=record)

    @classmethod
    def from_detector_file(cls, path) -> "Emulator":
        return cls.from_record(load_detector(path))

    @classmethod
    def from_povm_csv(cls, path, source: str = "auto") -> "Emulator":
        return cls(table=load_povm_csv(path, source))

    @classmethod
    def from_file(cls, path, povm_source: str = "auto") -> "Emulator":
        """``*.csv`` -> :meth:`from_povm_csv`, anything else -> :meth:`from_detector_file`."""
        if str(path).lower().endswith(".csv"):
            return cls.from_povm_csv(path, povm_source)
        return cls.from_detector_file(path)

    def ensemble(self, n: int, seed=None) -> "Emulator":
        """A new emulator whose members are ``n`` parameter draws from the fit's covariance."""
        if self.record is None:
            raise ArgumentError("an ensemble needs a fitted detector file (detector.json), not a POVM table")
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 1 <= n <= MAX_ENSEMBLE:
            raise ArgumentError(f"ensemble: expected a whole number of members from 1 to {MAX_ENSEMBLE}, got {n!r}")
        return Emulator(model=self.model, members=draw_parameter_ensemble(self.record, n, seed), record=self.record)

    @property
    def n_members(self) -> int:
        return 1 if self.members is None else self.members.shape[0]

    # ----- POVMs ----------------------------------------------------------------------
    def povms(self, n_photons: int) -> np.ndarray:
        """POVM of every member, shape (n_members, n_outcomes, n_photons)."""
        if self.model is None:
            if n_photons > self.table.shape[1]:
                raise ArgumentError(
                    f"the POVM table covers photon numbers 0..{self.table.shape[1] - 1}, "
                    f"{n_photons - 1} requested"
                )
            return self.table[None, :, :n_photons]
        return np.asarray(_batched_povm(self.model, int(n_photons))(self.members))

    def _fit_to_table(self, p: np.ndarray) -> np.ndarray:
        if self.model is None and p.size > self.table.shape[1]:
            top = self.table.shape[1]
            if p[top:].sum() > _TAIL_TOLERANCE:
                raise ArgumentError(
                    f"the state has {p[top:].sum():.3g} of its probability above {top - 1} photons, "
                    f"beyond the POVM table (0..{top - 1})"
                )
            return p[:top]
        return p

    # ----- probabilities and histograms ---------------------------------------------------
    def member_probabilities(self, state) -> np.ndarray:
        """Outcome probabilities of every member, shape (n_members, n_outcomes); each row sums
        to one to rounding (the cut tail, below 1e-10, is added to the top outcome)."""
        p = self._fit_to_table(state_distribution(state))
        if p.size > MAX_PHOTONS:
            raise ArgumentError(f"state {state if isinstance(state, str) else '(array)'}: needs {p.size} photon numbers, "
                                f"above the emulator's limit of {MAX_PHOTONS}")
        self._warn_beyond_scan(p, state)
        q = self.povms(p.size) @ p
        q[:, -1] += 1.0 - q.sum(axis=1)
        return q

    def _warn_beyond_scan(self, p: np.ndarray, state) -> None:
        provenance = self.record.provenance if self.record is not None else {}
        top = provenance.get("constrained_photons") if isinstance(provenance, dict) else None
        if not isinstance(top, int) or isinstance(top, bool) or p.size <= top + 1:
            return
        beyond = float(p[top + 1:].sum())
        if beyond > _EXTRAPOLATION_MASS:
            warnings.warn(f"the input {state if isinstance(state, str) else 'state'} puts {beyond:.3g} of its "
                          f"probability above {top} photons, beyond the photon numbers the fitted scan "
                          "constrained: the response there is the model's extrapolation", ExtrapolationWarning,
                          stacklevel=3)

    def probabilities(self, state) -> np.ndarray:
        """Outcome probabilities q[k] = sum_n p(n) theta[k, n] (ensemble mean), shape (n_outcomes,)."""
        return self.member_probabilities(state).mean(axis=0)

    def _pick_member(self, rng: np.random.Generator) -> int:
        return int(rng.integers(self.n_members)) if self.n_members > 1 else 0

    def sample(self, state, shots: int, seed=None) -> np.ndarray:
        """Outcome counts (n_outcomes,) of one run of ``shots`` shots (one member per run)."""
        rng = np.random.default_rng(seed)
        q = self.member_probabilities(state)
        return sample_counts(q[self._pick_member(rng)], _check_shots(shots), rng)

    def sample_ensemble(self, state, shots: int, seed=None) -> np.ndarray:
        """One run per member: counts of shape (n_members, n_outcomes)."""
        rng = np.random.default_rng(seed)
        return sample_counts(self.member_probabilities(state), _check_shots(shots), rng)

    # ----- per-shot response --------------------------------------------------------------
    def respond(self, photon_numbers, seed=None) -> np.ndarray:
        """One outcome per shot for photons arriving at the detector (one member per call).

        Args:
            photon_numbers: non-negative integer array (any shape), photons in each shot.
        Returns:
            int32 array of outcomes, same shape.
        """
        photons = np.asarray(photon_numbers)
        if photons.size and (not np.issubdtype(photons.dtype, np.integer) or photons.min() < 0):
            raise ValueError("photon numbers must be non-negative integers")
        rng = np.random.default_rng(seed)
        member = self._pick_member(rng)
        top = int(photons.max()) + 1 if photons.size else 1
        theta = self.povms(max(top, 2))[member]
        return sample_outcomes(response_table(theta), photons, rng)

    # ----- click patterns -----------------------------------------------------------------
    def patterns(self, state, shots: int, seed=None) -> tuple[np.ndarray, np.ndarray]:
        """Per-pixel click patterns and reported outcomes of one run (array or threshold model).

        Returns:
            patterns: bool array (shots, pixels), True where a pixel fired;
            outcomes: int array (shots,), the reported outcome (the number of fired pixels
            after readout misassignment or saturation, when the model has them).
        """
        if self.model is None or self.model.family == "pnr":
            raise ArgumentError("click patterns need an array or threshold detector model")
        shots = _check_shots(shots)
        rng = np.random.default_rng(seed)
        values = dict(zip(self.model.parameter_names, self.members[self._pick_member(rng)]))
        pixels = self.model.size
        p = state_distribution(state)
        if "unequal_split" in self.model.features:
            photons = sample_outcomes(response_table(p[:, None]), np.zeros(shots, dtype=np.int64), rng)
            detected = rng.binomial(photons, values["efficiency"])
            ratios = np.asarray(self.model.split_ratios(self.model.pack(values)))
            patterns = split_array_patterns(
                detected, ratios, values.get("dark_probability", 0.0), values.get("crosstalk_probability", 0.0), rng
            )
        else:
            pixel_model = _pixel_level_model(self.model)
            vector = np.array([values[n] for n in pixel_model.parameter_names])
            q = np.asarray(_batched_povm(pixel_model, p.size)(vector[None, :]))[0] @ p
            fired = sample_outcomes(response_table(q[:, None]), np.zeros(shots, dtype=np.int64), rng)
            patterns = uniform_subset_patterns(fired, pixels, rng)
        return patterns, self._reported_outcomes(patterns.sum(axis=1), values, rng)

    def _reported_outcomes(self, fired: np.ndarray, values: dict, rng) -> np.ndarray:
        pixels = self.model.size
        if self.model.fixed_readout is not None:
            matrix = fixed_readout_columns(self.model.fixed_readout, pixels + 1)
        elif "readout" in self.model.features:
            matrix = np.asarray(readout_matrix(values["readout_width"], pixels + 1, self.n_outcomes))
        elif self.model.saturation is not None:
            matrix = np.asarray(saturation_matrix(pixels + 1, self.model.saturation))
        else:
            return fired.astype(np.int32)
        return sample_outcomes(response_table(matrix), fired, rng)


def _check_shots(shots) -> int:
    if isinstance(shots, bool) or not isinstance(shots, (int, np.integer, float)) or not 0 <= shots <= MAX_SHOTS \
            or int(shots) != shots:
        raise ArgumentError(f"shots: expected a whole number from 0 to {MAX_SHOTS}, got {shots!r}")
    return int(shots)


# ----- povm.csv ---------------------------------------------------------------------------
def _parse_int(text: str, where: str) -> int:
    try:
        value = int(text.strip())
    except ValueError:
        raise ArgumentError(f"{where}: {text!r} is not a whole number") from None
    if value < 0:
        raise ArgumentError(f"{where}: must be >= 0, got {value}")
    return value


def load_povm_csv(path, source: str = "auto") -> np.ndarray:
    """Read a long-layout ``povm.csv`` into theta of shape (n_outcomes, n_photons).

    See the module docstring for the choice of rows and the checks. DetectorFileError names the
    file, the line and the column of the first problem.
    """
    path = Path(path)
    if source not in ("auto", "reconstruction", "model"):
        raise DetectorFileError(f"POVM source must be auto, reconstruction or model, got {source!r}")
    rows = read_csv_rows(path, "POVM table")
    header = [h.strip() for h in rows[0]] if rows else []
    missing = [c for c in _POVM_COLUMNS if c not in header]
    if missing:
        raise DetectorFileError(f"{path}: line 1: missing column(s) {', '.join(missing)}")
    col = {name: header.index(name) for name in _POVM_COLUMNS}
    entries = []  # (line, source, photons, outcome, probability)
    for line, row in data_rows(rows, path):
        kind = row[col["source"]].strip()
        if kind not in ("model", "reconstruction"):
            raise DetectorFileError(f"{path}: line {line}, column 'source': expected model or reconstruction, got {kind!r}")
        photons = _parse_int(row[col["photons"]], f"{path}: line {line}, column 'photons'")
        outcome = _parse_int(row[col["outcome"]], f"{path}: line {line}, column 'outcome'")
        try:
            probability = float(row[col["probability"]])
        except ValueError:
            probability = math.nan
        if not math.isfinite(probability) or probability < -POVM_SUM_TOLERANCE or probability > 1 + POVM_SUM_TOLERANCE:
            raise DetectorFileError(
                f"{path}: line {line}, column 'probability': expected a number in [0, 1], got {row[col['probability']]!r}"
            )
        entries.append((line, kind, photons, outcome, probability))
    kinds = {e[1] for e in entries}
    chosen = source if source != "auto" else ("reconstruction" if "reconstruction" in kinds else "model")
    entries = [e for e in entries if e[1] == chosen]
    if not entries:
        raise DetectorFileError(f"{path}: no rows with source {chosen!r}")
    n_photons = max(e[2] for e in entries) + 1
    n_outcomes = max(e[3] for e in entries) + 1
    if n_outcomes < 2:
        raise DetectorFileError(f"{path}: the {chosen} rows have a single outcome; a detector needs two or more")
    theta = np.full((n_outcomes, n_photons), np.nan)
    for line, _, photons, outcome, probability in entries:
        if not math.isnan(theta[outcome, photons]):
            raise DetectorFileError(f"{path}: line {line}: second {chosen} row for photons={photons}, outcome={outcome}")
        theta[outcome, photons] = probability
    if np.isnan(theta).any():
        k, n = np.argwhere(np.isnan(theta))[0]
        raise DetectorFileError(f"{path}: no {chosen} row for photons={n}, outcome={k} (the grid must be complete)")
    sums = theta.sum(axis=0)
    worst = int(np.argmax(np.abs(sums - 1.0)))
    if abs(sums[worst] - 1.0) > POVM_SUM_TOLERANCE:
        raise DetectorFileError(
            f"{path}: column 'probability': the {chosen} probabilities at photons={worst} sum to {sums[worst]:.9g}, not 1"
        )
    theta = np.clip(theta, 0.0, None)
    return theta / theta.sum(axis=0)
