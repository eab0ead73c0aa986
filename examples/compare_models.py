"""Which physical model explains a detector? Rank candidate models and explain the choice.

Scenario (invented, and the data are simulated): the Harbour Street Quantum Lab tests a
four-bin time-multiplexed click detector built from one avalanche photodiode, the
"Kestrel Photonics KP-4T". Its datasheet promises no crosstalk; the lab suspects that an
avalanche in one time bin sometimes triggers an afterpulse in the next, which would look
like crosstalk between bins. They scan it with coherent probes and let the data decide
between loss only, loss plus dark clicks, and loss plus dark clicks plus crosstalk.

Run:  python examples/compare_models.py [--seed N]
"""
from __future__ import annotations

import argparse

import numpy as np

import povmfit
from povmfit.models import parse_model_spec, probe_distributions

DEVICE = "array:4+dark+crosstalk"  # what the simulated device really is
TRUE_VALUES = {"efficiency": 0.55, "dark_probability": 1e-3, "crosstalk_probability": 0.06}
CANDIDATES = ["array:4", "array:4+dark", "array:4+dark+crosstalk"]


def simulate_scan(seed: int, shots: int = 20_000):
    coherent = np.array([0.0, 0.1, 0.2, 0.5, 1.0, 2.0, 3.0, 5.0, 8.0, 12.0])
    thermal = np.zeros_like(coherent)
    model = parse_model_spec(DEVICE)
    n_photons = 60  # tail mass of Poisson(12) beyond 60 photons is far below 1e-10
    theta = np.asarray(model.povm(model.pack(TRUE_VALUES), n_photons))
    q = np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T
    counts = np.random.default_rng(seed).multinomial(shots, q / q.sum(axis=1, keepdims=True))
    return povmfit.scan_from_arrays(coherent, thermal, counts, source="KP-4T scan (simulated)")


def print_table(comparison) -> None:
    print(f"{'model':<26}{'k':>3}{'deviance':>11}{'dof':>5}{'p':>9}{'dAIC':>9}{'dBIC':>9}{'weight':>8}{'CV':>10}")
    for row in comparison.table:
        cv = "-" if row["cv_deviance"] is None else f"{row['cv_deviance']:.1f}"
        print(f"{row['model']:<26}{row['parameters']:>3}{row['deviance']:>11.1f}{row['dof']:>5}"
              f"{row['p_value']:>9.2g}{row['delta_aic']:>9.1f}{row['delta_bic']:>9.1f}{row['weight']:>8.3f}{cv:>10}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=11)
    args = parser.parse_args(argv)

    scan = simulate_scan(args.seed)
    print("Kestrel Photonics KP-4T at the Harbour Street Quantum Lab (simulated data)\n")
    comparison = povmfit.compare(scan, CANDIDATES, cv_folds=5, cv_top=2, seed=args.seed)
    print_table(comparison)
    print("\nlikelihood-ratio tests (one feature added at a time):")
    for test in comparison.tests:
        print(f"  {test['null']:<14} -> {test['alternative']:<24} statistic {test['statistic']:9.1f}  "
              f"p = {test['p_value']:.2g}  ({test['reference']})")
    print(f"\nverdict: {comparison.verdict}")

    chosen = comparison.fits[comparison.chosen.spec]
    print("\nWhy: a model is adequate when its deviance is compatible with shot noise (p >= 0.01); "
          "among adequate models the lowest BIC wins, so an extra feature must lower the deviance "
          "by more than ln(total shots) per parameter to be kept.")
    if "crosstalk_probability" in chosen.values:
        lo, hi = chosen.ci95["crosstalk_probability"]
        print(f"The data need crosstalk between bins: probability {chosen.values['crosstalk_probability']:.3f} "
              f"(95% interval {lo:.3f} to {hi:.3f}); the simulated device had {TRUE_VALUES['crosstalk_probability']}.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
