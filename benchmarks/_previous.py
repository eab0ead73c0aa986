"""Shared helper (not a benchmark: ``run.py`` only loads ``bench_*.py``): the two code versions
that ``bench_command`` and ``bench_outputs`` set side by side.

- old: the package as of commit ``BASE_COMMIT`` (the last one before the restructuring),
  extracted with ``git archive`` into a temporary folder (the working tree is never touched)
  and laid out as setuptools' ``package-dir`` mapping installs it: ``src/povmfit`` ->
  ``povmfit``, ``models`` -> ``povmfit.models``, ``fitting`` -> ``povmfit.fitting``. It runs
  with ``PYTHONPATH`` pointing at that tree; the helper process the command starts with
  ``python -m ...`` inherits it.
- new: the installed package (editable install of this repository), run without
  ``PYTHONPATH``. With ``POVMFIT_BENCH_NEW=<commit>`` in the environment the new side is that
  commit, extracted like the old one (to try the harness while the working tree is broken).

Both run under the same interpreter (the one running the benchmarks), each command in a
temporary working folder so the repository folder is not on the path.
"""
from __future__ import annotations

import contextlib
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
BASE_COMMIT = "c65d21c"
NEW_COMMIT_VARIABLE = "POVMFIT_BENCH_NEW"
PRODUCTION_FOLDERS = ("src", "models", "fitting")


@dataclass(frozen=True)
class Version:
    """One version of the code: where its sources are and how to run its command line."""

    label: str  # e.g. "c65d21c" or "working tree"
    tree: Path  # source tree root (holds src/, models/, fitting/)
    site: Path | None  # folder to put on PYTHONPATH, None for the installed package

    def environment(self, cache: Path) -> dict:
        return environment(cache, self.site)

    def command(self, *args: str) -> list[str]:
        return [sys.executable, "-m", "povmfit", *args]

    def demo_scan(self) -> Path:
        return self.tree / "fitting" / "data" / "demo_scan.csv"


def environment(cache: Path, site: Path | None = None) -> dict:
    """This process's environment with ``XDG_CACHE_HOME=cache`` and ``PYTHONPATH=site`` (or none)."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "XDG_CACHE_HOME")}
    env["XDG_CACHE_HOME"] = str(cache)
    if site is not None:
        env["PYTHONPATH"] = str(site)
    return env


@dataclass
class Result:
    """One finished process: wall time from start to the exit of the main process."""

    seconds: float
    returncode: int
    error: str  # last line of stderr when the command failed, else ""


def run_timed(command: list[str], env: dict, cwd: Path, timeout: float = 600.0) -> Result:
    """Run ``command`` to completion and time it (stdout discarded).

    The command gets its own process group; after it exits, any helper process it left
    behind is waited for (up to 30 s, then ended), so it cannot slow the next measurement.
    """
    with tempfile.TemporaryFile() as stderr:  # not a pipe: a helper holding it open must not delay us
        started = time.perf_counter()
        process = subprocess.Popen(command, env=env, cwd=cwd, stdout=subprocess.DEVNULL, stderr=stderr,
                                   start_new_session=True)
        try:
            process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()
        seconds = time.perf_counter() - started
        _wait_for_group(process.pid)
        stderr.seek(0)
        lines = stderr.read().decode(errors="replace").strip().splitlines()
    error = (lines[-1] if lines else f"exit code {process.returncode}") if process.returncode else ""
    return Result(seconds, process.returncode, error)


def _wait_for_group(group: int, patience: float = 30.0) -> None:
    deadline = time.monotonic() + patience
    while True:
        try:
            os.killpg(group, 0)  # signal 0: only asks whether the group still has members
        except (ProcessLookupError, PermissionError):
            return
        if time.monotonic() > deadline:
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(group, signal.SIGKILL)
            return
        time.sleep(0.05)


def extract(commit: str, into: Path) -> Version:
    """``git archive`` ``commit`` into ``into``/tree and build the importable ``into``/site."""
    tree, site = into / "tree", into / "site"
    tree.mkdir(parents=True)
    archive = subprocess.run(["git", "-C", str(REPO), "archive", commit], check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(tree)], input=archive, check=True)
    package = site / "povmfit"
    shutil.copytree(tree / "src" / "povmfit", package)
    shutil.copytree(tree / "models", package / "models")
    shutil.copytree(tree / "fitting", package / "fitting")
    return Version(label=commit, tree=tree, site=site)


def check_imports(version: Version, scratch: Path) -> None:
    """Fail loudly if ``version`` would import povmfit from anywhere but its own tree (e.g. if
    the editable install of the repository took precedence over ``PYTHONPATH``)."""
    probe = "import povmfit, povmfit.models, povmfit.fitting as f; print(povmfit.__file__); print(f.__file__)"
    out = subprocess.run([sys.executable, "-c", probe], env=version.environment(scratch / "probe-cache"),
                         cwd=scratch, capture_output=True, text=True)
    expected = (version.site or version.tree).resolve()
    if out.returncode:
        return  # broken code is reported by the measurements themselves
    for line in out.stdout.split():
        if not Path(line).resolve().is_relative_to(expected):
            raise RuntimeError(f"{version.label}: povmfit imported from {line}, expected under {expected}")


@contextlib.contextmanager
def versions():
    """Yield ``(old, new, scratch)``: both versions and a temporary folder for working folders
    and caches. Everything is removed afterwards."""
    with tempfile.TemporaryDirectory(prefix="povmfit-bench-") as folder:
        scratch = Path(folder)
        old = extract(BASE_COMMIT, scratch / "old")
        new_commit = os.environ.get(NEW_COMMIT_VARIABLE)
        if new_commit:
            new = extract(new_commit, scratch / "new")
        else:
            new = Version(label="working tree", tree=REPO, site=None)
        for version in (old, new):
            check_imports(version, scratch)
        yield old, new, scratch


def production_lines(tree: Path) -> int:
    """Non-blank lines of every ``*.py`` under ``src/``, ``models/`` and ``fitting/`` of ``tree``."""
    total = 0
    for name in PRODUCTION_FOLDERS:
        for path in (tree / name).rglob("*.py"):
            total += sum(1 for line in path.read_text(encoding="utf-8").splitlines() if line.strip())
    return total


def fresh_folder(scratch: Path, name: str) -> Path:
    """A new empty folder under ``scratch``."""
    return Path(tempfile.mkdtemp(prefix=f"{name}-", dir=scratch))
