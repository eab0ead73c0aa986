"""Use an emulated detector inside a simulation: a heralded single-photon source.

Scenario (invented, and the data are simulated): at the Harbour Street Quantum Lab a
down-conversion source emits two-mode squeezed vacuum; a click of the idler's on/off
detector, a "Kestrel Photonics KP-1" nanowire, heralds a photon in the signal arm. The lab
first characterises the KP-1 from a probe scan (fit ``threshold+dark``), then asks what the
heralded signal state looks like *through that fitted detector*, and how much the
detector's parameter uncertainty moves the answer.

Physics: two-mode squeezed vacuum with mean photon number mu per mode has the joint
photon-number distribution P(n, n) = mu^n / (1 + mu)^(n+1) (thermal marginals). A herald
click projects the signal onto p_s(n) proportional to P(n) theta_click(n), with
theta_click(n) = P(click | n photons) of the herald detector. Reported per detector member:
the heralding probability P(click), the heralded single-photon probability p_s(1), the
heralded multi-photon probability p_s(n >= 2) and the heralded
g2(0) = sum n(n-1) p_s(n) / (sum n p_s(n))^2.

The detector enters as an Emulator: the point estimate, and an ensemble of parameter
vectors drawn from the fit's covariance (``detector_file.draw_parameter_ensemble``), so the
spread of each figure over the ensemble is the part of its uncertainty that comes from
not knowing the herald detector exactly. A Monte Carlo run with per-shot detector responses
(``Emulator.respond``) checks the exact numbers.

Run:  python examples/heralded_source.py [--seed N]
"""
from __future__ import annotations

import argparse

import numpy as np

import povmfit
from povmfit.models import parse_model_spec, probe_distributions, thermal_distribution

HERALD = "threshold+dark"
TRUE_HERALD = {"efficiency": 0.80, "dark_probability": 5e-4}  # the simulated KP-1
PAIR_MEAN = 0.1  # mean photon number per mode of the two-mode squeezed vacuum
N_PHOTONS = 40  # thermal(0.1) tail beyond 40 photons is about 1e-42


def characterise_herald(seed: int, shots: int = 5_000):
    """Simulate a short probe scan of the KP-1 and fit it: returns the FitResult."""
    coherent = np.array([0.0, 0.05, 0.1, 0.3, 1.0, 3.0])
    thermal = np.zeros_like(coherent)
    model = parse_model_spec(HERALD)
    theta = np.asarray(model.povm(model.pack(TRUE_HERALD), N_PHOTONS))
    q = np.asarray(probe_distributions(coherent, thermal, N_PHOTONS)) @ theta.T
    counts = np.random.default_rng(seed).multinomial(shots, q / q.sum(axis=1, keepdims=True))
    scan = povmfit.scan_from_arrays(coherent, thermal, counts, source="KP-1 scan (simulated)")
    return povmfit.fit(scan, model)


def heralded_figures(click_probability: np.ndarray, pairs: np.ndarray) -> dict:
    """Figures of the heralded signal for herald responses theta_click, shape (members, n)."""
    joint = click_probability * pairs[None, :]  # (members, n)
    herald_rate = joint.sum(axis=1)
    signal = joint / herald_rate[:, None]
    n = np.arange(pairs.size)
    mean = signal @ n
    return {
        "heralding probability": herald_rate,
        "p_signal(1)": signal[:, 1],
        "p_signal(n>=2)": signal[:, 2:].sum(axis=1),
        "heralded g2(0)": (signal @ (n * (n - 1))) / mean**2,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=5)
    parser.add_argument("--ensemble", type=int, default=400)
    parser.add_argument("--shots", type=int, default=200_000)
    args = parser.parse_args(argv)

    result = characterise_herald(args.seed)
    print("Herald: Kestrel Photonics KP-1 at the Harbour Street Quantum Lab (simulated data)")
    for name in result.model.parameter_names:
        print(f"  {name:<18} {result.values[name]:.5f} +- {result.stderr[name]:.5f}   (simulated truth {TRUE_HERALD[name]})")

    record = result.to_detector(provenance={"source": "examples/heralded_source.py (simulated)"})
    point = povmfit.Emulator.from_record(record)
    ensemble = point.ensemble(args.ensemble, seed=args.seed)
    pairs = np.asarray(thermal_distribution(PAIR_MEAN, N_PHOTONS))
    at_point = heralded_figures(point.povms(N_PHOTONS)[:, 1, :], pairs)
    spread = heralded_figures(ensemble.povms(N_PHOTONS)[:, 1, :], pairs)

    print(f"\nHeralded signal of two-mode squeezed vacuum, mu = {PAIR_MEAN} photons per mode:")
    print(f"  {'figure':<24}{'fitted detector':>16}{'ensemble mean':>15}{'ensemble sd':>13}")
    for name in at_point:
        print(f"  {name:<24}{at_point[name][0]:>16.5f}{spread[name].mean():>15.5f}{spread[name].std(ddof=1):>13.2g}")
    print(f"  (spread over {args.ensemble} detectors drawn from the fit's covariance: the part of each "
          "uncertainty due to the herald detector)")

    # Monte Carlo: draw pair photon numbers, let the emulated herald respond shot by shot.
    rng = np.random.default_rng(args.seed + 1)
    photons = rng.choice(N_PHOTONS, size=args.shots, p=pairs / pairs.sum())
    clicks = point.respond(photons, seed=args.seed + 2) == 1
    heralded = photons[clicks]
    g2_sampled = np.mean(heralded * (heralded - 1)) / np.mean(heralded) ** 2
    print(f"\nMonte Carlo with per-shot responses ({args.shots} pulses, {clicks.sum()} heralds): "
          f"heralding probability {clicks.mean():.5f}, heralded g2(0) {g2_sampled:.4f} "
          f"(exact through the fitted detector: {at_point['heralding probability'][0]:.5f}, {at_point['heralded g2(0)'][0]:.4f})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
