"""povmfit: characterise photon detectors from probe-state counts.

Importing povmfit switches JAX to 64-bit floats: every probability in this package is
computed in double precision.
"""
import jax

jax.config.update("jax_enable_x64", True)

__version__ = "0.1.0"
