"""Arguments as a user passes them (paths, specs, numbers) turned into povmfit's objects,
each checked at the edge with a message naming the argument."""
from __future__ import annotations

import math
from os import PathLike

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.data.scan import Scan, load_scan
from povmfit.models import DetectorModel, parse_model_spec

__all__ = ["as_scan", "as_model", "as_models", "as_calibration_uncertainty"]


def as_scan(scan) -> Scan:
    """A Scan, or the path (str or path-like) of a scan file to load."""
    if isinstance(scan, Scan):
        return scan
    if isinstance(scan, (str, PathLike)):
        return load_scan(scan)
    raise ArgumentError(f"scan: expected a Scan or the path of a scan file, got {type(scan).__name__}")


def as_model(model, argument: str = "model") -> DetectorModel:
    """A DetectorModel, or its spec such as ``"array:8+dark+crosstalk"``."""
    if isinstance(model, DetectorModel):
        return model
    if isinstance(model, str):
        try:
            return parse_model_spec(model)
        except ValueError as error:
            raise ArgumentError(f"{argument}: {error}") from None
    raise ArgumentError(f"{argument}: expected a model spec or a DetectorModel, got {type(model).__name__}")


def as_models(models, argument: str = "candidates") -> list[DetectorModel] | None:
    """None, a comma-separated string of specs, or an iterable of specs and models."""
    if models is None:
        return None
    if isinstance(models, str):
        models = [part for part in models.split(",") if part.strip()]
    out = [as_model(m, argument) for m in models]
    if not out:
        raise ArgumentError(f"{argument}: no model given")
    return out


def as_calibration_uncertainty(value) -> float | None:
    """Relative 1-sigma width of the probe photon numbers; None or 0 mean exact probes."""
    if value is None:
        return None
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise ArgumentError(f"calibration_uncertainty: expected a number, got {value!r}") from None
    if not math.isfinite(value) or not 0 <= value < 0.5:
        raise ArgumentError(f"calibration_uncertainty: expected a relative width from 0 (exact probes) to below 0.5, got {value}")
    return value or None
