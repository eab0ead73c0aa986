"""Candidate models of a scan and the order in which a ranking fits them (no fitting here).

Kept apart from the ranking itself so that the command line's helper process can learn which
compiled programs the ranking will need without importing the fitting libraries.
"""
from __future__ import annotations

import itertools

from povmfit.models import DetectorModel

__all__ = ["candidate_models", "family_compute_model", "ranking_order", "programs_in_ranking_order", "programs_needed"]

_MAX_SPLIT = 16


def candidate_models(n_outcomes: int, families=None, features=None) -> list[DetectorModel]:
    """Candidate models for a scan with ``n_outcomes`` outcomes.

    ``families`` restricts the families ("threshold", "pnr", "array"); ``features`` restricts
    the features that may be switched on.
    """
    k = n_outcomes - 1
    families = set(families or ("threshold", "pnr", "array"))
    allowed = set(features) if features is not None else {"dark", "crosstalk", "readout", "unequal_split"}
    out = []
    if k == 1:
        if "threshold" in families:
            out += [DetectorModel("threshold")] + ([DetectorModel("threshold", features=("dark",))] if "dark" in allowed else [])
        return out
    pool = {
        "pnr": [f for f in ("dark", "crosstalk", "readout") if f in allowed],
        "array": [f for f in ("dark", "crosstalk", "readout", "unequal_split") if f in allowed and (f != "unequal_split" or k <= _MAX_SPLIT)],
    }
    for family in ("pnr", "array"):
        if family not in families:
            continue
        for r in range(len(pool[family]) + 1):
            for subset in itertools.combinations(pool[family], r):
                out.append(DetectorModel(family, k, subset))
    return out


def family_compute_model(model: DetectorModel) -> DetectorModel:
    """The largest model of the same family whose compiled code fits ``model``."""
    if model.family == "threshold":
        return DetectorModel("threshold", features=("dark",))
    features = ["dark", "crosstalk", "readout"]
    if "unequal_split" in model.features:
        features.append("unequal_split")
    return DetectorModel(model.family, model.size, tuple(features), model.saturation)


def ranking_order(candidates) -> list[DetectorModel]:
    """Simplest first within a family, so that each candidate can start from its best nested
    fit; within the array family the unequal-split candidates (a costlier program) come last."""
    return sorted(candidates, key=lambda m: (m.family, "unequal_split" in m.features, len(m.features)))


def programs_in_ranking_order(candidates) -> list[DetectorModel]:
    """The compute models (one compiled program each) a ranking of ``candidates`` needs, in the
    order it first needs them."""
    out = []
    for model in ranking_order(candidates):
        compute = family_compute_model(model)
        if compute not in out:
            out.append(compute)
    return out


def programs_needed(scan, model: str = "auto", candidates: str | None = None) -> list[DetectorModel]:
    """The compute models the fit command will call, in the order it first needs them (the
    ranking's when ``model`` is "auto", else the model itself); [] for specs it will refuse."""
    from povmfit.models import parse_model_spec

    try:
        if model != "auto":
            return [parse_model_spec(model)]
        if candidates:
            return programs_in_ranking_order([parse_model_spec(s) for s in candidates.split(",") if s.strip()])
        return programs_in_ranking_order(candidate_models(scan.n_outcomes))
    except ValueError:
        return []
