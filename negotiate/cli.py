"""Command line: a thin layer that parses arguments, calls the Python API and prints.

Every command is doable from Python; this module holds no logic of its own. User mistakes raise the
documented exception type and are printed without a traceback, with a non-zero exit status.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import negotiate
from negotiate.tools.generate import KINDS

if TYPE_CHECKING:
    from negotiate.coordination.engine import RoundRecord
    from negotiate.core.agent import AgentModel
    from negotiate.fleet.spec import CoordinatorSettings, FleetSpec


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
    run.add_argument("fleet", nargs="?", help="fleet file (TOML); may be left out with --resume")
    run.add_argument(
        "--out",
        metavar="DIR",
        help="folder for the outputs and the checkpoint (created; required unless --resume); one run at a time, "
        "and an earlier run's files there are replaced",
    )
    run.add_argument(
        "--method",
        help="bundle, gradient, newton, or package.module:Class of your own Method (imports and runs it); "
        "default: the fleet file's [coordinator] method",
    )
    run.add_argument("--verify", action="store_true", help="compare with the centralized IPOPT solve")
    run.add_argument("--quiet", action="store_true", help="no progress bar")
    run.add_argument("--workers", type=int, metavar="N", help="solve the agents in N local worker processes")
    run.add_argument("--scheduler", metavar="tcp://HOST:PORT", help="solve the agents on this Dask scheduler's workers")
    run.add_argument(
        "--cluster", choices=["local"], help="start a Dask cluster on this machine (loopback; --workers workers, 2)"
    )
    run.add_argument(
        "--time-limit",
        type=float,
        metavar="S",
        help="seconds per agent solve: a solve that runs longer counts as failed for that agent (time-limit)",
    )
    run.add_argument(
        "--resume",
        metavar="DIR",
        help="continue the run whose checkpoint is in DIR from its last complete round (outputs go to DIR)",
    )

    generate = commands.add_parser(
        "generate",
        help="write an invented fleet of N agents to standard output",
        description="Write a fleet file (TOML) with N invented agents of one kind to standard output: haul "
        "trucks at a single-lane bridge, machines through a furnace, tractors charging from one grid "
        "connection, or cars and heavy vehicles at a four-way crossing. Arrivals are spread out in proportion "
        "to N, so the fleet stays feasible as it grows. The same kind, N and seed always give the same file.",
    )
    generate.add_argument("--kind", required=True, choices=list(KINDS), help="kind of fleet")
    generate.add_argument("--agents", required=True, type=int, metavar="N", help="number of agents")
    generate.add_argument("--seed", type=int, default=0, metavar="S", help="seed of the invented numbers (default 0)")

    report = commands.add_parser(
        "report",
        help="rebuild DIR/report.html from a run folder's files (no solving)",
        description="Read the files that 'negotiate run' wrote into DIR (run.json and the CSV files) and "
        "write DIR/report.html again, without solving anything. Only files inside DIR are read. Exit status "
        "2 when a file is missing or damaged (the message names it).",
    )
    report.add_argument("dir", metavar="DIR", help="folder written by 'negotiate run --out DIR'")

    sweep = commands.add_parser(
        "sweep",
        help="scan one agent's value function along one parameter",
        description="Build one agent of the fleet and solve it along a parameter path from A to B in N "
        "evenly spaced steps (warm-started), the other parameters at the agent's free optimum. Writes "
        "DIR/sweep-AGENT-PARAM.csv and .png: V, dV/dp and the multipliers along the path, with the points "
        "where the active set changes or a constraint is weakly active marked.",
    )
    sweep.add_argument("fleet", help="fleet file (TOML)")
    sweep.add_argument("--agent", required=True, metavar="ID", help="agent name in the fleet file")
    sweep.add_argument("--param", required=True, metavar="NAME", help="parameter name, e.g. furnace.enter")
    sweep.add_argument("--from", dest="start", required=True, type=float, metavar="A", help="first value")
    sweep.add_argument("--to", dest="stop", required=True, type=float, metavar="B", help="last value")
    sweep.add_argument("--steps", type=int, default=41, metavar="N", help="number of points (default 41)")
    sweep.add_argument("--out", default=".", metavar="DIR", help="folder for the CSV and PNG (default: .)")

    compare = commands.add_parser(
        "compare",
        help="run every coordination method and the centralized solve on one fleet",
        description="Run the bundle, gradient and newton methods and the centralized IPOPT solve on the same "
        "agents with the same first-come-first-served orders (whatever the fleet's order setting, so that "
        "the comparison is fair); print rounds, agent solves, wall time, final total and the relative gap to "
        "the centralized optimum. With --out, also write DIR/compare.csv and DIR/compare.png.",
    )
    compare.add_argument("fleet", help="fleet file (TOML)")
    compare.add_argument("--out", metavar="DIR", help="folder for compare.csv and compare.png (created)")
    return parser


def _check(args: argparse.Namespace) -> int:
    from negotiate.tools.check import check_fleet

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
    import time

    started = time.perf_counter()  # the run's wall time counts from here: reading, building, solving
    from negotiate.errors import CheckpointError, DeadlockError, FleetError, RunFolderError
    from negotiate.run import load_fleet, run_fleet

    if args.fleet is None and args.resume is None:
        print("negotiate run: give a fleet file, or --resume DIR", file=sys.stderr)
        return 2
    if args.out is not None and args.resume is not None and Path(args.out).resolve() != Path(args.resume).resolve():
        print("negotiate run: --resume DIR writes its outputs to DIR; leave out --out", file=sys.stderr)
        return 2
    if args.out is None and args.resume is None:
        print("negotiate run: --out DIR is required (the folder for the outputs and the checkpoint)", file=sys.stderr)
        return 2
    limit = args.time_limit
    if limit is not None and not (limit > 0 and limit < float("inf")):
        print(f"negotiate run: --time-limit must be a positive number of seconds, got {limit}", file=sys.stderr)
        return 2
    out = args.out or args.resume
    spec = None
    if args.fleet is not None:
        try:
            spec = load_fleet(args.fleet)
        except OSError as exc:
            print(f"negotiate run: cannot read the fleet file {args.fleet}: {exc.strerror or exc}; check the path",
                  file=sys.stderr)  # fmt: skip
            return 2
        except FleetError as exc:
            print(exc, file=sys.stderr)
            return 1
    bars: list[Any] = []  # the progress bar, once the agents are built
    trial = [0]
    plain = not args.quiet and not sys.stderr.isatty()  # a log file gets a line now and then, not a bar

    def built(spec: FleetSpec, agents: list[AgentModel], settings: CoordinatorSettings) -> None:
        print(f"fleet {spec.name}: {len(agents)} agents, {len(spec.resources)} resources; method {settings.method}, "
              f"orders {settings.order}")  # fmt: skip
        if not args.quiet and not plain:
            from tqdm import tqdm

            bars.append(tqdm(total=None, unit="round", file=sys.stderr, dynamic_ncols=True, leave=False,
                             desc="order 1"))  # fmt: skip

    def progress(rec: RoundRecord) -> None:
        if plain and (rec.round % 25 == 0 or rec.trial != trial[0]):
            trial[0] = rec.trial
            print(f"order {rec.trial + 1}, round {rec.round}: total {_fmt(rec.best_total, 9)}  measure "
                  f"{rec.measure:.1e}  flagged {len(rec.flagged)}  failed {len(rec.failed)}", file=sys.stderr)
        for bar in bars:
            if rec.trial != trial[0]:  # a new order of the search: its rounds count from 0 again
                trial[0] = rec.trial
                bar.reset()
                bar.set_description_str(f"order {rec.trial + 1}", refresh=False)
            bar.update(1)
            bar.set_postfix_str(
                f"total {_fmt(rec.best_total, 9)}  measure {rec.measure:.1e}  flagged {len(rec.flagged)}"
                + (f"  failed {len(rec.failed)}" if rec.failed else ""),
                refresh=False,
            )

    def close_bar() -> None:
        while bars:
            bars.pop().close()

    try:
        result = run_fleet(
            spec, method=args.method, verify=args.verify, progress=progress, out=out, resume=args.resume is not None,
            workers=args.workers, scheduler=args.scheduler, cluster=args.cluster, time_limit=limit,
            build_time=time.perf_counter() - started, on_built=built, stop_on_signal=True,
        )  # fmt: skip
    except (RunFolderError, CheckpointError, ImportError) as exc:
        close_bar()
        print(f"negotiate run: {exc}", file=sys.stderr)
        return 2
    except (FleetError, DeadlockError, ValueError) as exc:
        close_bar()
        print(exc, file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        close_bar()
        print(f"negotiate run: interrupted; the last complete round is saved: negotiate run --resume {out}",
              file=sys.stderr)  # fmt: skip
        return 130
    finally:
        close_bar()
    c = result.coordination
    rows = []
    for r in result.schedule:
        if r.chart == "shares":
            draw = "" if r.draw != r.draw else f"{r.draw:.0f}"
            rows.append([r.agent, r.resource, f"{r.enter:.1f}", f"{r.leave:.1f}", f"{r.share:.0f}", draw, "", "",
                         _fmt(r.d_share, 3), _fmt(r.value - r.free_value, 4), r.verdict])  # fmt: skip
        else:
            rows.append([r.agent, r.resource, f"{r.enter:.1f}", f"{r.leave:.1f}", "", "", _fmt(r.d_enter, 3),
                         _fmt(r.d_leave, 3), "", _fmt(r.value - r.free_value, 4), r.verdict])  # fmt: skip
    print(_table(["agent", "resource", "enter s", "leave s", "share", "draw", "dV/denter /s", "dV/dleave /s",
                  "dV/dshare", "cost increase", "certificate"], rows))  # fmt: skip
    skipped = sum(1 for t in result.order_trials if t.infeasible)
    phases = ", ".join(f"{k.replace('_', ' ')} {v:.1f} s" for k, v in result.phase_times.items())
    print(f"status: {c.status} ({c.message}); {c.rounds} rounds, {c.agent_solves} agent solves in the best order; "
          f"{len(result.order_trials)} order(s) tried"
          + (f" ({skipped} infeasible, skipped)" if skipped else "")
          + f"; {result.wall_time:.1f} s ({phases})")  # fmt: skip
    print(f"total cost {_fmt(result.total, 10)}; free optima {_fmt(result.free_total, 10)}; "
          f"coordination cost {_fmt(result.total - result.free_total, 6)}")  # fmt: skip
    if result.centralized is not None:
        ce = result.centralized
        gap = result.gap
        print(f"centralized: {ce.status} ({ce.message}), cost {_fmt(ce.total, 10)}, {ce.wall_time:.2f} s; "
              f"relative gap {'-' if gap is None else f'{gap:+.2e}'}")  # fmt: skip
    print("orders: " + "; ".join(f"{k}: {' > '.join(v)}" for k, v in c.orders.items()))
    bounded = [t for t in result.order_trials if t.gap_kind]
    if bounded:
        t = bounded[-1]
        print(f"order gap ({t.gap_kind}): best order's total >= {_fmt(t.bound, 10)}, gap {_fmt(t.gap, 4)}"
              + (f" ({t.gap_reason})" if t.gap_reason else ""))  # fmt: skip
    folder = Path(out)
    top = sorted({p.relative_to(folder).parts[0] for p in result.files})
    print(f"wrote {len(result.files)} files to {folder}: "
          + ", ".join(t + ("/" if (folder / t).is_dir() else "") for t in top))  # fmt: skip
    print("planning and research output, not a safety controller: check gaps and speeds against site rules")
    return 0 if c.success else 3


def _load(command: str, path: str) -> FleetSpec | int:
    """The parsed fleet, or the exit status after printing why it cannot be read."""
    from negotiate.errors import FleetError
    from negotiate.run import load_fleet

    try:
        return load_fleet(path)
    except OSError as exc:
        print(f"negotiate {command}: cannot read {path}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except FleetError as exc:
        print(exc, file=sys.stderr)
        return 1


def _report(args: argparse.Namespace) -> int:
    from negotiate.errors import RunFolderError
    from negotiate.output.report import write_report

    try:
        path = write_report(args.dir)
    except RunFolderError as exc:
        print(f"negotiate report: {exc}", file=sys.stderr)
        return 2
    print(f"wrote {path}")
    return 0


def _sweep(args: argparse.Namespace) -> int:
    from negotiate.errors import FleetError
    from negotiate.tools.sweep import sweep_fleet, write_sweep

    spec = _load("sweep", args.fleet)
    if isinstance(spec, int):
        return spec
    try:
        res = sweep_fleet(spec, args.agent, args.param, args.start, args.stop, args.steps)
    except (FleetError, ValueError) as exc:
        print(exc, file=sys.stderr)
        return 1
    paths = write_sweep(res, args.out)
    ok = int(res.converged.sum())
    if res.window is not None:
        print(f"reachable window of {res.param} with the other parameters at the free optimum: "
              f"{res.window[0]:g} .. {res.window[1]:g} {res.unit}")  # fmt: skip
        out_n = int((~res.in_window).sum())
        if out_n:
            print(f"  {out_n} of {res.values.size} points lie outside the reachable window (in_window = 0 in the "
                  "CSV, shaded in the plot): the coordinator never offers them, and a solve there may converge "
                  "to a plan the agent cannot carry out")  # fmt: skip
    print(f"{res.agent}: {res.param} from {args.start:g} to {args.stop:g} {res.unit} in {res.values.size} points; "
          f"{ok} converged, {res.values.size - ok} failed")  # fmt: skip
    if res.changes:
        print("active set changes between: "
              + ", ".join(f"{res.values[k - 1]:g}..{res.values[k]:g}" for k in res.changes))  # fmt: skip
    weak = [f"{res.values[k]:g}" for k, w in enumerate(res.weakly_active) if w]
    if weak:
        print("weakly active constraint at: " + ", ".join(weak))
    out = Path(args.out)
    top = sorted({p.relative_to(out).parts[0] for p in paths})
    print(f"wrote {len(paths)} files to {out}: " + ", ".join(t + ("/" if (out / t).is_dir() else "") for t in top))
    return 0 if ok == res.values.size else 3


def _compare(args: argparse.Namespace) -> int:
    from negotiate.errors import DeadlockError, FleetError
    from negotiate.tools.compare import compare_methods, write_comparison

    spec = _load("compare", args.fleet)
    if isinstance(spec, int):
        return spec
    try:
        cmp = compare_methods(spec)
    except (FleetError, DeadlockError, ValueError) as exc:
        print(exc, file=sys.stderr)
        return 1
    print(f"fleet {spec.name}: {len(spec.agents)} agents, {len(spec.resources)} resources")
    print(cmp.to_text(), end="")
    if args.out:
        print("wrote " + ", ".join(str(p) for p in write_comparison(cmp, args.out)))
    return 0


def _generate(args: argparse.Namespace) -> int:
    from negotiate.tools.generate import generate_fleet

    try:
        text = generate_fleet(args.kind, args.agents, args.seed)
    except ValueError as exc:
        print(f"negotiate generate: {exc}", file=sys.stderr)
        return 2
    sys.stdout.write(text)
    return 0


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
    if args.command == "generate":
        return _generate(args)
    if args.command == "report":
        return _report(args)
    if args.command == "sweep":
        return _sweep(args)
    if args.command == "compare":
        return _compare(args)
    return 0


if __name__ == "__main__":
    sys.exit(main())
