"""Compiled code kept across runs in the user cache folder.

Two layers, both switched on by :func:`enable_compilation_cache` (the command line does):

- JAX's persistent compilation cache keeps XLA's compiled executables, so a warm run does not
  compile again;
- :func:`stored_program` keeps the *traced* program (StableHLO, via ``jax.export``) of the
  hot functions, so a warm run does not trace the Python model code again either (0.2-0.5 s
  per detector family otherwise).

A stored program is keyed by its label and the shapes and dtypes of its arguments, inside a
folder named by a hash of povmfit's own source files and the versions of jax and jaxlib:
edited code never meets a stale program, and folders unused for 30 days are removed. Any
failure to read or write the store falls back to plain tracing.
"""
from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
import threading
import time
from functools import lru_cache
from pathlib import Path

import numpy as np

import povmfit

__all__ = ["enable_compilation_cache", "stored_program", "StoredPrograms"]

_STORE: dict = {"folder": None}


def _user_cache_folder() -> Path:
    return Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "povmfit"


_JAX_SETTINGS = {  # JAX reads these options from the environment when it is first imported
    "jax_persistent_cache_min_compile_time_secs": 0.0,
    "jax_persistent_cache_min_entry_size_bytes": -1,
}


def enable_compilation_cache() -> None:
    """Keep JAX's compiled code and povmfit's traced programs in the user cache folder.

    Does not import JAX (the command line calls it first thing).
    """
    base = _user_cache_folder()
    try:
        (base / "jax").mkdir(parents=True, exist_ok=True)
        (base / "programs").mkdir(parents=True, exist_ok=True)
    except OSError:
        return
    for name, value in dict(_JAX_SETTINGS, jax_compilation_cache_dir=str(base / "jax")).items():
        povmfit._set_jax_option(name, value)
    _STORE["folder"] = base / "programs"


@lru_cache(maxsize=1)
def _source_fingerprint() -> str:
    """SHA-256 over the package's Python sources and the versions of jax and jaxlib."""
    import jax
    import jaxlib

    digest = hashlib.sha256(f"{jax.__version__}|{jaxlib.__version__}".encode())
    root = Path(povmfit.__file__).resolve().parent
    folders = [root] + [Path(p).resolve() for name in ("models", "fitting") for p in _package_paths(name)]
    for folder in folders:
        for path in sorted(folder.glob("*.py")):
            digest.update(path.name.encode())
            digest.update(path.read_bytes())
    return digest.hexdigest()


def _package_paths(name: str) -> list:
    module = __import__(f"povmfit.{name}", fromlist=["__path__"])
    return list(module.__path__)


def _signature(args) -> tuple:
    return tuple((tuple(np.shape(a)), np.result_type(a).str) for a in args)


_CLAIM_PATIENCE_S = 120.0  # a claim older than this is taken as abandoned


def stored_program(jitted, label: str, args):
    """A compiled callable equivalent to ``jitted`` for arguments shaped like ``args``: loaded
    from the program store when it is there (else traced, compiled and saved); ``jitted``
    itself when the store is off or unusable.

    A process compiling a program first leaves a claim file beside it; another process that
    needs the same program meanwhile waits for it instead of compiling it twice (the command
    line's helper process compiles programs the main process will need later).
    """
    if _STORE["folder"] is None:
        return jitted
    try:
        folder = _program_folder()
        key = _program_key(label, args)
        path, claim = folder / f"{key}.hlo", folder / f"{key}.claim"
        if not path.exists():
            _wait_for_claim(claim, path)
        if path.exists():
            return _compile(_deserialize(path.read_bytes()), args)
        return _export_compile_and_store(jitted, args, path, claim)
    except Exception:  # noqa: BLE001 - the store is an optimisation; tracing always works
        return jitted


def _program_key(label: str, args) -> str:
    return hashlib.sha256(repr((label, _signature(args))).encode()).hexdigest()[:40]


_STALE_AFTER_S = 30 * 86400


def _program_folder() -> Path:
    return _version_folder(_STORE["folder"])


@lru_cache(maxsize=4)
def _version_folder(root: Path) -> Path:
    """The store's folder for this source and JAX version; folders of other versions unused
    for 30 days are removed."""
    folder = root / _source_fingerprint()[:24]
    folder.mkdir(exist_ok=True)
    os.utime(folder)  # marks this version as in use
    for other in root.iterdir():
        try:
            if other.is_dir() and other != folder and time.time() - other.stat().st_mtime > _STALE_AFTER_S:
                shutil.rmtree(other, ignore_errors=True)
        except OSError:
            pass
    return folder


def _deserialize(data: bytes):
    from jax import export

    return export.deserialize(bytearray(data))


def _compile(program, args):
    import jax

    # compiling here fills JAX's persistent cache (or reads it) before the program is used
    return jax.jit(program.call).lower(*args).compile()


def _export_compile_and_store(jitted, args, path: Path, claim: Path):
    from jax import export

    try:
        handle = os.open(claim, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        os.write(handle, str(os.getpid()).encode())
        os.close(handle)
    except OSError:
        claim = None  # another process claimed it meanwhile: compile anyway, do not wait
    try:
        program = export.export(jitted)(*args)
        compiled = _compile(program, args)
        _write_atomically(path, program.serialize())
    finally:
        if claim is not None:
            claim.unlink(missing_ok=True)
    return compiled


def _wait_for_claim(claim: Path, path: Path) -> None:
    """Wait while another living process holds a fresh claim on the program at ``path``."""
    while not path.exists():
        try:
            age = time.time() - claim.stat().st_mtime
            holder = int(claim.read_text() or 0)
        except (OSError, ValueError):
            return  # no claim (or it was just released)
        if age > _CLAIM_PATIENCE_S or not _alive(holder):
            claim.unlink(missing_ok=True)  # abandoned (its process was stopped)
            return
        time.sleep(0.01)


def _alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True  # exists, owned by someone else
    return True


def _write_atomically(path: Path, data: bytes) -> None:
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".tmp-")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        os.replace(temporary, path)
    except OSError:
        Path(temporary).unlink(missing_ok=True)


class StoredPrograms:
    """Callable wrapper of a jitted function that resolves a stored program per argument shape."""

    def __init__(self, jitted, label: str):
        self._jitted = jitted
        self._label = label
        self._by_signature: dict = {}
        self._resolving = threading.Lock()  # a program loaded in the background is not loaded twice

    def is_stored(self, *args) -> bool:
        """Whether the program for arguments shaped like ``args`` is in the store already."""
        return _STORE["folder"] is not None and (_program_folder() / f"{_program_key(self._label, args)}.hlo").exists()

    def __call__(self, *args):
        signature = _signature(args)
        program = self._by_signature.get(signature)
        if program is None:
            with self._resolving:
                program = self._by_signature.get(signature)
                if program is None:
                    program = self._by_signature[signature] = stored_program(self._jitted, self._label, args)
        return program(*args)
