"""Model-free reconstruction of a diagonal POVM from probe counts.

Problem (Lundeen et al., Nature Physics 5, 27 (2009); Feito et al., New J. Phys. 11, 093038
(2009)), with per-probe weights w_p = shots_p / mean(shots):

    minimise  sum_p w_p sum_k (f[p, k] - sum_n F[p, n] theta[k, n])^2
              + g sum_k sum_n (theta[k, n] - theta[k, n+1])^2
    subject to theta[k, n] >= 0 and sum_k theta[k, n] = 1 for every n,

where f are the observed outcome frequencies and F the probe photon-number distributions
(n = 0..n_photons-1, cutoff from ``choose_cutoff``). With equal shots the weights are 1 and
this is the published objective.

Solver: accelerated projected gradient (FISTA, Beck & Teboulle, SIAM J. Imaging Sci. 2, 183
(2009)) with gradient-based adaptive restart (O'Donoghue & Candes, Found. Comput. Math. 15,
715 (2015)); the projection is the exact Euclidean projection of every photon-number column
onto the probability simplex (sort-based, Duchi et al., ICML 2008). F is stored in blocks:
photon numbers are cut into strides of ``stride`` entries and every probe lives in the span
of two consecutive strides that holds its window, so one gradient costs
O(n_probes x window x n_outcomes) and memory O(n_probes x window), not the dense product.

The regularisation strength g is chosen by K-fold cross-validation over held-out probes
from a grid relative to the largest eigenvalue of the weighted data term; uncertainties come
from a seeded parametric bootstrap (multinomial counts drawn from the fitted probabilities,
re-solved at the chosen g).
"""
from __future__ import annotations

import sys
from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from povmfit.models import banded_probe_distributions, choose_cutoff

__all__ = [
    "Reconstruction", "reconstruct_povm", "ProblemLayout", "build_layout", "WeightedOperator",
    "weighted_operator", "solve_povm", "cross_validate", "predicted_frequencies", "Progress",
    "objective_value", "project_columns_to_simplex", "coarse_start", "interpolation_matrix", "DEFAULT_GRID", "DEFAULT_FOLDS",
]

DEFAULT_GRID = tuple(10.0 ** np.arange(-8, 1))  # g / lambda_max(F^T W F)
DEFAULT_FOLDS = 5
CONSTRAINED_FRACTION = 1e-2  # n is "constrained" where the probe weight is >= 1% of its peak


# ----- the problem in block form ---------------------------------------------------------
@dataclass(frozen=True)
class ProblemLayout:
    """Probe matrix and data arranged for the solver.

    Attributes:
        blocks: (n_blocks, rows, span) probe distributions; row r of block b is the probe
            ``probe_index[b, r]`` restricted to photon numbers b*stride .. b*stride+span-1.
        probe_index: (n_blocks, rows) int, -1 for padding rows.
        stride, span, n_photons: ints (span == n_photons when there is one block).
    """

    blocks: np.ndarray
    probe_index: np.ndarray
    stride: int
    span: int
    n_photons: int

    def per_row(self, per_probe: np.ndarray) -> np.ndarray:
        """Scatter a per-probe array (n_probes, ...) into rows: (n_blocks, rows, ...), 0 on padding."""
        per_probe = np.asarray(per_probe, dtype=float)
        out = per_probe[np.maximum(self.probe_index, 0)]
        mask = (self.probe_index >= 0).reshape(self.probe_index.shape + (1,) * (per_probe.ndim - 1))
        return np.where(mask, out, 0.0)

    def per_probe(self, per_row: np.ndarray, n_probes: int) -> np.ndarray:
        valid = self.probe_index >= 0
        out = np.zeros((n_probes,) + per_row.shape[2:])
        out[self.probe_index[valid]] = per_row[valid]
        return out


