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

    run = commands.add_parser(
        "run",
        help="coordinate a fleet: choose orders, negotiate slots and shares, write the schedule",
        description="Build the fleet's agents, choose the orders on exclusive resources, coordinate the "
        "shared parameters and write DIR/schedule.csv and DIR/run.json. With --verify, also solve the "
        "centralized NLP for the final orders and report the gap. A planning and research tool, not a "
        "safety controller: gaps, speeds and site rules come from local codes and licensed practice.",
    )
    run.add_argument("fleet", help="fleet file (TOML)")
    run.add_argument("--out", required=True, metavar="DIR", help="folder for the output files (created)")
    run.add_argument(
        "--method",
        help="bundle, gradient, newton, or package.module:Class of your own Method (imports and runs it); "
        "default: the fleet file's [coordinator] method",
    )
    run.add_argument("--verify", action="store_true", help="compare with the centralized IPOPT solve")
    run.add_argument("--quiet", action="store_true", help="no progress bar")
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


def _fmt(v: float, digits: int = 6) -> str:
    return "-" if v != v else f"{v:.{digits}g}"


def _table(header: list[str], rows: list[list[str]]) -> str:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(header)]
    line = "  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))
    body = [
        "  ".join(c.rjust(w) if k > 1 else c.ljust(w) for k, (c, w) in enumerate(zip(r, widths, strict=True)))
        for r in rows
    ]
    return "\n".join([line, *body])


def _run(args: argparse.Namespace) -> int:
    from negotiate.coupling import DeadlockError
    from negotiate.errors import FleetError
    from negotiate.fleet import build_agents, load_fleet
    from negotiate.run import run_fleet, write_outputs

    try:
        spec = load_fleet(args.fleet)
    except OSError as exc:
        print(f"negotiate run: cannot read {args.fleet}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except FleetError as exc:
        print(exc, file=sys.stderr)
        return 1
    bar = None
    try:
        agents = build_agents(spec)
        method = args.method or spec.coordinator.method
        print(f"fleet {spec.name}: {len(agents)} agents, {len(spec.resources)} resources; method {method}, "
              f"orders {spec.coordinator.order}")  # fmt: skip
        progress = None
        if not args.quiet:
            from tqdm import tqdm

            bar = tqdm(total=None, unit="round", file=sys.stderr, dynamic_ncols=True, leave=False)

            def progress(rec):  # type: ignore[no-untyped-def]
                bar.update(1)
                bar.set_postfix_str(
                    f"total {_fmt(rec.best_total, 9)}  measure {rec.measure:.1e}  flagged {len(rec.flagged)}"
                    + (f"  failed {len(rec.failed)}" if rec.failed else ""),
                    refresh=False,
                )

        result = run_fleet(spec, agents, method=args.method, verify=args.verify, progress=progress)
    except (FleetError, DeadlockError, ValueError) as exc:
        if bar is not None:
            bar.close()
        print(exc, file=sys.stderr)
        return 1
    if bar is not None:
        bar.close()
    paths = write_outputs(result, args.out)
    c = result.coordination
    rows = []
    for r in result.schedule:
        if r.share == r.share:
            rows.append([r.agent, r.resource, f"{r.enter:.1f}", f"{r.leave:.1f}", f"{r.share:.0f}", "", "",
                         _fmt(r.d_share, 3), _fmt(r.value - r.free_value, 4), r.verdict])  # fmt: skip
        else:
            rows.append([r.agent, r.resource, f"{r.enter:.1f}", f"{r.leave:.1f}", "", _fmt(r.d_enter, 3),
                         _fmt(r.d_leave, 3), "", _fmt(r.value - r.free_value, 4), r.verdict])  # fmt: skip
    print(_table(["agent", "resource", "enter s", "leave s", "share", "dV/denter /s", "dV/dleave /s",
                  "dV/dshare", "cost increase", "certificate"], rows))  # fmt: skip
    print(f"status: {c.status} ({c.message}); {c.rounds} rounds, {c.agent_solves} agent solves, "
          f"{len(result.order_trials)} order(s) tried, {result.wall_time:.1f} s")  # fmt: skip
    print(f"total cost {_fmt(result.total, 10)}; free optima {_fmt(result.free_total, 10)}; "
          f"coordination cost {_fmt(result.total - result.free_total, 6)}")  # fmt: skip
    if result.centralized is not None:
        ce = result.centralized
        gap = result.gap
        print(f"centralized: {ce.status} ({ce.message}), cost {_fmt(ce.total, 10)}, {ce.wall_time:.2f} s; "
              f"relative gap {'-' if gap is None else f'{gap:+.2e}'}")  # fmt: skip
    print("orders: " + "; ".join(f"{k}: {' > '.join(v)}" for k, v in c.orders.items()))
    print("wrote " + ", ".join(str(p) for p in paths))
    print("planning and research output, not a safety controller: check gaps and speeds against site rules")
    return 0 if c.success else 3


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    if args.command == "check":
        return _check(args)
    if args.command == "run":
        return _run(args)
    return 0


if __name__ == "__main__":
    sys.exit(main())
