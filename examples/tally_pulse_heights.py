"""From pulse heights to a scan, a readout matrix and a fitted efficiency.

Scenario (invented, and the data are simulated): the Millbrook Cryogenic Sensors Group runs a
Wexcombe WX-3 transition-edge sensor, an (invented) number-resolving detector whose pulse
height grows with the number of absorbed photons. For each probe setting (attenuated laser
pulses, plus two pseudo-thermal settings) their digitiser stores one pulse height per trigger;
nobody has set thresholds yet. They want the scan povmfit fits, the readout misassignment, and
the system efficiency.

The script writes the instrument files (text and NumPy .npy) and a PROBES file into a folder,
runs the tally (one joint fit of all spectra), writes scan.csv and readout.json, and fits the
tallied scan with a number-resolving model.

Run:  python examples/tally_pulse_heights.py [--out FOLDER] [--seed N]
"""
from __future__ import annotations

import argparse
import math
import tempfile
from pathlib import Path

import numpy as np

import povmfit

# The invented "true" WX-3: pulse height in millivolts for m registered photons is
# Normal(OFFSET + GAIN m, WIDTH_0^2 + m WIDTH_1^2); its system efficiency is EFFICIENCY.
OFFSET, GAIN, WIDTH_0, WIDTH_1, EFFICIENCY = 3.0, 41.0, 2.6, 1.5, 0.81
PROBES = [("pulse 0.5", 0.5, 0.0), ("pulse 1.5", 1.5, 0.0), ("pulse 3", 3.0, 0.0), ("pulse 6", 6.0, 0.0),
          ("thermal 1", 0.0, 1.0), ("displaced 2+0.5", 2.0, 0.5)]
TRIGGERS = 50_000


def registered_photons(rng, coherent: float, thermal: float, size: int) -> np.ndarray:
    """A displaced thermal state is a Gaussian mixture of coherent states; loss thins binomially."""
    beta = math.sqrt(coherent) + math.sqrt(thermal / 2) * (rng.standard_normal(size) + 1j * rng.standard_normal(size))
    return rng.binomial(rng.poisson(np.abs(beta) ** 2), EFFICIENCY)


def write_instrument_files(folder: Path, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    rows = ["probe,coherent_photons,thermal_photons,heights"]
    for i, (label, coherent, thermal) in enumerate(PROBES):
        m = registered_photons(rng, coherent, thermal, TRIGGERS)
        heights = rng.normal(OFFSET + GAIN * m, np.sqrt(WIDTH_0**2 + m * WIDTH_1**2))
        name = f"run{i:02d}.npy" if i % 2 else f"run{i:02d}.txt"
        if name.endswith(".npy"):
            np.save(folder / name, heights)
        else:
            np.savetxt(folder / name, heights, fmt="%.3f")
        rows.append(f"{label},{coherent},{thermal},{name}")
    (folder / "probes.csv").write_text("\n".join(rows) + "\n")
    return folder / "probes.csv"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=None, help="folder for the files (default: a temporary folder)")
    parser.add_argument("--seed", type=int, default=2)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as temporary:
        folder = Path(args.out or temporary)
        folder.mkdir(parents=True, exist_ok=True)
        probes = write_instrument_files(folder, args.seed)
        print(f"simulated WX-3 pulse heights: {len(PROBES)} probes x {TRIGGERS:,} triggers in {folder}")

        # %% one joint fit of every spectrum, thresholds at minimum misassignment, counts
        tally = povmfit.tally_pulse_heights(probes)
        print(tally.summary())
        files = tally.write(folder / "scan.csv")
        for kind, path in files.items():
            print(f"wrote {kind:<8} {path.name}")

        # %% the readout matrix as a fixed stage, and a model fit of the tallied scan
        matrix = povmfit.load_readout(files["readout"])
        print(f"readout matrix {matrix.shape[0]} outcomes x {matrix.shape[1]} registered photon numbers; "
              f"P(read 1 | 1 registered) = {matrix[1, 1]:.6f}")
        efficiency = tally.parameters["efficiency"]
        print(f"tally efficiency {efficiency['value']:.4f} ± {efficiency['stderr']:.4f} (true {EFFICIENCY})")
        fit = povmfit.fit(tally.scan, f"pnr:{tally.max_outcome}", readout=files["readout"])
        print(f"fit efficiency {fit.values['efficiency']:.4f} ± {fit.stderr['efficiency']:.4f} (true {EFFICIENCY})")
        print(f"  (through readout.json as a fixed readout stage; deviance {fit.deviance:.1f} on {fit.dof} dof)")


if __name__ == "__main__":
    main()
