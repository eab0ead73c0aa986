"""The detector file ``detector.json`` (schema ``povmfit.detector/1``): read, write, ensembles.

The file holds everything needed to rebuild a fitted detector exactly: the model spec,
the parameter values, their covariance, the bounds the fit used, the gate duration and
the provenance. Layout (keys in this order)::

    {
      "schema": "povmfit.detector/1",
      "model": {"spec": "array:8+dark+crosstalk", "family": "array", "pixels": 8,
                "features": ["dark", "crosstalk"]},
      "parameters": {"efficiency": 0.61, ...},
      "parameter_order": ["efficiency", ...],
      "covariance": [[...], ...],
      "bounds": {"efficiency": [1e-09, 1.0], ...},
      "gate_duration_s": null,
      "provenance": {"software": "povmfit 0.1.0", "input_sha256": "...", "options": {...}}
    }

``model`` carries ``pixels`` for ``array`` and ``threshold`` (1) and ``max_outcome`` for
``pnr``; a model with a fixed readout (spec ``...+fixed_readout``) also carries
``fixed_readout``, its matrix ``M[k][m] = P(outcome k | m registered)`` as a list of rows
(checked on load like a ``readout.json``: entries in [0, 1], columns summing to 1). Loading only parses JSON (no pickle, no code) and refuses, with one-line
:class:`DetectorFileError` messages, anything it cannot vouch for: another schema (a newer one
included), missing or unknown fields, a model block that disagrees with its spec,
parameters outside their bounds, a covariance that is not a finite symmetric positive
semi-definite matrix of the right size. Writing is atomic and deterministic
(``json.dumps(indent=2)``, floats by ``repr``), so loading and saving a file that povmfit
wrote reproduces it byte for byte.
"""
from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from povmfit.models import DetectorModel, check_readout_matrix, parse_model_spec

from povmfit.fitting.data.files import atomic_write_text
from povmfit.fitting.data.errors import DetectorFileError

__all__ = [
    "SCHEMA",
    "DetectorRecord",
    "EnsembleClippingWarning",
    "load_detector",
    "save_detector",
    "draw_parameter_ensemble",
]

SCHEMA = "povmfit.detector/1"
_KEYS = ("schema", "model", "parameters", "parameter_order", "covariance", "bounds", "gate_duration_s", "provenance")
_PSD_TOLERANCE = 1e-9  # negative eigenvalues down to -1e-9 * largest are rounding
_MAX_REJECTION_ROUNDS = 50


class EnsembleClippingWarning(UserWarning):
    """Rejection sampling could not fill the ensemble inside the bounds; the rest was clipped."""


@dataclass(frozen=True)
class DetectorRecord:
    """A fitted detector as stored in ``detector.json``.

    Attributes:
        model: the DetectorModel (rebuilt from its spec).
        parameters: {name: value} in ``model.parameter_names`` order.
        covariance: (n_params, n_params) covariance of the parameters, same order.
        gate_duration_s: gate or window duration in seconds, or None.
        provenance: free JSON-able dict (software, input SHA-256, options).
        bounds: {name: (lo, hi)} the fit used; None means ``model.bounds()``.
    """

    model: DetectorModel
    parameters: dict
    covariance: np.ndarray
    gate_duration_s: float | None
    provenance: dict
    bounds: dict | None = field(default=None)

    def parameter_vector(self) -> np.ndarray:
        """Parameter values as a float array in ``model.parameter_names`` order."""
        return np.array([float(self.parameters[n]) for n in self.model.parameter_names])

    def parameter_bounds(self) -> dict:
        return dict(self.bounds) if self.bounds is not None else self.model.bounds()

    def to_dict(self) -> dict:
        """Plain JSON-able dict in the file layout (keys in the documented order)."""
        model = self.model
        block = {"spec": model.spec, "family": model.family}
        if model.family == "pnr":
            block["max_outcome"] = model.size
        else:
            block["pixels"] = model.size
        block["features"] = list(model.feature_list)
        if model.fixed_readout is not None:
            block["fixed_readout"] = [list(row) for row in model.fixed_readout]
        names = list(model.parameter_names)
        bounds = self.parameter_bounds()
        covariance = np.asarray(self.covariance, dtype=float)
        return {
            "schema": SCHEMA,
            "model": block,
            "parameters": {n: float(self.parameters[n]) for n in names},
            "parameter_order": names,
            "covariance": [[float(v) for v in row] for row in covariance],
            "bounds": {n: [float(bounds[n][0]), float(bounds[n][1])] for n in names},
            "gate_duration_s": None if self.gate_duration_s is None else float(self.gate_duration_s),
            "provenance": self.provenance,
        }


def save_detector(record: DetectorRecord, path) -> None:
    """Write ``record`` to ``path`` atomically as indented JSON (no NaN or infinity)."""
    text = json.dumps(record.to_dict(), indent=2, allow_nan=False)
    atomic_write_text(path, text + "\n")


# ----- loading -------------------------------------------------------------------------
def _refuse_constant(name):
    raise ValueError(f"{name} is not allowed")


