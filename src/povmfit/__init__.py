"""povmfit: characterise photon detectors from probe-state counts.

Importing povmfit switches JAX to 64-bit floats: every probability in this package is
computed in double precision. JAX itself is imported only where a computation needs it, so
the command line starts (and launches its helper process) quickly.
"""
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
