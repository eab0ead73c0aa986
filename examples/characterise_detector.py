"""Characterise a detector from a probe scan and print its datasheet figures from Python.

Scenario (invented, and the data are simulated): the Harbour Street Quantum Lab has a
Kestrel Photonics KP-8, an eight-pixel superconducting nanowire array. They illuminate it
with attenuated laser pulses (coherent probes) of known mean photon number, 20,000 shots
each, record how many pixels click, and want its system efficiency, its dark-click
probability per gate and the crosstalk between pixels, with honest uncertainties. Their
power-meter calibration of the probe photon numbers is good to 3 % (1 sigma).

Run:  python examples/characterise_detector.py [--seed N]
"""
from __future__ import annotations

import argparse

import numpy as np

import povmfit
from povmfit.models import parse_model_spec, probe_distributions

# The invented "true" device that the simulation stands in for.
DEVICE = "array:8+dark+crosstalk"
TRUE_VALUES = {"efficiency": 0.72, "dark_probability": 2e-4, "crosstalk_probability": 0.03}
GATE_DURATION_S = 50e-9  # 50 ns counting gate
CALIBRATION = 0.03  # relative 1-sigma uncertainty of the probe photon numbers


def simulate_scan(seed: int, shots: int = 20_000):
    """Counts of the invented KP-8 for a ladder of coherent probes (photons per pulse)."""
    coherent = np.array([0.0, 0.0, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 3.0, 5.0, 8.0, 12.0])
    thermal = np.zeros_like(coherent)
    model = parse_model_spec(DEVICE)
    n_photons = 60  # tail mass of Poisson(12) beyond 60 photons is far below 1e-10
    theta = np.asarray(model.povm(model.pack(TRUE_VALUES), n_photons))
    q = np.asarray(probe_distributions(coherent, thermal, n_photons)) @ theta.T
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(shots, q / q.sum(axis=1, keepdims=True))
    labels = ["dark"] * 2 + [f"pulse {m:g}" for m in coherent[2:]]
    return povmfit.scan_from_arrays(coherent, thermal, counts, labels=labels, source="KP-8 scan (simulated)")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=2024)
    args = parser.parse_args(argv)

    scan = simulate_scan(args.seed)
    print(f"Kestrel Photonics KP-8 at the Harbour Street Quantum Lab (simulated data): "
          f"{scan.n_probes} probes, {int(scan.shots.sum())} shots, outcomes 0..{scan.max_outcome} pixels")
    result = povmfit.fit(scan, DEVICE, calibration_uncertainty=CALIBRATION)
    print(f"model {result.model.spec}: deviance {result.deviance:.1f} on {result.dof} dof, "
          f"goodness-of-fit p = {result.p_value:.2f}, converged: {result.converged}\n")

    print(f"{'figure':<26}{'value':>11}{'stderr':>11}{'stat':>11}{'calib':>11}   95% interval")
    for name, fig in result.figures(gate_duration_s=GATE_DURATION_S).items():
        stat = fig.get("stat_stderr")
        calib = fig.get("calibration_stderr")
        print(f"{name:<26}{fig['value']:>11.4g}{fig['stderr']:>11.2g}"
              f"{'' if stat is None else format(stat, '.2g'):>11}{'' if calib is None else format(calib, '.2g'):>11}"
              f"   [{fig['ci95'][0]:.4g}, {fig['ci95'][1]:.4g}]")
    print(f"\n(true values of the simulated device: {TRUE_VALUES})")
    eff = result.values["efficiency"]
    print(f"The efficiency {eff:.3f} carries the {CALIBRATION:.0%} probe calibration: its calibration part "
          f"({result.calibration_stderr['efficiency']:.3f}) outweighs the statistical part "
          f"({result.stat_stderr['efficiency']:.4f}) of this scan.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