def load_detector(path) -> DetectorRecord:
    """Read and check a detector file; :class:`DetectorFileError` (one line) on anything wrong."""
    path = Path(path)
    where = str(path)
    try:
        raw = path.read_bytes()
    except OSError as error:
        raise DetectorFileError(f"{where}: cannot read the detector file ({error.strerror or error})") from None
    try:
        data = json.loads(raw.decode("utf-8"), parse_constant=_refuse_constant)
    except UnicodeDecodeError:
        raise DetectorFileError(f"{where}: not a detector file (not UTF-8 JSON text)") from None
    except ValueError as error:
        first = str(error).splitlines()[0]
        raise DetectorFileError(f"{where}: not valid JSON ({first})") from None
    except RecursionError:
        raise DetectorFileError(f"{where}: not a detector file (JSON nested too deeply)") from None
    if not isinstance(data, dict):
        raise DetectorFileError(f"{where}: expected a JSON object at the top level")
    return _record_from_dict(data, where)


def _record_from_dict(data: dict, where: str) -> DetectorRecord:
    schema = data.get("schema")
    if schema != SCHEMA:
        if isinstance(schema, str) and schema.startswith("povmfit.detector/"):
            raise DetectorFileError(
                f"{where}: field 'schema' is {schema!r}; this povmfit reads {SCHEMA!r} "
                "(a file from a newer povmfit needs that version)"
            )
        raise DetectorFileError(f"{where}: field 'schema' must be {SCHEMA!r}, got {schema!r}")
    missing = [k for k in _KEYS if k not in data]
    if missing:
        raise DetectorFileError(f"{where}: missing field(s) {', '.join(repr(k) for k in missing)}")
    unknown = sorted(set(data) - set(_KEYS))
    if unknown:
        raise DetectorFileError(f"{where}: unknown field(s) {', '.join(repr(k) for k in unknown)} for schema {SCHEMA}")
    model = _check_model_block(data["model"], where)
    names = list(model.parameter_names)
    if data["parameter_order"] != names:
        raise DetectorFileError(f"{where}: field 'parameter_order' must be {names} for model {model.spec}, got {data['parameter_order']}")
    parameters = _check_named_floats(data["parameters"], names, "parameters", where)
    bounds = _check_bounds(data["bounds"], model, names, where)
    for name in names:
        lo, hi = bounds[name]
        if not lo <= parameters[name] <= hi:
            raise DetectorFileError(f"{where}: field 'parameters.{name}' = {parameters[name]!r} is outside its bounds [{lo!r}, {hi!r}]")
    covariance = _check_covariance(data["covariance"], len(names), where)
    gate = data["gate_duration_s"]
    if gate is not None and not (_is_number(gate) and math.isfinite(gate) and gate > 0):
        raise DetectorFileError(f"{where}: field 'gate_duration_s' must be null or a positive number of seconds, got {gate!r}")
    if not isinstance(data["provenance"], dict):
        raise DetectorFileError(f"{where}: field 'provenance' must be an object")
    same_as_model = all(tuple(bounds[n]) == tuple(model.bounds()[n]) for n in names)
    return DetectorRecord(
        model=model,
        parameters=parameters,
        covariance=covariance,
        gate_duration_s=None if gate is None else float(gate),
        provenance=data["provenance"],
        bounds=None if same_as_model else bounds,
    )


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_model_block(block, where: str) -> DetectorModel:
    if not isinstance(block, dict) or not isinstance(block.get("spec"), str):
        raise DetectorFileError(f"{where}: field 'model' must be an object with a 'spec' string")
    matrix = _check_fixed_readout(block.get("fixed_readout"), where)
    try:
        model = parse_model_spec(block["spec"], fixed_readout=matrix)
    except ValueError as error:
        raise DetectorFileError(f"{where}: field 'model.spec': {error}") from None
    size_key = "max_outcome" if model.family == "pnr" else "pixels"
    expected = {"spec": model.spec, "family": model.family, size_key: model.size, "features": model.feature_list}
    if matrix is not None:
        expected["fixed_readout"] = block["fixed_readout"]
    if set(block) != set(expected):
        raise DetectorFileError(f"{where}: field 'model' must have exactly the keys {', '.join(expected)} for a {model.family} detector")
    for key, value in expected.items():
        if block[key] != value or (key == size_key and not isinstance(block[key], int)):
            raise DetectorFileError(f"{where}: field 'model.{key}' is {block[key]!r} but spec {block['spec']!r} means {value!r}")
    return model


def _check_fixed_readout(rows, where: str):
    """The ``model.fixed_readout`` matrix as an array (None when absent); DetectorFileError
    when it is not a list of rows of numbers forming a readout matrix."""
    if rows is None:
        return None
    if not (isinstance(rows, list) and rows and all(isinstance(r, list) for r in rows)
            and all(_is_number(v) for r in rows for v in r) and len({len(r) for r in rows}) == 1):
        raise DetectorFileError(f"{where}: field 'model.fixed_readout' must be a list of equally long rows of numbers")
    try:
        return check_readout_matrix(rows)
    except ValueError as error:
        raise DetectorFileError(f"{where}: field 'model.fixed_readout': {error}") from None


