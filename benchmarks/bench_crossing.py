"""Crossings and long horizons: build time per vehicle, rounds, agent solves and wall time next to the
centralized solve, in one run.

Cases (every number invented):

* ``crossing-N-sS``: ``negotiate generate --kind crossing --agents N --seed S`` (cars and heavy vehicles
  through the four quadrants of a crossing, 2-3 adjacent conflict zones each);
* ``quarry-stagesK``: ``examples/quarry_bridge.toml`` (8 haul trucks, contended bridge) with every truck
  discretised in K stages (long horizons).

For each case and method: the build time per agent (its NLP, the free solve, the kinematic window), the
coordination's status, rounds, agent solves and wall time (one process, no workers), and the centralized IPOPT
solve of the same agents and orders (its own build of the monolithic NLP plus its solve) with the relative
gap of the coordinated total to it. The orders are the search's first orders (first come, first served, or
one ranking of all vehicles where that fails), so that every method and the centralized solve see the same
problem.

    python benchmarks/bench_crossing.py                                   # 16 and 64 vehicles, 40/120 stages
    python benchmarks/bench_crossing.py --sizes 16 64 256 --stages 40 120 240 --seeds 0 1 2
"""

from __future__ import annotations

import argparse
import dataclasses
import time
import tomllib
from pathlib import Path

from negotiate.coordination.centralized import solve_centralized
from negotiate.coordination.engine import coordinate
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet, parse_fleet
from negotiate.fleet.spec import FleetSpec
from negotiate.resources.coupling import build_feasible_set, first_orders
from negotiate.tools.generate import generate_fleet

ROOT = Path(__file__).resolve().parents[1]


def with_stages(spec: FleetSpec, stages: int) -> FleetSpec:
    """The fleet with every vehicle discretised in ``stages`` stages."""
    agents = tuple(
        dataclasses.replace(a, params=dataclasses.replace(a.params, stages=stages)) if a.model == "vehicle" else a
        for a in spec.agents
    )
    return dataclasses.replace(spec, agents=agents)


def run_case(name: str, spec: FleetSpec, methods: list[str], max_rounds: int) -> None:
    t0 = time.perf_counter()
    agents = build_agents(spec)
    build = time.perf_counter() - t0
    orders = first_orders(agents, spec.resources)
    feasible = build_feasible_set(agents, spec.resources, orders)
    t0 = time.perf_counter()
    ref = solve_centralized(agents, feasible)
    central = time.perf_counter() - t0
    per_agent = 1e3 * build / len(agents)
    print(f"{name:22s} {'centralized':11s} {str(ref.status):12s} {'-':>6s} {'-':>7s} {central:8.2f} "
          f"{'-':>10s}   build {per_agent:7.1f} ms/agent")
    for method in methods:
        settings = dataclasses.replace(spec.coordinator, method=method, max_rounds=max_rounds, tolerance=1e-6)
        t0 = time.perf_counter()
        res = coordinate(agents, spec.resources, settings, orders=orders)
        wall = time.perf_counter() - t0
        gap = (res.total - ref.total) / abs(ref.total) if ref.success else float("nan")
        print(f"{name:22s} {method:11s} {str(res.status):12s} {res.rounds:6d} {res.agent_solves:7d} {wall:8.2f} "
              f"{gap:+10.2e}   (with the build: {build + wall:.1f} s vs centralized {build + central:.1f} s)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=[16, 64], help="crossing fleet sizes")
    ap.add_argument("--seeds", type=int, nargs="+", default=[0], help="generator seeds")
    ap.add_argument("--stages", type=int, nargs="*", default=[40, 120], help="stages of the quarry trucks")
    ap.add_argument("--methods", nargs="+", default=["bundle", "newton", "gradient"])
    ap.add_argument("--max-rounds", type=int, default=60)
    args = ap.parse_args()
    print(f"{'case':22s} {'method':11s} {'status':12s} {'rounds':>6s} {'solves':>7s} {'wall s':>8s} {'gap':>10s}")
    for n in args.sizes:
        for seed in args.seeds:
            spec = parse_fleet(tomllib.loads(generate_fleet("crossing", n, seed)))
            run_case(f"crossing-{n}-s{seed}", spec, args.methods, args.max_rounds)
    for stages in args.stages:
        spec = with_stages(load_fleet(ROOT / "examples" / "quarry_bridge.toml"), stages)
        run_case(f"quarry-stages{stages}", spec, args.methods, args.max_rounds)


if __name__ == "__main__":
    main()
