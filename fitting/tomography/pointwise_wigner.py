"""Point-by-point Wigner values of POVM elements from displaced-thermal probes, the smoothed
curve through them, and the phase-insensitivity test.

At one displacement alpha (probes with the same ``coherent_photons`` = |alpha|^2 and phase),
thermal probes of means nbar_j give, for every outcome k,

    Q_jk = sum_n P_th(n; nbar_j) p_kn,    p_kn = <n| D(alpha)^dagger Pi_k D(alpha) |n>.

With the saturation prior p_kn = p_kM for n >= M, the unknowns are p_k0..p_kM and the
design matrix is T[j, n] = P_th(n; nbar_j) for n < M and T[j, M] = sum_{n>=M} P_th(n; nbar_j)
= (nbar_j/(1+nbar_j))^M. The Wigner value is the Abel-summed alternating series

    W_k(alpha) = p_kM/pi + (2/pi) sum_{n<M} (-1)^n (p_kn - p_kM)

(normalisation: identity -> 1/pi, vacuum projector -> 2/pi at the origin). The p are found
by weighted least squares (weights = shots) under 0 <= p <= 1: ``method="simplex"`` (default)
also imposes sum_k p_kn = 1, so the values of all outcomes add up to 1/pi exactly;
``method="box"`` solves each outcome alone (exact bounded least squares,
:func:`box_least_squares`). M defaults to the
number of thermal levels minus one (as many unknowns as levels). Errors: seeded parametric
bootstrap (multinomial counts from the fitted Q).
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from scipy.special import chdtrc

from povmfit.models import fock_wigner_table_numpy

from povmfit.fitting.data.errors import ArgumentError

__all__ = [
    "PointwiseWigner", "SmoothedWigner", "PhaseTest", "pointwise_wigner", "smoothed_wigner",
    "phase_insensitivity_test", "thermal_design", "wigner_from_p", "displacement_groups", "box_least_squares",
    "BOOTSTRAP_TASK",
]

_DECIMALS = 9  # probe settings equal to 9 decimals count as the same setting
BOOTSTRAP_TASK = "bootstrap (Wigner)"  # progress task name: one step per displacement


def thermal_design(thermal_levels, saturation: int) -> np.ndarray:
    """T[j, n] = P_th(n; nbar_j) for n < M and the tail mass at n >= M in column M.

    Shape (n_rows, M+1); every row sums to 1 (geometric distribution, closed form).
    """
    nbar = np.asarray(thermal_levels, dtype=float)[:, None]
    ratio = nbar / (1.0 + nbar)
    n = np.arange(saturation)[None, :]
    head = ratio**n / (1.0 + nbar)
    return np.concatenate([head, ratio**saturation], axis=1)


def wigner_from_p(p) -> np.ndarray:
    """Abel-summed W = p_M/pi + (2/pi) sum_{n<M} (-1)^n (p_n - p_M); p has shape (..., M+1)."""
    p = np.asarray(p, dtype=float)
    top = p[..., -1]
    signs = (-1.0) ** np.arange(p.shape[-1] - 1)
    return top / math.pi + (2.0 / math.pi) * np.sum(signs * (p[..., :-1] - top[..., None]), axis=-1)


def displacement_groups(coherent, phase=None):
    """Probes grouped by displacement: list of (|alpha|^2, phase, probe indices).

    The phase of alpha = 0 is irrelevant and set to 0. Order: by |alpha|^2, then phase.
    """
    coherent = np.round(np.asarray(coherent, dtype=float), _DECIMALS)
    phase = np.zeros_like(coherent) if phase is None else np.round(np.mod(np.asarray(phase, dtype=float), 2 * math.pi), _DECIMALS)
    phase = np.where(coherent == 0, 0.0, phase)
    keys = sorted(set(zip(coherent.tolist(), phase.tolist())))
    return [(a, ph, np.nonzero((coherent == a) & (phase == ph))[0]) for a, ph in keys]


_ENUMERATE_UP_TO = 6  # unknowns up to which box problems are solved by visiting every face


def box_least_squares(design, targets) -> np.ndarray:
    """min ||design x - t||^2 over 0 <= x <= 1 for every column t of ``targets``.

    Shapes: design (n_rows, n), targets (n_rows, n_targets); returns (n_targets, n). Exact:
    for n <= 6 every face of the box (each unknown free, at 0 or at 1) is visited, the
    least-squares point of each face is computed for all targets at once, and the best
    feasible one is kept; an optimum with the most unknowns at a bound is the unique
    least-squares point of its face (a null direction of the face would lead to a bound), so
    it is among them. Targets whose unconstrained optimum is inside the box skip the faces.
    Larger n: scipy's bounded-variable least squares (BVLS), one target at a time, clipped
    to the box (it can step outside by rounding).
    """
    design = np.asarray(design, dtype=float)
    targets = np.asarray(targets, dtype=float)
    n = design.shape[1]
    if n > _ENUMERATE_UP_TO:
        from scipy import optimize

        solved = [optimize.lsq_linear(design, t, bounds=(0.0, 1.0), method="bvls").x for t in targets.T]
        return np.clip(np.stack(solved), 0.0, 1.0)  # BVLS may step outside by rounding
    out = np.linalg.lstsq(design, targets, rcond=None)[0].T  # unconstrained minimum: optimal where inside
    inside = np.all((out >= 0.0) & (out <= 1.0), axis=1)
    if inside.all():
        return out
    out[~inside] = _box_least_squares_by_faces(design, targets[:, ~inside])
    return out


def _box_least_squares_by_faces(design, targets) -> np.ndarray:
    """The face enumeration of :func:`box_least_squares` (n <= 6 unknowns)."""
    n = design.shape[1]
    best = np.full(targets.shape[1], np.inf)
    out = np.zeros((targets.shape[1], n))
    for face in itertools.product((0, 1, 2), repeat=n):  # 0: at 0, 1: at 1, 2: free
        face = np.asarray(face)
        free = face == 2
        fixed = np.where(face == 1, 1.0, 0.0)
        shifted = targets - (design @ fixed)[:, None]
        x = np.tile(fixed, (targets.shape[1], 1))
        if free.any():
            x[:, free] = np.linalg.lstsq(design[:, free], shifted, rcond=None)[0].T
        feasible = np.all((x >= 0.0) & (x <= 1.0), axis=1)
        value = np.sum((design @ x.T - targets) ** 2, axis=0)
        better = feasible & (value < best)
        best = np.where(better, value, best)
        out[better] = x[better]
    return out


def _solve_box(design, weights, q):
    """Per-outcome box problems; q may hold several frequency tables side by side: (rows, m*K)."""
    root = np.sqrt(weights)[:, None]
    return box_least_squares(root * design, root * q)


def _solve_simplex(design, weights, q):
    """min sum_j w_j ||Q_j - T_j p||^2 over p (K, M+1) with p >= 0, sum_k p_kn = 1."""
    root = np.sqrt(weights)[:, None]
    unconstrained = np.linalg.lstsq(root * design, root * q, rcond=None)[0].T  # (K, M+1)
    if unconstrained.min() >= 0.0:
        return unconstrained  # feasible: columns already sum to 1 (rows of T sum to 1)
    n_outcomes, size = unconstrained.shape
    start = np.clip(unconstrained, 0.0, None)
    start /= np.maximum(start.sum(axis=0, keepdims=True), 1e-300)
    # residual form, scaled so that the objective is of order one near the optimum
    a = root * design
    b = root * q
    scale = 1.0 / max(float(np.sum((a @ start.T - b) ** 2)), 1e-300)

    def objective(flat):
        residual = a @ flat.reshape(n_outcomes, size).T - b
        return scale * float(np.sum(residual**2))

    def gradient(flat):
        residual = a @ flat.reshape(n_outcomes, size).T - b
        return scale * 2.0 * (residual.T @ a).ravel()

    from scipy import optimize

    sums = np.kron(np.ones((1, n_outcomes)), np.eye(size))
    result = optimize.minimize(
        objective, start.ravel(), jac=gradient, method="SLSQP", bounds=[(0.0, 1.0)] * start.size,
        constraints=[{"type": "eq", "fun": lambda x: sums @ x - 1.0, "jac": lambda x: sums}],
        options={"ftol": 1e-15, "maxiter": 500},
    )
    p = np.clip(result.x.reshape(n_outcomes, size), 0.0, 1.0)
    return p / p.sum(axis=0, keepdims=True)


def _solve(design, weights, q, method):
    # With two outcomes the box problems of the two outcomes are mirror images (Q_1 = 1 - Q_0,
    # bounds symmetric), so the box solution already satisfies p_0 + p_1 = 1: use it.
    if method == "simplex" and q.shape[1] > 2:
        return _solve_simplex(design, weights, q)
    return _solve_box(design, weights, q)


@dataclass(frozen=True)
class PointwiseWigner:
    """Pointwise Wigner values.

    Attributes:
        alpha: (n_points,) complex displacements, alpha = sqrt(coherent_photons) e^{i phase}.
        values, stderr: (n_outcomes, n_points) W_k(alpha) and bootstrap standard errors.
        p: (n_points, n_outcomes, M+1) estimated p_kn(alpha), n = 0..M (M = saturation).
        saturation: M; levels: (n_points,) number of distinct thermal levels per point.
        probes: tuple of (n_points) arrays with the probe indices used at each point.
        method, bootstrap, seed: how it was computed.
        replicate_values: (bootstrap, n_outcomes, n_points) bootstrap Wigner values.
    """

    alpha: np.ndarray
    values: np.ndarray
    stderr: np.ndarray
    p: np.ndarray
    saturation: int
    levels: np.ndarray
    probes: tuple
    method: str
    bootstrap: int
    seed: int | None
    replicate_values: np.ndarray

    def to_dict(self) -> dict:
        return {
            "re_alpha": self.alpha.real.tolist(), "im_alpha": self.alpha.imag.tolist(),
            "values": self.values.tolist(), "stderr": self.stderr.tolist(),
            "saturation": self.saturation, "levels": self.levels.tolist(), "method": self.method,
            "bootstrap": self.bootstrap, "seed": self.seed,
        }


def pointwise_wigner(coherent, thermal, counts, phase=None, *, saturation: int | None = None,
                     method: str = "simplex", bootstrap: int = 100, seed: int | None = 0,
                     progress=None) -> PointwiseWigner | None:
    """Wigner values at every displacement probed at two or more thermal levels.

    Args:
        coherent, thermal: (n_probes,) |alpha|^2 and nbar per probe; phase: optional (n_probes,)
            displacement phases in radians.
        counts: (n_probes, n_outcomes) outcome counts.
        saturation: M for every point; default (number of distinct thermal levels - 1), the
            smallest over the points.
        method: "simplex" or "box" (see module docstring).
        bootstrap: parametric-bootstrap resamples (0 or 1: no standard errors); seed: theirs.
        progress: optional callback ``progress(task, done, total)`` (task
            :data:`BOOTSTRAP_TASK`); nothing is printed.
    Returns:
        :class:`PointwiseWigner`, or None when no displacement has two thermal levels.
    """
    if method not in ("simplex", "box"):
        raise ArgumentError(f"method: expected 'simplex' or 'box', got {method!r}")
    counts = np.asarray(counts, dtype=np.int64)
    thermal = np.asarray(thermal, dtype=float)
    shots = counts.sum(axis=1)
    groups = [(a, ph, idx) for a, ph, idx in displacement_groups(coherent, phase)
              if np.unique(np.round(thermal[idx], _DECIMALS)).size >= 2]
    if not groups:
        return None
    levels = np.array([np.unique(np.round(thermal[idx], _DECIMALS)).size for _, _, idx in groups])
    m = int(levels.min() - 1) if saturation is None else int(saturation)
    if m < 1:
        raise ArgumentError(f"saturation: expected a photon number M >= 1, got {m}"
                            + ("" if saturation is not None else " (one fewer than the fewest thermal levels at a point)"))
    designs = [thermal_design(thermal[idx], m) for _, _, idx in groups]
    weights = [shots[idx] / shots[idx].mean() for _, _, idx in groups]
    frequencies = [counts[idx] / shots[idx, None] for _, _, idx in groups]
    p = np.stack([_solve(t, w, f, method) for t, w, f in zip(designs, weights, frequencies)])
    rng = np.random.default_rng(seed)
    replicas = _bootstrap_p(p, designs, weights, [shots[idx] for _, _, idx in groups], method, bootstrap, rng, progress)
    values = wigner_from_p(p).T
    replicate_values = np.swapaxes(wigner_from_p(replicas), 1, 2)  # (bootstrap, K, n_points)
    stderr = replicate_values.std(axis=0, ddof=1) if bootstrap > 1 else np.zeros_like(values)
    alpha = np.array([math.sqrt(a) * complex(math.cos(ph), math.sin(ph)) for a, ph, _ in groups])
    return PointwiseWigner(alpha, values, stderr, p, m, levels, tuple(idx for _, _, idx in groups),
                           method, int(bootstrap), seed, replicate_values)


def _bootstrap_p(p, designs, weights, shots, method, replicates, rng, progress):
    """(replicates, n_points, n_outcomes, M+1) re-solved p from multinomial resamples.

    The counts are drawn replicate by replicate, point by point (in that order); the box
    problems of all replicates of one point are then solved together.
    """
    if replicates <= 1:
        return np.empty((0,) + p.shape)
    expected = []
    for t, point in zip(designs, p):
        q = np.clip(t @ point.T, 0.0, None)
        expected.append(q / q.sum(axis=1, keepdims=True))
    draws = [[rng.multinomial(s, q) / s[:, None] for s, q in zip(shots, expected)] for _ in range(replicates)]
    out = np.empty((replicates,) + p.shape)
    n_outcomes = p.shape[1]
    for i, (t, w) in enumerate(zip(designs, weights)):
        tables = [draw[i] for draw in draws]
        if method == "box" or n_outcomes <= 2:  # see _solve: the box solution is used
            solved = _solve_box(t, w, np.concatenate(tables, axis=1))  # (replicates*K, M+1)
            out[:, i] = solved.reshape(replicates, n_outcomes, -1)
        else:
            out[:, i] = [_solve(t, w, table, method) for table in tables]
        if progress is not None:
            progress(BOOTSTRAP_TASK, i + 1, len(designs))
    return out


# ----- the smoothed curve ----------------------------------------------------------------------
@dataclass(frozen=True)
class SmoothedWigner:
    """Least-squares fit of the saturating form (DESIGN section 2) to the pointwise values.

    Attributes:
        theta: (n_outcomes, M+1) fitted theta(0..M) (bounded to [0, 1]).
        saturation: M; chi_square, dof, p_value: weighted misfit to the pointwise values.
        alpha: (n_eval,) where the curve is reported; values, stderr: (n_outcomes, n_eval).
        candidates: {M: AIC} for the saturation numbers tried when M was chosen from the data.
    """

    theta: np.ndarray
    saturation: int
    chi_square: float
    dof: int
    p_value: float
    alpha: np.ndarray
    values: np.ndarray
    stderr: np.ndarray
    candidates: dict

    def to_dict(self) -> dict:
        return {
            "theta": self.theta.tolist(), "saturation": self.saturation, "chi_square": self.chi_square,
            "dof": self.dof, "p_value": self.p_value, "re_alpha": self.alpha.real.tolist(),
            "im_alpha": self.alpha.imag.tolist(), "values": self.values.tolist(), "stderr": self.stderr.tolist(),
            "candidates": {str(k): v for k, v in self.candidates.items()},
        }


def _bases(alpha, saturations) -> dict:
    """{M: (n_points, M+1) W of the unit vector e_n in the saturating form} for every M given.

    e_n (n < M) gives the Fock term W_n(alpha); e_M gives 1/pi - sum_{n<M} W_n(alpha)
    (``saturating_wigner`` with theta = e_n); one table of W_n serves every M.
    """
    top = max(saturations)
    table = fock_wigner_table_numpy(np.asarray(alpha), top).T  # (n_points, top)
    return {m: np.concatenate([table[:, :m], 1.0 / math.pi - table[:, :m].sum(axis=1, keepdims=True)], axis=1)
            for m in saturations}


def _fit_saturating(values, sigma, basis):
    """Weighted bounded least squares per outcome.

    values: (n_sets, K, n_points) sets of pointwise values sharing the errors sigma (K, n_points).
    Returns theta (n_sets, K, M+1) and the chi-square of every set (n_sets,).
    """
    root = 1.0 / sigma
    theta = np.stack([box_least_squares(root[k][:, None] * basis, (root[k] * values[:, k]).T)
                      for k in range(sigma.shape[0])], axis=1)
    chi_square = np.sum(((theta @ basis.T - values) * root) ** 2, axis=(1, 2))
    return theta, chi_square


def smoothed_wigner(pointwise: PointwiseWigner, saturation: int | None = None, n_grid: int = 41,
                    max_saturation: int = 12) -> SmoothedWigner:
    """Fit the saturating Gaussian-modulated polynomial to all pointwise values.

    The errors of the pointwise values are floored at 1e-3 / pi so that points with zero
    bootstrap spread do not dominate. Without ``saturation`` M is chosen by the smallest AIC
    (chi-square + 2 x number of fitted theta) among 1..min(max_saturation, distinct |alpha| - 1).
    The curve is reported at the pointwise displacements and on ``n_grid`` real alphas from 0
    to the largest |alpha|; its errors come from refitting every bootstrap replicate.
    """
    if saturation is not None and saturation < 1:
        raise ArgumentError(f"saturation: expected a photon number M >= 1, got {saturation!r}")
    values = pointwise.values
    sigma = np.maximum(pointwise.stderr, 1e-3 / math.pi)
    radii = np.unique(np.round(np.abs(pointwise.alpha), _DECIMALS)).size
    grid = np.linspace(0.0, np.abs(pointwise.alpha).max(), n_grid).astype(complex)
    alpha = np.concatenate([pointwise.alpha, grid])
    tried = [saturation] if saturation is not None else list(range(1, max(1, min(max_saturation, radii - 1)) + 1))
    bases = _bases(alpha, tried)  # rows: the pointwise displacements, then the grid
    n_points = pointwise.alpha.size
    candidates = {}
    if saturation is None:
        for m in tried:
            _, chi_square = _fit_saturating(values[None], sigma, bases[m][:n_points])
            candidates[m] = float(chi_square[0]) + 2.0 * values.shape[0] * (m + 1)
        saturation = min(candidates, key=candidates.get)
    evaluation = bases[saturation]
    basis = evaluation[:n_points]
    theta, chi_square = _fit_saturating(values[None], sigma, basis)
    theta, chi_square = theta[0], float(chi_square[0])
    dof = max(values.size - theta.size, 0)
    replicas = pointwise.replicate_values
    if len(replicas) > 1:
        stderr = np.std(_fit_saturating(np.asarray(replicas), sigma, basis)[0] @ evaluation.T, axis=0, ddof=1)
    else:
        stderr = np.zeros((values.shape[0], alpha.size))
    return SmoothedWigner(theta, int(saturation), chi_square, int(dof),
                          float(chdtrc(dof, chi_square)) if dof > 0 else float("nan"),
                          alpha, theta @ evaluation.T, stderr, candidates)


# ----- phase insensitivity ------------------------------------------------------------------------
@dataclass(frozen=True)
class PhaseTest:
    """Chi-square homogeneity test of the outcome counts of probes that differ only in phase.

    Attributes:
        chi_square, dof, p_value: pooled over all (|alpha|^2, nbar) settings probed at two or
            more phases (Pearson chi-square of the probes x outcomes contingency table).
        settings: number of such settings; worst: the setting with the smallest p-value,
            {coherent_photons, thermal_photons, p_value}.
    """

    chi_square: float
    dof: int
    p_value: float
    settings: int
    worst: dict

    def to_dict(self) -> dict:
        return {"chi_square": self.chi_square, "dof": self.dof, "p_value": self.p_value,
                "settings": self.settings, "worst": self.worst}


def _contingency(table):
    table = table[:, table.sum(axis=0) > 0]
    expected = table.sum(axis=1, keepdims=True) * table.sum(axis=0, keepdims=True) / table.sum()
    return float(np.sum((table - expected) ** 2 / expected)), (table.shape[0] - 1) * (table.shape[1] - 1)


def phase_insensitivity_test(coherent, thermal, counts, phase) -> PhaseTest | None:
    """Do probes with the same |alpha|^2 and nbar but different phases give the same outcome
    distribution? None when no setting was probed at two phases (or no phases are given)."""
    if phase is None:
        return None
    counts = np.asarray(counts, dtype=float)
    coherent = np.round(np.asarray(coherent, dtype=float), _DECIMALS)
    thermal = np.round(np.asarray(thermal, dtype=float), _DECIMALS)
    phase = np.round(np.mod(np.asarray(phase, dtype=float), 2 * math.pi), _DECIMALS)
    total, dof, settings, worst = 0.0, 0, 0, {}
    for a, t in sorted(set(zip(coherent[coherent > 0].tolist(), thermal[coherent > 0].tolist()))):
        rows = np.nonzero((coherent == a) & (thermal == t))[0]
        if np.unique(phase[rows]).size < 2:
            continue
        chi_square, d = _contingency(counts[rows])
        if d == 0:
            continue
        total, dof, settings = total + chi_square, dof + d, settings + 1
        p_value = float(chdtrc(d, chi_square))
        if not worst or p_value < worst["p_value"]:
            worst = {"coherent_photons": a, "thermal_photons": t, "p_value": p_value}
    if settings == 0:
        return None
    return PhaseTest(total, dof, float(chdtrc(dof, total)), settings, worst)
