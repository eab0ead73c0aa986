"""The ``povmfit`` command line.

Each verb lives in its own module ``povmfit.fitting.cli.<verb>`` exposing
``register(subparsers)`` (adds its parser, with ``--help`` text and an example) and
``run(args) -> int``; a verb turns options into keyword arguments of a library function.
The library's typed errors (:class:`PovmfitError` and subclasses) are printed as one line
on stderr and the exit code is 2. Ctrl-C (SIGINT) prints one line and exits with 130 after
the worker processes are stopped and partial outputs removed; the process then ends at once
(``os._exit``), so no native library thread can abort the interpreter's shutdown.
"""
from __future__ import annotations

import _thread
import argparse
import importlib
import os
import sys
import threading

import povmfit
from povmfit.fitting.data.errors import PovmfitError


VERBS = ("fit", "reconstruct", "emulate", "simulate", "demo",
         "batch", "plan",
         "tally")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="povmfit", description="Characterise photon detectors from probe-state counts."
    )
    parser.add_argument("--version", action="version", version=f"povmfit {povmfit.__version__}")
    subparsers = parser.add_subparsers(dest="verb", metavar="VERB")
    for verb in VERBS:
        module = importlib.import_module(f"povmfit.fitting.cli.{verb}")
        sub = module.register(subparsers)
        sub.set_defaults(handler=module.run)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as stop:  # argparse already printed its one-line usage error
        return 2 if stop.code not in (0, None) else 0
    if getattr(args, "handler", None) is None:
        parser.print_help()
        return 0
    from povmfit.fitting.cli.cache import enable_compilation_cache

    enable_compilation_cache()
    try:
        return int(args.handler(args) or 0)
    except PovmfitError as error:
        print(f"povmfit {args.verb}: error: {' '.join(str(error).split())}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"povmfit {args.verb}: interrupted (no partial output is left behind)", file=sys.stderr)
        return INTERRUPTED


INTERRUPTED = 130  # the shell's code for a command ended by SIGINT (128 + 2)


def _redeliver_interrupts(default_hook):
    """A ``sys.unraisablehook`` that delivers again a Ctrl-C Python had to drop: one arriving
    while a garbage-collection callback runs (JAX registers one) is raised inside it, where
    Python only reports it as ignored; the command would carry on. It is raised again from
    another thread 50 ms later, so that it reaches the main thread outside the callback."""
    def hook(unraisable):
        if unraisable.exc_type is not None and issubclass(unraisable.exc_type, KeyboardInterrupt):
            timer = threading.Timer(0.05, _thread.interrupt_main)
            timer.daemon = True
            timer.start()
            return
        default_hook(unraisable)

    return hook


def entry() -> None:
    """Console entry point."""
    sys.unraisablehook = _redeliver_interrupts(sys.unraisablehook)
    try:
        code = main()
    except KeyboardInterrupt:  # Ctrl-C before a verb started (while parsing or importing)
        print("povmfit: interrupted", file=sys.stderr)
        code = INTERRUPTED
    if code == INTERRUPTED:
        import atexit

        try:
            atexit._run_exitfuncs()  # release the worker pool's locks, record the cache entries
        finally:
            sys.stdout.flush()
            sys.stderr.flush()
            os._exit(code)
    sys.exit(code)


if __name__ == "__main__":
    entry()
