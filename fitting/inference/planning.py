"""Optimal measurement design from the expected Fisher information (pure computation, no I/O).

The problem: choose shots ``n_c >= 0`` on candidate probes c (coherent and thermal photon
numbers) so that the total ``sum_c n_c`` is smallest while every target figure j meets its
standard error ``t_j``:

    minimise sum_c n_c   subject to   g_j^T J(n)^{-1} g_j <= t_j^2,
    J(n) = B + sum_c n_c I_c,

where ``I_c`` is the expected Fisher information per shot of candidate c (multinomial
outcome counts, ``sum_k a_k a_k^T / q_k`` with ``a_k = dq_k/dx``), ``B`` a fixed information
(the Gaussian probe-calibration prior ``1/sigma^2`` on the probe scale s, plus any probes
whose shots are fixed), and ``g_j`` the gradient of figure j (delta method). With one target
this is a c-optimal design, with several a minimax-A (L-optimal) design. Each constraint is
convex in ``n`` (the matrix inverse is matrix-convex), so the problem is convex.

Solution (column generation): a multiplicative warm start over all candidates picks a few
probes; the restricted problem is solved exactly (SLSQP on the few shot numbers); the
Lagrange multipliers mu_j of the restricted optimum give each candidate its sensitivity
``s_c = sum_j mu_j g_j^T J^{-1} I_c J^{-1} g_j``; at the optimum ``s_c <= 1`` everywhere
with equality on the support (the equivalence theorem of optimal design), otherwise the most
sensitive candidates join and the restricted problem is solved again.

Calibration floor: loss and probe calibration are degenerate, so with a calibration prior
some figures keep a variance however many shots are taken,
``floor_j = lim_{N -> inf} g_j^T (B + N M)^{-1} g_j = g_j^T V (V^T B V)^{-1} V^T g_j``
with V spanning the null space of the data information M.

Conventions: photon numbers are mean photons per shot at the reference plane; the design is
linearised at the guessed parameters with the probe scale s = 1.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize

from povmfit.models import DetectorModel, choose_cutoff

from povmfit.fitting.inference.objective import PROBABILITY_FLOOR, povm_and_jacobian, scaled_probe_distributions

__all__ = [
    "candidate_grid", "probe_information", "figure_gradient", "prior_information", "variances",
    "calibration_floor", "scale_to_targets", "optimal_shots", "prune_design", "round_shots", "DesignError",
    "NULL_TOLERANCE",
]

NULL_TOLERANCE = 1e-10  # eigenvalues below this fraction of the largest span the null space
_SENSITIVITY_TOLERANCE = 1e-3  # optimal when no candidate's sensitivity exceeds 1 by more
_MAX_ROUNDS = 30


class DesignError(ValueError):
    """No design over the candidates meets the constraints (message names the constraint)."""


# ----- candidates and information ---------------------------------------------------------------
def candidate_grid(coherent_range, thermal_range, n_coherent: int = 32, n_thermal: int = 7):
    """Candidate probes: every combination of coherent and thermal levels, (coherent, thermal).

    Levels are geometric (finer where little light makes a big difference) from the range's
    lower end (or 1/400 of its upper end, when the lower end is 0) to its upper end, rounded to
    three significant digits, plus 0 when the range starts at 0. A range with equal ends gives
    that one level.
    """
    def levels(lo, hi, count):
        if hi <= lo:
            return np.array([float(lo)])
        start = lo if lo > 0 else hi / 400.0
        out = np.geomspace(start, hi, count - (1 if lo == 0 else 0))
        out = np.unique(np.clip([float(f"{v:.3g}") for v in out], lo, hi))  # values a lab can set
        return np.concatenate([[0.0], out]) if lo == 0 else out

    a, t = np.meshgrid(levels(*coherent_range, n_coherent), levels(*thermal_range, n_thermal), indexing="ij")
    return a.ravel(), t.ravel()


def probe_information(model: DetectorModel, values, coherent, thermal, calibrated: bool, tolerance: float = 1e-10):
    """Per-shot Fisher information of every probe, shape (n_probes, P, P), P = model
    parameters (+ the probe scale s, last, when ``calibrated``); also the outcome
    probabilities q[p, k] and the POVM with its Jacobian, theta (K, N) and (K, N, M).

    The derivative in the probe scale s (at s = 1) is that of the fit's objective
    (``objective.scaled_probe_distributions``).
    """
    coherent = np.asarray(coherent, dtype=float)
    thermal = np.asarray(thermal, dtype=float)
    n_photons = choose_cutoff(coherent, thermal, tolerance)
    x = np.array([float(values[name]) for name in model.parameter_names])
    theta, jac = povm_and_jacobian(model, n_photons)(x)
    theta, jac = np.asarray(theta), np.asarray(jac)
    inside, d_distribution = scaled_probe_distributions(coherent, thermal, 1.0, n_photons)
    q = inside @ theta.T
    dq = np.tensordot(inside, jac, axes=(1, 1))  # (C, K, M)
    if calibrated:
        dq = np.concatenate([dq, (d_distribution @ theta.T)[..., None]], axis=2)
    usable = q > PROBABILITY_FLOOR
    weight = np.where(usable, 1.0 / np.where(usable, q, 1.0), 0.0)
    info = np.einsum("ck,cki,ckj->cij", weight, dq, dq)
    return info, q, (theta, jac)


def figure_gradient(model: DetectorModel, values, name: str, calibrated: bool, povm, gate_duration_s=None):
    """(value, gradient over the design parameters) of a figure or parameter ``name``;
    None when the model has no such figure. ``povm`` is (theta, d theta/d parameters) from
    :func:`probe_information`. The probe scale has gradient 0."""
    names = list(model.parameter_names)
    size = len(names) + (1 if calibrated else 0)
    gradient = np.zeros(size)
    if name in names:
        gradient[names.index(name)] = 1.0
        return float(values[name]), gradient
    if name.startswith("dark_") and name.endswith("_per_pixel" if "rate" not in name else "_per_pixel_hz"):
        if "dark_probability" not in names or model.size < 2:
            return None
        d = float(values["dark_probability"])
        gradient[names.index("dark_probability")] = 1.0
        if name == "dark_click_probability_per_pixel":
            return d, gradient
        if name != "dark_count_rate_per_pixel_hz" or not gate_duration_s:
            return None
        return -np.log1p(-d) / gate_duration_s, gradient / (1.0 - d) / gate_duration_s
    if name in ("vacuum_click_probability", "dark_count_rate_hz"):
        theta, jac = povm
        p_vac = 1.0 - float(theta[0, 0])
        gradient[: len(names)] = -np.asarray(jac)[0, 0]
        if name == "vacuum_click_probability":
            return p_vac, gradient
        if not gate_duration_s:
            return None
        return -np.log1p(-min(p_vac, 1 - 1e-15)) / gate_duration_s, gradient / (1.0 - p_vac) / gate_duration_s
    return None


def prior_information(size: int, calibration_uncertainty) -> np.ndarray:
    """B: the Gaussian prior 1/sigma^2 on the probe scale (last parameter), else zeros."""
    base = np.zeros((size, size))
    if calibration_uncertainty:
        base[-1, -1] = 1.0 / calibration_uncertainty**2
    return base


# ----- variances and floors ---------------------------------------------------------------------
def _information(shots, info, base):
    return base + np.einsum("c,cij->ij", shots, info)


def variances(shots, info, base, gradients) -> np.ndarray:
    """g_j^T J^{-1} g_j for every row of ``gradients`` (J, P); inf where J cannot determine it."""
    matrix = _information(np.asarray(shots, float), info, base)
    return _quadratic_forms(matrix, gradients)


def _quadratic_forms(matrix, gradients):
    values, vectors = np.linalg.eigh(matrix)
    top = max(values.max(), 1e-300)
    good = values > NULL_TOLERANCE * top
    projected = gradients @ vectors  # (J, P)
    out = np.sum(projected[:, good] ** 2 / values[good], axis=1)
    lost = np.sum(projected[:, ~good] ** 2, axis=1) > 1e-12 * np.sum(gradients**2, axis=1)
    return np.where(lost, np.inf, out)


def calibration_floor(shots, info, base, gradients) -> np.ndarray:
    """Variance of every figure with infinitely many shots in the proportions of ``shots``
    (0 when the data alone determine it; inf when nothing does)."""
    data = np.einsum("c,cij->ij", np.asarray(shots, float), info)
    values, vectors = np.linalg.eigh(data)
    null = vectors[:, values <= NULL_TOLERANCE * max(values.max(), 1e-300)]
    if null.shape[1] == 0:
        return np.zeros(len(gradients))
    return _quadratic_forms(null.T @ base @ null, gradients @ null)


def scale_to_targets(shots, info, base, gradients, targets) -> float:
    """Smallest factor k with every variance of ``k * shots`` at or below its target^2
    (inf when even infinitely many shots in these proportions do not reach a target)."""
    limit = np.asarray(targets, float) ** 2
    floor = calibration_floor(shots, info, base, gradients)
    if np.any(floor >= limit * (1 - 1e-9)):
        return np.inf
    if not np.any(base):  # no prior: variances scale as 1/k
        return float(np.max(variances(shots, info, base, gradients) / limit))

    def excess(log_k):
        return float(np.max(np.log(variances(np.exp(log_k) * shots, info, base, gradients) / limit)))

    lo, hi = -60.0, 1.0
    while excess(hi) > 0:
        lo, hi = hi, hi + 10.0
    return float(np.exp(optimize.brentq(excess, lo, hi, xtol=1e-12, rtol=1e-12)))


# ----- the optimal design -----------------------------------------------------------------------
def _sensitivities(shots, info, base, gradients, targets):
    """d[c, j] = g_j^T J^{-1} I_c J^{-1} g_j / t_j^2 and the variances / t_j^2."""
    matrix = _information(shots, info, base)
    u = np.linalg.solve(matrix + 1e-300 * np.eye(len(matrix)), gradients.T)  # (P, J)
    d = np.einsum("ij,cik,kj->cj", u, info, u) / targets**2
    return d, np.sum(gradients.T * u, axis=0) / targets**2


def _warm_start(info, base, gradients, targets, rounds: int = 200):
    """Multiplicative algorithm on the target-weighted A criterion over every candidate."""
    weights = np.full(len(info), 1.0 / len(info))
    total = scale_to_targets(weights, info, base, gradients, targets)
    if not np.isfinite(total):
        return None
    for _ in range(rounds):
        d, ratio = _sensitivities(total * weights, info, base, gradients, targets)
        emphasis = ratio / ratio.max()
        score = d @ emphasis**4
        weights = weights * np.sqrt(score / max(weights @ score, 1e-300))
        weights /= weights.sum()
    return weights * scale_to_targets(weights, info, base, gradients, targets)


def _restricted(support, shots, info, base, gradients, targets):
    """Exact optimum over the probes in ``support`` (SLSQP, from the feasible ``shots``)."""
    sub = info[support]
    scale = max(shots[support].sum(), 1.0)
    limit = np.log(targets**2)

    def constraint(x):
        return limit - np.log(variances(scale * x, sub, base, gradients))

    def constraint_jacobian(x):
        d, ratio = _sensitivities(scale * x, sub, base, gradients, targets)
        return (scale * d / ratio).T

    x0 = shots[support] / scale
    result = optimize.minimize(
        lambda x: x.sum(), x0, jac=lambda x: np.ones_like(x), method="SLSQP",
        bounds=[(0.0, None)] * len(support),
        constraints=[{"type": "ineq", "fun": constraint, "jac": constraint_jacobian}],
        options={"maxiter": 500, "ftol": 1e-12},
    )
    x = np.clip(result.x, 0.0, None)
    out = np.zeros_like(shots)
    out[support] = scale * x
    k = scale_to_targets(out, info, base, gradients, targets)  # land exactly on the constraints
    candidate = out * k if np.isfinite(k) else out
    if candidate.sum() <= shots.sum() * (1 + 1e-9) or not np.all(np.isfinite(candidate)):
        return candidate
    return shots


def _multipliers(shots, info, base, gradients, targets):
    """Lagrange multipliers of the targets at a restricted optimum (non-negative least squares
    of sum_j mu_j d[c, j] = 1 over the support, active targets only)."""
    d, ratio = _sensitivities(shots, info, base, gradients, targets)
    support = shots > 1e-9 * shots.max()
    active = ratio > 1 - 1e-4
    mu = np.zeros(len(targets))
    if active.any():
        mu[active] = optimize.nnls(d[support][:, active], np.ones(support.sum()))[0]
    return mu, d


def optimal_shots(info, base, gradients, targets, allowed=None):
    """Continuous optimum: shots (C,) minimising the total with every target met.

    Args:
        info: (C, P, P) per-shot information of the candidates.
        base: (P, P) fixed information (calibration prior, fixed probes).
        gradients: (J, P) figure gradients; targets: (J,) standard errors.
        allowed: optional boolean mask (C,) of the candidates that may get shots.

    Raises:
        DesignError: some target cannot be met by any design over the candidates.
    """
    gradients, targets = np.atleast_2d(gradients), np.asarray(targets, float)
    allowed = np.ones(len(info), bool) if allowed is None else np.asarray(allowed, bool)
    everything = np.where(allowed, 1.0, 0.0)
    floor = calibration_floor(everything, info, base, gradients)
    if np.any(floor >= targets**2 * (1 - 1e-9)):
        worst = int(np.argmax(floor / targets**2))
        raise DesignError(f"target {worst}: floor {np.sqrt(floor[worst]):.4g} >= {targets[worst]:.4g}")
    masked = info * allowed[:, None, None]
    start = _warm_start(masked, base, gradients, targets)
    if start is None:
        raise DesignError("no design over the candidates meets the targets")
    support = np.argsort(start)[::-1][: max(3, gradients.shape[1] + 1)]
    shots = np.zeros(len(info))
    shots[support] = start[support]
    k = scale_to_targets(shots, masked, base, gradients, targets)
    shots = shots * k if np.isfinite(k) else start  # the few largest alone cannot do it: keep them all
    for _ in range(_MAX_ROUNDS):
        shots = _restricted(np.flatnonzero(shots > 0), shots, masked, base, gradients, targets)
        mu, d = _multipliers(shots, masked, base, gradients, targets)
        sensitivity = np.where(allowed, d @ mu, 0.0)
        if sensitivity.max() <= 1 + _SENSITIVITY_TOLERANCE:
            break
        newcomers = [c for c in np.argsort(sensitivity)[::-1][:4] if sensitivity[c] > 1 + _SENSITIVITY_TOLERANCE]
        shots[newcomers] = np.maximum(shots[newcomers], 1e-6 * shots.sum())
    shots[shots < 1e-9 * shots.max()] = 0.0
    return shots * scale_to_targets(shots, masked, base, gradients, targets)


def prune_design(shots, info, base, gradients, targets, max_probes: int, tolerance: float = 0.01,
                 min_probes: int = 1):
    """Fewer distinct probes: drop the probe with the fewest shots (re-optimising the others)
    while more than ``max_probes`` remain, or while dropping it costs less than ``tolerance``
    of the total; never below ``min_probes``. A probe is kept when dropping it makes a target
    unreachable."""
    shots = np.asarray(shots, float).copy()
    while True:
        support = np.flatnonzero(shots > 0)
        if len(support) <= max(min_probes, 1):
            return shots
        smallest = support[np.argmin(shots[support])]
        allowed = shots > 0
        allowed[smallest] = False
        try:
            reduced = _feasible(np.where(allowed, shots, 0.0), info, base, gradients, targets)
        except DesignError:
            return shots
        trial = _restricted(np.flatnonzero(allowed), reduced, info, base, gradients, targets)
        cost = trial.sum() / shots.sum() - 1
        if len(support) > max_probes or cost < tolerance:
            shots = trial
        else:
            return shots


def _feasible(shots, info, base, gradients, targets):
    k = scale_to_targets(shots, info, base, gradients, targets)
    if not np.isfinite(k):
        raise DesignError("dropping a probe makes a target unreachable")
    return shots * k


def round_shots(shots, info, base, gradients, targets, digits: int = 3) -> np.ndarray:
    """Whole shots, each rounded up to ``digits`` significant digits (rounding up keeps every
    target met: more shots never increase a variance); zeros stay zero."""
    shots = np.asarray(shots, float)
    out = np.zeros(len(shots), dtype=np.int64)
    for c in np.flatnonzero(shots > 0):
        place = max(int(np.floor(np.log10(shots[c]))) - digits + 1, 0)
        step = 10**place
        out[c] = int(np.ceil(shots[c] / step - 1e-9) * step)
    return out
