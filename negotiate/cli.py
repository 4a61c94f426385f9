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
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    check = commands.add_parser(
        "check",
        help="validate a fleet file, build its agents, show windows and conflicts",
        description="Validate a fleet file, build every agent and print each agent's "
        "reachable parameter window and free optimum, the resources' users and the "
        "conflict graph. Exit status 0: no problems; 1: problems (listed); 2: the file "
        "cannot be read. Custom models named by import path are imported and run.",
    )
    check.add_argument("fleet", help="fleet file (TOML)")
    check.add_argument("--no-build", action="store_true", help="only parse and validate; do not build the agents")
    return parser


def _check(args: argparse.Namespace) -> int:
    from negotiate.check import check_fleet

    try:
        result = check_fleet(args.fleet, build=not args.no_build)
    except OSError as exc:
        print(f"negotiate check: cannot read {args.fleet}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    print(result.to_text(), end="")
    return 0 if result.ok else 1


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    if args.command == "check":
        return _check(args)
    return 0


if __name__ == "__main__":
    sys.exit(main())