def build_layout(coherent, thermal, n_photons: int, tolerance: float = 1e-12, banded: bool | None = None) -> ProblemLayout:
    """Block layout of the probes' photon-number distributions (see module docstring).

    ``banded=None`` uses blocks when the widest probe window is below a third of n_photons
    (one dense block otherwise); True/False force the choice (True needs width < n_photons).
    """
    use_blocks = banded
    banded = banded_probe_distributions(coherent, thermal, n_photons, tolerance)
    width, n_probes = banded.width, banded.n_probes
    if use_blocks is None:
        use_blocks = 3 * width < n_photons
    if not use_blocks or width >= n_photons:  # one dense block
        return ProblemLayout(banded.dense()[None], np.arange(n_probes)[None], n_photons, n_photons, n_photons)
    stride, span = width, 2 * width
    block_of = banded.starts // stride
    n_blocks = int(block_of.max()) + 1
    rows = int(np.bincount(block_of, minlength=n_blocks).max())
    blocks = np.zeros((n_blocks, rows, span))
    index = -np.ones((n_blocks, rows), dtype=np.int64)
    fill = np.zeros(n_blocks, dtype=np.int64)
    for p in range(n_probes):
        b = block_of[p]
        offset = banded.starts[p] - b * stride
        blocks[b, fill[b], offset : offset + width] = banded.values[p]
        index[b, fill[b]] = p
        fill[b] += 1
    return ProblemLayout(blocks, index, stride, span, n_photons)


# ----- solver pieces (pure JAX) ------------------------------------------------------------
def project_columns_to_simplex(v):
    """Euclidean projection of every column of v (shape (n_outcomes, n_columns)) onto
    {x >= 0, sum x = 1} (sort-based algorithm, Duchi et al., ICML 2008)."""
    k = v.shape[0]
    u = -jnp.sort(-v, axis=0)
    cumulative = jnp.cumsum(u, axis=0) - 1.0
    ranks = jnp.arange(1, k + 1, dtype=v.dtype)[:, None]
    active = jnp.sum(u - cumulative / ranks > 0, axis=0)
    tau = jnp.take_along_axis(cumulative, (active - 1)[None, :], axis=0)[0] / active
    return jnp.maximum(v - tau[None, :], 0.0)


def _span_indices(n_blocks, stride, span):
    return jnp.arange(n_blocks)[:, None] * stride + jnp.arange(span)[None, :]


@partial(jax.jit, static_argnames=("stride",))
def _predict(theta, blocks, stride):
    """Predicted probabilities per row: (n_blocks, rows, n_outcomes)."""
    n_blocks, _, span = blocks.shape
    padded_length = (n_blocks - 1) * stride + span
    padded = jnp.pad(theta, ((0, 0), (0, padded_length - theta.shape[1])))
    spans = padded[:, _span_indices(n_blocks, stride, span)]  # (K, n_blocks, span)
    return jnp.einsum("brs,kbs->brk", blocks, spans)


@partial(jax.jit, static_argnames=("stride", "n_photons"))
def _adjoint(residual, blocks, stride, n_photons):
    """F^T residual back on photon numbers: (n_outcomes, n_photons)."""
    n_blocks, _, span = blocks.shape
    per_span = jnp.einsum("brs,brk->kbs", blocks, residual)
    padded_length = (n_blocks - 1) * stride + span
    out = jnp.zeros((residual.shape[-1], padded_length))
    out = out.at[:, _span_indices(n_blocks, stride, span)].add(per_span)
    return out[:, :n_photons]


def _smoothness_gradient(theta):
    """Gradient of sum_k sum_n (theta[k, n] - theta[k, n+1])^2 divided by 2."""
    difference = jnp.diff(theta, axis=1)
    return jnp.pad(difference, ((0, 0), (1, 0))) - jnp.pad(difference, ((0, 0), (0, 1)))


def _apply_data(theta, operator, stride, kind):
    """theta -> theta (F^T W F) (symmetric), either with the dense Gram matrix or the blocks."""
    if kind == "gram":
        return theta @ operator[0]
    blocks, weights = operator
    return _adjoint(weights[..., None] * _predict(theta, blocks, stride), blocks, stride, theta.shape[1])


def _quadratic(theta, hessian_theta, linear, constant, g):
    return (jnp.sum(theta * hessian_theta) - 2.0 * jnp.sum(linear * theta) + constant
            + g * jnp.sum(jnp.diff(theta, axis=1) ** 2))


