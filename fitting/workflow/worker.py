"""The one worker process of the whole job (``concurrent.futures``, spawn context).

:func:`worker_pool` gives a one-worker process pool for ``n_jobs >= 2`` (None for 1): the
whole job runs the model-free POVM there beside the model ranking. The module imports only
the standard library, so the command line can start the worker before it imports numpy and
JAX itself, and the worker's start-up overlaps this process's. :func:`submit` runs a task
there (or here without a pool) and turns a dead or hung worker into a one-line WorkerError.
"""
from __future__ import annotations

import importlib
import multiprocessing
import os
import signal
from concurrent.futures import Future, ProcessPoolExecutor
from contextlib import contextmanager

from povmfit.fitting.data.errors import ArgumentError  # standard library only below it

__all__ = ["worker_pool", "submit", "report_to_parent", "release", "WORKER_TIMEOUT_S", "PRELOAD"]

PRELOAD = ("povmfit.fitting.tomography.model_free", "povmfit.fitting.tomography.reconstruct")
"""Modules the worker imports as it starts (what its tasks need), before any task arrives."""

WORKER_TIMEOUT_S = 6 * 3600.0
"""Longest wait for one task of the worker process (its result or its start) before the job
is stopped with a one-line WorkerError; a healthy worker answers well within it."""


@contextmanager
def worker_pool(n_jobs: int, progress=None):
    """A one-worker process pool for n_jobs >= 2 (or -1), else None (work done here).

    The worker imports :data:`PRELOAD` as it starts. Its progress (tasks given
    :func:`report_to_parent` as their callback) comes back through a queue and is passed to
    ``progress`` on a thread of this process, the task's name marked "(worker)".

    The worker is a fresh interpreter (spawn) started isolated from the working folder: the
    folder is not on its module path (``PYTHONSAFEPATH`` during its start-up, and the module
    path it inherits has the working folder removed unless the running script lives there),
    so a module file lying in the folder where povmfit runs is never imported by it. It
    ignores SIGINT: Ctrl-C reaches this process, which stops the worker.
    """
    if n_jobs == -1:
        n_jobs = os.cpu_count() or 1
    if not isinstance(n_jobs, int) or n_jobs < 1:
        raise ArgumentError(f"n_jobs: expected a positive number of processes or -1, got {n_jobs!r}")
    if n_jobs == 1:
        yield None
        return
    # spawn: a fresh interpreter (JAX's threads do not survive fork)
    context = multiprocessing.get_context("spawn")
    reports = context.Queue() if progress is not None else None
    pool = ProcessPoolExecutor(max_workers=1, mp_context=context, initializer=_worker_setup,
                               initargs=(os.getpid(), reports, PRELOAD))
    relay = _relay_progress(reports, progress) if reports is not None else None
    try:
        _start_isolated(pool)
        yield pool
    except BaseException:
        # the worker's result is no longer wanted: stop it rather than wait for it
        _stop_workers(pool)
        raise
    finally:
        if relay is not None:
            reports.put(None)
            relay.join(timeout=5)
    pool.shutdown(wait=True)


_REPORTS = None  # in the worker: the queue its progress goes to


def report_to_parent(task: str, done: int, total: int) -> None:
    """The progress callback of a task run in the worker: the report goes to the parent."""
    if _REPORTS is not None:
        _REPORTS.put((f"{task} (worker)", done, total))


def _relay_progress(reports, progress):
    """A thread passing the worker's reports to ``progress`` until it reads None."""
    import threading

    def relay():
        for report in iter(reports.get, None):
            progress(*report)

    thread = threading.Thread(target=relay, daemon=True, name="povmfit-worker-progress")
    thread.start()
    return thread


def _worker_setup(parent_pid: int, reports=None, preload=()) -> None:
    """In the worker: ignore SIGINT (the parent stops the worker), send progress to
    ``reports``, end when the parent is gone (killed), so no worker outlives its job, and
    import ``preload``."""
    import threading
    import time

    global _REPORTS
    _REPORTS = reports
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch():
        while os.getppid() == parent_pid:
            time.sleep(0.5)
        os._exit(1)

    threading.Thread(target=watch, daemon=True, name="povmfit-parent-watch").start()
    for name in preload:
        importlib.import_module(name)


def _start_isolated(pool) -> None:
    """Start the pool's worker now, with the working folder off its module path. The worker's
    interpreter and its module path are fixed when ``submit`` returns (spawn hands them over
    as it starts the process), so this process does not wait for the worker to answer; the
    first task's answer carries the start's time limit."""
    import sys

    main_file = getattr(sys.modules.get("__main__"), "__file__", None)
    main_folder = os.path.realpath(os.path.dirname(main_file)) if main_file else None
    here = os.path.realpath(os.getcwd())
    unsafe = {entry for entry in sys.path
              if os.path.realpath(entry or ".") == here and here != main_folder}
    saved_path, saved_flag = list(sys.path), os.environ.get("PYTHONSAFEPATH")
    os.environ["PYTHONSAFEPATH"] = "1"
    sys.path[:] = [entry for entry in sys.path if entry not in unsafe]
    try:
        started = pool.submit(os.getpid)  # the pool starts its worker on the first task
    finally:
        sys.path[:] = saved_path
        if saved_flag is None:
            os.environ.pop("PYTHONSAFEPATH", None)
        else:
            os.environ["PYTHONSAFEPATH"] = saved_flag
    return started


def _stop_workers(pool) -> None:
    processes = list((getattr(pool, "_processes", None) or {}).values())
    for process in processes:
        process.terminate()
    for process in processes:
        process.join(timeout=5)
        if process.is_alive():
            process.kill()
            process.join(timeout=5)
    # the worker is gone, so the pool's manager thread ends at once: wait for it, so that the
    # pool's queues and locks are released before this process exits
    pool.shutdown(wait=not any(process.is_alive() for process in processes), cancel_futures=True)


class _Pending:
    """The answer of a task submitted to the worker; ``result()`` waits at most ``timeout``
    seconds and turns a dead or hung worker into a one-line WorkerError."""

    def __init__(self, future: Future, timeout: float, task: str):
        self._future, self._timeout, self._task = future, timeout, task

    def result(self):
        return _wait(self._future, self._timeout, self._task)


def _wait(future: Future, timeout: float, task: str):
    from concurrent.futures import TimeoutError as FutureTimeout
    from concurrent.futures.process import BrokenProcessPool

    from povmfit.fitting.data.errors import WorkerError

    try:
        return future.result(timeout=timeout)
    except FutureTimeout:
        raise WorkerError(f"the worker process gave no answer for {task} within {timeout:g} s; "
                          "stopped (rerun with --jobs 1 to compute everything in one process)") from None
    except BrokenProcessPool:
        raise WorkerError(f"the worker process ended unexpectedly during {task} (killed or out of memory?); "
                          "rerun with --jobs 1 to compute everything in one process") from None


def submit(pool, function, *args, timeout: float | None = None):
    """Run ``function(*args)`` in the worker (or here without a pool); the returned object's
    ``result()`` waits at most ``timeout`` seconds (default :data:`WORKER_TIMEOUT_S`)."""
    if pool is not None:
        return _Pending(pool.submit(function, *args), WORKER_TIMEOUT_S if timeout is None else timeout,
                        getattr(function, "__name__", "a task"))
    done: Future = Future()
    done.set_result(function(*args))
    return done


def release(pool) -> None:
    """Let the worker end once its tasks are done, without waiting for it (its interpreter's
    exit then overlaps this process's remaining work); :func:`worker_pool` waits for it at
    the end of its block."""
    if pool is not None:
        pool.shutdown(wait=False)
