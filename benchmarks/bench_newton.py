"""Projected Newton on smooth fleets: rounds, agent solves, fallbacks and gap to the centralized optimum.

Cases (every number invented):

* ``dock-4``: four one-slot agents queueing at one dock whose inner bound starts to bind when they are delayed
  (``tests/fleets.py: buffered_slot_agent``; piecewise quadratic, smooth at every point solved);
* ``huber``: one agent with V = sqrt(1 + (p - 20)^2) started at p = 22, where the full Newton step overshoots;
* ``cross-N-S``: N vehicles with two exclusive zones 240 m apart (alternating which comes first), one leaving
  every S seconds;
* ``depot-N-seed``: ``negotiate generate --kind depot`` fleets.

For each: status, rounds, agent solves, rounds noted "gradient fallback" / "backtracking" (gradient method's
line search) / "Newton backtracking", whether any measure was NaN, and the relative gap of the final total
to the centralized IPOPT solve of the same fleet and orders.

    python benchmarks/bench_newton.py                          # this checkout
    python benchmarks/bench_newton.py --baseline /path/to/src  # and another source tree, side by side

With ``--baseline`` the same cases run a second time in a subprocess whose ``PYTHONPATH`` is that tree.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))


def crossing_toml(n: int, spacing: float) -> str:
    lines = [
        '[fleet]\nname = "crossing"\n',
        '[resources.za]\nkind = "exclusive"\ngap = 4.0\n',
        '[resources.zb]\nkind = "exclusive"\ngap = 4.0\n',
        "[defaults.vehicle]\nroute_length = 1000.0\nstages = 16\nspeed_limit = 13.0\ninitial_speed = 8.0\n"
        "latest_arrival = 500.0\n",
    ]
    for k in range(n):
        z1, z2 = ("za", "zb") if k % 2 == 0 else ("zb", "za")
        lines.append(
            f'[agents.v{k}]\nmodel = "vehicle"\ndeparture = {spacing * k}\ndesired_arrival = {95.0 + spacing * k}\n'
            f'[[agents.v{k}.zones]]\nresource = "{z1}"\nentry = 300.0\nexit = 340.0\nspeed_limit = 7.0\n'
            f'[[agents.v{k}.zones]]\nresource = "{z2}"\nentry = 540.0\nexit = 580.0\nspeed_limit = 7.0\n'
        )
    return "\n".join(lines)


def cases() -> list[tuple[str, object]]:
    from negotiate.fleet.spec import CapacityResource, ExclusiveResource

    def dock():
        from fleets import buffered_slot_agent

        wants, stiff = [10.0, 13.0, 16.7, 19.4], [1.0, 3.0, 0.5, 2.0]
        pairs = enumerate(zip(wants, stiff, strict=True))
        agents = [buffered_slot_agent(f"b{k}", w, 6.0, s, "dock") for k, (w, s) in pairs]
        return agents, [ExclusiveResource("dock", gap=2.0)], 1e-10, None

    def huber():
        import casadi as ca

        from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam

        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        prob = ParametricNLP({"x": x, "p": p, "f": ca.sqrt(1 + (x - 20.0) ** 2), "g": x - p}, lbg=0, ubg=0)
        agent = AgentModel(
            "huber", prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),), ReachableSet([0.0], [40.0]), [20.0]
        )
        return [agent], [CapacityResource("grid", (100.0,))], 1e-12, np.array([22.0])

    def fleet_case(text: str, tol: float | None = None):
        def make():
            from negotiate.fleet.build import build_agents
            from negotiate.fleet.parse import parse_fleet

            spec = parse_fleet(tomllib.loads(text))
            return build_agents(spec), spec.resources, tol or spec.coordinator.tolerance, None

        return make

    from negotiate.tools.generate import generate_fleet

    out: list[tuple[str, object]] = [("dock-4", dock), ("huber", huber)]
    for n, sp in ((8, 6.0), (12, 5.0)):
        out.append((f"cross-{n}-{sp:g}", fleet_case(crossing_toml(n, sp), 1e-8)))
    for n in (4, 8, 16):
        for seed in (0, 1):
            out.append((f"depot-{n}-{seed}", fleet_case(generate_fleet("depot", n, seed))))
    return out


def run(only: list[str] | None) -> dict[str, dict]:
    from negotiate.coordination.centralized import solve_centralized
    from negotiate.coordination.engine import coordinate
    from negotiate.fleet.spec import CoordinatorSettings

    rows = {}
    for name, make in cases():
        if only and name not in only:
            continue
        agents, resources, tol, start = make()
        res = coordinate(
            agents, resources, CoordinatorSettings(method="newton", max_rounds=200, tolerance=tol), start=start
        )
        ref = solve_centralized(agents, res.evaluation.feasible)
        notes = [h.note for h in res.history]
        rows[name] = {
            "status": str(res.status.value),
            "rounds": res.rounds,
            "solves": res.agent_solves,
            "fallback": sum("gradient fallback" in n for n in notes),
            "backtrack": sum(n == "backtracking" for n in notes),
            "newton_bt": sum(n == "Newton backtracking" for n in notes),
            "nan": any(math.isnan(h.measure) for h in res.history),
            "gap": (res.total - ref.total) / max(1.0, abs(ref.total)) if ref.success else float("nan"),
        }
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline", help="another source tree to run the same cases with, side by side")
    ap.add_argument("--json", action="store_true", help="print the rows as JSON (used for --baseline)")
    ap.add_argument("--cases", nargs="*", help="run only these cases")
    args = ap.parse_args()
    base = None
    if args.baseline:
        cmd = [sys.executable, __file__, "--json", *(["--cases", *args.cases] if args.cases else [])]
        env = dict(os.environ, PYTHONPATH=str(Path(args.baseline).resolve()))
        base = json.loads(subprocess.run(cmd, env=env, capture_output=True, text=True, check=True).stdout)
    rows = run(args.cases)
    if args.json:
        print(json.dumps(rows))
        return

    def cell(r: dict | None) -> str:
        if r is None:
            return ""
        return (
            f"{r['status']:>10} {r['rounds']:>4} {r['solves']:>6} {r['fallback']:>4} {r['backtrack']:>4} "
            f"{r['newton_bt']:>4} {'yes' if r['nan'] else 'no':>4} {r['gap']:>9.1e}"
        )

    head = f"{'status':>10} {'rnds':>4} {'solves':>6} {'fb':>4} {'bt':>4} {'nbt':>4} {'nan':>4} {'gap':>9}"
    print("fb: gradient fallback rounds, bt: gradient backtracking rounds, nbt: Newton backtracking rounds")
    if base is not None:
        print(f"{'':<14} {'baseline':<{len(head)}}  | this tree")
    print(f"{'case':<14} {head + '  | ' if base is not None else ''}{head}")
    for name, r in rows.items():
        left = cell(base.get(name)).ljust(len(head)) + "  | " if base is not None else ""
        print(f"{name:<14} {left}{cell(r)}")


if __name__ == "__main__":
    main()
