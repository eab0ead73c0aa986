"""povmfit: characterise photon detectors from probe-state counts.

The library in one screen::

    import povmfit

    scan = povmfit.load_scan("scan.csv")                 # or pass the path anywhere below
    result = povmfit.characterise(scan, calibration_uncertainty=0.03, gate_duration=100e-9)
    result.summary(); result.datasheet(); result.write("scan.povmfit")

    fit = povmfit.fit(scan, "array:8+dark+crosstalk")    # one model; "auto" ranks them
    ranking = povmfit.compare(scan)                      # AIC, BIC, tests, cross-validation
    model_free = povmfit.reconstruct(scan)               # POVM and pointwise Wigner values
    detector = povmfit.Emulator.from_file("scan.povmfit/detector.json")

Conventions: photon numbers are mean photons per shot at the reference plane; ``alpha`` is
the complex displacement amplitude; a detector is ``theta[k, n] = P(outcome k | n photons)``.

Importing povmfit switches JAX to 64-bit floats: every probability in this package is
computed in double precision. The names below are loaded on first use, so the command line
starts quickly.
"""
import importlib as _importlib
import os as _os
import sys as _sys


def _set_jax_option(name: str, value) -> None:
    """Set a JAX option without importing JAX: through ``jax.config`` when JAX is loaded
    already, else through the environment, which JAX reads when it is first imported."""
    if "jax" in _sys.modules:
        _sys.modules["jax"].config.update(name, value)
    else:
        _os.environ[name.upper()] = str(value)


_set_jax_option("jax_enable_x64", True)

__version__ = "0.1.0"

_PUBLIC = {
    "load_scan": "povmfit.fitting.data.scan",
    "scan_from_arrays": "povmfit.fitting.data.scan",
    "Scan": "povmfit.fitting.data.scan",
    "demo_scan_path": "povmfit.fitting.data.demo",
    "DetectorModel": "povmfit.models",
    "parse_model_spec": "povmfit.models",
    "fit": "povmfit.fitting.workflow.api",
    "compare": "povmfit.fitting.workflow.api",
    "reconstruct": "povmfit.fitting.workflow.api",
    "characterise": "povmfit.fitting.workflow.characterise",
    "Characterisation": "povmfit.fitting.workflow.characterise",
    "characterise_many": "povmfit.fitting.workflow.batch",
    "BatchResult": "povmfit.fitting.workflow.batch",
    "FitResult": "povmfit.fitting.inference.fit",
    "Comparison": "povmfit.fitting.inference.compare",
    "Emulator": "povmfit.fitting.emulation.emulator",
    "simulate_scan": "povmfit.fitting.emulation.simulate",
    "plan": "povmfit.fitting.workflow.plan", "MeasurementPlan": "povmfit.fitting.workflow.plan",
    "load_detector": "povmfit.fitting.data.detector_file",
    "DetectorRecord": "povmfit.fitting.data.detector_file",
    "PovmfitError": "povmfit.fitting.data.errors",
    "ArgumentError": "povmfit.fitting.data.errors",
    "ScanError": "povmfit.fitting.data.errors",
    "DetectorFileError": "povmfit.fitting.data.errors",
    "StateError": "povmfit.fitting.data.errors",
    "NotIdentifiable": "povmfit.fitting.data.errors",
    "FitError": "povmfit.fitting.data.errors",
    "FitNotConverged": "povmfit.fitting.inference.fit",
    "tally_pulse_heights": "povmfit.fitting.workflow.tally",
    "tally_click_log": "povmfit.fitting.workflow.tally",
    "PulseHeightTally": "povmfit.fitting.workflow.tally",
    "ClickLogTally": "povmfit.fitting.workflow.tally",
    "load_readout": "povmfit.fitting.tally.readout",
    "apply_readout": "povmfit.fitting.tally.readout",
}
__all__ = sorted(_PUBLIC)


def __getattr__(name: str):
    if name in _PUBLIC:
        value = getattr(_importlib.import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'povmfit' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
