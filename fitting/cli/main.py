"""The ``povmfit`` command line.

Each verb lives in its own module ``povmfit.fitting.cmd_<verb>`` exposing
``register(subparsers)`` (adds its parser, with ``--help`` text and an example) and
``run(args) -> int``. Bad input raises :class:`PovmfitError`; it is printed as one line on
stderr and the exit code is 2.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys

import povmfit
from povmfit.fitting.data.errors import PovmfitError


VERBS = ("fit", "reconstruct", "emulate", "simulate", "demo")


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
        print(f"povmfit {args.verb}: error: {error}", file=sys.stderr)
        return 2


def entry() -> None:
    """Console entry point: run :func:`main` and leave at once.

    Every output is written and closed by then; skipping the interpreter's teardown (module
    and JAX runtime clean-up, about 0.5 s) is what makes the leaving immediate.
    """
    code = main()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except OSError:  # e.g. a reader that closed the pipe early
            pass
    os._exit(code)


if __name__ == "__main__":
    entry()