@partial(jax.jit, static_argnames=("stride", "kind", "max_iter", "check_every"))
def _fista(theta0, operator, linear, constant, g, step, rtol, stride, kind, max_iter, check_every=25):
    """FISTA with adaptive restart, scaled by the per-column steps ``step`` (n_photons,).

    Minimises theta.H.theta - 2 linear.theta + constant + g ||diff theta||^2 over columns in
    the simplex; H = F^T W F. Stops when the objective changes by at most ``rtol`` (relative)
    over ``check_every`` iterations, or after ``max_iter`` iterations.
    """

    def objective(x):
        return _quadratic(x, _apply_data(x, operator, stride, kind), linear, constant, g)

    def gradient(x):
        return 2.0 * (_apply_data(x, operator, stride, kind) - linear) + 2.0 * g * _smoothness_gradient(x)

    def cond(state):
        *_, it, f_old, f_new = state
        settled = jnp.abs(f_old - f_new) <= rtol * jnp.abs(f_new)
        return (it < max_iter) & ~settled

    def body(state):
        x, y, t, it, f_old, f_new = state
        x_new = project_columns_to_simplex(y - step[None, :] * gradient(y))
        restart = jnp.vdot(y - x_new, x_new - x) > 0
        t_new = jnp.where(restart, 1.0, 0.5 * (1.0 + jnp.sqrt(1.0 + 4.0 * t * t)))
        y_new = x_new + jnp.where(restart, 0.0, (t - 1.0) / t_new) * (x_new - x)
        check = (it + 1) % check_every == 0
        f_now = jax.lax.cond(check, objective, lambda _: f_new, x_new)
        return x_new, y_new, t_new, it + 1, jnp.where(check, f_new, f_old), f_now

    start = objective(theta0)
    state = (theta0, theta0, jnp.asarray(1.0), jnp.asarray(0), start + 1.0 + jnp.abs(start), start)
    x, _, _, it, f_old, f_new = jax.lax.while_loop(cond, body, state)
    return x, it, jnp.abs(f_old - f_new) <= rtol * jnp.abs(f_new)


@dataclass(frozen=True)
class WeightedOperator:
    """The data term's Hessian for one set of probe weights.

    ``kind`` is "gram" (operator = (F^T W F,), dense (n_photons, n_photons)) or "blocks"
    (operator = (blocks, row weights)); ``row_sums`` (n_photons,) are the row sums of
    F^T W F, an upper bound of its largest eigenvalue and the diagonal preconditioner.
    """

    layout: ProblemLayout
    kind: str
    operator: tuple
    row_weights: np.ndarray
    row_sums: np.ndarray

    @property
    def scale(self) -> float:
        return float(self.row_sums.max())


def weighted_operator(layout: ProblemLayout, probe_weights) -> WeightedOperator:
    row_weights = layout.per_row(probe_weights)
    blocks = jnp.asarray(layout.blocks)
    ones = jnp.ones((1, layout.n_photons))
    if layout.blocks.shape[0] == 1 and layout.span == layout.n_photons:
        dense = layout.blocks[0]
        gram = dense.T @ (row_weights[0][:, None] * dense)
        operator, kind = (jnp.asarray(gram),), "gram"
    else:
        operator, kind = (blocks, jnp.asarray(row_weights)), "blocks"
    row_sums = np.asarray(_apply_data(ones, operator, layout.stride, kind))[0]
    return WeightedOperator(layout, kind, operator, row_weights, row_sums)


def _linear_term(op: WeightedOperator, frequencies):
    targets = op.layout.per_row(frequencies)
    weighted = jnp.asarray(op.row_weights[..., None] * targets)
    linear = _adjoint(weighted, jnp.asarray(op.layout.blocks), op.layout.stride, op.layout.n_photons)
    return linear, float(np.sum(op.row_weights[..., None] * targets**2))


