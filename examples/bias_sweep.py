"""A bias sweep characterised in one go: efficiency plateau and dark-count limit, on Dask.

Scenario (invented, and the data are simulated): the Larkspur Cryogenic Detector Group sweeps
the bias current of a Wren Photonics WN-8, an eight-pixel superconducting nanowire array,
from 6 to 10 microampere. At each bias they record a scan: dark gates and a ladder of
attenuated laser pulses (coherent probes), 20,000 gates each, counting how many pixels
click. They want the usual sweep figures: where the efficiency plateau starts (within 1 % of
its maximum) and the bias at which the dark click probability per gate reaches 1e-2.

The script writes the scans and a manifest (``scan`` plus the ``bias_current_ua`` and
``device`` conditions) into a folder, runs ``povmfit.characterise_many`` on a local Dask
cluster, and prints the figures next to the simulated truth. The command line does the same:
``povmfit batch FOLDER/manifest.csv --model array:8+dark --dark-limit 1e-2``.

Run:  python examples/bias_sweep.py [--out FOLDER] [--workers N] [--seed N]
"""
from __future__ import annotations

import argparse
import math
import tempfile
from pathlib import Path

import numpy as np

import povmfit
from povmfit.fitting.data.scan import write_scan
from povmfit.models import parse_model_spec, probe_distributions

DEVICE = "array:8+dark"
BIAS_UA = (6.0, 7.0, 8.0, 8.5, 9.0, 10.0)
COHERENT = (0.0, 0.0, 0.3, 1.0, 2.0, 4.0, 8.0)  # mean photons per pulse; two dark probes
SHOTS = 20_000
ETA_MAX, HALF_UA, WIDTH_UA = 0.88, 7.0, 0.4  # the invented device: sigmoid efficiency against bias
DARK_AT_6UA, DARK_EFOLD_UA = 1e-4, 1.0  # per-pixel dark probability per gate, e-fold per microampere
DARK_LIMIT = 1e-2


def efficiency(bias):
    return ETA_MAX / (1 + math.exp(-(bias - HALF_UA) / WIDTH_UA))


def dark_probability(bias):
    return DARK_AT_6UA * math.exp((bias - 6.0) / DARK_EFOLD_UA)


def simulate_sweep(folder: Path, seed: int) -> Path:
    """One scan file per bias and the manifest listing them; returns the manifest's path."""
    model = parse_model_spec(DEVICE)
    coherent = np.array(COHERENT)
    thermal = np.zeros_like(coherent)
    n_photons = 60  # Poisson(8) leaves far less than 1e-10 beyond 60 photons
    distributions = np.asarray(probe_distributions(coherent, thermal, n_photons))
    rng = np.random.default_rng(seed)
    lines = ["scan,bias_current_ua,device"]
    for bias in BIAS_UA:
        truth = {"efficiency": efficiency(bias), "dark_probability": dark_probability(bias)}
        q = distributions @ np.asarray(model.povm(model.pack(truth), n_photons)).T
        counts = rng.multinomial(SHOTS, q / q.sum(axis=1, keepdims=True))
        name = f"wn8_{bias:.1f}ua.csv"
        write_scan(povmfit.scan_from_arrays(coherent, thermal, counts), folder / name)
        lines.append(f"{name},{bias},WN-8 serial 0042")
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join(lines) + "\n")
    return manifest


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=None, help="folder for the scans and results (default: a temporary one)")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seed", type=int, default=5)
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory() as scratch:
        folder = Path(args.out or scratch)
        folder.mkdir(parents=True, exist_ok=True)
        manifest = simulate_sweep(folder, args.seed)
        print(f"Wren Photonics WN-8 at the Larkspur Cryogenic Detector Group (simulated data): "
              f"{len(BIAS_UA)} scans from {BIAS_UA[0]} to {BIAS_UA[-1]} uA")
        result = povmfit.characterise_many(manifest, folder / "results", model=DEVICE, dark_limit=DARK_LIMIT,
                                           workers=args.workers)
        print(result.summary())

        (sweep,) = result.sweeps
        r = 0.99 * efficiency(BIAS_UA[-1]) / ETA_MAX  # 99 % of the best efficiency in the sweep
        start_truth = HALF_UA + WIDTH_UA * math.log(r / (1 - r))
        per_pixel = 1 - (1 - DARK_LIMIT) ** (1 / 8)  # 1 - (1 - d)^8 = limit for 8 independent pixels
        crossing_truth = 6.0 + DARK_EFOLD_UA * math.log(per_pixel / DARK_AT_6UA)
        start, crossing = sweep["start"], sweep["dark_limit_bias"]
        print()
        print(f"plateau start   {start['value']:.3f} ± {start['stderr']:.3f} uA   (simulated device: {start_truth:.3f} uA)")
        print(f"dark limit bias {crossing['value']:.3f} ± {crossing['stderr']:.3f} uA   "
              f"(simulated device: {crossing_truth:.3f} uA)")
        print(f"wrote {', '.join(sorted(p.name for p in result.files.values()))} and one folder per scan")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
