"""Constrained least-squares solver behind the model-free POVM reconstruction.

Problem (Lundeen et al., Nature Physics 5, 27 (2009); Feito et al., New J. Phys. 11, 093038
(2009)), with per-probe weights w_p:

    minimise  sum_p w_p sum_k (f[p, k] - sum_n F[p, n] theta[k, n])^2
              + g sum_k sum_n (theta[k, n] - theta[k, n+1])^2
    subject to theta[k, n] >= 0 and sum_k theta[k, n] = 1 for every n,

where f are the observed outcome frequencies (n_probes, n_outcomes) and F the probe
photon-number distributions (n_probes, n_photons). Written with H = F^T W F it is
theta.H.theta - 2 linear.theta + constant + g ||diff theta||^2 per outcome row.

Solver: accelerated projected gradient (FISTA, Beck & Teboulle, SIAM J. Imaging Sci. 2, 183
(2009)) with gradient-based adaptive restart (O'Donoghue & Candes, Found. Comput. Math. 15,
715 (2015)), diagonally preconditioned by the row sums of the Hessian (Gershgorin); the
projection is the exact Euclidean projection of every photon-number column onto the
probability simplex (Michelot's fixed-point algorithm, J. Optim. Theory Appl. 50, 195 (1986)).
F is stored in blocks: photon numbers are cut into strides of ``stride`` entries (half the
widest probe window) and every probe lives in the span of :data:`SPAN_STRIDES` consecutive
strides that holds its window, so one gradient costs O(n_probes x window x n_outcomes) and
memory O(n_probes x window), not the dense product. Three strides of half a window waste less
than two of a whole one (1.5 windows of work per probe instead of 2); the spans are shifted
slices of theta cut into strides, not a gather, and each block is one product rows x span
times span x K (theta photon numbers first). On 2,000 coherent probes x 20,000 photon numbers
x 20 outcomes a prediction and its adjoint took 55-80 ms with two whole-window strides and a
gather, 27-43 ms now (shared machine).

Many problems (cross-validation folds, bootstrap replicates, simulated scans) are solved in one
compiled loop: :func:`solve_povm_batch` stacks them in groups of :data:`BATCH` members, each
member with its own data, weights, g and start; a member stops changing once it meets its own
stopping rule, so every member ends exactly where it would alone (up to rounding).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
from scipy import sparse

from povmfit.models import BandedProbeMatrix, banded_probe_distributions

__all__ = [
    "ProblemLayout", "build_layout", "WeightedOperator", "weighted_operator", "solve_povm",
    "solve_povm_batch", "objective_value", "predicted_frequencies", "project_columns_to_simplex",
    "coarse_start", "interpolation_matrix", "interpolate", "BATCH",
]

BATCH = 5  # problems per compiled solve (one compiled shape; 5 = the default number of folds)
SMALL_PROBLEM = 4096  # outcomes x photon numbers up to which a lone problem is padded to BATCH
CHECK_EVERY = 25  # iterations between two evaluations of the stopping rule
FEW_OUTCOMES = 12  # simplex projection by fixed passes up to this many outcomes, else until nothing changes
SPAN_STRIDES = 3  # strides per block span (block work per probe: span = SPAN_STRIDES / (SPAN_STRIDES - 1) windows)


# ----- the problem in block form ---------------------------------------------------------
@dataclass(frozen=True)
class ProblemLayout:
    """Probe matrix and data arranged for the solver.

    Attributes:
        blocks: (n_blocks, rows, span) probe distributions; row r of block b is the probe
            ``probe_index[b, r]`` restricted to photon numbers b*stride .. b*stride+span-1.
        probe_index: (n_blocks, rows) int, -1 for padding rows.
        stride, span, n_photons: ints (span == n_photons when there is one block; span is a
            multiple of stride).
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

    @property
    def dense(self) -> bool:
        """One block holding every photon number: the solver uses the Gram matrix F^T W F."""
        return self.blocks.shape[0] == 1 and self.span == self.n_photons