def solve_povm(op: WeightedOperator, frequencies, regularisation: float, theta0=None,
               rtol: float = 1e-12, max_iter: int = 200_000):
    """Solve the constrained least-squares problem at fixed g.

    Args:
        op: :func:`weighted_operator` of the layout and probe weights w_p (0 leaves a probe out).
        frequencies: (n_probes, n_outcomes) observed outcome frequencies.
        regularisation: g >= 0 in the objective's units.
        theta0: optional start (n_outcomes, n_photons); default uniform.
        rtol: relative objective change over 25 iterations that counts as converged.
    Returns:
        (theta (n_outcomes, n_photons) numpy array, iterations, converged flag).
    """
    n_outcomes = np.asarray(frequencies).shape[1]
    linear, constant = _linear_term(op, frequencies)
    # Gershgorin: H has non-negative entries, so diag(row sums) - H is positive semidefinite;
    # the smoothness term's Hessian has row sums <= 4.
    curvature = 2.0 * (op.row_sums + 4.0 * regularisation)
    curvature = np.maximum(curvature, 1e-12 * max(curvature.max(), 1e-300))
    if theta0 is None:
        theta0 = np.full((n_outcomes, op.layout.n_photons), 1.0 / n_outcomes)
    theta, iterations, converged = _fista(
        jnp.asarray(theta0, dtype=jnp.float64), op.operator, linear, constant, float(regularisation),
        jnp.asarray(1.0 / curvature), float(rtol), op.layout.stride, op.kind, int(max_iter),
    )
    return np.asarray(theta), int(iterations), bool(converged)


def interpolation_matrix(n_coarse: int, n_photons: int) -> np.ndarray:
    """Hat functions on ``n_coarse`` evenly spaced nodes over 0..n_photons-1: (n_coarse, n_photons).

    Columns are convex weights, so theta = theta_coarse @ P keeps every column in the simplex.
    """
    nodes = np.linspace(0.0, n_photons - 1.0, n_coarse)
    spacing = nodes[1] - nodes[0]
    return np.clip(1.0 - np.abs(np.arange(n_photons)[None, :] - nodes[:, None]) / spacing, 0.0, None)


def coarse_start(layout: ProblemLayout, frequencies, probe_weights, regularisation: float,
                 n_coarse: int = 400, rtol: float = 1e-10) -> np.ndarray:
    """Warm start for large problems: solve with theta piecewise linear between ``n_coarse``
    nodes (the smoothness term of a piecewise-linear theta with node spacing h is the coarse
    one divided by h) and interpolate back. Shape (n_outcomes, n_photons)."""
    n_photons = layout.n_photons
    n_coarse = int(min(n_coarse, n_photons))
    hats = interpolation_matrix(n_coarse, n_photons)
    n_probes = int(layout.probe_index.max()) + 1
    coarse = np.zeros((n_probes, n_coarse))
    padded_length = (layout.blocks.shape[0] - 1) * layout.stride + layout.span
    hats_padded = np.zeros((n_coarse, padded_length))
    hats_padded[:, :n_photons] = hats
    for b in range(layout.blocks.shape[0]):
        rows = layout.probe_index[b] >= 0
        window = hats_padded[:, b * layout.stride : b * layout.stride + layout.span]
        coarse[layout.probe_index[b, rows]] = layout.blocks[b, rows] @ window.T
    coarse_layout = ProblemLayout(coarse[None], np.arange(n_probes)[None], n_coarse, n_coarse, n_coarse)
    spacing = (n_photons - 1.0) / (n_coarse - 1.0)
    theta, _, _ = solve_povm(weighted_operator(coarse_layout, probe_weights), frequencies,
                             regularisation / spacing, rtol=rtol)
    return theta @ hats


def objective_value(layout: ProblemLayout, frequencies, probe_weights, regularisation: float, theta) -> float:
    """The objective of the module docstring at ``theta`` (computed from the residuals)."""
    theta = np.asarray(theta, dtype=float)
    rows = np.asarray(_predict(jnp.asarray(theta), jnp.asarray(layout.blocks), layout.stride))
    residual = rows - layout.per_row(frequencies)
    data = np.sum(layout.per_row(probe_weights)[..., None] * residual**2)
    return float(data + regularisation * np.sum(np.diff(theta, axis=1) ** 2))


