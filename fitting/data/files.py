"""Atomic output (single files and whole sets of files) and small CSV readers.

Permissions: every file and folder written here gets the mode a normal ``open`` or ``mkdir``
would give under the user's umask (0644 and 0755 under umask 022), not the owner-only mode
of the temporary files it is written through.

Sets: :func:`output_set` writes a whole result folder into a temporary sibling folder and
renames it into place, so a folder of results is always complete and from one run; an
existing folder that holds files is replaced only with ``overwrite``.
"""
from __future__ import annotations

import contextlib
import csv
import hashlib
import json
import math
import os
import shutil
import stat
import tempfile
import threading
from pathlib import Path

import numpy as np

from povmfit.fitting.data.errors import InputFileError, OutputError

__all__ = [
    "atomic_write_text", "atomic_write_bytes", "write_json", "json_safe", "file_sha256", "read_csv_rows", "data_rows",
    "check_output_folder", "output_set", "normal_file_mode",
]

_UMASK_LOCK = threading.Lock()


def _umask() -> int:
    with _UMASK_LOCK:  # reading the umask means setting it; keep that window private
        mask = os.umask(0o022)
        os.umask(mask)
    return mask


def normal_file_mode(folder: bool = False) -> int:
    """Mode of a new file (0666) or folder (0777) under the current umask."""
    return (0o777 if folder else 0o666) & ~_umask()


def atomic_write_bytes(path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary file in the same folder, then rename.
    The file gets the normal mode under the umask (see the module docstring)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        os.fchmod(handle, normal_file_mode())
        with os.fdopen(handle, "wb") as out:
            out.write(data)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_text(path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def json_safe(value):
    """Plain JSON data: NaN and infinities become None (JSON has no such numbers), numpy
    scalars and arrays become Python numbers and lists, recursively."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def write_json(path, payload) -> None:
    atomic_write_text(path, json.dumps(json_safe(payload), indent=2, allow_nan=False) + "\n")


def read_csv_rows(path, what: str) -> list[list[str]]:
    """All rows of a small UTF-8 CSV file; InputFileError naming the file when it cannot be read."""
    try:
        with open(path, newline="", encoding="utf-8") as handle:
            return list(csv.reader(handle))
    except (OSError, UnicodeDecodeError) as error:
        raise InputFileError(f"{path}: cannot read the {what} ({error})") from None


def data_rows(rows: list[list[str]], path):
    """(line number, row) for every non-blank row after the header of ``read_csv_rows`` output;
    InputFileError when a row has a different number of fields than the header."""
    width = len(rows[0]) if rows else 0
    for line, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != width:
            raise InputFileError(f"{path}: line {line}: expected {width} fields, got {len(row)}")
        yield line, row


def file_sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


# ----- result folders written as a set ------------------------------------------------------
def check_output_folder(out_dir, overwrite: bool = False) -> Path:
    """Refuse, before any work, an output folder that cannot receive a result set.

    Refused (:class:`OutputError`, one line naming the folder): a path that exists and is not
    a folder; a folder that already holds files unless ``overwrite``; a parent that is a file
    or that this user cannot write to. Nothing is created. Returns the path.
    """
    out_dir = Path(out_dir)
    if _exists_as_non_folder(out_dir):
        raise OutputError(f"--out {out_dir}: exists and is not a folder (give a folder for the results)")
    if not overwrite and _holds_files(out_dir):
        raise OutputError(f"--out {out_dir}: the folder already holds files (other results?); give --overwrite "
                          "to replace the whole folder, or choose another")
    parent = _existing_parent(out_dir)
    if not parent.is_dir():
        raise OutputError(f"--out {out_dir}: {parent} is a file, not a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"--out {out_dir}: cannot write in {parent} (permission denied)")
    return out_dir


def _holds_files(folder: Path) -> bool:
    try:
        return any(folder.iterdir())
    except (FileNotFoundError, NotADirectoryError):
        return False


def _exists_as_non_folder(path: Path) -> bool:
    """One look at ``path`` (another run may move a folder away at any moment)."""
    try:
        return not stat.S_ISDIR(os.stat(path).st_mode)
    except (FileNotFoundError, NotADirectoryError):
        return False


def _existing_parent(path: Path) -> Path:
    parent = path.absolute().parent
    while not parent.exists():
        parent = parent.parent
    return parent


@contextlib.contextmanager
def output_set(out_dir, overwrite: bool = False):
    """Context manager yielding a temporary sibling folder of ``out_dir``; on success that
    folder is renamed to ``out_dir`` (the previous folder, if ``overwrite``, is replaced as a
    whole), on any error or interruption it is removed. Readers therefore see either the
    old set or the new one, never a mix, also when two runs write the same ``out_dir``:
    the later rename wins and the other run's set is discarded whole.
    """
    out_dir = check_output_folder(out_dir, overwrite).absolute()
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    _remove_abandoned(out_dir)
    try:
        staging = Path(tempfile.mkdtemp(dir=out_dir.parent, prefix=f".{out_dir.name}.{os.getpid()}.", suffix=".partial"))
    except OSError as error:
        raise OutputError(f"--out {out_dir}: cannot write in {out_dir.parent} ({error.strerror or error})") from None
    try:
        os.chmod(staging, normal_file_mode(folder=True))
        yield staging
        _commit(staging, out_dir, overwrite)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def _remove_abandoned(out_dir: Path) -> None:
    """Remove the staging folders of earlier runs for ``out_dir`` whose process is gone
    (killed before it could clean up): ``.NAME.PID.*.partial``."""
    for folder in out_dir.parent.glob(f".{out_dir.name}.*.partial"):
        pid = folder.name[len(out_dir.name) + 2:].split(".", 1)[0]
        if pid.isdigit() and not _alive(int(pid)):
            shutil.rmtree(folder, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


def _commit(staging: Path, out_dir: Path, overwrite: bool) -> None:
    for _ in range(100):  # another run may swap its set in between two steps: try again
        try:
            os.rename(staging, out_dir)  # succeeds when out_dir is absent or an empty folder
            return
        except FileNotFoundError:
            continue
        except OSError:
            if _exists_as_non_folder(out_dir):
                raise OutputError(f"--out {out_dir}: exists and is not a folder") from None
            try:
                occupied = any(out_dir.iterdir())
            except FileNotFoundError:
                continue
            if occupied and not overwrite:
                raise OutputError(f"--out {out_dir}: another run wrote results there meanwhile; give --overwrite "
                                  "to replace them") from None
        old = Path(tempfile.mkdtemp(dir=out_dir.parent, prefix=f".{out_dir.name}.", suffix=".old"))
        try:
            os.replace(out_dir, old / "set")
        except FileNotFoundError:
            shutil.rmtree(old, ignore_errors=True)
            continue
        try:
            os.rename(staging, out_dir)
            return
        except OSError:
            continue
        finally:
            shutil.rmtree(old, ignore_errors=True)
    raise OutputError(f"--out {out_dir}: could not move the results into place (other runs keep writing there)")