def _check_named_floats(values, names, field_name: str, where: str) -> dict:
    if not isinstance(values, dict) or list(values) != names:
        got = list(values) if isinstance(values, dict) else type(values).__name__
        raise DetectorFileError(f"{where}: field '{field_name}' must list {names} in that order, got {got}")
    out = {}
    for name in names:
        value = values[name]
        if not _is_number(value) or not math.isfinite(value):
            raise DetectorFileError(f"{where}: field '{field_name}.{name}' must be a finite number, got {value!r}")
        out[name] = float(value)
    return out


def _check_bounds(bounds, model: DetectorModel, names, where: str) -> dict:
    if not isinstance(bounds, dict) or list(bounds) != names:
        raise DetectorFileError(f"{where}: field 'bounds' must list {names} in that order")
    allowed = model.bounds()
    out = {}
    for name in names:
        pair = bounds[name]
        if not (isinstance(pair, list) and len(pair) == 2 and all(_is_number(v) and math.isfinite(v) for v in pair)):
            raise DetectorFileError(f"{where}: field 'bounds.{name}' must be [lower, upper] finite numbers, got {pair!r}")
        lo, hi = float(pair[0]), float(pair[1])
        a_lo, a_hi = allowed[name]
        if not a_lo <= lo < hi <= a_hi:
            raise DetectorFileError(f"{where}: field 'bounds.{name}' = [{lo!r}, {hi!r}] must be increasing and inside [{a_lo!r}, {a_hi!r}]")
        out[name] = (lo, hi)
    return out


def _check_covariance(rows, size: int, where: str) -> np.ndarray:
    shape_ok = isinstance(rows, list) and len(rows) == size and all(isinstance(r, list) and len(r) == size for r in rows)
    if not shape_ok:
        raise DetectorFileError(f"{where}: field 'covariance' must be a {size} x {size} list of lists")
    if not all(_is_number(v) and math.isfinite(v) for r in rows for v in r):
        raise DetectorFileError(f"{where}: field 'covariance' must hold finite numbers only")
    matrix = np.array(rows, dtype=float)
    if not np.array_equal(matrix, matrix.T):
        i, j = np.argwhere(matrix != matrix.T)[0]
        raise DetectorFileError(f"{where}: field 'covariance' is not symmetric (entries [{i}][{j}] and [{j}][{i}] differ)")
    if size:
        eigenvalues = np.linalg.eigvalsh(matrix)
        if eigenvalues.min() < -_PSD_TOLERANCE * max(eigenvalues.max(), 0.0) - 1e-300:
            raise DetectorFileError(f"{where}: field 'covariance' is not positive semi-definite (eigenvalue {eigenvalues.min():.3g})")
    matrix.setflags(write=False)
    return matrix


# ----- parameter ensembles ---------------------------------------------------------------
def _covariance_root(covariance: np.ndarray) -> np.ndarray:
    """L with L @ L.T = covariance for a positive semi-definite matrix (singular allowed)."""
    values, vectors = np.linalg.eigh(covariance)
    return vectors * np.sqrt(np.clip(values, 0.0, None))


def draw_parameter_ensemble(record: DetectorRecord, n: int, seed=None) -> np.ndarray:
    """Draw ``n`` parameter vectors from Normal(values, covariance) restricted to the bounds.

    Policy: rejection sampling (the truncated normal), in rounds of at least 1000 draws, at
    most 50 rounds. If that does not give ``n`` vectors inside the bounds (acceptance below
    about 1/50), the missing ones are drawn untruncated and clipped to the bounds, and an
    :class:`EnsembleClippingWarning` says how many. Parameters with zero variance stay at
    their fitted value.

    Returns:
        array (n, n_params) in ``record.model.parameter_names`` order, every row within the
        bounds (inclusive).
    """
    n = int(n)
    if n < 1:
        raise ValueError(f"ensemble size must be >= 1, got {n}")
    rng = np.random.default_rng(seed)
    names = record.model.parameter_names
    centre = record.parameter_vector()
    bounds = record.parameter_bounds()
    lower = np.array([bounds[name][0] for name in names])
    upper = np.array([bounds[name][1] for name in names])
    root = _covariance_root(np.asarray(record.covariance, dtype=float))
    accepted, have = [], 0
    batch = max(n, 1000)
    for _ in range(_MAX_REJECTION_ROUNDS):
        draws = centre + rng.standard_normal((batch, len(names))) @ root.T
        inside = draws[np.all((draws >= lower) & (draws <= upper), axis=1)]
        accepted.append(inside[: n - have])
        have += accepted[-1].shape[0]
        if have >= n:
            return np.concatenate(accepted)
    missing = n - have
    warnings.warn(
        f"only {have} of {n} ensemble draws fell inside the parameter bounds after "
        f"{_MAX_REJECTION_ROUNDS} rounds of rejection; the other {missing} were clipped to the bounds",
        EnsembleClippingWarning,
        stacklevel=2,
    )
    extra = np.clip(centre + rng.standard_normal((missing, len(names))) @ root.T, lower, upper)
    return np.concatenate(accepted + [extra])