def predicted_frequencies(layout: ProblemLayout, theta, n_probes: int) -> np.ndarray:
    """q[p, k] = sum_n F[p, n] theta[k, n]: shape (n_probes, n_outcomes)."""
    rows = np.asarray(_predict(jnp.asarray(theta), jnp.asarray(layout.blocks), layout.stride))
    return layout.per_probe(rows, n_probes)


# ----- cross-validation, bootstrap and the result ---------------------------------------------
class Progress:
    """Plain-text progress bar on stderr; silent when ``quiet`` or stderr is not a terminal."""

    def __init__(self, total: int, label: str, quiet: bool = False, stream=None):
        self.stream = stream if stream is not None else sys.stderr
        self.total, self.label = int(total), label
        self.active = not quiet and total > 0 and getattr(self.stream, "isatty", lambda: False)()

    def update(self, done: int) -> None:
        if not self.active:
            return
        filled = int(30 * done / self.total)
        self.stream.write(f"\r{self.label} [{'#' * filled}{'.' * (30 - filled)}] {done}/{self.total}")
        if done >= self.total:
            self.stream.write("\n")
        self.stream.flush()


@dataclass(frozen=True)
class Reconstruction:
    """Result of :func:`reconstruct_povm`.

    Attributes:
        theta: (n_outcomes, n_photons) reconstructed P(outcome k | n photons).
        stderr: (n_outcomes, n_photons) parametric-bootstrap standard errors (zeros when
            ``bootstrap == 0``).
        regularisation: chosen g (objective units, see module docstring).
        regularisation_grid: (n_grid,) the g values tried.
        cv_scores: (n_grid,) held-out weighted squared error summed over folds.
        cv_folds: number of folds.
        probe_weight: (n_photons,) expected number of shots with n photons,
            sum_p shots_p F[p, n].
        constrained: (n_photons,) bool, probe_weight >= CONSTRAINED_FRACTION x its maximum:
            the photon numbers the probes actually inform.
        objective: objective value at theta (chosen g).
        iterations, converged: solver status of the final solve.
        bootstrap: number of bootstrap replicates; seed: their seed.
    """

    theta: np.ndarray
    stderr: np.ndarray
    regularisation: float
    regularisation_grid: np.ndarray
    cv_scores: np.ndarray
    cv_folds: int
    probe_weight: np.ndarray
    constrained: np.ndarray
    objective: float
    iterations: int
    converged: bool
    bootstrap: int
    seed: int | None

    @property
    def n_outcomes(self) -> int:
        return self.theta.shape[0]

    @property
    def n_photons(self) -> int:
        return self.theta.shape[1]

    def to_dict(self) -> dict:
        """Plain JSON-able data (lists and numbers)."""
        return {
            "n_outcomes": self.n_outcomes,
            "n_photons": self.n_photons,
            "theta": self.theta.tolist(),
            "stderr": self.stderr.tolist(),
            "regularisation": self.regularisation,
            "regularisation_grid": self.regularisation_grid.tolist(),
            "cv_scores": self.cv_scores.tolist(),
            "cv_folds": self.cv_folds,
            "probe_weight": self.probe_weight.tolist(),
            "constrained_photons": np.nonzero(self.constrained)[0].tolist(),
            "objective": self.objective,
            "iterations": self.iterations,
            "converged": self.converged,
            "bootstrap": self.bootstrap,
            "seed": self.seed,
        }


def _fold_ids(n_probes: int, folds: int, rng: np.random.Generator) -> np.ndarray:
    return rng.permutation(np.arange(n_probes) % folds)


def cross_validate(layout, frequencies, probe_weights, grid, folds: int, rng, rtol=1e-10, max_iter=50_000):
    """Held-out weighted squared error for every g in ``grid``: shape (len(grid),).

    Each fold's probes get weight 0 in training and are scored on their predicted
    frequencies; the solves along the grid are warm-started (largest g first).
    """
    n_probes = frequencies.shape[0]
    folds = max(2, min(folds, n_probes))
    fold = _fold_ids(n_probes, folds, rng)
    scores = np.zeros(len(grid))
    order = np.argsort(grid)[::-1]
    for f in range(folds):
        held = fold == f
        op = weighted_operator(layout, np.where(held, 0.0, probe_weights))
        theta = None
        for i in order:
            theta, _, _ = solve_povm(op, frequencies, grid[i], theta, rtol, max_iter)
            predicted = predicted_frequencies(layout, theta, n_probes)
            scores[i] += float(np.sum(probe_weights[held, None] * (predicted[held] - frequencies[held]) ** 2))
    return scores


