"""``povmfit demo``: the whole job on the bundled example scan.

The example is simulated, in a scenario of our own: the (invented) Fenwick Institute's
detector group characterises an (invented) eight-bin time-multiplexed click detector, the
"Marlow TM-8", with coherent and displaced-thermal probes. The true detector has efficiency
0.62, dark-click probability 2e-3 per bin and gate, and pixel crosstalk 0.04.
"""
from __future__ import annotations

import argparse
import shutil
from importlib import resources
from pathlib import Path

import numpy as np

DEMO_MODEL = "array:8+dark+crosstalk"
DEMO_TRUTH = {"efficiency": 0.62, "dark_probability": 2e-3, "crosstalk_probability": 0.04}
DEMO_COHERENT = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0)
DEMO_THERMAL = (0.0, 0.3, 0.6, 1.0)
DEMO_SHOTS = 100_000
DEMO_SEED = 20261201
DEMO_GATE_S = 100e-9
DEMO_CALIBRATION = 0.03

EPILOG = """example:
  povmfit demo --out demo-output
  then open demo-output/report.html in a browser."""


def demo_scan_path() -> Path:
    return Path(str(resources.files("povmfit.fitting.data") / "demo_scan.csv"))


def generate_demo_scan():
    """Regenerate the bundled example scan (deterministic)."""
    from povmfit.models import choose_cutoff, parse_model_spec, probe_distributions

    from povmfit.fitting.data.scan import scan_from_arrays

    model = parse_model_spec(DEMO_MODEL)
    coherent, thermal = (np.array(v, float).ravel() for v in np.meshgrid(DEMO_COHERENT, DEMO_THERMAL, indexing="ij"))
    n = choose_cutoff(coherent, thermal, 1e-13)
    q = np.asarray(probe_distributions(coherent, thermal, n) @ model.povm(model.pack(DEMO_TRUTH), n).T)
    q = np.clip(q, 0, None)
    q /= q.sum(axis=1, keepdims=True)
    rng = np.random.default_rng(DEMO_SEED)
    counts = np.array([rng.multinomial(DEMO_SHOTS, row) for row in q])
    labels = [f"a{a:g}_n{t:g}" for a, t in zip(coherent, thermal)]
    return scan_from_arrays(coherent, thermal, counts, labels=labels, source="demo_scan.csv")


def register(subparsers):
    parser = subparsers.add_parser(
        "demo",
        help="run the whole job on the bundled (simulated) example scan",
        description="Fit, rank models, reconstruct, cross-check and write the report for the bundled "
        "example scan (simulated data of an invented eight-bin click detector).",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--out", default="povmfit-demo", help="output folder (default: povmfit-demo)")
    parser.add_argument("--quiet", action="store_true", help="print nothing but errors")
    parser.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    return parser


def run(args) -> int:
    from povmfit.fitting.cli.fit import print_summary, run_fit_command
    from povmfit.fitting.tomography.model_free import ranking_request, start_model_free

    out_dir = Path(args.out)
    out_dir.mkdir(parents=True, exist_ok=True)
    scan_copy = out_dir / "demo_scan.csv"
    shutil.copyfile(demo_scan_path(), scan_copy)
    fit_args = argparse.Namespace(
        model="auto", candidates=None, calibration_uncertainty=DEMO_CALIBRATION, gate_duration=DEMO_GATE_S,
        weighting="deviance", bootstrap=0, seed=0, quiet=args.quiet, json=args.json, no_report=False,
    )
    if not args.quiet and not args.json:
        print(f"povmfit demo: simulated scan of an invented 8-bin click detector -> {scan_copy}")
        print(f"true values: {DEMO_TRUTH}\n")
    model_free = start_model_free(scan_copy, fit_args.seed, ranking=ranking_request(fit_args))
    try:
        outcome = run_fit_command(scan_copy, out_dir, fit_args, model_free)
    finally:
        model_free.cancel()
    print_summary(outcome, fit_args)
    if not args.quiet and not args.json:
        print(f"\nopen {out_dir / 'report.html'} in a browser to see the fit, the POVM and the Wigner functions.")
    return 0
