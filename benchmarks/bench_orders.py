"""Order rules side by side: first-come-first-served, neighbour swaps, the order master, full enumeration.

For each fleet (generated fleets of every kind the generator has whose resources need an order, at each size
and seed, and the example files given) it builds the agents once and then, in one run:

* ``fcfs``, ``swap`` and ``master`` (the order master and its adjacent swaps): each through
  :func:`negotiate.run.run_fleet` with the fleet's own coordinator settings and only ``order`` changed (the
  master with its default options unless ``--master-options`` says otherwise);
* ``enumerate``: every combination of the orders of all exclusive resources jointly (the product of the
  permutations of each resource's users), each checked for a deadlock or an empty polyhedron
  (:func:`negotiate.resources.coupling.check_orders`) and then solved by the centralized IPOPT solve
  (:func:`negotiate.coordination.centralized.solve_centralized`, cold start from the projected free optima)
  -- only where the number of combinations is at most ``--enumerate-limit``.

Columns: the weighted total cost, its gap to the best total any rule found on that fleet (relative), the
coordinations (order trials handed to the coordinator; for ``enumerate``: centralized solves), the agent
solves (guard probes included; for ``enumerate``: none, the centralized solves are counted instead), the wall
time of the order search (s; building the agents is not included) and, for the master, the gap it reports on
the best order's total and whether it is certified.

    python benchmarks/bench_orders.py                                  # the default run (a few minutes, 2 cores)
    python benchmarks/bench_orders.py --kinds bridge --sizes 4 6 --seeds 1 2 3
    python benchmarks/bench_orders.py --sizes 16 32 --rules swap master --no-example
    python benchmarks/bench_orders.py --master-options time_budget=60 max_coordinations=20

Kinds are the generator's own (:data:`negotiate.tools.generate.KINDS`); one whose fleets have no resource
that needs an order (capacity shares only) is skipped with a note. Run it on a quiet machine: the figures
are wall times. Every number is from invented data.
"""

from __future__ import annotations

import argparse
import itertools
import math
import sys
import time
import tomllib
from dataclasses import replace
from pathlib import Path

import numpy as np

from negotiate.coordination.centralized import solve_centralized
from negotiate.coordination.engine import RoundRecord
from negotiate.core.agent import AgentModel
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet, parse_fleet
from negotiate.fleet.spec import FleetSpec
from negotiate.resources.coupling import build_feasible_set, check_orders
from negotiate.run import run_fleet
from negotiate.tools.generate import KINDS, generate_fleet

ROOT = Path(__file__).resolve().parent.parent
RULES = ("fcfs", "swap", "master")


def _ordered_kinds() -> list[str]:
    """The generator's kinds whose fleets have a resource that needs an order (read from a 2-agent fleet)."""
    out = []
    for kind in KINDS:
        spec = parse_fleet(tomllib.loads(generate_fleet(kind, 2, 0)), f"<generated {kind}>")
        if any(r.needs_order for r in spec.resources):
            out.append(kind)
    return out


def combinations(spec: FleetSpec, agents: list[AgentModel]) -> int:
    """How many order combinations the fleet has (the product of the users' factorials over its ordered
    resources)."""
    return math.prod(math.factorial(len(r.users(agents))) for r in spec.resources if r.needs_order)


def enumerate_orders(spec: FleetSpec, agents: list[AgentModel]) -> dict[str, object]:
    """Every order combination, each solved centrally: the best total and orders, solves, failures, time."""
    t0 = time.perf_counter()
    ordered = [r for r in spec.resources if r.needs_order]
    users = {r.name: r.users(agents) for r in ordered}
    best, best_orders, solves, infeasible, failed = math.inf, None, 0, 0, 0
    for combo in itertools.product(*(itertools.permutations(users[r.name]) for r in ordered)):
        orders = {r.name: list(c) for r, c in zip(ordered, combo, strict=True)}
        try:
            check_orders(agents, spec.resources, orders)
        except (DeadlockError, InfeasibleOrdersError):
            infeasible += 1
            continue
        c = solve_centralized(agents, build_feasible_set(agents, spec.resources, orders))
        solves += 1
        if not c.success:
            failed += 1
            continue
        if c.total < best:
            best, best_orders = c.total, orders
    return {"total": best, "orders": best_orders, "coordinations": solves, "agent_solves": 0,
            "wall": time.perf_counter() - t0, "note": f"{infeasible} infeasible, {failed} failed"}  # fmt: skip