def build_layout(coherent, thermal, n_photons: int, tolerance: float = 1e-12, banded: bool | None = None) -> ProblemLayout:
    """Block layout of the probes' photon-number distributions (see module docstring).

    ``banded=None`` uses blocks when the widest probe window is below a third of n_photons
    (one dense block otherwise); True/False force the choice (True needs width < n_photons).
    """
    return layout_from_windows(banded_probe_distributions(coherent, thermal, n_photons, tolerance), banded)


def layout_from_windows(banded: BandedProbeMatrix, use_blocks: bool | None = None) -> ProblemLayout:
    """Block layout of probe rows stored as windows (:class:`povmfit.models.BandedProbeMatrix`);
    ``use_blocks`` as ``banded`` in :func:`build_layout`."""
    width, n_probes, n_photons = banded.width, banded.n_probes, banded.n_photons
    if use_blocks is None:
        use_blocks = 3 * width < n_photons
    if not use_blocks or width >= n_photons:  # one dense block
        return ProblemLayout(banded.dense()[None], np.arange(n_probes)[None], n_photons, n_photons, n_photons)
    stride = -(-width // (SPAN_STRIDES - 1))  # a window starting anywhere in its stride fits the span
    span = SPAN_STRIDES * stride
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


# ----- the probe matrix and its adjoint in numpy (set-up, scoring) -----------------------------
def _predict_numpy(theta, layout: ProblemLayout) -> np.ndarray:
    """sum_n F[p, n] theta[k, n] per row: (n_blocks, rows, n_outcomes)."""
    n_blocks = layout.blocks.shape[0]
    # photon numbers beyond the last block (no probe reaches them) are padding here
    padded = np.zeros((theta.shape[0], max((n_blocks - 1) * layout.stride + layout.span, layout.n_photons)))
    padded[:, : layout.n_photons] = theta
    starts = np.arange(n_blocks) * layout.stride
    spans = padded[:, starts[:, None] + np.arange(layout.span)[None, :]]  # (K, n_blocks, span)
    return np.einsum("brs,kbs->brk", layout.blocks, spans)


def _adjoint_numpy(per_row, layout: ProblemLayout) -> np.ndarray:
    """sum_p F[p, n] per_row[p, k] on photon numbers: (n_outcomes, n_photons)."""
    n_blocks, stride = layout.blocks.shape[0], layout.stride
    per_span = np.einsum("brs,brk->kbs", layout.blocks, per_row)
    out = np.zeros((per_row.shape[-1], n_blocks - 1 + layout.span // stride, stride))
    for j in range(layout.span // stride):  # the span of block b covers strides b .. b+span/stride-1
        out[:, j : j + n_blocks] += per_span[:, :, j * stride : (j + 1) * stride]
    out = out.reshape(per_row.shape[-1], -1)[:, : layout.n_photons]
    return np.pad(out, ((0, 0), (0, layout.n_photons - out.shape[1])))  # no probe beyond the last block


# ----- solver pieces (pure JAX) ------------------------------------------------------------
def project_columns_to_simplex(v):
    """Euclidean projection of every column of v (shape (..., n_outcomes, n_columns)) onto
    {x >= 0, sum x = 1}.

    Michelot's algorithm: tau = (sum of the entries above the previous tau - 1) / their
    number, started from all entries; tau rises and the set shrinks until it stops changing,
    which takes at most n_outcomes - 1 updates, and the final tau is the exact one (element-wise
    work only). Up to :data:`FEW_OUTCOMES` outcomes that many fixed passes are made; with more,
    the passes stop as soon as no column's tau changed (usually after a few: a sort-based
    projection cost about 17 times as much per call for 60 outcomes, and gives the same tau up
    to the order of summation).
    """
    k = v.shape[-2]
    tau = (jnp.sum(v, axis=-2, keepdims=True) - 1.0) / k
    if k <= FEW_OUTCOMES:
        for _ in range(k - 1):
            tau = _michelot_update(v, tau)
        return jnp.maximum(v - tau, 0.0)

    def keep_going(state):
        passes, changed, _ = state
        return changed & (passes < k - 1)

    def one_pass(state):
        passes, _, tau = state
        new = _michelot_update(v, tau)
        return passes + 1, jnp.any(new != tau), new

    _, _, tau = jax.lax.while_loop(keep_going, one_pass, (0, jnp.asarray(True), tau))
    return jnp.maximum(v - tau, 0.0)


def _michelot_update(v, tau):
    """One pass of Michelot's algorithm: tau from the entries of each column above ``tau``."""
    above = v > tau
    return (jnp.sum(jnp.where(above, v, 0.0), axis=-2, keepdims=True) - 1.0) / jnp.sum(above, axis=-2, keepdims=True)


def _strided_spans(theta, n_blocks, stride, span):
    """theta (B, N, K) (photon numbers first) cut into the blocks' spans: (B, n_blocks, span, K).
    Span b is strides b .. b + span/stride - 1, so the spans are shifted slices of theta cut
    into strides (no gather)."""
    per_span = span // stride
    n_strides = n_blocks - 1 + per_span
    padded = jnp.pad(theta, ((0, 0), (0, max(n_strides * stride - theta.shape[1], 0)), (0, 0)))
    strides = padded[:, : n_strides * stride].reshape((theta.shape[0], n_strides, stride, theta.shape[2]))
    return jnp.concatenate([strides[:, j : j + n_blocks] for j in range(per_span)], axis=2)


def predict_photon_major(theta, blocks, stride):
    """Predicted probabilities per row for a batch: theta (B, N, K) -> (B, n_blocks, rows, K)
    (one matrix product per block, rows x span times span x K)."""
    n_blocks, _, span = blocks.shape
    return jnp.einsum("brs,zbsk->zbrk", blocks, _strided_spans(theta, n_blocks, stride, span))


def adjoint_photon_major(residual, blocks, stride, n_photons):
    """F^T residual back on photon numbers for a batch: (B, n_blocks, rows, K) -> (B, N, K)."""
    n_blocks, _, span = blocks.shape
    per_span = span // stride
    batch, n_outcomes = residual.shape[0], residual.shape[-1]
    parts = jnp.einsum("brs,zbrk->zbsk", blocks, residual).reshape((batch, n_blocks, per_span, stride, n_outcomes))
    # stride j of span b is stride b + j of the photon numbers
    out = sum(jnp.pad(parts[:, :, j], ((0, 0), (j, per_span - 1 - j), (0, 0), (0, 0))) for j in range(per_span))
    out = out.reshape((batch, -1, n_outcomes))[:, :n_photons]
    return jnp.pad(out, ((0, 0), (0, n_photons - out.shape[1]), (0, 0)))  # no probe beyond the last block


def _predict(theta, blocks, stride):
    """:func:`predict_photon_major` for theta (B, K, N)."""
    return predict_photon_major(jnp.swapaxes(theta, 1, 2), blocks, stride)


def _adjoint(residual, blocks, stride, n_photons):
    """:func:`adjoint_photon_major` on (B, K, N)."""
    return jnp.swapaxes(adjoint_photon_major(residual, blocks, stride, n_photons), 1, 2)


def _smoothness_gradient(theta):
    """Gradient of sum_k sum_n (theta[k, n] - theta[k, n+1])^2 divided by 2 (last axis is n)."""
    difference = jnp.diff(theta, axis=-1)
    pad = [(0, 0)] * (theta.ndim - 1)
    return jnp.pad(difference, pad + [(1, 0)]) - jnp.pad(difference, pad + [(0, 1)])


def _apply_data(theta, operator, stride, kind):
    """theta (B, K, N) -> theta (F^T W F) per member, with the Gram matrices (B, N, N) or the
    blocks and per-member row weights (B, n_blocks, rows)."""
    if kind == "gram":
        return jnp.einsum("zkn,znm->zkm", theta, operator[0])
    blocks, weights = operator
    return _adjoint(weights[..., None] * _predict(theta, blocks, stride), blocks, stride, theta.shape[-1])


@partial(jax.jit, static_argnames=("stride", "kind", "check_every"))
def _fista(theta0, operator, linear, constant, g, step, active, rtol, max_iter, stride, kind, check_every=CHECK_EVERY):
    """FISTA with adaptive restart on a batch of B problems, scaled by the per-column steps.

    Shapes: theta0, linear (B, K, N); constant, g, rtol (B,); step (B, N); active (B,) bool
    (inactive members are padding and never move). Member b minimises
    x.H_b.x - 2 linear_b.x + constant_b + g_b ||diff x||^2 over columns in the simplex and
    stops when its objective changes by at most rtol_b (relative) over ``check_every``
    iterations, or after ``max_iter`` iterations (checked every ``check_every`` iterations and
    at max_iter). Returns (theta (B, K, N), iterations (B,), converged (B,)).
    """
    per_member = (slice(None), None, None)

    def objective(x):
        data = jnp.sum(x * _apply_data(x, operator, stride, kind), axis=(1, 2))
        return data - 2.0 * jnp.sum(linear * x, axis=(1, 2)) + constant + g * jnp.sum(jnp.diff(x, axis=-1) ** 2, axis=(1, 2))

    def iterate(_, state):
        x, y, t = state
        gradient = 2.0 * (_apply_data(y, operator, stride, kind) - linear) + 2.0 * g[per_member] * _smoothness_gradient(y)
        x_new = project_columns_to_simplex(y - step[:, None, :] * gradient)
        restart = jnp.sum((y - x_new) * (x_new - x), axis=(1, 2)) > 0
        t_new = jnp.where(restart, 1.0, 0.5 * (1.0 + jnp.sqrt(1.0 + 4.0 * t * t)))
        y_new = x_new + jnp.where(restart, 0.0, (t - 1.0) / t_new)[per_member] * (x_new - x)
        return x_new, y_new, t_new

    def cond(state):
        it, done = state[3], state[6]
        return (it < max_iter) & ~jnp.all(done)

    def body(state):
        x, y, t, it, f_old, f_new, done, iterations = state
        steps = jnp.minimum(check_every, max_iter - it)
        x_run, y_run, t_run = jax.lax.fori_loop(0, steps, iterate, (x, y, t))
        keep = done[per_member]  # members that had stopped before keep their state
        f_previous, f_latest = jnp.where(done, f_old, f_new), jnp.where(done, f_new, objective(x_run))
        stopped = done | (jnp.abs(f_previous - f_latest) <= rtol * jnp.abs(f_latest))
        return (jnp.where(keep, x, x_run), jnp.where(keep, y, y_run), jnp.where(done, t, t_run), it + steps,
                f_previous, f_latest, stopped, jnp.where(done, iterations, it + steps))

    start = objective(theta0)
    state = (theta0, theta0, jnp.ones_like(constant), jnp.asarray(0, dtype=max_iter.dtype),
             start + 1.0 + jnp.abs(start), start, ~active, jnp.zeros(active.shape, dtype=max_iter.dtype))
    x, _, _, _, f_old, f_new, _, iterations = jax.lax.while_loop(cond, body, state)
    return x, iterations, jnp.abs(f_old - f_new) <= rtol * jnp.abs(f_new)


# ----- operators and the solve entry points ------------------------------------------------------
@dataclass(frozen=True)
class WeightedOperator:
    """The data term's Hessian for one set of probe weights.

    ``kind`` is "gram" (``matrix`` = F^T W F, dense (n_photons, n_photons)) or "blocks"
    (``matrix`` is None; the solver uses the layout's blocks and ``row_weights``);
    ``row_sums`` (n_photons,) are the row sums of F^T W F, an upper bound of its largest
    eigenvalue and the diagonal preconditioner.
    """

    layout: ProblemLayout
    kind: str
    matrix: np.ndarray | None
    row_weights: np.ndarray
    row_sums: np.ndarray

    @property
    def scale(self) -> float:
        return float(self.row_sums.max())


def weighted_operator(layout: ProblemLayout, probe_weights) -> WeightedOperator:
    """F^T W F for probe weights w_p (n_probes,), in the form the solver uses (numpy only)."""
    row_weights = layout.per_row(probe_weights)
    if layout.dense:
        dense = layout.blocks[0]
        gram = dense.T @ (row_weights[0][:, None] * dense)
        return WeightedOperator(layout, "gram", gram, row_weights, gram.sum(axis=1))
    ones = np.ones((1, layout.n_photons))
    row_sums = _adjoint_numpy(row_weights[..., None] * _predict_numpy(ones, layout), layout)[0]
    return WeightedOperator(layout, "blocks", None, row_weights, row_sums)


def _linear_term(op: WeightedOperator, frequencies):
    """(F^T W f)^T, shape (n_outcomes, n_photons), and sum_p w_p ||f_p||^2."""
    targets = op.layout.per_row(frequencies)
    weighted = op.row_weights[..., None] * targets
    return _adjoint_numpy(weighted, op.layout), float(np.sum(weighted * targets))


def _steps(op: WeightedOperator, regularisation: float) -> np.ndarray:
    # Gershgorin: H has non-negative entries, so diag(row sums) - H is positive semidefinite;
    # the smoothness term's Hessian has row sums <= 4.
    curvature = 2.0 * (op.row_sums + 4.0 * regularisation)
    return 1.0 / np.maximum(curvature, 1e-12 * max(curvature.max(), 1e-300))


def solve_povm_batch(ops, frequencies, regularisation, theta0=None, rtol=1e-12, max_iter: int = 200_000):
    """Solve many problems of one layout, :data:`BATCH` at a time in one compiled loop
    (a lone large problem alone: see :data:`SMALL_PROBLEM`).

    Args:
        ops: a :class:`WeightedOperator` shared by all problems, or a sequence with one per
            problem (all of the same layout).
        frequencies: (n_problems, n_probes, n_outcomes) observed frequencies, or
            (n_probes, n_outcomes) shared by all problems.
        regularisation: g (objective units), scalar or (n_problems,).
        theta0: start, None (uniform), (n_outcomes, n_photons) shared or
            (n_problems, n_outcomes, n_photons).
        rtol: relative objective change over 25 iterations that counts as converged, scalar
            or (n_problems,).
        max_iter: iteration limit of every problem.
    Returns:
        (theta (n_problems, n_outcomes, n_photons), iterations (n_problems,) int,
        converged (n_problems,) bool), numpy arrays; each problem as :func:`solve_povm` gives it.
    """
    frequencies = np.asarray(frequencies, dtype=float)
    n_problems = _count_problems(ops, frequencies, regularisation, theta0, rtol)
    op_list = list(ops) if isinstance(ops, (list, tuple)) else [ops] * n_problems
    layout = op_list[0].layout
    n_outcomes, n_photons = frequencies.shape[-1], layout.n_photons
    frequencies = np.broadcast_to(frequencies, (n_problems,) + frequencies.shape[-2:])
    g = np.broadcast_to(np.asarray(regularisation, dtype=float), (n_problems,))
    tolerance = np.broadcast_to(np.asarray(rtol, dtype=float), (n_problems,))
    if theta0 is None:
        theta0 = np.full((n_outcomes, n_photons), 1.0 / n_outcomes)
    theta0 = np.broadcast_to(np.asarray(theta0, dtype=float), (n_problems, n_outcomes, n_photons))
    thetas = np.empty((n_problems, n_outcomes, n_photons))
    iterations = np.empty(n_problems, dtype=np.int64)
    converged = np.empty(n_problems, dtype=bool)
    # Small problems always run BATCH members (padding included): one compiled shape serves
    # every call. Large ones are not padded: there a padding member costs real time.
    per_call = BATCH if n_outcomes * n_photons <= SMALL_PROBLEM else min(BATCH, n_problems)
    for first in range(0, n_problems, per_call):
        members = np.arange(first, min(first + per_call, n_problems))
        padded = np.concatenate([members, np.full(per_call - members.size, members[0])])
        args = _member_arrays([op_list[i] for i in padded], frequencies[padded], g[padded], theta0[padded])
        x, its, ok = _fista(
            jnp.asarray(args["theta0"]), args["operator"], jnp.asarray(args["linear"]), jnp.asarray(args["constant"]),
            jnp.asarray(g[padded]), jnp.asarray(args["step"]), jnp.asarray(np.arange(per_call) < members.size),
            jnp.asarray(tolerance[padded]), jnp.asarray(max_iter, dtype=jnp.int32), stride=layout.stride,
            kind=op_list[0].kind,
        )
        thetas[members] = np.asarray(x)[: members.size]
        iterations[members] = np.asarray(its)[: members.size]
        converged[members] = np.asarray(ok)[: members.size]
    return thetas, iterations, converged


def _count_problems(ops, frequencies, regularisation, theta0, rtol) -> int:
    sizes = {len(ops)} if isinstance(ops, (list, tuple)) else set()
    sizes |= {frequencies.shape[0]} if frequencies.ndim == 3 else set()
    for value, ndim in ((regularisation, 1), (theta0, 3), (rtol, 1)):
        if value is not None and np.ndim(value) == ndim:
            sizes.add(np.shape(value)[0])
    if len(sizes) > 1:
        raise ValueError(f"solve_povm_batch: the per-problem arguments disagree on the number of problems: {sorted(sizes)}")
    return sizes.pop() if sizes else 1


def _member_arrays(ops, frequencies, g, theta0) -> dict:
    """Stacked solver inputs of a batch of members (numpy, except the operator)."""
    linear, constant = zip(*(_linear_term(op, f) for op, f in zip(ops, frequencies)))
    if ops[0].kind == "gram":
        operator = (jnp.asarray(np.stack([op.matrix for op in ops])),)
    else:
        operator = (jnp.asarray(ops[0].layout.blocks), jnp.asarray(np.stack([op.row_weights for op in ops])))
    return {
        "theta0": theta0, "operator": operator, "linear": np.stack(linear), "constant": np.asarray(constant),
        "step": np.stack([_steps(op, gi) for op, gi in zip(ops, g)]),
    }


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
    theta, iterations, converged = solve_povm_batch(op, np.asarray(frequencies)[None], [regularisation],
                                                    None if theta0 is None else np.asarray(theta0)[None], rtol, max_iter)
    return theta[0], int(iterations[0]), bool(converged[0])


def interpolation_matrix(n_coarse: int, n_photons: int, n_columns: int | None = None) -> sparse.csr_matrix:
    """Hat functions on ``n_coarse`` evenly spaced nodes over 0..n_photons-1, sparse
    (n_coarse, n_columns) (default n_columns = n_photons; columns beyond n_photons are zero).

    Columns are convex weights (two nonzero entries at most), so theta = theta_coarse @ P
    keeps every column in the simplex.
    """
    n_columns = n_photons if n_columns is None else n_columns
    n = np.arange(n_photons)
    if n_coarse < 2:
        return sparse.csr_matrix((np.ones(n_photons), (np.zeros(n_photons, dtype=np.int64), n)), shape=(1, n_columns))
    spacing = (n_photons - 1.0) / (n_coarse - 1.0)
    left = np.minimum((n / spacing).astype(np.int64), n_coarse - 2)
    right_weight = np.clip(n / spacing - left, 0.0, 1.0)
    rows = np.r_[left, left + 1]
    values = np.r_[1.0 - right_weight, right_weight]
    keep = values > 0
    return sparse.csr_matrix((values[keep], (rows[keep], np.r_[n, n][keep])), shape=(n_coarse, n_columns))


def interpolate(theta_coarse, hats) -> np.ndarray:
    """theta_coarse (K, n_coarse) on the photon numbers: (K, n_photons) dense."""
    return np.asarray((hats.T @ np.asarray(theta_coarse).T).T)


def coarse_problem(layout: ProblemLayout, n_coarse: int, n_probes: int, banded: bool | None = False):
    """The problem restricted to theta piecewise linear between ``n_coarse`` nodes: (layout of
    the probes against the hat functions, hats (n_coarse, n_photons) sparse, node spacing h).
    The smoothness term of such a theta is the coarse one divided by h. ``banded`` as in
    :func:`build_layout` (False: one dense block; None: blocks when the probes' coarse windows
    are narrow)."""
    n_photons = layout.n_photons
    n_coarse = int(min(n_coarse, n_photons))
    padded_length = max((layout.blocks.shape[0] - 1) * layout.stride + layout.span, n_photons)
    hats_padded = interpolation_matrix(n_coarse, n_photons, padded_length).tocsc()
    windows, starts = [None] * n_probes, np.zeros(n_probes, dtype=np.int64)
    for b in range(layout.blocks.shape[0]):
        rows = layout.probe_index[b] >= 0
        window = hats_padded[:, b * layout.stride : b * layout.stride + layout.span].tocsr()
        touched = np.nonzero(np.diff(window.indptr))[0]
        lo, hi = (int(touched[0]), int(touched[-1]) + 1) if touched.size else (0, 1)
        part = (window[lo:hi] @ layout.blocks[b, rows].T).T  # (probes of the block, nodes lo..hi-1)
        for p, row in zip(layout.probe_index[b, rows], part):
            support = np.nonzero(row > 0)[0]
            first, last = (int(support[0]), int(support[-1]) + 1) if support.size else (0, 1)
            windows[p], starts[p] = row[first:last], lo + first
    width = max(w.size for w in windows)
    values = np.zeros((n_probes, width))
    for p, w in enumerate(windows):
        start = min(starts[p], max(n_coarse - width, 0))  # keep every window inside the nodes
        values[p, starts[p] - start : starts[p] - start + w.size] = w
        starts[p] = start
    coarse_layout = layout_from_windows(BandedProbeMatrix(values, starts, n_coarse), banded)
    return coarse_layout, hats_padded[:, :n_photons].tocsr(), (n_photons - 1.0) / max(n_coarse - 1.0, 1.0)


def coarse_start(layout: ProblemLayout, frequencies, probe_weights, regularisation: float,
                 n_coarse: int = 400, rtol: float = 1e-10) -> np.ndarray:
    """Warm start for large problems: solve with theta piecewise linear between ``n_coarse``
    nodes (the smoothness term of a piecewise-linear theta with node spacing h is the coarse
    one divided by h) and interpolate back. Shape (n_outcomes, n_photons)."""
    coarse_layout, hats, spacing = coarse_problem(layout, n_coarse, int(layout.probe_index.max()) + 1)
    theta, _, _ = solve_povm(weighted_operator(coarse_layout, probe_weights), frequencies,
                             regularisation / spacing, rtol=rtol)
    return interpolate(theta, hats)


def objective_value(layout: ProblemLayout, frequencies, probe_weights, regularisation: float, theta) -> float:
    """The objective of the module docstring at ``theta`` (computed from the residuals)."""
    theta = np.asarray(theta, dtype=float)
    residual = _predict_numpy(theta, layout) - layout.per_row(frequencies)
    data = np.sum(layout.per_row(probe_weights)[..., None] * residual**2)
    return float(data + regularisation * np.sum(np.diff(theta, axis=1) ** 2))


def predicted_frequencies(layout: ProblemLayout, theta, n_probes: int) -> np.ndarray:
    """q[p, k] = sum_n F[p, n] theta[k, n]: shape (n_probes, n_outcomes)."""
    return layout.per_probe(_predict_numpy(np.asarray(theta, dtype=float), layout), n_probes)
