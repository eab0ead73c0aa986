"""JAX's persistent compilation cache in the user cache folder, switched on by the command line.

Compiled executables are kept in ``$XDG_CACHE_HOME/povmfit/jax`` (default
``~/.cache/povmfit/jax``), so a second run of the same kind of scan does not compile again.
The folder holds native code: it must be private to the user. Deleting it is always safe.
"""
from __future__ import annotations

import os
from pathlib import Path

import povmfit

__all__ = ["enable_compilation_cache", "compilation_cache_folder"]

_JAX_SETTINGS = {  # JAX reads these options from the environment when it is first imported
    "jax_persistent_cache_min_compile_time_secs": 0.0,
    "jax_persistent_cache_min_entry_size_bytes": -1,
}


def compilation_cache_folder() -> Path:
    return Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "povmfit" / "jax"


def enable_compilation_cache() -> None:
    """Keep JAX's compiled code in :func:`compilation_cache_folder` (does not import JAX).

    An unusable folder (read-only, not creatable) leaves the cache off: everything still works.
    """
    folder = compilation_cache_folder()
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    except OSError:
        return
    for name, value in dict(_JAX_SETTINGS, jax_compilation_cache_dir=str(folder)).items():
        povmfit._set_jax_option(name, value)