def run_rule(spec: FleetSpec, agents: list[AgentModel], rule: str, options: dict[str, object]) -> dict[str, object]:
    """One order rule through run_fleet: total, coordinations, agent solves (all trials), search time, gap."""
    settings = replace(spec.coordinator, order=rule, order_options=dict(options) if rule == "master" else {})
    last: dict[int, int] = {}

    def progress(rec: RoundRecord) -> None:
        last[rec.trial] = rec.agent_solves

    res = run_fleet(replace(spec, coordinator=settings), agents, progress=progress)
    trials = res.order_trials
    bounded = [t for t in trials if t.gap_kind]
    note = ""
    if bounded:
        t = bounded[-1]
        rel = t.gap / max(1.0, abs(res.coordination.total))
        note = f"order gap {rel:.2e} {t.gap_kind}" + (f" ({t.gap_reason[:60]})" if t.gap_reason else "")
    return {
        "total": res.coordination.total if res.coordination.evaluation.ok else math.inf,
        "coordinations": sum(1 for t in trials if not t.infeasible),
        "agent_solves": sum(last.values()),
        "wall": res.phase_times["order_search"],
        "note": note,
    }


def bench(name: str, spec: FleetSpec, rules: list[str], limit: int, options: dict[str, object]) -> None:
    t0 = time.perf_counter()
    agents = build_agents(spec)
    ordered = [r for r in spec.resources if r.needs_order]
    combos = combinations(spec, agents)
    print(f"\n{name}: {len(agents)} agents, {len(ordered)} ordered resource(s), {combos:.4g} order combinations "
          f"(built in {time.perf_counter() - t0:.1f} s)", flush=True)  # fmt: skip
    rows: dict[str, dict[str, object]] = {}
    for rule in rules:
        rows[rule] = run_rule(spec, agents, rule, options)
    if combos <= limit:
        rows["enumerate"] = enumerate_orders(spec, agents)
    else:
        rows["enumerate"] = {"skip": f"not affordable ({combos:.4g} > --enumerate-limit {limit})"}
    best = min(float(r["total"]) for r in rows.values() if "total" in r)  # type: ignore[arg-type]
    print(f"  {'rule':<10} {'total':>16} {'gap to best':>12} {'coord.':>7} {'agent solves':>13} {'wall s':>8}  note")
    for rule, r in rows.items():
        if "skip" in r:
            print(f"  {rule:<10} {r['skip']}")
            continue
        total = float(r["total"])  # type: ignore[arg-type]
        gap = (total - best) / max(1.0, abs(best)) if np.isfinite(total) else math.inf
        print(f"  {rule:<10} {total:16.6f} {gap:12.2e} {r['coordinations']:>7} {r['agent_solves']:>13} "
              f"{float(r['wall']):8.2f}  {r['note']}", flush=True)  # type: ignore[arg-type]  # fmt: skip


def _option(text: str) -> tuple[str, object]:
    key, sep, value = text.partition("=")
    if not sep:
        raise argparse.ArgumentTypeError(f"expected key=value, got {text!r}")
    parsed = tomllib.loads(f"v = {value}")["v"]
    return key, parsed


def main(argv: list[str] | None = None) -> None:
    kinds = _ordered_kinds()
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kinds", nargs="+", default=kinds, choices=list(KINDS), help="generated kinds (default: all)")
    ap.add_argument("--sizes", nargs="+", type=int, default=[4, 6, 8, 16, 32], help="agents per generated fleet")
    ap.add_argument("--seeds", nargs="+", type=int, default=[1], help="generator seeds")
    ap.add_argument("--rules", nargs="+", default=list(RULES), choices=list(RULES), help="order rules to run")
    ap.add_argument("--enumerate-limit", type=int, default=600, help="largest number of combinations enumerated")
    ap.add_argument("--example", nargs="*", default=[str(ROOT / "examples" / "quarry_bridge.toml")],
                    help="fleet files to run as well (default: the quarry bridge)")  # fmt: skip
    ap.add_argument("--no-example", action="store_true", help="leave the example files out")
    ap.add_argument("--master-options", nargs="*", type=_option, default=[],
                    help="options of the master rule, key=value (docs/methods.md)")  # fmt: skip
    args = ap.parse_args(argv)
    options = dict(args.master_options)
    for kind in args.kinds:
        if kind not in kinds:
            print(f"\n{kind}: skipped (its fleets have no resource whose users take turns)")
            continue
        for n in args.sizes:
            for seed in args.seeds:
                spec = parse_fleet(tomllib.loads(generate_fleet(kind, n, seed)), f"<generated {kind} {n} {seed}>")
                bench(f"generated {kind}, {n} agents, seed {seed}", spec, args.rules, args.enumerate_limit, options)
    for path in [] if args.no_example else args.example:
        bench(Path(path).name, load_fleet(path), args.rules, args.enumerate_limit, options)


if __name__ == "__main__":
    main(sys.argv[1:])
