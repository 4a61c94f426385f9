"""Command line: a thin layer that parses arguments, calls the Python API and prints.

Every command is doable from Python; this module holds no logic of its own. User mistakes raise the
documented exception type and are printed without a traceback, with a non-zero exit status.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

import negotiate


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="negotiate",
        description="Coordinate shared slots and capacities among agents that keep their own parametric NLPs.",
    )
    parser.add_argument("--version", action="version", version=f"negotiate {negotiate.__version__}")
    parser.add_subparsers(dest="command", metavar="COMMAND")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main())
