"""The one table of detector features: what each switches on, in which families, with which
parameters, ranges, starting values and the value that switches it off again.

Everything that needs to know about a feature reads it here: the model class (allowed
features, parameter names, bounds, starts), the model ranking (which features it tries and
how a larger compiled model stands in for a smaller one), the identifiability checks and the
datasheet. The stage functions themselves live in ``_stages`` and are chained per family in
``_families``; each row names its stage functions.

A new stage: write it in ``_stages``, add a row here, call it in the family's chain.
"""
from __future__ import annotations

from dataclasses import dataclass

from . import _stages as st

__all__ = ["Parameter", "Feature", "PARAMETERS", "FEATURE_TABLE", "FAMILIES", "MAX_SPLIT_PIXELS",
           "parameter", "null_value", "ranked_features", "dark_parameter_names"]

FAMILIES = ("threshold", "pnr", "array")
MAX_SPLIT_PIXELS = 16  # unequal split ratios: N-1 free parameters, tried for up to 16 pixels


@dataclass(frozen=True)
class Parameter:
    """Range, start and null value of a parameter (the null value switches its feature off;
    None for a parameter no model can do without)."""

    lower: float
    upper: float
    start: float
    null: float | None


PARAMETERS = {
    "efficiency": Parameter(1e-9, 1.0, 0.5, None),
    "dark_probability": Parameter(0.0, 0.999, 1e-3, 0.0),  # per pixel and gate
    "dark_mean": Parameter(0.0, 20.0, 1e-3, 0.0),  # mean spurious counts per gate (pnr)
    "crosstalk_probability": Parameter(0.0, 0.999, 0.02, 0.0),
    "readout_width": Parameter(1e-3, 2.0, 0.2, 1e-3),  # Gaussian width in outcome units
    "split_log_ratio": Parameter(-10.0, 10.0, 0.0, 0.0),  # log(r_i / r_0) of pixel i
}
# family-specific upper bounds: the Borel branching mean L = -log(1-p) must stay below 1
UPPER_BY_FAMILY = {("pnr", "crosstalk_probability"): 0.6}


@dataclass(frozen=True)
class Feature:
    """One switchable feature.

    Attributes:
        name: the word used in model specs.
        parameters: {family: parameter names} (the split ratios have one per pixel after
            the first: ``split_log_ratio_1..N-1``, written here as ``split_log_ratio``).
        stages: {family: stage function of ``_stages``}.
        ranked: offered by the automatic model ranking.
        max_pixels: largest size for which the feature exists (None: any).
    """

    name: str
    parameters: dict
    stages: dict
    ranked: bool = True
    max_pixels: int | None = None

    @property
    def families(self) -> tuple[str, ...]:
        return tuple(self.parameters)


FEATURE_TABLE = {
    "dark": Feature(
        "dark",
        {"threshold": ("dark_probability",), "array": ("dark_probability",), "pnr": ("dark_mean",)},
        {"threshold": st.click_dark_matrix, "array": st.click_dark_matrix, "pnr": st.poisson_dark_matrix},
    ),
    "crosstalk": Feature(
        "crosstalk",
        {"array": ("crosstalk_probability",), "pnr": ("crosstalk_probability",)},
        {"array": st.pixel_crosstalk_matrix, "pnr": st.borel_crosstalk_matrix},
    ),
    "readout": Feature(
        "readout",
        {"array": ("readout_width",), "pnr": ("readout_width",)},
        {"array": st.readout_matrix, "pnr": st.readout_matrix},
    ),
    "unequal_split": Feature(
        "unequal_split", {"array": ("split_log_ratio",)}, {"array": st.split_pixel_matrix},
        max_pixels=MAX_SPLIT_PIXELS,
    ),
    "saturation": Feature("saturation", {"array": ()}, {"array": st.saturation_matrix}, ranked=False),
}
FEATURES = tuple(FEATURE_TABLE)


def base_name(name: str) -> str:
    """``split_log_ratio_3`` -> ``split_log_ratio``; other names unchanged."""
    return "split_log_ratio" if name.startswith("split_log_ratio") else name


def parameter(name: str, family: str | None = None) -> Parameter:
    """Range, start and null value of parameter ``name`` (in ``family`` when it matters)."""
    entry = PARAMETERS[base_name(name)]
    upper = UPPER_BY_FAMILY.get((family, base_name(name)))
    return entry if upper is None else Parameter(entry.lower, upper, entry.start, entry.null)


def null_value(name: str) -> float:
    """The value of ``name`` that switches its feature off."""
    null = PARAMETERS[base_name(name)].null
    if null is None:
        raise ValueError(f"{name} cannot be switched off")
    return null


def ranked_features(family: str, size: int) -> list[str]:
    """Features the automatic ranking tries for a ``family`` detector of ``size``."""
    return [f.name for f in FEATURE_TABLE.values()
            if f.ranked and family in f.parameters and (f.max_pixels is None or size <= f.max_pixels)]


def dark_parameter_names() -> tuple[str, ...]:
    """Every parameter name the dark feature uses in some family."""
    return tuple(sorted({n for names in FEATURE_TABLE["dark"].parameters.values() for n in names}))
