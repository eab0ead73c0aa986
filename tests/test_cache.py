"""The store of traced programs returns exactly what plain tracing returns."""
import jax
import numpy as np
import pytest

from povmfit.fitting import _cache
from povmfit.fitting.objective import compiled
from povmfit.models import parse_model_spec


@pytest.fixture
def store(tmp_path, monkeypatch):
    monkeypatch.setitem(_cache._STORE, "folder", tmp_path)
    return tmp_path


def _probabilities_and_jacobian():
    model = parse_model_spec("array:4+dark+crosstalk")
    x = np.array([0.6, 0.01, 0.05])
    coherent, thermal = np.array([0.0, 0.5, 2.0]), np.array([0.0, 0.3, 0.0])
    return compiled(model, 30).probabilities_and_jacobian._jitted, (x, coherent, thermal)


def test_stored_program_is_saved_and_reloaded_with_identical_results(store):
    jitted, args = _probabilities_and_jacobian()
    reference = jitted(*args)  # source: the plain jitted function (common practice, no source)
    first = _cache.stored_program(jitted, "probe", args)
    assert len(list(store.glob("*/*.hlo"))) == 1
    second = _cache.stored_program(jitted, "probe", args)  # now read back from the file
    for program in (first, second):
        for got, want in zip(program(*args), reference):
            np.testing.assert_array_equal(np.asarray(got), np.asarray(want))


def test_programs_are_keyed_by_label_and_argument_shapes(store):
    jitted, args = _probabilities_and_jacobian()
    _cache.stored_program(jitted, "one", args)
    _cache.stored_program(jitted, "two", args)
    longer = (args[0], np.append(args[1], 1.0), np.append(args[2], 0.0))
    wrapper = _cache.StoredPrograms(jitted, "one")
    q, _ = wrapper(*longer)
    assert q.shape == (4, 5)
    assert len(list(store.glob("*/*.hlo"))) == 3


def test_store_off_means_plain_tracing(monkeypatch):
    monkeypatch.setitem(_cache._STORE, "folder", None)
    f = jax.jit(lambda x: 2 * x)
    assert _cache.stored_program(f, "off", (np.ones(2),)) is f


def _claim_and_program_paths(store, jitted, args, label):
    key = _cache._program_key(label, args)
    folder = _cache._program_folder()
    return folder / f"{key}.claim", folder / f"{key}.hlo"


def test_claim_of_a_stopped_process_is_not_waited_for(store, monkeypatch):
    jitted, args = _probabilities_and_jacobian()
    claim, path = _claim_and_program_paths(store, jitted, args, "stale")
    claim.write_text("999999999")  # no such process
    monkeypatch.setattr(_cache.time, "sleep", lambda s: pytest.fail("waited for a dead process"))
    _cache.stored_program(jitted, "stale", args)
    assert path.exists() and not claim.exists()


def test_live_claim_is_waited_for_and_its_program_used(store, monkeypatch):
    import os

    jitted, args = _probabilities_and_jacobian()
    claim, path = _claim_and_program_paths(store, jitted, args, "claimed")
    claim.write_text(str(os.getpid()))  # a living holder

    def other_process_finishes(seconds):
        _cache._write_atomically(path, jax.export.export(jitted)(*args).serialize())
        claim.unlink()

    monkeypatch.setattr(_cache.time, "sleep", other_process_finishes)
    monkeypatch.setattr(_cache, "_export_compile_and_store", lambda *a: pytest.fail("compiled it twice"))
    program = _cache.stored_program(jitted, "claimed", args)
    np.testing.assert_array_equal(np.asarray(program(*args)[0]), np.asarray(jitted(*args)[0]))


def test_programs_of_other_versions_unused_for_30_days_are_removed(store):
    import os
    import time

    old, recent = store / ("0" * 24), store / ("1" * 24)
    for folder in (old, recent):
        folder.mkdir()
        (folder / "x.hlo").write_bytes(b"")
    month_ago = time.time() - 31 * 86400
    os.utime(old, (month_ago, month_ago))
    jitted, args = _probabilities_and_jacobian()
    _cache.stored_program(jitted, "sweep", args)
    assert not old.exists() and recent.exists()
    assert len(list(store.glob("*/*.hlo"))) == 2  # the recent one and the new program
