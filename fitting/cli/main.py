"""The ``povmfit`` command line.

Each verb lives in its own module ``povmfit.fitting.cli.<verb>`` exposing
``register(subparsers)`` (adds its parser, with ``--help`` text and an example) and
``run(args) -> int``; a verb turns options into keyword arguments of a library function.
The library's typed errors (:class:`PovmfitError` and subclasses) are printed as one line
on stderr and the exit code is 2.
"""
from __future__ import annotations

import argparse
import importlib
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
    """Console entry point."""
    sys.exit(main())


if __name__ == "__main__":
    entry()