def reconstruct_povm(coherent, thermal, counts, *, n_photons: int | None = None, grid=None,
                     folds: int = DEFAULT_FOLDS, bootstrap: int = 100, seed: int | None = 0,
                     quiet: bool = False, tolerance: float = 1e-10) -> Reconstruction:
    """Reconstruct the diagonal POVM from probe counts.

    Args:
        coherent, thermal: (n_probes,) |alpha|^2 and nbar of each probe.
        counts: (n_probes, n_outcomes) integer outcome counts (shots are the row sums).
        n_photons: photon numbers 0..n_photons-1; default ``choose_cutoff(..., tolerance)``.
        grid: g values relative to the largest row sum of F^T W F (an upper bound of its
            largest eigenvalue); default :data:`DEFAULT_GRID` (1e-8 .. 1, one per decade).
            A single value skips cross-validation.
        folds: cross-validation folds over probes.
        bootstrap: parametric bootstrap replicates (0: no standard errors).
        seed: seeds the fold assignment and the bootstrap.
        quiet: no progress bar.
    """
    counts = np.asarray(counts, dtype=np.int64)
    shots = counts.sum(axis=1).astype(float)
    frequencies = counts / shots[:, None]
    probe_weights = shots / shots.mean()
    if n_photons is None:
        n_photons = choose_cutoff(coherent, thermal, tolerance)
    layout = build_layout(coherent, thermal, n_photons)
    op = weighted_operator(layout, probe_weights)
    relative = np.atleast_1d(np.asarray(DEFAULT_GRID if grid is None else grid, dtype=float))
    absolute = relative * op.scale
    rng = np.random.default_rng(seed)
    cross_validated = absolute.size > 1
    if cross_validated:
        scores = cross_validate(layout, frequencies, probe_weights, absolute, folds, rng)
        chosen = float(absolute[int(np.argmin(scores))])
    else:
        scores, chosen = np.zeros(1), float(absolute[0])
    start = coarse_start(layout, frequencies, probe_weights, chosen) if op.kind == "blocks" else None
    theta, iterations, converged = solve_povm(op, frequencies, chosen, start)
    stderr = _bootstrap_stderr(op, theta, shots, chosen, bootstrap, rng, quiet)
    weight = banded_probe_distributions(coherent, thermal, n_photons).column_weights(shots)
    return Reconstruction(
        theta=theta, stderr=stderr, regularisation=chosen, regularisation_grid=absolute,
        cv_scores=scores, cv_folds=int(folds) if cross_validated else 0, probe_weight=weight,
        constrained=weight >= CONSTRAINED_FRACTION * weight.max(),
        objective=objective_value(layout, frequencies, probe_weights, chosen, theta),
        iterations=iterations, converged=converged, bootstrap=int(bootstrap), seed=seed,
    )


def _bootstrap_stderr(op, theta, shots, g, replicates, rng, quiet):
    """Standard deviation over parametric-bootstrap re-solves: (n_outcomes, n_photons)."""
    if replicates <= 1:
        return np.zeros_like(theta)
    q = np.clip(predicted_frequencies(op.layout, theta, shots.size), 0.0, None)
    q /= q.sum(axis=1, keepdims=True)
    progress = Progress(replicates, "bootstrap (POVM)", quiet)
    samples = np.empty((replicates,) + theta.shape)
    for r in range(replicates):
        simulated = rng.multinomial(shots.astype(np.int64), q) / shots[:, None]
        samples[r], _, _ = solve_povm(op, simulated, g, theta, rtol=1e-11)
        progress.update(r + 1)
    return samples.std(axis=0, ddof=1)
