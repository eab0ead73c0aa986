"""One catalogue of detector models for the property tests.

Every family and every feature combination that changes the chain of stages is listed once
with a parameter vector inside its bounds; ``EDGE_CASES`` adds vectors on the edges of the
ranges where fits most often end (efficiency 1, dark 0, crosstalk 0). A new stage or feature
is tested by listing it here.
"""
from __future__ import annotations

from dataclasses import dataclass

# A typical interior point for every parameter name (split log ratios are set per case).
_TYPICAL = {
    "efficiency": 0.73,
    "dark_probability": 0.02,
    "dark_mean": 0.15,
    "crosstalk_probability": 0.08,
    "readout_width": 0.35,
}


@dataclass(frozen=True)
class Case:
    """A model spec and one parameter point, given by name (missing names take _TYPICAL)."""

    spec: str
    values: tuple[tuple[str, float], ...] = ()
    label: str = "interior"

    def parameter_values(self, names) -> dict[str, float]:
        given = dict(self.values)
        out = {}
        for i, name in enumerate(names):
            if name in given:
                out[name] = given[name]
            elif name.startswith("split_log_ratio"):
                out[name] = 0.3 * i - 0.7  # distinct, unequal ratios
            else:
                out[name] = _TYPICAL[name]
        return out

    @property
    def id(self) -> str:
        return f"{self.spec}[{self.label}]"


SPECS = (
    "threshold",
    "threshold+dark",
    "pnr:1",
    "pnr:5",
    "pnr:5+dark",
    "pnr:5+crosstalk",
    "pnr:5+readout",
    "pnr:5+dark+crosstalk+readout",
    "array:1",
    "array:1+dark",
    "array:2+crosstalk",
    "array:4",
    "array:4+unequal_split",
    "array:4+unequal_split+dark",
    "array:3+unequal_split+dark+crosstalk+readout+saturation:2",
    "array:8+dark",
    "array:8+dark+crosstalk",
    "array:8+dark+readout",
    "array:8+saturation:5",
    "array:8+dark+readout+saturation:5",
    "array:8+dark+crosstalk+readout+saturation:5",
)

INTERIOR_CASES = tuple(Case(spec) for spec in SPECS)

_EDGES = {
    "efficiency=1": (("efficiency", 1.0),),
    "efficiency=1,dark=0": (("efficiency", 1.0), ("dark_probability", 0.0), ("dark_mean", 0.0)),
    "dark=0,crosstalk=0": (("dark_probability", 0.0), ("dark_mean", 0.0), ("crosstalk_probability", 0.0)),
}

EDGE_CASES = tuple(
    Case(spec, values, label)
    for spec in (
        "threshold+dark",
        "pnr:5+dark+crosstalk+readout",
        "array:8+dark+crosstalk",
        "array:4+unequal_split+dark",
        "array:8+dark+crosstalk+readout+saturation:5",
    )
    for label, values in _EDGES.items()
)

ALL_CASES = INTERIOR_CASES + EDGE_CASES
