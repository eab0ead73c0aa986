"""Maximum-likelihood solver behind the model-free POVM reconstruction.

Problem, with c[p, k] the counts of outcome k for probe p, F[p, n] the probe photon-number
distributions and q[p, k] = sum_n F[p, n] theta[k, n]:

    minimise  f(theta) = sum_{p,k} c[p, k] log(c[p, k] / (N_p q[p, k]))
                         + g sum_k sum_n (theta[k, n] - theta[k, n+1])^2
    subject to theta[k, n] >= 0 and sum_k theta[k, n] = 1 for every n,

i.e. half the multinomial deviance plus a smoothness penalty (N_p = sum_k c[p, k]; terms
with c = 0 are 0). Held-out probes are probes whose counts are set to zero.

Method: expectation-maximisation with the photon number as the missing datum (each shot of
probe p carries n photons with probability F[p, n], then gives outcome k with probability
theta[k, n]; Dempster, Laird & Rubin, J. R. Stat. Soc. B 39, 1 (1977)). The E-step gives the
expected complete-data counts A[k, n] = theta[k, n] sum_p F[p, n] c[p, k] / q[p, k]; the
penalty is majorised by a separable quadratic (De Pierro, IEEE Trans. Med. Imaging 14, 132
(1995): (a - b)^2 <= 2 (a - m)^2 + 2 (b - m)^2 with m the mean of the current a and b), so the
M-step is, per column n, the root of 4 g d_n t^2 + (lambda_n - 4 g S[k, n]) t - A[k, n] = 0
(d_n neighbours, S[k, n] the sum of the neighbour midpoints) with the multiplier lambda_n
found by Newton's method so that the column sums to 1. Every step lowers f (a
minorise-maximise step). The steps are accelerated by SQUAREM (Varadhan & Roland, Scand.
J. Stat. 35, 335 (2008), scheme S3) with a monotone safeguard: an extrapolated point is kept
only when its objective is not above the current one, else the plain double step is taken.

Many problems (cross-validation folds, bootstrap replicates, simulated scans) sharing the
probes are solved in one compiled loop, each with its own counts, g and start; a member
stops moving once it meets its stopping rule, so it ends where it would alone.
The probe matrix is stored in blocks (``povm_solver.ProblemLayout``), so one step costs
O(n_probes x window x n_outcomes).
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from povmfit.fitting.tomography.povm_solver import (
    ProblemLayout,
    _predict,
    _adjoint,
    _predict_numpy,
    coarse_problem,
)

__all__ = [
    "solve_likelihood", "solve_likelihood_batch", "likelihood_objective", "heldout_log_likelihood",
    "heldout_log_likelihood_per_probe",
    "likelihood_coarse_start", "solve_likelihood_chunked", "em_step_numpy", "BATCH", "NEWTON_STEPS", "Q_FLOOR",
]

BATCH = 5  # problems per compiled solve (5 = the default number of folds)
NEWTON_STEPS = 8  # Newton iterations for each column's multiplier (then normalised)
Q_FLOOR = 1e-300  # predicted probabilities below this count as this (log of zero avoided)
STEP_GROWTH = 4.0  # SQUAREM: the largest step grows by this factor when reached (Varadhan & Roland's default)


# ----- numpy helpers (set-up, scoring) ---------------------------------------------------------
def likelihood_objective(layout: ProblemLayout, counts, regularisation: float, theta) -> float:
    """f(theta) of the module docstring for one problem (numpy)."""
    counts = np.asarray(counts, dtype=float)
    q = layout.per_probe(_predict_numpy(np.asarray(theta, dtype=float), layout), counts.shape[0])
    shots = counts.sum(axis=1, keepdims=True)
    positive = counts > 0
    ratio = np.where(positive, counts, 1.0) / np.maximum(np.where(positive, shots * q, 1.0), Q_FLOOR)
    data = float(np.sum(np.where(positive, counts * np.log(ratio), 0.0)))
    return data + regularisation * float(np.sum(np.diff(np.asarray(theta), axis=1) ** 2))


def heldout_log_likelihood(layout: ProblemLayout, counts, theta, floor: float = 1e-12) -> float:
    """sum_{p,k} c[p, k] log q[p, k] (natural log; predicted probabilities floored at ``floor``
    so that an outcome predicted impossible costs a finite, large amount)."""
    counts = np.asarray(counts, dtype=float)
    q = layout.per_probe(_predict_numpy(np.asarray(theta, dtype=float), layout), counts.shape[0])
    return float(np.sum(counts * np.log(np.maximum(q, floor))))


def heldout_log_likelihood_per_probe(layout: ProblemLayout, counts, theta, floor: float = 1e-12) -> np.ndarray:
    """sum_k c[p, k] log q[p, k] for every probe p: (n_probes,) (floored as above)."""
    counts = np.asarray(counts, dtype=float)
    q = layout.per_probe(_predict_numpy(np.asarray(theta, dtype=float), layout), counts.shape[0])
    return np.sum(counts * np.log(np.maximum(q, floor)), axis=1)


def em_step_numpy(theta, dense_probes, counts):
    """One plain EM step without penalty, dense numpy (reference and benchmark baseline):
    theta (K, N), dense_probes (P, N), counts (P, K) -> theta (K, N)."""
    q = dense_probes @ theta.T
    ratio = np.where(counts > 0, counts / np.maximum(q, Q_FLOOR), 0.0)
    expected = theta * (ratio.T @ dense_probes)
    total = expected.sum(axis=0, keepdims=True)
    return np.where(total > 0, expected / np.where(total > 0, total, 1.0), theta)


# ----- the compiled pieces ----------------------------------------------------------------------
def _objective_from_q(q, counts_rows, constant, g, theta):
    """f per member from predictions q (B, n_blocks, rows, K)."""
    positive = counts_rows > 0
    logq = jnp.log(jnp.maximum(jnp.where(positive, q, 1.0), Q_FLOOR))
    data = constant - jnp.sum(jnp.where(positive, counts_rows * logq, 0.0), axis=(1, 2, 3))
    return data + g * jnp.sum(jnp.diff(theta, axis=-1) ** 2, axis=(1, 2))


def _m_step(expected, theta, g):
    """Penalised M-step (module docstring): expected counts A (B, K, N), current theta -> theta."""
    n = theta.shape[-1]
    degree = jnp.full((n,), 2.0).at[0].set(1.0).at[-1].set(1.0) if n > 1 else jnp.zeros((1,))
    midpoints = 0.5 * (theta[..., 1:] + theta[..., :-1])
    zero = jnp.zeros(theta.shape[:-1] + (1,))
    neighbour_sum = jnp.concatenate([zero, midpoints], -1) + jnp.concatenate([midpoints, zero], -1)
    a = 4.0 * g[:, None, None] * degree  # (B, 1, N) -> broadcast
    b = 4.0 * g[:, None, None] * neighbour_sum  # (B, K, N)
    a = jnp.broadcast_to(a, expected.shape)

    def entries(lam):
        x = lam - b
        disc = jnp.sqrt(x * x + 4.0 * a * expected)
        positive_x = x > 0
        t = jnp.where(positive_x, 2.0 * expected / jnp.where(positive_x, x + disc, 1.0),
                      (disc - x) / jnp.where(a > 0, 2.0 * a, 1.0))
        slope = jnp.where(disc > 0, -t / jnp.where(disc > 0, disc, 1.0), 0.0)
        return t, slope

    # start: summing the quadratic over k gives lambda = sum A + sum b t - a sum t^2, here with
    # t the current column (exact at a fixed point); Newton's method on the convex decreasing
    # column sum then converges from either side
    lam = jnp.sum(expected + b * theta - a * theta * theta, axis=-2, keepdims=True)

    def newton(_, lam):
        t, slope = entries(lam)
        excess = jnp.sum(t, axis=-2, keepdims=True) - 1.0
        derivative = jnp.sum(slope, axis=-2, keepdims=True)
        return lam - jnp.where(derivative < 0, excess / jnp.where(derivative < 0, derivative, -1.0), 0.0)

    lam = jax.lax.fori_loop(0, NEWTON_STEPS, newton, lam)
    t, _ = entries(lam)
    total = jnp.sum(t, axis=-2, keepdims=True)
    empty = (jnp.sum(expected, axis=-2, keepdims=True) <= 0) & (a[..., :1, :] <= 0)  # no data, no penalty
    return jnp.where(empty | ~(total > 0), theta, t / jnp.where(total > 0, total, 1.0))


def _em(theta, counts_rows, blocks, stride, constant, g):
    """One penalised EM step; also returns f at the input theta."""
    q = _predict(theta, blocks, stride)
    positive = counts_rows > 0
    ratio = jnp.where(positive, counts_rows / jnp.maximum(jnp.where(positive, q, 1.0), Q_FLOOR), 0.0)
    expected = theta * _adjoint(ratio, blocks, stride, theta.shape[-1])
    return _m_step(expected, theta, g), _objective_from_q(q, counts_rows, constant, g, theta)


@partial(jax.jit, static_argnames=("stride",))
def _squarem(theta0, counts_rows, blocks, constant, g, active, rtol, atol, max_cycles, stride):
    """SQUAREM-accelerated penalised EM on a batch (see module docstring).

    Shapes: theta0 (B, K, N); counts_rows (B, n_blocks, rows, K); constant, g, rtol (B,);
    active (B,) bool (padding members never move). Member b stops when f changes by at most
    atol + rtol |f| in one cycle (three EM steps) or after ``max_cycles`` cycles. Returns
    (theta, f, cycles, converged).
    """
    per = (slice(None), None, None)

    def norm2(x):
        return jnp.sum(x * x, axis=(1, 2))

    def extrapolate(x, x1, x2, step_max):
        r = x1 - x
        v = x2 - x1 - r
        alpha = jnp.clip(-jnp.sqrt(norm2(r) / jnp.maximum(norm2(v), 1e-300)), -step_max, -1.0)
        point = x - 2.0 * alpha[per] * r + (alpha * alpha)[per] * v
        # an entry set to zero would stay zero under EM: the extrapolation may shrink an
        # entry to 1e-3 of its value after the double step, not below
        point = jnp.maximum(point, 1e-3 * x2)
        return point / jnp.sum(point, axis=1, keepdims=True), alpha

    def cycle(state):
        x, f_x, step_max, done, cycles, f_change, it = state

        # the three EM steps of a cycle share one call site (one copy in the compiled code):
        # x -> x1 (and f at x), x1 -> x2, extrapolated point -> x3 (and f there)
        def phase(carry, i):
            point, x1, x2, f_now, f_extrapolated = carry
            new, f = _em(point, counts_rows, blocks, stride, constant, g)
            x1 = jnp.where(i == 0, new, x1)
            x2 = jnp.where(i == 1, new, x2)
            f_now = jnp.where(i == 0, f, f_now)
            f_extrapolated = jnp.where(i == 2, f, f_extrapolated)
            following = jnp.where(i == 0, new, extrapolate(x, x1, x2, step_max)[0])
            return (jnp.where(i == 2, new, following), x1, x2, f_now, f_extrapolated), None

        (x3, x1, x2, f_now, f_extrapolated), _ = jax.lax.scan(
            phase, (x, x, x, f_x, f_x), jnp.arange(3))
        _, alpha = extrapolate(x, x1, x2, step_max)
        accept = f_extrapolated <= f_now
        x_new = jnp.where(accept[per], x3, x2)
        grown = jnp.where(alpha <= -step_max, step_max * STEP_GROWTH, step_max)
        step_new = jnp.where(accept, grown, jnp.maximum(1.0, step_max / STEP_GROWTH))
        # f at x_new is known only at the next E-step: the change is measured between the
        # starts of consecutive cycles (f_x: f at the previous cycle's start)
        change = jnp.abs(f_x - f_now)
        stopped = done | ((it > 0) & (change <= atol + rtol * jnp.abs(f_now)))
        keep = stopped[per]
        return (jnp.where(keep, x, x_new), jnp.where(stopped, f_x, f_now), jnp.where(stopped, step_max, step_new),
                stopped, jnp.where(stopped, cycles, cycles + 1), jnp.where(stopped, f_change, change), it + 1)

    def cond(state):
        return (state[6] < max_cycles) & ~jnp.all(state[3])

    infinite = jnp.full(constant.shape, jnp.inf)
    state = (theta0, infinite, jnp.ones_like(constant), ~active, jnp.zeros(active.shape, jnp.int32), infinite,
             jnp.asarray(0, jnp.int32))
    x, f_x, _, done, cycles, _, _ = jax.lax.while_loop(cond, cycle, state)
    # the objective at the returned points (one more E-step)
    f_final = _objective_from_q(_predict(x, blocks, stride), counts_rows, constant, g, x)
    return x, f_final, cycles, done


# ----- entry points -------------------------------------------------------------------------------
def _constant(counts) -> np.ndarray:
    """sum_{p,k} c log(c / N_p) per problem: (B,)."""
    counts = np.asarray(counts, dtype=float)
    shots = counts.sum(axis=-1, keepdims=True)
    positive = counts > 0
    return np.sum(np.where(positive, counts * np.log(np.where(positive, counts, 1.0) / np.where(shots > 0, shots, 1.0)), 0.0),
                  axis=(-2, -1))


def solve_likelihood_batch(layout: ProblemLayout, counts, regularisation, theta0=None, rtol=1e-11, atol=1e-9,
                           max_cycles: int = 20_000, batch: int = BATCH, progress=None):
    """Solve many maximum-likelihood problems of one probe layout.

    Args:
        layout: the probes' block layout (``povm_solver.build_layout``).
        counts: (n_problems, n_probes, n_outcomes) counts (floats allowed; a held-out probe
            has zero counts), or (n_probes, n_outcomes) shared by all problems.
        regularisation: g (counts units), scalar or (n_problems,).
        theta0: start: None (uniform), (K, N) shared, or (n_problems, K, N).
        rtol, atol: a member stops when f changes by at most atol + rtol |f| over one cycle.
        max_cycles: cycle limit per problem (one cycle = three EM steps).
        batch: members per compiled call (small problems are padded to it; one compiled shape).
        progress: optional ``progress(done, total)`` after each compiled call.
    Returns:
        (theta (n_problems, K, N), objective (n_problems,), cycles (n_problems,),
        converged (n_problems,)) numpy arrays.
    """
    counts = np.asarray(counts, dtype=float)
    g = np.atleast_1d(np.asarray(regularisation, dtype=float))
    sizes = {s for s in (counts.shape[0] if counts.ndim == 3 else None, g.size if g.size > 1 else None,
                         np.shape(theta0)[0] if theta0 is not None and np.ndim(theta0) == 3 else None) if s}
    if len(sizes) > 1:
        raise ValueError(f"solve_likelihood_batch: the per-problem arguments disagree: {sorted(sizes)}")
    n_problems = sizes.pop() if sizes else 1
    n_outcomes, n_photons = counts.shape[-1], layout.n_photons
    counts = np.broadcast_to(counts, (n_problems,) + counts.shape[-2:])
    g = np.broadcast_to(g, (n_problems,))
    if theta0 is None:
        theta0 = np.full((n_outcomes, n_photons), 1.0 / n_outcomes)
    theta0 = np.broadcast_to(np.asarray(theta0, dtype=float), (n_problems, n_outcomes, n_photons))
    constant = _constant(counts)
    out_theta = np.empty((n_problems, n_outcomes, n_photons))
    out_f, out_cycles = np.empty(n_problems), np.empty(n_problems, dtype=np.int64)
    out_ok = np.empty(n_problems, dtype=bool)
    per_call = batch if n_outcomes * n_photons <= 4096 else min(batch, n_problems)
    blocks = jnp.asarray(layout.blocks)
    for first in range(0, n_problems, per_call):
        members = np.arange(first, min(first + per_call, n_problems))
        padded = np.concatenate([members, np.full(per_call - members.size, members[0])])
        rows = np.stack([layout.per_row(counts[i]) for i in padded])
        x, f, cycles, ok = _squarem(
            jnp.asarray(theta0[padded]), jnp.asarray(rows), blocks, jnp.asarray(constant[padded]),
            jnp.asarray(g[padded]), jnp.asarray(np.arange(per_call) < members.size),
            jnp.asarray(np.full(per_call, rtol)), jnp.asarray(np.full(per_call, atol)),
            jnp.asarray(max_cycles, dtype=jnp.int32), stride=layout.stride)
        m = members.size
        out_theta[members] = np.asarray(x)[:m]
        out_f[members], out_cycles[members], out_ok[members] = np.asarray(f)[:m], np.asarray(cycles)[:m], np.asarray(ok)[:m]
        if progress is not None:
            progress(int(members[-1]) + 1, n_problems)
    return out_theta, out_f, out_cycles, out_ok


def solve_likelihood(layout: ProblemLayout, counts, regularisation: float = 0.0, theta0=None, rtol=1e-11,
                     atol=1e-9, max_cycles: int = 20_000):
    """One problem: (theta (K, N), objective, cycles, converged)."""
    theta, f, cycles, ok = solve_likelihood_batch(layout, np.asarray(counts)[None], [regularisation],
                                                  None if theta0 is None else np.asarray(theta0)[None],
                                                  rtol, atol, max_cycles)
    return theta[0], float(f[0]), int(cycles[0]), bool(ok[0])


def solve_likelihood_chunked(layout: ProblemLayout, counts, regularisation: float, theta0, max_cycles: int,
                             chunk: int = 10, rtol=1e-11, atol=1e-8, progress=None):
    """One large problem solved ``chunk`` cycles at a time (each call warm-started at the last),
    so that ``progress(done_cycles, max_cycles)`` can be reported between calls; stops once a
    chunk ends converged or after ``max_cycles``. Returns (theta, objective, cycles, converged)."""
    theta, value, done, converged = np.asarray(theta0, dtype=float), np.nan, 0, False
    while done < max_cycles and not converged:
        step = min(chunk, max_cycles - done)
        theta, value, cycles, converged = solve_likelihood(layout, counts, regularisation, theta, rtol, atol, step)
        done += step if not converged else cycles
        if progress is not None:
            progress(min(done, max_cycles), max_cycles)
    return theta, value, done, converged


def likelihood_coarse_start(layout: ProblemLayout, counts, regularisation: float, n_coarse: int = 400,
                            rtol: float = 1e-9, atol: float = 1e-4, max_cycles: int = 500) -> np.ndarray:
    """Warm start for large problems: theta piecewise linear between ``n_coarse`` nodes
    (hat functions are convex weights, so the columns stay in the simplex; the penalty of a
    piecewise-linear theta with node spacing h is the coarse one divided by h), solved
    densely and interpolated back. Shape (n_outcomes, n_photons)."""
    counts = np.asarray(counts, dtype=float)
    coarse_layout, hats, spacing = coarse_problem(layout, n_coarse, counts.shape[0])
    theta, _, _, _ = solve_likelihood(coarse_layout, counts, regularisation / spacing, rtol=rtol, atol=atol,
                                      max_cycles=max_cycles)
    theta = theta + 1e-9  # no exact zeros (EM keeps a zero entry at zero)
    return (theta / theta.sum(axis=0, keepdims=True)) @ hats

