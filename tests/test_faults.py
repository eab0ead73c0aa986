"""Fault injection: damaged caches, signals, racing and refused outputs, hostile working
folders and unusual scans. Each fault is one test; every one must end in a result or in one
line on stderr (exit code 2, or 130 for Ctrl-C), never a traceback, and never leave a
half-written output or a stray process.

Whole `povmfit fit` runs in subprocesses use a five-probe threshold scan, an explicit model,
--no-report and a private compilation cache.
"""
from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pytest

from povmfit.fitting.cli.main import main
from povmfit.fitting.data.errors import ScanError
from povmfit.fitting.data.scan import MAX_OUTCOMES, MAX_SHOTS, load_scan

POVMFIT = str(Path(sys.executable).with_name("povmfit"))
PLAIN = ("coherent_photons,thermal_photons,shots,count_0,count_1\n"
         "0,0,1000,998,2\n0.5,0,1000,742,258\n1,0,1000,551,449\n2,0,1000,301,699\n0.5,0.5,1000,702,298\n")
FIT = ["--model", "threshold+dark", "--no-report", "--quiet"]


def _scan(folder: Path, text: str = PLAIN, name: str = "scan.csv") -> Path:
    path = folder / name
    path.write_bytes(text.encode("utf-8") if isinstance(text, str) else text)
    return path


def _env(tmp_path: Path, tag: str | None = None) -> dict:
    env = dict(os.environ, XDG_CACHE_HOME=str(tmp_path / "cache"))
    if tag:
        env["POVMFIT_FAULT_TAG"] = tag
    return env


