"""The ``povmfit`` command line."""
from __future__ import annotations

import argparse
import sys

import povmfit


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="povmfit", description="Characterise photon detectors from probe-state counts.")
    parser.add_argument("--version", action="version", version=f"povmfit {povmfit.__version__}")
    parser.add_subparsers(dest="verb")
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.verb is None:
        parser.print_help()
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main())
