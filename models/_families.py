"""Detector families: chains of stages with switchable features, and the model spec syntax.

Spec syntax (ours)::

    FAMILY[:SIZE][+FEATURE[:VALUE]]...

    threshold                 on/off detector, loss only
    threshold+dark            on/off detector with dark clicks
    pnr:6+dark+readout        number-resolving, outcomes 0..6 (6 means "6 or more")
    array:8+dark+crosstalk    8 click pixels (outcomes 0..8 pixels fired)
    array:16+dark+unequal_split+saturation:10

Features: ``dark``, ``crosstalk``, ``readout``, ``unequal_split`` (array only) and
``saturation:K`` (array only; pnr always saturates at its size).

A fixed readout: a known misassignment matrix ``M[k, m] = P(outcome k | m registered)`` (a
pulse-height tally's ``readout.json``) put after the chain in place of the readout and
saturation stages, ``theta_observed = M @ theta_registered``. It has no parameters; the spec
shows it as ``+fixed_readout`` and the matrix travels with the model
(``DetectorModel(..., fixed_readout=M)`` or ``parse_model_spec(spec, fixed_readout=M)``).

Chains (POVM = product of stage matrices, applied right to left):

    threshold:  loss -> pixels(1) -> dark [-> fixed readout]
    array:N:    loss -> pixels(N, uniform or split) -> dark -> crosstalk -> readout -> saturation
                (or -> fixed readout of the pixels fired 0..N)
    pnr:K:      loss -> dark (additive Poisson) -> crosstalk (Borel) -> readout/saturation at K
                (or -> fixed readout of the registered counts, K+1 rows)
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

import jax
import jax.numpy as jnp
import numpy as np

from . import _stages as st
from ._features import FAMILIES, FEATURE_TABLE, FEATURES, MAX_SPLIT_PIXELS, parameter

__all__ = ["DetectorModel", "parse_model_spec", "fixed_readout_columns", "check_readout_matrix", "FAMILIES",
           "FEATURES", "FIXED_READOUT", "READOUT_COLUMN_TOLERANCE"]

_READOUT_MARGIN = 16  # extra internal counts kept above the top outcome (8 sigma at width 2)
FIXED_READOUT = "fixed_readout"  # the word a spec shows for a fixed readout matrix
READOUT_COLUMN_TOLERANCE = 1e-9  # columns of a fixed readout matrix sum to 1 within this


def fixed_readout_columns(matrix, n_registered: int) -> np.ndarray:
    """A readout matrix ``M[k, m]`` cut or padded to ``n_registered`` columns (numpy).

    Registered numbers beyond the matrix's last column report the top outcome K (a pulse
    height above every threshold), so padded columns are (0, ..., 0, 1).
    Returns shape (K+1, n_registered).
    """
    matrix = np.asarray(matrix, dtype=float)
    if n_registered <= matrix.shape[1]:
        return matrix[:, :n_registered]
    pad = np.zeros((matrix.shape[0], n_registered - matrix.shape[1]))
    pad[-1] = 1.0
    return np.concatenate([matrix, pad], axis=1)


def check_readout_matrix(matrix) -> np.ndarray:
    """``matrix`` as a float array if it is a readout matrix M[k, m] = P(outcome k | m
    registered): shape (K+1, n_registered) with K >= 1, entries in [0, 1], every column
    summing to 1 within ``READOUT_COLUMN_TOLERANCE``; else ValueError saying what is wrong."""
    try:
        matrix = np.array(matrix, dtype=float)
    except (TypeError, ValueError):
        raise ValueError("expected a rectangle of numbers") from None
    if matrix.ndim != 2 or matrix.shape[0] < 2 or matrix.shape[1] < 1:
        raise ValueError(f"expected shape (K+1, n_registered) with K >= 1, got {matrix.shape}")
    if not np.isfinite(matrix).all() or (matrix < 0).any() or (matrix > 1).any():
        raise ValueError("entries must be probabilities in [0, 1]")
    sums = matrix.sum(axis=0)
    bad = np.nonzero(np.abs(sums - 1.0) > READOUT_COLUMN_TOLERANCE)[0]
    if bad.size:
        raise ValueError(f"column {int(bad[0])} sums to {sums[bad[0]]:.12g}, not 1")
    return matrix


@dataclass(frozen=True)
class DetectorModel:
    """A parametric detector model.

    Attributes:
        family: ``"threshold"``, ``"pnr"`` or ``"array"``.
        size: pixels for ``array`` (1 for ``threshold``), top outcome K for ``pnr``.
        features: sorted tuple of switched-on features (``saturation`` excluded).
        saturation: top reported outcome for ``array`` with saturation, else None.
        fixed_readout: None, or a known readout matrix ``M[k, m] = P(outcome k | m
            registered)`` (rows: outcomes 0..K; columns: registered numbers, pixels fired for
            arrays) applied after the chain; stored as a tuple of row tuples (hashable).
            It replaces the ``readout`` feature and saturation; a pnr model's size is K.
    """

    family: str
    size: int = 1
    features: tuple[str, ...] = ()
    saturation: int | None = None
    fixed_readout: tuple | None = field(default=None, repr=False)
    _names: tuple[str, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        if self.family not in FAMILIES:
            raise ValueError(f"unknown detector family {self.family!r}; expected one of {', '.join(FAMILIES)}")
        if self.family == "threshold" and self.size != 1:
            raise ValueError("a threshold detector has no size")
        if self.size < 1:
            raise ValueError(f"{self.family} size must be >= 1, got {self.size}")
        unknown = {f for f in self.features if self.family not in FEATURE_TABLE[f].parameters}
        if unknown:
            raise ValueError(f"feature(s) {', '.join(sorted(unknown))} not available for {self.family}")
        if "unequal_split" in self.features and not 2 <= self.size <= MAX_SPLIT_PIXELS:
            raise ValueError(f"unequal_split needs 2..{MAX_SPLIT_PIXELS} pixels, got {self.size}")
        if "crosstalk" in self.features and self.family == "array" and self.size < 2:
            raise ValueError("pixel crosstalk needs at least 2 pixels")
        if self.saturation is not None:
            if self.family != "array":
                raise ValueError("saturation:K is for arrays; a pnr detector saturates at its size")
            if not 1 <= self.saturation < self.size:
                raise ValueError(f"saturation must be between 1 and {self.size - 1}, got {self.saturation}")
        object.__setattr__(self, "features", tuple(sorted(set(self.features), key=FEATURES.index)))
        if self.fixed_readout is not None:
            object.__setattr__(self, "fixed_readout", self._checked_fixed_readout(self.fixed_readout))
        object.__setattr__(self, "_names", self._parameter_names())

    def _checked_fixed_readout(self, matrix) -> tuple:
        try:
            matrix = check_readout_matrix(matrix)
        except ValueError as error:
            raise ValueError(f"fixed readout matrix: {error}") from None
        if "readout" in self.features:
            raise ValueError("a fixed readout matrix replaces the readout feature: drop +readout")
        if self.saturation is not None:
            raise ValueError("a fixed readout matrix sets the outcomes itself: drop +saturation")
        if self.family == "pnr" and matrix.shape[0] != self.size + 1:
            raise ValueError(f"pnr:{self.size} has outcomes 0..{self.size} but the fixed readout matrix has "
                             f"{matrix.shape[0]} rows")
        return tuple(tuple(float(v) for v in row) for row in matrix)

    # ----- description -------------------------------------------------------------
    @property
    def max_outcome(self) -> int:
        """Largest reported outcome K (outcomes are 0..K)."""
        if self.fixed_readout is not None:
            return len(self.fixed_readout) - 1
        if self.saturation is not None:
            return self.saturation
        return self.size

    @property
    def fixed_readout_matrix(self) -> np.ndarray | None:
        """The fixed readout matrix M[k, m] as a numpy array, shape (K+1, n_registered), or None."""
        return None if self.fixed_readout is None else np.array(self.fixed_readout, dtype=float)

    def with_fixed_readout(self, matrix) -> "DetectorModel":
        """The same model with the readout matrix ``matrix`` (None: without a fixed readout)."""
        return DetectorModel(self.family, self.size, self.features, self.saturation, matrix)

    @property
    def n_outcomes(self) -> int:
        return self.max_outcome + 1

    @property
    def feature_list(self) -> list[str]:
        """Features as DESIGN lists them, saturation included."""
        out = list(self.features)
        if self.saturation is not None:
            out.append("saturation")
        return out

    @property
    def spec(self) -> str:
        head = self.family if self.family == "threshold" else f"{self.family}:{self.size}"
        tail = [f"+{f}" for f in self.features]
        if self.saturation is not None:
            tail.append(f"+saturation:{self.saturation}")
        if self.fixed_readout is not None:
            tail.append(f"+{FIXED_READOUT}")
        return head + "".join(tail)

    def __str__(self) -> str:
        return self.spec

    # ----- parameters ------------------------------------------------------------
    def _parameter_names(self) -> tuple[str, ...]:
        names = ["efficiency"]
        for feature in self.features:
            for name in FEATURE_TABLE[feature].parameters[self.family]:
                names += [f"{name}_{i}" for i in range(1, self.size)] if name == "split_log_ratio" else [name]
        return tuple(names)

    @property
    def parameter_names(self) -> tuple[str, ...]:
        """Order of the parameter vector taken by :meth:`povm`."""
        return self._names

    def bounds(self) -> dict[str, tuple[float, float]]:
        """Allowed range of each parameter (inclusive, as used by the fitters)."""
        return {name: (parameter(name, self.family).lower, parameter(name, self.family).upper) for name in self._names}

    def starting_values(self) -> dict[str, float]:
        return {name: parameter(name, self.family).start for name in self._names}

    def unpack(self, params) -> dict:
        """Parameter vector -> {name: value} (JAX-traceable)."""
        return {name: params[i] for i, name in enumerate(self._names)}

    def pack(self, values: dict) -> jnp.ndarray:
        missing = [n for n in self._names if n not in values]
        if missing:
            raise ValueError(f"model {self.spec} needs parameter(s) {', '.join(missing)}")
        return jnp.asarray([float(values[n]) for n in self._names], dtype=jnp.float64)

    def split_ratios(self, params):
        """Splitting probabilities of the pixels (softmax of 0 and the log ratios)."""
        p = self.unpack(params)
        logits = jnp.concatenate([jnp.zeros(1), jnp.stack([p[f"split_log_ratio_{i}"] for i in range(1, self.size)])])
        return jax.nn.softmax(logits)

    # ----- the POVM ----------------------------------------------------------------
    def povm(self, params, n_photons: int):
        """POVM ``theta[k, n] = P(outcome k | n photons)``, shape (n_outcomes, n_photons).

        ``params`` is a vector in :attr:`parameter_names` order; ``n_photons`` is static.
        jit-able, vmap-able over parameter batches and differentiable in every parameter.
        """
        p = self.unpack(jnp.asarray(params, dtype=jnp.float64))
        matrix = st.loss_matrix(p["efficiency"], n_photons)
        if self.family == "pnr":
            return self._pnr_chain(p, matrix, n_photons)
        return self._click_chain(p, params, matrix, n_photons)

    def _stage(self, feature: str):
        return FEATURE_TABLE[feature].stages[self.family]

    def _click_chain(self, p, params, matrix, n_photons):
        n = self.size
        if "unequal_split" in self.features:
            pixel = self._stage("unequal_split")(self.split_ratios(params), n_photons)
        else:
            pixel = st.uniform_pixel_matrix(n, n_photons)
        matrix = pixel @ matrix
        if "dark" in self.features:
            matrix = self._stage("dark")(p["dark_probability"], n) @ matrix
        if "crosstalk" in self.features:
            matrix = self._stage("crosstalk")(p["crosstalk_probability"], n) @ matrix
        if self.fixed_readout is not None:
            return self._fixed_readout_stage(n + 1) @ matrix
        if "readout" in self.features:
            return self._stage("readout")(p["readout_width"], n + 1, self.n_outcomes) @ matrix
        if self.saturation is not None:
            return self._stage("saturation")(n + 1, self.saturation) @ matrix
        return matrix

    def _pnr_chain(self, p, matrix, n_photons):
        top = self.size
        adds_counts = "dark" in self.features or "crosstalk" in self.features
        columns = len(self.fixed_readout[0]) if self.fixed_readout is not None else 0
        inner = max(n_photons, top + 1, columns) + (_READOUT_MARGIN if adds_counts or "readout" in self.features else 0)
        if "dark" in self.features:
            matrix = self._stage("dark")(p["dark_mean"], n_photons, inner) @ matrix
        else:
            matrix = jnp.zeros((inner, n_photons)).at[:n_photons].set(matrix)
        if "crosstalk" in self.features:
            matrix = self._stage("crosstalk")(p["crosstalk_probability"], inner, inner) @ matrix
        if self.fixed_readout is not None:
            return self._fixed_readout_stage(inner) @ matrix
        if "readout" in self.features:
            return self._stage("readout")(p["readout_width"], inner, top + 1) @ matrix
        return st.saturation_matrix(inner, top) @ matrix

    def _fixed_readout_stage(self, n_registered: int):
        """The fixed readout matrix as a stage on ``n_registered`` registered numbers (a
        constant of the compiled program), shape (K+1, n_registered)."""
        return jnp.asarray(fixed_readout_columns(self.fixed_readout, n_registered))

    # ----- figures -----------------------------------------------------------------
    def vacuum_click_probability(self, params):
        """Probability of any non-zero outcome with no light: 1 - theta[0, 0]."""
        return 1.0 - self.povm(params, 2)[0, 0]


_SPEC_HEAD = re.compile(r"^(threshold|pnr|array)(?::(\d+))?$")


def parse_model_spec(spec: str, fixed_readout=None) -> DetectorModel:
    """Parse ``FAMILY[:SIZE][+FEATURE[:VALUE]]...`` into a :class:`DetectorModel`.

    ``fixed_readout``: a readout matrix M[k, m] to put after the chain (see the module
    docstring); the spec may then show ``+fixed_readout``, which without a matrix is refused.
    Raises ValueError with a message naming the offending part.
    """
    text = spec.strip().lower().replace(" ", "")
    if not text:
        raise ValueError("empty model spec")
    head, *parts = text.split("+")
    match = _SPEC_HEAD.match(head)
    if not match:
        raise ValueError(f"model spec {spec!r}: expected threshold, pnr:K or array:N before the first '+', got {head!r}")
    family, size = match.group(1), match.group(2)
    if family == "threshold":
        if size not in (None, "1"):
            raise ValueError(f"model spec {spec!r}: threshold takes no size")
        size = 1
    elif size is None:
        raise ValueError(f"model spec {spec!r}: {family} needs a size, e.g. {family}:8")
    features, saturation = [], None
    for part in parts:
        name, _, value = part.partition(":")
        if name == "saturation":
            if not value.isdigit():
                raise ValueError(f"model spec {spec!r}: saturation needs a top outcome, e.g. saturation:6")
            saturation = int(value)
        elif name == FIXED_READOUT and not value:
            if fixed_readout is None:
                raise ValueError(f"model spec {spec!r}: {FIXED_READOUT} needs the readout matrix "
                                 "(a readout.json from a pulse-height tally)")
        elif name in FEATURES and not value:
            features.append(name)
        else:
            raise ValueError(f"model spec {spec!r}: unknown feature {part!r}; known: {', '.join(FEATURES)}, "
                             f"{FIXED_READOUT}")
    return DetectorModel(family, int(size), tuple(features), saturation, fixed_readout)

