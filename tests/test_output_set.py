"""Outputs written as a set and with normal permissions (fitting/data/files.py)."""
from __future__ import annotations

import json
import os
import threading

import pytest

from povmfit.fitting.data.errors import OutputError
from povmfit.fitting.data.files import atomic_write_text, check_output_folder, output_set, write_json


@pytest.fixture
def umask_022():
    old = os.umask(0o022)
    yield
    os.umask(old)


def test_files_get_the_normal_mode_under_the_umask(tmp_path, umask_022):
    # Source: POSIX open(2)/mkdir(2): mode 0666/0777 masked by the umask (common practice).
    atomic_write_text(tmp_path / "a.txt", "x")
    write_json(tmp_path / "b.json", {"a": 1})
    with output_set(tmp_path / "set") as staging:
        atomic_write_text(staging / "c.txt", "y")
    for path in (tmp_path / "a.txt", tmp_path / "b.json", tmp_path / "set" / "c.txt"):
        assert oct(path.stat().st_mode & 0o777) == oct(0o644), path
    assert oct((tmp_path / "set").stat().st_mode & 0o777) == oct(0o755)


def test_other_umask_is_followed(tmp_path):
    old = os.umask(0o077)
    try:
        atomic_write_text(tmp_path / "a.txt", "x")
    finally:
        os.umask(old)
    assert (tmp_path / "a.txt").stat().st_mode & 0o777 == 0o600


def test_set_appears_whole_or_not_at_all(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(RuntimeError):
        with output_set(out) as staging:
            atomic_write_text(staging / "datasheet.json", "{}")
            raise RuntimeError("stopped half-way")
    assert not out.exists()
    assert not list(tmp_path.iterdir())  # no staging folder left behind


def test_existing_results_refused_without_overwrite_and_replaced_whole_with_it(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "report.html").write_text("old run")
    (out / "plots").mkdir()
    with pytest.raises(OutputError, match="already holds files.*--overwrite"):
        check_output_folder(out)
    with output_set(out, overwrite=True) as staging:
        atomic_write_text(staging / "datasheet.json", "{}")
    assert sorted(p.name for p in out.iterdir()) == ["datasheet.json"]  # nothing of the old set
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_empty_existing_folder_is_used(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    with output_set(out) as staging:
        atomic_write_text(staging / "x.csv", "1\n")
    assert (out / "x.csv").read_text() == "1\n"


@pytest.mark.parametrize("case", ["file", "under_file"])
def test_output_path_at_or_under_a_file_is_refused(tmp_path, case):
    target = tmp_path / "taken"
    target.write_text("not a folder")
    out = target if case == "file" else target / "out"
    with pytest.raises(OutputError) as caught:
        check_output_folder(out)
    assert len(str(caught.value).splitlines()) == 1 and str(out) in str(caught.value)


@pytest.mark.skipif(os.geteuid() == 0, reason="permissions do not bind the superuser")
def test_unwritable_parent_is_refused(tmp_path):
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        with pytest.raises(OutputError, match="cannot write"):
            check_output_folder(locked / "out")
    finally:
        locked.chmod(0o755)


def test_two_writers_of_one_folder_never_mix(tmp_path):
    # Eight writers race to put a set of 20 files, each tagged with its writer, into one
    # folder (all with overwrite). Whatever order they finish in, the folder must hold the
    # 20 files of exactly one writer.
    out = tmp_path / "out"
    barrier = threading.Barrier(8)
    errors = []

    def writer(tag):
        try:
            barrier.wait()
            with output_set(out, overwrite=True) as staging:
                for i in range(20):
                    atomic_write_text(staging / f"f{i}.txt", tag)
        except Exception as error:  # noqa: BLE001 - collected for the assertion below
            errors.append(error)

    threads = [threading.Thread(target=writer, args=(f"run{j}",)) for j in range(8)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=60)
    assert not errors
    tags = {(out / f"f{i}.txt").read_text() for i in range(20)}
    assert len(tags) == 1 and len(list(out.iterdir())) == 20
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_second_writer_without_overwrite_is_refused_not_mixed(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(OutputError, match="meanwhile"):
        with output_set(out) as staging:
            atomic_write_text(staging / "b.txt", "second")
            out.mkdir()  # another run put its set in place while this one was writing
            (out / "a.txt").write_text("first")
    assert sorted(p.name for p in out.iterdir()) == ["a.txt"] and (out / "a.txt").read_text() == "first"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_abandoned_staging_of_a_killed_run_is_removed(tmp_path):
    dead = tmp_path / ".out.999999999.abc.partial"  # no such process id
    dead.mkdir()
    (dead / "datasheet.json").write_text(json.dumps({}))
    with output_set(tmp_path / "out") as staging:
        atomic_write_text(staging / "x", "1")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_json_never_holds_nan_or_infinity(tmp_path):
    import numpy as np

    payload = {"a": float("nan"), "b": [np.float32("inf"), np.float64(-np.inf), np.int64(3)], "c": np.array([1.5, np.nan]),
               "d": {"e": np.bool_(True), "f": (1, float("inf"))}}
    write_json(tmp_path / "x.json", payload)
    text = (tmp_path / "x.json").read_text()
    assert "NaN" not in text and "Infinity" not in text
    assert json.loads(text) == {"a": None, "b": [None, None, 3], "c": [1.5, None], "d": {"e": True, "f": [1, None]}}


def _small_reconstruction(tmp_path):
    """Model-free reconstruction of a small invented scan of an on/off detector."""
    from povmfit.fitting.data.scan import load_scan
    from povmfit.fitting.tomography.model_free import reconstruct_scan

    scan = tmp_path / "scan.csv"
    scan.write_text("coherent_photons,thermal_photons,shots,count_0,count_1\n"
                    "0,0,1000,998,2\n0.5,0,1000,742,258\n1,0,1000,551,449\n2,0,1000,301,699\n0.5,0.5,1000,702,298\n")
    result = reconstruct_scan(load_scan(scan), bootstrap=0, seed=0, method="least_squares")
    scan.unlink()
    return result


def test_reconstruction_is_written_as_a_set(tmp_path, monkeypatch):
    import povmfit.fitting.tomography.scan_reconstruction as module

    result = _small_reconstruction(tmp_path)
    out = tmp_path / "rec"
    out.mkdir()
    (out / "povm.csv").write_text("an earlier run's table")
    with pytest.raises(OutputError, match="already holds files"):
        result.write(out)
    assert (out / "povm.csv").read_text() == "an earlier run's table"

    def failing(path, payload):
        raise RuntimeError("disk full")  # the last file of the set fails

    monkeypatch.setattr(module, "write_json", failing)
    with pytest.raises(RuntimeError):
        result.write(out, overwrite=True)
    assert sorted(p.name for p in out.iterdir()) == ["povm.csv"] and (out / "povm.csv").read_text() == "an earlier run's table"
    monkeypatch.undo()
    files = result.write(out, overwrite=True)
    assert sorted(p.name for p in out.iterdir()) == ["povm.csv", "reconstruction.json", "wigner.csv"]
    assert {name: path.parent for name, path in files.items()} == dict.fromkeys(files, out)
    assert json.loads(files["reconstruction"].read_text())["schema"] == module.RECONSTRUCTION_SCHEMA
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rec"]  # no staging folder left
