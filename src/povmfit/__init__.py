"""povmfit: characterise photon detectors from probe-state counts.

Importing povmfit switches JAX to 64-bit floats: every probability in this package is
computed in double precision. JAX itself is imported only where a computation needs it, so
the command line starts (and launches its helper process) quickly.
"""
import os as _os
import sys as _sys

if "jax" in _sys.modules:
    _sys.modules["jax"].config.update("jax_enable_x64", True)
else:
    _os.environ["JAX_ENABLE_X64"] = "1"  # read by JAX when it is first imported

__version__ = "0.1.0"
