"""Coordination methods side by side on one fleet: rounds, agent solves and wall time to a 1e-4 gap.

Run:  python benchmarks/bench_coordinate.py [examples/quarry_bridge.toml] [--max-rounds 300]

All methods use the same agents and the same first-come-first-served orders. The reference optimum is the
centralized IPOPT solve of the same monolithic problem (cold start). For each method the table gives the
first round at which its incumbent's total is within 1e-4 (relative) of that optimum, the agent solves and
the wall time spent until then, and its final relative gap. Because the agents' own costs (traction
energy) dwarf what coordination changes, the same is also reported for a gap of 1e-4 of the coordination
cost (optimum minus the sum of the agents' free-optimum values), the stricter and more telling test. Peers:

* ``fd-gradient``: the projected-gradient method fed with forward-difference gradients (every agent
  re-solved once per parameter, warm-started; step 1e-4 of the parameter's window), guard off;
* ``subgradient``: projected steps along the value gradient with a diminishing length alpha_0 / k and no
  line search (the classical subgradient method);
* ``cobyla``: SciPy's derivative-free COBYLA on the upper level (each function value = every agent
  solved once), constraints = the coupling polyhedron.

Targets on the quarry example: bundle <= 30 rounds; at least 5x fewer agent solves than ``fd-gradient``;
the subgradient peer needs many times more rounds.
"""

from __future__ import annotations

import argparse
import dataclasses
import time
from pathlib import Path

import numpy as np
import scipy.optimize

from negotiate.coordination.centralized import solve_centralized
from negotiate.coordination.engine import coordinate
from negotiate.coordination.methods import Evaluation, Method, Proposal, register_method
from negotiate.core.agent import AgentModel
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet
from negotiate.fleet.spec import CoordinatorSettings
from negotiate.resources.coupling import build_feasible_set, fcfs_orders

GAP = 1e-4


class FiniteDifferenceProblem:
    """An agent problem whose reported gradient comes from forward differences (extra solves counted)."""

    def __init__(self, base, steps: np.ndarray) -> None:
        self.base, self.steps, self.extra = base, steps, 0
        self.n_p = base.n_p

    def solve(self, p, warm=None, **kw):
        r = self.base.solve(p, warm=warm)
        if not r.success:
            return r
        g = np.empty(self.n_p)
        for k in range(self.n_p):
            q = np.array(p, dtype=float)
            q[k] += self.steps[k]
            rk = self.base.solve(q, warm=r)
            self.extra += 1
            g[k] = (rk.value - r.value) / self.steps[k] if rk.success else np.nan
        if not np.all(np.isfinite(g)):
            return dataclasses.replace(r, gradient=None, status=type(r.status)("failed"))
        return dataclasses.replace(r, gradient=g)


@register_method
class DiminishingSubgradient(Method):
    """Projected subgradient steps of length alpha_0 / k along the plain gradient, no line search."""

    name = "bench-subgradient"

    def start(self, first: Evaluation) -> None:
        self.x, self.incumbent, self.k = first, first, 0
        self.alpha0 = 0.05 / max(1e-300, float(np.max(np.abs(first.gradient * self.feasible.scale))))

    def propose(self, latest: Evaluation) -> Proposal:
        if latest.ok:
            self.x = latest
            if latest.total < self.incumbent.total:
                self.incumbent = latest
        self.k += 1
        s = self.feasible.scale
        nxt = self.feasible.project(self.x.P - self.alpha0 / self.k * s**2 * self.x.gradient)
        return Proposal(nxt, float("nan"), False, "")


