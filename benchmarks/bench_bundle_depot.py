"""Bundle method on generated depot fleets: rounds, status and relative gap to the centralized solve.

Fleets: ``negotiate generate --kind depot --agents N --seed S`` for N = 4, 8, 16 and seeds 0-3 (every number
invented), coordinated by the bundle method with the fleet's own settings (60 rounds, tolerance 1e-6).

    python benchmarks/bench_bundle_depot.py                          # this checkout
    python benchmarks/bench_bundle_depot.py --baseline /path/to/src  # and another source tree, side by side

With ``--baseline`` the same fleets run a second time in a subprocess whose ``PYTHONPATH`` is that tree.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tomllib
from pathlib import Path


def rows(sizes: list[int], seeds: list[int]) -> list[dict]:
    from negotiate.fleet.parse import parse_fleet
    from negotiate.run import run_fleet
    from negotiate.tools.generate import generate_fleet

    out = []
    for n in sizes:
        for seed in seeds:
            spec = parse_fleet(tomllib.loads(generate_fleet("depot", n, seed)))
            run = run_fleet(spec, method="bundle", verify=True)
            c = run.coordination
            out.append({"case": f"depot-{n}-{seed}", "status": str(c.status.value), "rounds": c.rounds,
                        "total": c.total, "gap": run.gap})  # fmt: skip
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline", help="another source tree to run the same fleets with, side by side")
    ap.add_argument("--json", action="store_true", help="print the rows as JSON (used for --baseline)")
    ap.add_argument("--sizes", default="4,8,16")
    ap.add_argument("--seeds", default="0,1,2,3")
    args = ap.parse_args()
    sizes = [int(v) for v in args.sizes.split(",")]
    seeds = [int(v) for v in args.seeds.split(",")]
    if args.baseline:
        cmd = [sys.executable, __file__, "--json", "--sizes", args.sizes, "--seeds", args.seeds]
        env = dict(os.environ, PYTHONPATH=str(Path(args.baseline).resolve()))
        base = json.loads(subprocess.run(cmd, env=env, capture_output=True, text=True, check=True).stdout)
    mine = rows(sizes, seeds)
    if args.json:
        print(json.dumps(mine))
        return

    def cell(r: dict) -> str:
        gap = "-" if r["gap"] is None else f"{r['gap']:+.1e}"
        return f"{r['status']:<11} {r['rounds']:>4} {r['total']:>16.1f} {gap:>9}"

    head = f"{'status':<11} {'rnds':>4} {'total':>16} {'gap':>9}"
    if args.baseline:
        print(f"{'case':<12} {head}  | {head}")
        print(f"{'':<12} {'baseline':<{len(head)}}  | this tree")
        for b, m in zip(base, mine, strict=True):
            print(f"{m['case']:<12} {cell(b)}  | {cell(m)}")
    else:
        print(f"{'case':<12} {head}")
        for m in mine:
            print(f"{m['case']:<12} {cell(m)}")


if __name__ == "__main__":
    main()
