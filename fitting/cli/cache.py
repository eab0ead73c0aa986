"""JAX's persistent compilation cache in the user cache folder, switched on by the command line.

Compiled executables are kept in ``$XDG_CACHE_HOME/povmfit/jax`` (default
``~/.cache/povmfit/jax``), so a second run of the same kind of scan does not compile again.

The folder holds native code that JAX loads and runs, so it is treated as trusted and kept
private: it is created (or reset) to mode 0700 and used only when it belongs to the user.
Nothing is read back unverified: a manifest beside the entries records the SHA-256 of every
entry this user's runs wrote, and at start-up every entry that is missing from it, differs
from it (truncated, corrupted, swapped with another entry) or is not a plain file is deleted,
so JAX compiles it afresh. A folder that cannot be used (not creatable, not writable, owned by
someone else) leaves the cache off with one line on stderr; the figures never depend on the
cache. Deleting the folder is always safe.
"""
from __future__ import annotations

import atexit
import hashlib
import json
import os
import shutil
import stat
import sys
import warnings
from pathlib import Path

import povmfit

__all__ = ["enable_compilation_cache", "compilation_cache_folder", "verify_cache_folder", "record_cache_entries"]

MANIFEST = "povmfit-manifest.json"
_JAX_SETTINGS = {  # JAX reads these options from the environment when it is first imported
    "jax_persistent_cache_min_compile_time_secs": 0.0,
    "jax_persistent_cache_min_entry_size_bytes": -1,
}


def compilation_cache_folder() -> Path:
    return Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "povmfit" / "jax"


def _digest(path: Path) -> str:
    with open(path, "rb") as handle:
        return hashlib.sha256(handle.read()).hexdigest()


def _read_manifest(folder: Path) -> dict:
    try:
        data = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict):
        return {}
    return {k: v for k, v in data.items() if isinstance(k, str) and isinstance(v, str)}


def verify_cache_folder(folder: Path) -> int:
    """Delete every entry of ``folder`` not recorded with its SHA-256 in the manifest; returns
    the number of entries deleted. The manifest keeps only the entries that passed."""
    manifest = _read_manifest(folder)
    kept, removed = {}, 0
    for entry in folder.iterdir():
        if entry.name == MANIFEST:
            continue
        try:
            info = entry.lstat()
            good = stat.S_ISREG(info.st_mode) and manifest.get(entry.name) == _digest(entry)
        except OSError:
            good = False
        if good:
            kept[entry.name] = manifest[entry.name]
            continue
        removed += 1
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
        else:
            try:
                entry.unlink()
            except OSError:
                pass
    _write_manifest(folder, kept)
    return removed


def record_cache_entries(folder: Path) -> None:
    """Add the entries written since start-up (plain files not yet in the manifest) to it."""
    manifest = _read_manifest(folder)
    try:
        entries = list(folder.iterdir())
    except OSError:
        return
    for entry in entries:
        if entry.name == MANIFEST or entry.name in manifest or entry.name.startswith("."):
            continue
        try:
            if stat.S_ISREG(entry.lstat().st_mode):
                manifest[entry.name] = _digest(entry)
        except OSError:
            continue
    _write_manifest(folder, manifest)


def _write_manifest(folder: Path, manifest: dict) -> None:
    temporary = folder / f".{MANIFEST}.{os.getpid()}"
    try:
        fd = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            json.dump(manifest, handle, sort_keys=True)
        os.replace(temporary, folder / MANIFEST)
    except OSError:
        try:
            temporary.unlink()
        except OSError:
            pass


def _private_folder(folder: Path) -> str | None:
    """Create or check the folder (mode 0700, owned by this user); None, or why it is unusable."""
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
        info = folder.stat()
        if hasattr(os, "getuid") and info.st_uid != os.getuid():
            return f"{folder} belongs to another user"
        if stat.S_IMODE(info.st_mode) & 0o077:
            os.chmod(folder, 0o700)
        if not os.access(folder, os.W_OK | os.X_OK):
            return f"{folder} is not writable"
        probe = folder / f".probe.{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as error:
        return f"{folder}: {error.strerror or error}"
    return None


def enable_compilation_cache() -> None:
    """Keep JAX's compiled code in :func:`compilation_cache_folder` (does not import JAX),
    after checking the folder and its entries (see the module docstring)."""
    folder = compilation_cache_folder()
    problem = _private_folder(folder)
    if problem is None:
        try:
            verify_cache_folder(folder)
        except OSError as error:
            problem = f"{folder}: {error.strerror or error}"
    if problem is not None:
        print(f"povmfit: note: compilation cache off ({problem}); models are compiled afresh", file=sys.stderr)
        return
    # an entry JAX cannot read is compiled afresh: the figures are the same, so say nothing
    warnings.filterwarnings("ignore", message="Error (reading|writing) persistent compilation cache entry")
    for name, value in dict(_JAX_SETTINGS, jax_compilation_cache_dir=str(folder)).items():
        povmfit._set_jax_option(name, value)
    atexit.register(record_cache_entries, folder)