def reached(history, ref: float, scale: float) -> tuple[int | None, int | None, float | None]:
    for h in history:
        if (h.best_total - ref) / scale <= GAP:
            return h.round, h.agent_solves, h.wall_time
    return None, None, None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("fleet", nargs="?", default=str(Path(__file__).parents[1] / "examples" / "quarry_bridge.toml"))
    ap.add_argument("--max-rounds", type=int, default=300)
    args = ap.parse_args()

    spec = load_fleet(args.fleet)
    agents = build_agents(spec)
    orders = fcfs_orders(agents, spec.resources)
    feasible = build_feasible_set(agents, spec.resources, orders)
    t0 = time.perf_counter()
    central = solve_centralized(agents, feasible)
    t_central = time.perf_counter() - t0
    ref = central.total
    free_total = sum(a.weight * a.problem.solve(a.free_optimum).value for a in agents)
    coord = ref - free_total
    print(f"fleet {spec.name}: {len(agents)} agents, {feasible.n} shared parameters; orders fcfs")
    print(f"centralized IPOPT: {central.status}, total {ref:.10g}, {central.iterations} iterations, {t_central:.2f} s")
    print(f"free optima: {free_total:.10g}; coordination cost {coord:.6g} ({100 * coord / ref:.2f} % of the total)")

    rows = []

    def run(label: str, method: str, ags: list[AgentModel], guard: bool = True, extra=lambda: 0) -> None:
        st = CoordinatorSettings(method=method, max_rounds=args.max_rounds, tolerance=1e-12, guard=guard)
        res = coordinate(ags, spec.resources, st, orders=orders)
        hits = []
        for scale in (abs(ref), coord):
            k, solves, wall = reached(res.history, ref, scale)
            if solves is not None and extra():
                # extra solves are spread evenly over the rounds (each round's gradient costs n_p solves)
                solves = int(solves + extra() * (k + 1) / (res.rounds + 1))
            hits.append((k, solves, wall))
        total_solves = res.agent_solves + extra()
        rows.append((label, *hits, total_solves, res.rounds, (res.total - ref) / abs(ref)))

    for m in ("bundle", "newton", "gradient"):
        run(m, m, agents)
    fd_agents = []
    for a in agents:
        steps = 1e-4 * np.maximum(a.reachable.upper - a.reachable.lower, 1.0)
        fd_agents.append(dataclasses.replace(a, problem=FiniteDifferenceProblem(a.problem, steps)))
    run("fd-gradient", "gradient", fd_agents, guard=False, extra=lambda: sum(a.problem.extra for a in fd_agents))
    run("subgradient", "bench-subgradient", agents, guard=False)

    # COBYLA on the upper level, in scaled coordinates.
    s, lay = feasible.scale, feasible.layout
    warm = [None] * len(agents)
    count = {"solves": 0, "best": np.inf, "hits": [None, None]}
    t0 = time.perf_counter()

    def total(u: np.ndarray) -> float:
        P = np.clip(u * s, feasible.lower, feasible.upper)
        tot = 0.0
        for i, (a, p) in enumerate(zip(agents, lay.split(P), strict=True)):
            r = a.problem.solve(p, warm=warm[i])
            count["solves"] += 1
            if not r.success:
                return 1e30
            warm[i] = r
            tot += a.weight * r.value
        if tot < count["best"] and feasible.contains(P, tol=1e-6):  # COBYLA may step outside the rules
            count["best"] = tot
            for j, scale in enumerate((abs(ref), coord)):
                if count["hits"][j] is None and (tot - ref) / scale <= GAP:
                    count["hits"][j] = (count["solves"] // len(agents), count["solves"], time.perf_counter() - t0)
        return tot

    P0 = feasible.project(lay.stack([a.free_optimum for a in agents]))
    cons = [{"type": "ineq", "fun": lambda u: feasible.b - feasible.A @ (u * s)}]
    bounds = list(zip(feasible.lower / s, feasible.upper / s, strict=True))
    scipy.optimize.minimize(total, P0 / s, method="COBYLA", constraints=cons, bounds=bounds,
                            options={"maxiter": args.max_rounds * 4, "rhobeg": 0.05, "tol": 1e-10})  # fmt: skip
    none = (None, None, None)
    rows.append(("cobyla", count["hits"][0] or none, count["hits"][1] or none, count["solves"],
                 count["solves"] // len(agents), (count["best"] - ref) / abs(ref)))  # fmt: skip
    rows.append(("centralized", (None, None, t_central), (None, None, t_central), None, None, 0.0))

    fmt = lambda v, f: "-" if v is None else format(v, f)  # noqa: E731
    print(f"\nrounds / agent solves / wall s to a gap of {GAP:g} of the total, and of the coordination cost:")
    print(f"{'method':<13}{'total: rounds':>14}{'solves':>8}{'wall s':>8}{'coord: rounds':>15}{'solves':>8}"
          f"{'wall s':>8}{'final gap':>11}{'all solves':>12}{'all rounds':>12}")  # fmt: skip
    for label, h1, h2, allsolves, allrounds, gap in rows:
        print(f"{label:<13}{fmt(h1[0], 'd'):>14}{fmt(h1[1], 'd'):>8}{fmt(h1[2], '.2f'):>8}"
              f"{fmt(h2[0], 'd'):>15}{fmt(h2[1], 'd'):>8}{fmt(h2[2], '.2f'):>8}"
              f"{gap:>11.1e}{fmt(allsolves, 'd'):>12}{fmt(allrounds, 'd'):>12}")  # fmt: skip
    by = {r[0]: r for r in rows}
    print("\ntargets (first on the total, then on the coordination cost):")
    for j, what in ((1, "total"), (2, "coordination cost")):
        b, fd, sg = by["bundle"][j], by["fd-gradient"][j], by["subgradient"][j]
        ok = b[0] is not None and b[0] <= 30
        print(f"  [{what}] bundle rounds: {fmt(b[0], 'd')} (target <= 30): {'met' if ok else 'MISSED'}")
        if b[1] and fd[1]:
            ratio = fd[1] / b[1]
            verdict = "met" if ratio >= 5 else "MISSED"
            print(f"  [{what}] fd-gradient / bundle solves: {ratio:.1f}x (target >= 5x): {verdict}")
        else:
            print(f"  [{what}] fd-gradient / bundle solves: n/a (fd: {fd[1]}, bundle: {b[1]})")
        sgr = "never within the budget" if sg[0] is None else f"{sg[0] / max(b[0] or 1, 1):.1f}x the bundle's"
        print(f"  [{what}] subgradient rounds: {sgr} ({args.max_rounds} rounds allowed)")


if __name__ == "__main__":
    main()
