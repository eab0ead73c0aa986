"""POVM and Jacobian speed of a click-array model (array:8+dark+crosstalk at 100 photon numbers).

Measured: compile time of ``jax.jit`` of (POVM, jacfwd POVM), and the median time of one
evaluation after compilation. Baseline in the same run: plain numpy, the POVM from the
Sperling-Vogel-Agarwal click formula (PRL 108, 093601 (2012)) followed by the crosstalk
matrix, and its Jacobian by central finite differences.
"""
from __future__ import annotations

import statistics
import time
from math import comb

import jax
import numpy as np

from povmfit.models import parse_model_spec

SPEC = "array:8+dark+crosstalk"
N_PHOTONS = 100
PARAMS = np.array([0.62, 0.01, 0.07])  # efficiency, dark probability, crosstalk probability
REPEATS = 200


def _median_seconds(call, repeats):
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _numpy_crosstalk(x, pixels):
    """Same crosstalk model as the JAX stage: Binomial(j, x) tries, each lands on one of the
    other N-1 pixels uniformly."""
    size = pixels + 1
    f = np.arange(size)
    step = np.zeros((size, size))
    step[f, f] = np.where(f > 0, (f - 1) / (pixels - 1), 1.0)
    step[f[:-1] + 1, f[:-1]] = np.where(f[:-1] > 0, (pixels - f[:-1]) / (pixels - 1), 0.0)
    out = np.zeros((size, size))
    for j in range(size):
        state = np.eye(size)[:, j]
        for a in range(j + 1):
            out[:, j] += comb(j, a) * x**a * (1 - x) ** (j - a) * state
            state = step @ state
    return out


def _numpy_povm(params, pixels=8, n_photons=N_PHOTONS):
    eta, d, x = params
    n = np.arange(n_photons)
    theta = np.zeros((pixels + 1, n_photons))
    for k in range(pixels + 1):
        for j in range(k + 1):
            theta[k] += comb(pixels, k) * (-1) ** j * comb(k, j) * (1 - d) ** (pixels - k + j) * (1 - eta + eta * (k - j) / pixels) ** n
    return _numpy_crosstalk(x, pixels) @ theta


def _numpy_povm_and_jacobian(params):
    theta = _numpy_povm(params)
    columns = []
    for i in range(params.size):
        h = 1e-6
        e = np.zeros_like(params)
        e[i] = h
        columns.append((_numpy_povm(params + e) - _numpy_povm(params - e)) / (2 * h))
    return theta, np.stack(columns, axis=-1)


def run() -> list[dict]:
    model = parse_model_spec(SPEC)
    povm = lambda p: model.povm(p, N_PHOTONS)  # noqa: E731
    both = jax.jit(lambda p: (povm(p), jax.jacfwd(povm)(p)))
    params = jax.numpy.asarray(PARAMS)

    start = time.perf_counter()
    jax.block_until_ready(both(params))
    compile_s = time.perf_counter() - start

    eval_s = _median_seconds(lambda: jax.block_until_ready(both(params)), REPEATS)
    baseline_s = _median_seconds(lambda: _numpy_povm_and_jacobian(PARAMS), max(REPEATS // 10, 10))

    # sanity: both routes compute the same POVM and Jacobian
    theta, jac = both(params)
    theta_np, jac_np = _numpy_povm_and_jacobian(PARAMS)
    agree = bool(np.allclose(theta, theta_np, atol=1e-10) and np.allclose(jac, jac_np, atol=1e-6))

    return [
        {"name": f"{SPEC} n={N_PHOTONS}: jit compile of (POVM, jacfwd)", "value": compile_s, "unit": "s",
         "baseline": None, "ratio": None, "target": "< 3 s", "passed": compile_s < 3.0},
        {"name": f"{SPEC} n={N_PHOTONS}: POVM + Jacobian per eval (speed-up = baseline/value)", "value": eval_s * 1e3,
         "unit": "ms", "baseline": baseline_s * 1e3, "ratio": baseline_s / eval_s, "target": "< 1 ms",
         "passed": eval_s < 1e-3},
        {"name": "numpy Sperling + finite differences agrees with JAX", "value": float(agree), "unit": "bool",
         "baseline": None, "ratio": None, "target": "1", "passed": agree},
    ]
