"""Candidate models of a scan and the order in which a ranking fits them (no fitting here)."""
from __future__ import annotations

import itertools

from povmfit.models import DetectorModel, ranked_features

__all__ = ["candidate_models", "family_compute_model", "ranking_order"]


def candidate_models(n_outcomes: int, families=None, features=None) -> list[DetectorModel]:
    """Candidate models for a scan with ``n_outcomes`` outcomes.

    ``families`` restricts the families ("threshold", "pnr", "array"); ``features`` restricts
    the features that may be switched on.
    """
    k = n_outcomes - 1
    families = set(families or ("threshold", "pnr", "array"))
    allowed = set(features) if features is not None else None
    out = []
    if k == 1:
        if "threshold" in families:
            pool = [f for f in ranked_features("threshold", 1) if allowed is None or f in allowed]
            out += [DetectorModel("threshold", features=subset) for subset in _subsets(pool)]
        return out
    for family in ("pnr", "array"):
        if family in families:
            pool = [f for f in ranked_features(family, k) if allowed is None or f in allowed]
            out += [DetectorModel(family, k, subset) for subset in _subsets(pool)]
    return out


def _subsets(pool):
    return [subset for r in range(len(pool) + 1) for subset in itertools.combinations(pool, r)]


def family_compute_model(model: DetectorModel) -> DetectorModel:
    """The largest model of the same family whose compiled code fits ``model``."""
    # the unequal split (a costlier program) only where the model has it
    features = [f for f in ranked_features(model.family, model.size) if f != "unequal_split" or f in model.features]
    return DetectorModel(model.family, model.size, tuple(features), model.saturation)


def ranking_order(candidates) -> list[DetectorModel]:
    """Simplest first within a family, so that each candidate can start from its best nested
    fit; within the array family the unequal-split candidates (a costlier program) come last."""
    return sorted(candidates, key=lambda m: (m.family, "unequal_split" in m.features, len(m.features)))