def _tagged_processes(tag: str) -> list[int]:
    """Process ids whose environment carries ``tag`` (the run and anything it started)."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            if f"POVMFIT_FAULT_TAG={tag}".encode() in (entry / "environ").read_bytes():
                found.append(int(entry.name))
        except OSError:
            continue
    return found


def _no_stray_processes(tag: str, wait: float = 15.0) -> bool:
    deadline = time.monotonic() + wait
    while time.monotonic() < deadline:
        if not _tagged_processes(tag):
            return True
        time.sleep(0.2)
    return False


def _one_line(stderr: str) -> str:
    lines = [line for line in stderr.splitlines() if line.strip()]
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr
    return lines[0]


def _figures(out: Path) -> dict:
    sheet = json.loads((out / "datasheet.json").read_text())
    return {name: (f["value"], f["stderr"]) for name, f in sheet["figures"].items()}


# ----- compilation cache --------------------------------------------------------------------
@pytest.mark.parametrize("damage", ["truncate", "random_bytes", "directory", "swap", "unlisted"])
def test_damaged_cache_entries_are_deleted_before_use(tmp_path, damage):
    from povmfit.fitting.cli.cache import MANIFEST, record_cache_entries, verify_cache_folder

    folder = tmp_path / "jax"
    folder.mkdir()
    for name, body in (("a-cache", b"A" * 100), ("b-cache", b"B" * 80), ("c-cache", b"C" * 60)):
        (folder / name).write_bytes(body)
    record_cache_entries(folder)
    if damage == "truncate":
        (folder / "a-cache").write_bytes(b"A" * 10)
    elif damage == "random_bytes":
        (folder / "a-cache").write_bytes(os.urandom(100))
    elif damage == "directory":
        (folder / "a-cache").unlink()
        (folder / "a-cache").mkdir()
    elif damage == "swap":
        (folder / "a-cache").rename(folder / "tmp")
        (folder / "b-cache").rename(folder / "a-cache")
        (folder / "tmp").rename(folder / "b-cache")
    else:  # an entry nobody recorded (planted, or written by a run that was killed)
        (folder / "d-cache").write_bytes(b"D")
    removed = verify_cache_folder(folder)
    left = sorted(p.name for p in folder.iterdir())
    expected = {"truncate": ["b-cache", "c-cache"], "random_bytes": ["b-cache", "c-cache"],
                "directory": ["b-cache", "c-cache"], "swap": ["c-cache"], "unlisted": ["a-cache", "b-cache", "c-cache"]}
    assert left == sorted(expected[damage] + [MANIFEST])
    assert removed == {"swap": 2}.get(damage, 1)


def test_unusable_cache_folder_gives_one_line_and_no_cache(tmp_path, monkeypatch, capsys):
    import povmfit
    from povmfit.fitting.cli import cache

    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache folder should be")
    monkeypatch.setenv("XDG_CACHE_HOME", str(blocker))
    calls = []
    monkeypatch.setattr(povmfit, "_set_jax_option", lambda *a: calls.append(a))
    cache.enable_compilation_cache()
    assert calls == []
    assert "compilation cache off" in _one_line(capsys.readouterr().err)


def test_cache_folder_is_made_private(tmp_path, monkeypatch):
    import povmfit
    from povmfit.fitting.cli import cache

    folder = tmp_path / "povmfit" / "jax"
    folder.mkdir(parents=True, mode=0o755)
    folder.chmod(0o755)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    monkeypatch.setattr(povmfit, "_set_jax_option", lambda *a: None)
    monkeypatch.setattr(cache.atexit, "register", lambda *a: None)
    cache.enable_compilation_cache()
    assert folder.stat().st_mode & 0o777 == 0o700


def test_corrupted_cache_gives_the_clean_runs_figures(tmp_path):
    scan = _scan(tmp_path)
    env = _env(tmp_path)
    first = subprocess.run([POVMFIT, "fit", str(scan), *FIT, "--jobs", "1", "--out", str(tmp_path / "a")],
                           env=env, capture_output=True, text=True, timeout=600)
    assert first.returncode == 0, first.stderr
    folder = tmp_path / "cache" / "povmfit" / "jax"
    entries = sorted(p for p in folder.iterdir() if p.name.endswith("-cache"))
    assert len(entries) >= 2 and folder.stat().st_mode & 0o777 == 0o700
    # the fit compiles only a few functions, so each round spoils the first two entries one way

    def truncated_and_random(first, second):
        first.write_bytes(first.read_bytes()[:20])
        second.write_bytes(os.urandom(200))

    def swapped(first, second):
        body = first.read_bytes()
        first.write_bytes(second.read_bytes())
        second.write_bytes(body)

    def folder_instead_of_file(first, second):
        first.unlink()
        first.mkdir()

    for spoil, out in ((truncated_and_random, "b"), (swapped, "c"), (folder_instead_of_file, "d")):
        spoil(*sorted(p for p in folder.iterdir() if p.name.endswith("-cache") and p.is_file())[:2])
        second = subprocess.run([POVMFIT, "fit", str(scan), *FIT, "--jobs", "1", "--out", str(tmp_path / out)],
                                env=env, capture_output=True, text=True, timeout=600)
        assert second.returncode == 0 and second.stderr == "", (spoil.__name__, second.stderr)
        assert _figures(tmp_path / out) == _figures(tmp_path / "a"), spoil.__name__


# ----- signals --------------------------------------------------------------------------------
def _hostile_folder(folder: Path) -> Path:
    """Modules named like ones povmfit imports; importing one leaves a marker file."""
    folder.mkdir(exist_ok=True)
    for name in ("numpy", "argparse", "scipy"):
        (folder / f"{name}.py").write_text(
            f"open({str(folder / ('IMPORTED-' + name))!r}, 'w').close()\nraise SystemExit('hostile {name}')\n")
    return folder


def _wait_for_worker(tag: str, parent: subprocess.Popen, timeout: float = 300) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and parent.poll() is None:
        if len(_tagged_processes(tag)) >= 2:  # the run and its worker
            time.sleep(0.5)
            return
        time.sleep(0.1)
    pytest.fail("the worker process never started")


def test_ctrl_c_during_fit_prints_one_line_exits_130_and_leaves_nothing(tmp_path):
    work = _hostile_folder(tmp_path / "work")
    scan = _scan(tmp_path)
    tag = uuid.uuid4().hex
    # a long bootstrap keeps the job busy well after its worker has started (the worker starts
    # without the main process waiting for it, so a tiny job could finish before the signal)
    run = subprocess.Popen([POVMFIT, "fit", str(scan), *FIT, "--jobs", "2", "--bootstrap", "20000",
                            "--out", str(work / "out")],
                           cwd=work, env=_env(tmp_path, tag), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    _wait_for_worker(tag, run)
    run.send_signal(signal.SIGINT)
    _, err = run.communicate(timeout=120)
    assert run.returncode == 130
    assert "interrupted" in _one_line(err)
    assert _no_stray_processes(tag)
    assert sorted(p.name for p in work.iterdir()) == ["argparse.py", "numpy.py", "scipy.py"]


@pytest.mark.parametrize("delay", [0.3, 0.8])
def test_ctrl_c_while_the_libraries_load_still_stops_the_command(tmp_path, delay):
    # Python reports an interrupt raised inside a garbage-collection callback (JAX registers
    # one) as ignored; it is delivered again, so Ctrl-C stops the command at any moment.
    scan = _scan(tmp_path)
    tag = uuid.uuid4().hex
    run = subprocess.Popen([POVMFIT, "fit", str(scan), *FIT, "--jobs", "2", "--bootstrap", "20000",
                            "--out", str(tmp_path / "out")],
                           env=_env(tmp_path, tag), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(delay)
    run.send_signal(signal.SIGINT)
    _, err = run.communicate(timeout=120)
    assert run.returncode == 130, err
    assert "interrupted" in _one_line(err)
    assert _no_stray_processes(tag)
    assert not (tmp_path / "out").exists()


def test_sigkill_part_way_leaves_no_partial_output_and_a_rerun_works(tmp_path, capsys):
    scan = _scan(tmp_path)
    out = tmp_path / "out"
    tag = uuid.uuid4().hex
    run = subprocess.Popen([POVMFIT, "fit", str(scan), *FIT, "--jobs", "2", "--out", str(out)],
                           env=_env(tmp_path, tag), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    _wait_for_worker(tag, run)
    run.kill()
    run.wait(timeout=60)
    assert _no_stray_processes(tag)  # the worker notices its parent is gone and ends
    if out.exists():  # killed after the rename: then the set is complete
        assert {"datasheet.json", "detector.json", "povm.csv"} <= {p.name for p in out.iterdir()}
    assert main(["fit", str(scan), *FIT, "--jobs", "1", "--out", str(out), "--overwrite"]) == 0
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == []  # staging cleaned
    assert json.loads((out / "datasheet.json").read_text())["schema"] == "povmfit.datasheet/1"


# ----- the worker process ---------------------------------------------------------------------
def test_worker_never_imports_modules_from_the_working_folder(tmp_path, monkeypatch):
    from povmfit.fitting.workflow.worker import submit as _submit, worker_pool as _executor

    work = _hostile_folder(tmp_path)
    monkeypatch.chdir(work)
    monkeypatch.syspath_prepend(str(work))  # as `python -m` or a script run from there would
    monkeypatch.setattr(sys, "path", ["", *sys.path])
    with _executor(2) as pool:
        files = _submit(pool, eval, "[__import__(m).__file__ for m in ('numpy', 'argparse', 'scipy')]").result()
    assert all(str(work) not in f for f in files), files
    assert not list(work.glob("IMPORTED-*"))


def test_hung_worker_is_stopped_with_one_line():
    from povmfit.fitting.data.errors import WorkerError
    from povmfit.fitting.workflow.worker import submit as _submit, worker_pool as _executor

    started = time.monotonic()
    with pytest.raises(WorkerError, match="no answer .* within 0.5 s") as caught:
        with _executor(2) as pool:
            _submit(pool, time.sleep, 60, timeout=0.5).result()
    assert "\n" not in str(caught.value) and time.monotonic() - started < 30


def test_dead_worker_gives_one_line():
    from povmfit.fitting.data.errors import WorkerError
    from povmfit.fitting.workflow.worker import submit as _submit, worker_pool as _executor

    with pytest.raises(WorkerError, match="ended unexpectedly"):
        with _executor(2) as pool:
            _submit(pool, os._exit, 3).result()


# ----- output paths ---------------------------------------------------------------------------
@pytest.mark.parametrize("case", ["existing_file", "under_a_file", "holds_other_results"])
def test_bad_out_is_refused_before_any_work(tmp_path, capsys, monkeypatch, case):
    import povmfit.fitting.workflow.characterise as workflow

    monkeypatch.setattr(workflow, "characterise", lambda *a, **k: pytest.fail("work started"))
    scan = _scan(tmp_path)
    taken = tmp_path / "taken"
    taken.write_text("x")
    out = {"existing_file": taken, "under_a_file": taken / "out", "holds_other_results": tmp_path / "old"}[case]
    if case == "holds_other_results":
        out.mkdir()
        (out / "report.html").write_text("another scan's report")
    assert main(["fit", str(scan), *FIT, "--out", str(out)]) == 2
    assert str(out) in _one_line(capsys.readouterr().err)


# ----- scans a lab might write ---------------------------------------------------------------
NATURAL = {
    "byte_order_mark": "\ufeff" + PLAIN,
    "crlf": PLAIN.replace("\n", "\r\n"),
    "quoted_numbers": "\n".join(",".join(f'"{c}"' for c in line.split(",")) for line in PLAIN.splitlines()) + "\n",
    "shots_as_1e3": PLAIN.replace(",1000,", ",1e3,"),
}


@pytest.mark.parametrize("case", sorted(NATURAL))
def test_natural_scan_variants_load_as_the_plain_scan(tmp_path, case):
    plain = load_scan(_scan(tmp_path, PLAIN, "plain.csv"))
    scan = load_scan(_scan(tmp_path, NATURAL[case]))
    np.testing.assert_array_equal(scan.counts, plain.counts)
    np.testing.assert_array_equal(scan.shots, plain.shots)
    np.testing.assert_array_equal(scan.coherent_photons, plain.coherent_photons)


def test_natural_scan_is_fitted_like_the_plain_one(tmp_path):
    plain, odd = _scan(tmp_path, PLAIN, "plain.csv"), _scan(tmp_path, "\ufeff" + NATURAL["quoted_numbers"].replace("\n", "\r\n"))
    assert main(["fit", str(plain), *FIT, "--jobs", "1", "--out", str(tmp_path / "a")]) == 0
    assert main(["fit", str(odd), *FIT, "--jobs", "1", "--out", str(tmp_path / "b")]) == 0
    assert _figures(tmp_path / "a") == _figures(tmp_path / "b")


REFUSED = {
    "count_above_2_63": (PLAIN.replace("0,0,1000,998,2", "0,0,9223372036854775810,9223372036854775808,2"),
                         ":2: column shots", "above the limit"),
    "inf_photons": (PLAIN.replace("2,0,1000", "inf,0,1000"), ":5: column coherent_photons", "infinite"),
    "duplicate_column": ("\n".join(line + (",shots" if i == 0 else ",1000") for i, line in enumerate(PLAIN.splitlines())) + "\n",
                         ":1: column shots", "twice"),
    "outcome_10_15_long_layout": ("probe,coherent_photons,thermal_photons,outcome,count\na,1,0,0,5\na,1,0,1000000000000000,5\n",
                                  ":3: column outcome", f"limit {MAX_OUTCOMES - 1}"),
    "wide_outcome_10_12": ("coherent_photons,thermal_photons,shots,count_0,count_1000000000000\n1,0,2,1,1\n",
                           ":1: column count_1000000000000", "limit"),
}


@pytest.mark.parametrize("case", sorted(REFUSED))
def test_bad_scans_are_refused_with_file_row_and_column(tmp_path, capsys, case):
    text, where, what = REFUSED[case]
    path = _scan(tmp_path, text)
    assert main(["fit", str(path), *FIT, "--out", str(tmp_path / "out")]) == 2
    line = _one_line(capsys.readouterr().err)
    assert f"{path}{where}" in line and what in line, line
    assert not (tmp_path / "out").exists()


def test_pattern_counts_that_would_wrap_are_refused(tmp_path):
    # two patterns of one probe with one click each, each 2^52 + 2^52 counts: their sum
    # passes 2^53 and would, summed blindly in int64 over more rows, wrap to nonsense
    rows = [f"a,1,0,{p},{2**53 - 1}" for p in ("10", "01")]
    path = _scan(tmp_path, "probe,coherent_photons,thermal_photons,pattern,count\n" + "\n".join(rows) + "\n")
    with pytest.raises(ScanError, match=f":3: column count: .*limit {MAX_SHOTS}"):
        load_scan(path)


def test_parquet_holding_csv_bytes_is_refused(tmp_path, capsys):
    path = _scan(tmp_path, PLAIN, "scan.parquet")
    assert main(["fit", str(path), *FIT, "--out", str(tmp_path / "out")]) == 2
    assert "cannot read as Parquet" in _one_line(capsys.readouterr().err)


def test_folder_given_as_the_scan_is_refused(tmp_path, capsys):
    (tmp_path / "scan.csv").mkdir()
    assert main(["fit", str(tmp_path / "scan.csv"), *FIT, "--out", str(tmp_path / "out")]) == 2
    assert "cannot read" in _one_line(capsys.readouterr().err)


def _datasheet_is_finite(out: Path) -> None:
    text = (out / "datasheet.json").read_text()
    assert "NaN" not in text and "Infinity" not in text


def test_one_probe_is_fitted_or_refused_with_one_line(tmp_path, capsys):
    path = _scan(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1\n1,0,1000,551,449\n")
    code = main(["fit", str(path), "--model", "threshold", "--no-report", "--quiet", "--jobs", "1",
                 "--out", str(tmp_path / "out")])
    if code == 0:
        _datasheet_is_finite(tmp_path / "out")
        # loss only, one coherent probe: 1 - exp(-eta) = 0.449 (Poisson click law, common practice)
        value = json.loads((tmp_path / "out" / "datasheet.json").read_text())["figures"]["efficiency"]["value"]
        assert value == pytest.approx(-math.log(0.551), rel=1e-6)
    else:
        assert code == 2 and str(path) in _one_line(capsys.readouterr().err)


def test_all_counts_in_outcome_zero_is_fitted_or_refused_with_one_line(tmp_path, capsys):
    text = "coherent_photons,thermal_photons,shots,count_0,count_1\n0.5,0,1000,1000,0\n1,0,1000,1000,0\n2,0,1000,1000,0\n"
    path = _scan(tmp_path, text)
    code = main(["fit", str(path), *FIT, "--jobs", "1", "--out", str(tmp_path / "out")])
    if code == 0:
        _datasheet_is_finite(tmp_path / "out")
    else:
        assert code == 2 and _one_line(capsys.readouterr().err)


@pytest.mark.slow  # about 4 minutes on a loaded two-core machine (258 s in bench_faults), most of it the model-free POVM
def test_sixty_outcomes_are_fitted(tmp_path):
    # a 59-photon-resolving detector, loss only, probed by coherent light (Poisson thinning:
    # outcome law Poisson(eta * m), common practice); counts are the expectation, rounded
    import scipy.stats

    rows = []
    for m in (5.0, 15.0, 30.0):
        q = scipy.stats.poisson.pmf(np.arange(60), 0.8 * m)
        q[-1] += 1 - q.sum()
        counts = np.round(q * 1e6).astype(int)
        rows.append(f"{m},0,{counts.sum()}," + ",".join(map(str, counts)))
    header = "coherent_photons,thermal_photons,shots," + ",".join(f"count_{k}" for k in range(60))
    path = _scan(tmp_path, header + "\n" + "\n".join(rows) + "\n")
    out = tmp_path / "out"
    assert main(["fit", str(path), "--model", "pnr:59", "--no-report", "--quiet", "--jobs", "1", "--out", str(out)]) == 0
    _datasheet_is_finite(out)
    value = json.loads((out / "datasheet.json").read_text())["figures"]["efficiency"]["value"]
    assert value == pytest.approx(0.8, abs=2e-3)  # rounding of ~1e6 expected counts: < 1e-3 shift
