"""All three coordination methods on generated fleets: status, rounds, agent solves and gap to the centralized solve.

Fleets: ``negotiate generate --kind K --agents N --seed S`` (every number invented) for the kinds, sizes and
seeds given; each fleet is built once, with its first-come-first-served orders, and coordinated by each
method with the fleet's own settings (round limit, tolerance 1e-6), the method replaced. The reference is the
centralized IPOPT solve of the same fleet and orders (:func:`negotiate.coordination.centralized.solve_centralized`),
started from the free optima and, where it finds a lower total, from each method's schedule; ``gap`` is
``(total - reference) / max(1, |reference|)``.

    python benchmarks/bench_methods.py                                   # the default set (a few minutes)
    python benchmarks/bench_methods.py --kinds depot --sizes 4,8,16,32,64 --seeds 0-9 --jobs 2

Columns: kind, N, seed, method, status, rounds, agent solves, relative gap. The last lines count, per method,
the runs that did not converge and the worst gap and round count.
"""

from __future__ import annotations

import argparse
import json
import os
import tomllib
from concurrent.futures import ProcessPoolExecutor

METHODS = ("bundle", "gradient", "newton")


def parse_list(text: str) -> list[int]:
    """``"4,8,16"`` or ``"0-9"`` (inclusive) or a mix, as integers."""
    out: list[int] = []
    for part in text.split(","):
        if "-" in part:
            a, b = part.split("-")
            out += list(range(int(a), int(b) + 1))
        elif part:
            out.append(int(part))
    return out


def one_fleet(job: tuple[str, int, int, tuple[str, ...]]) -> list[dict]:
    """Build one generated fleet, coordinate it with each method, solve it centrally; one row per method."""
    kind, n, seed, methods = job
    from dataclasses import replace

    from negotiate.coordination.centralized import solve_centralized
    from negotiate.coordination.engine import coordinate
    from negotiate.fleet.build import build_agents
    from negotiate.fleet.parse import parse_fleet
    from negotiate.tools.generate import generate_fleet

    spec = parse_fleet(tomllib.loads(generate_fleet(kind, n, seed)))
    agents = build_agents(spec)
    results = {}
    for m in methods:
        settings = replace(spec.coordinator, method=m, options={})
        results[m] = coordinate(agents, spec.resources, settings)
    feasible = next(iter(results.values())).evaluation.feasible
    refs = [solve_centralized(agents, feasible)]
    refs += [solve_centralized(agents, feasible, start_P=r.P) for r in results.values() if r.status.usable]
    good = [r.total for r in refs if r.success]
    ref = min(good) if good else float("nan")
    rows = []
    for m, r in results.items():
        gap = (r.total - ref) / max(1.0, abs(ref)) if good else float("nan")
        rows.append({"kind": kind, "N": n, "seed": seed, "method": m, "status": str(r.status.value),
                     "rounds": r.rounds, "solves": r.agent_solves, "gap": gap})  # fmt: skip
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kinds", default="depot,bridge,furnace", help="comma-separated fleet kinds")
    ap.add_argument("--sizes", default="4,8,16", help="agent counts, e.g. 4,8,16,32 or 4-8")
    ap.add_argument("--seeds", default="0-2", help="seeds, e.g. 0-9 or 0,3,5")
    ap.add_argument("--methods", default=",".join(METHODS), help="comma-separated method names")
    ap.add_argument("--jobs", type=int, default=min(2, os.cpu_count() or 1), help="fleets run at once (processes)")
    ap.add_argument("--json", action="store_true", help="print the rows as JSON instead of a table")
    args = ap.parse_args()
    methods = tuple(args.methods.split(","))
    jobs = [(k, n, s, methods) for k in args.kinds.split(",") for n in parse_list(args.sizes)
            for s in parse_list(args.seeds)]  # fmt: skip
    if args.jobs > 1:
        with ProcessPoolExecutor(args.jobs) as pool:
            rows = [r for part in pool.map(one_fleet, jobs) for r in part]
    else:
        rows = [r for job in jobs for r in one_fleet(job)]
    if args.json:
        print(json.dumps(rows))
        return
    print(f"{'kind':<8} {'N':>3} {'seed':>4} {'method':<9} {'status':<11} {'rounds':>6} {'solves':>7} {'gap':>9}")
    for r in rows:
        print(f"{r['kind']:<8} {r['N']:>3} {r['seed']:>4} {r['method']:<9} {r['status']:<11} {r['rounds']:>6} "
              f"{r['solves']:>7} {r['gap']:>+9.1e}")  # fmt: skip
    print()
    for m in methods:
        mine = [r for r in rows if r["method"] == m]
        if not mine:
            continue
        bad = sum(r["status"] != "converged" for r in mine)
        worst = max((abs(r["gap"]) for r in mine), default=float("nan"))
        print(f"{m:<9} runs {len(mine):>4}  not converged {bad:>3}  max rounds {max(r['rounds'] for r in mine):>4}"
              f"  max |gap| {worst:.1e}")  # fmt: skip


if __name__ == "__main__":
    main()
