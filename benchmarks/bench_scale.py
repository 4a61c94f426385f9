"""Scale-out benchmark: generated bridge fleets of N = 16, 64, 256 trucks (invented data).

For each N it measures, each configuration in a fresh Python process (so that the peak memory is that
configuration's own):

* the coordinator (bundle method, first-come-first-served orders) with 1 and with 2 local worker processes
  and with a Dask LocalCluster of 2 workers on 127.0.0.1: rounds, agent solves, wall time of the
  coordination (after the agents are built), wall time per round, the time at which the incumbent first
  comes within 1e-4 relative of the centralized optimum, and the coordinator process's peak resident
  memory (``resource.getrusage``; the workers are separate processes and not counted);
* the centralized IPOPT solve of the same fleet and orders (one NLP over every truck's trajectory and all
  slots), cold-started from the projected free optima like the coordinator, with ``max_wall_time`` as a cap.

Then it prints the table and checks the targets: per-round wall time linear in N / workers; at N = 64 the
coordinated run reaches a 1e-4 relative gap in less wall time than the centralized solve takes; at N = 256
it finishes where the centralized solve is slower or hits its cap; coordinator memory at most linear in N.

    python benchmarks/bench_scale.py                 # all of it (about 10 minutes on 2 cores)
    python benchmarks/bench_scale.py --sizes 16 64   # a subset

Run it on a quiet machine: the figures are wall times.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GAP = 1e-4
CONFIGS = ("workers-1", "workers-2", "dask-2", "centralized")


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def one(fleet: str, config: str, cap: float) -> dict:
    """Measure one configuration in this process; return its figures."""
    from negotiate.coordination.centralized import solve_centralized
    from negotiate.coordination.engine import coordinate
    from negotiate.execution.dask import DaskExecutor
    from negotiate.execution.processes import ProcessExecutor
    from negotiate.fleet.build import build_agents
    from negotiate.fleet.parse import load_fleet
    from negotiate.resources.coupling import build_feasible_set, fcfs_orders

    spec = load_fleet(fleet)
    t0 = time.perf_counter()
    agents = build_agents(spec)
    build = time.perf_counter() - t0
    orders = fcfs_orders(agents, spec.resources)
    out: dict = {"config": config, "agents": len(agents), "build_s": build}
    if config == "centralized":
        feasible = build_feasible_set(agents, spec.resources, orders)
        t0 = time.perf_counter()
        res = solve_centralized(agents, feasible, max_wall_time=cap)
        out.update(wall_s=time.perf_counter() - t0, total=res.total, status=str(res.status),
                   iterations=res.iterations, peak_mib=_peak_mib())  # fmt: skip
        return out
    t0 = time.perf_counter()
    if config == "dask-2":
        executor = DaskExecutor(spec, workers=2)
    else:
        executor = ProcessExecutor(spec, int(config.split("-")[1]))
    executor.prepare(agents)  # the workers build their agents (in parallel) before the clock starts
    start = time.perf_counter() - t0
    # Time spent in the coordination method itself (its master QP and projections), apart from the rounds.
    from negotiate.coordination.engine import _load_builtins
    from negotiate.coordination.methods import _METHODS

    _load_builtins()
    cls = _METHODS[spec.coordinator.method]
    plain = cls.propose
    in_method = [0.0]

    def timed(self, latest):  # type: ignore[no-untyped-def]
        t = time.perf_counter()
        try:
            return plain(self, latest)
        finally:
            in_method[0] += time.perf_counter() - t

    cls.propose = timed  # type: ignore[method-assign]
    mem_before = _peak_mib()
    marks: list[tuple[float, float, int]] = []
    t0 = time.perf_counter()
    with executor:
        res = coordinate(
            agents, spec.resources, spec.coordinator, orders=orders, executor=executor,
            progress=lambda rec: marks.append((time.perf_counter() - t0, rec.best_total, rec.agent_solves)),
        )  # fmt: skip
        wall = time.perf_counter() - t0
    out.update(start_s=start, wall_s=wall, rounds=res.rounds, solves=res.agent_solves, total=res.total,
               status=res.status, marks=marks, peak_mib=_peak_mib(), mem_before_mib=mem_before,
               method_s=in_method[0])  # fmt: skip
    return out


def _run_one(fleet: Path, config: str, cap: float) -> dict:
    proc = subprocess.run(
        [sys.executable, __file__, "--one", str(fleet), config, "--cap", str(cap)],
        capture_output=True, text=True, check=False,
    )  # fmt: skip
    if proc.returncode != 0:
        return {"config": config, "error": proc.stderr.strip().splitlines()[-1] if proc.stderr.strip() else "?"}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _time_to_gap(r: dict, reference: float) -> float | None:
    for t, best, _ in r.get("marks", []):
        if (best - reference) / abs(reference) <= GAP:
            return t
    return None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", type=int, nargs="+", default=[16, 64, 256])
    ap.add_argument("--cap", type=float, default=600.0, help="centralized wall-time cap, s (default 600)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--one", nargs=2, metavar=("FLEET", "CONFIG"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        print(json.dumps(one(args.one[0], args.one[1], args.cap)))
        return

    from negotiate.tools.generate import generate_fleet

    results: dict[int, dict[str, dict]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        for n in args.sizes:
            fleet = Path(tmp) / f"bridge-{n}.toml"
            fleet.write_text(generate_fleet("bridge", n, args.seed))
            results[n] = {}
            for config in CONFIGS:
                t0 = time.perf_counter()
                results[n][config] = r = _run_one(fleet, config, args.cap)
                print(f"N={n:4d} {config:12s} done in {time.perf_counter() - t0:7.1f} s", file=sys.stderr)
                if "error" in r:
                    print(f"    error: {r['error']}", file=sys.stderr)

    head = (f"{'N':>4} {'configuration':<13} {'rounds':>6} {'solves':>7} {'build s':>8} {'workers s':>9} {'wall s':>8} "
            f"{'s/round':>8} {'method s':>8} {'to 1e-4 s':>9} {'total':>15} {'status':<10} "
            f"{'MiB built':>9} {'peak MiB':>8}")  # fmt: skip
    print(head)
    print("-" * len(head))
    for n, row in results.items():
        central = row["centralized"]
        ref = central.get("total")
        for config in CONFIGS:
            r = row[config]
            if "error" in r:
                print(f"{n:>4} {config:<13} error: {r['error']}")
                continue
            if config == "centralized":
                print(f"{n:>4} {config:<13} {'-':>6} {'-':>7} {r['build_s']:8.1f} {'-':>9} {r['wall_s']:8.1f} "
                      f"{'-':>8} {'-':>8} {'-':>9} {r['total']:15.6e} {r['status']:<10} {'-':>9} "
                      f"{r['peak_mib']:8.0f}")  # fmt: skip
                continue
            # The reference for the gap: the centralized optimum, or the best total found if it is lower
            # (a capped or failed centralized solve is no optimum).
            best_ref = min(x for x in (ref, r["total"]) if x is not None)
            if central.get("status") == "converged":
                best_ref = min(best_ref, ref)
            tg = _time_to_gap(r, best_ref)
            r["to_gap_s"] = tg
            per_round = r["wall_s"] / (r["rounds"] + 1)
            r["per_round_s"] = per_round
            r["agents_per_round_s"] = (r["wall_s"] - r["method_s"]) / (r["rounds"] + 1)
            print(f"{n:>4} {config:<13} {r['rounds']:6d} {r['solves']:7d} {r['build_s']:8.1f} {r['start_s']:9.1f} "
                  f"{r['wall_s']:8.1f} "
                  f"{per_round:8.2f} {r['method_s']:8.1f} {'-' if tg is None else f'{tg:.1f}':>9} {r['total']:15.6e} "
                  f"{r['status']:<10} {r['mem_before_mib']:9.0f} {r['peak_mib']:8.0f}")  # fmt: skip
    print()
    _targets(results)


def _targets(results: dict[int, dict[str, dict]]) -> None:
    sizes = sorted(results)
    print("targets")
    # 1. per-round wall time linear in N / workers: seconds per round per (N / workers) stays within 2x.
    for config, w in (("workers-1", 1), ("workers-2", 2), ("dask-2", 2)):
        per = {n: results[n][config].get("per_round_s") for n in sizes}
        unit = {n: per[n] / (n / w) for n in sizes if per[n] is not None}
        if len(unit) >= 2:
            spread = max(unit.values()) / min(unit.values())
            figures = ", ".join(f"N={n}: {1e3 * u:.1f} ms" for n, u in unit.items())
            print(f"  per-round time / (N/workers), {config}: {figures}; spread {spread:.2f}x -> "
                  f"{'met' if spread <= 2.0 else 'MISSED'} (linear if within 2x)")  # fmt: skip
        # The same without the method's own time (the agents' solves and their transport only).
        per = {n: results[n][config].get("agents_per_round_s") for n in sizes}
        unit = {n: per[n] / (n / w) for n in sizes if per[n] is not None}
        if len(unit) >= 2:
            spread = max(unit.values()) / min(unit.values())
            figures = ", ".join(f"N={n}: {1e3 * u:.1f} ms" for n, u in unit.items())
            print(f"    without the method's time: {figures}; spread {spread:.2f}x")
    for n in sizes:
        one_, two = results[n]["workers-1"].get("per_round_s"), results[n]["workers-2"].get("per_round_s")
        if one_ and two:
            print(f"  N={n}: 2 workers vs 1: {one_ / two:.2f}x faster per round")
    # 2. N = 64: coordinated reaches 1e-4 faster than the centralized solve.
    if 64 in results:
        c = results[64]["centralized"]
        for config in ("workers-1", "workers-2", "dask-2"):
            tg = results[64][config].get("to_gap_s")
            ok = tg is not None and "wall_s" in c and tg < c["wall_s"]
            verdict = "met" if ok else "MISSED"
            print(f"  N=64 {config}: reaches {GAP:g} gap at {'-' if tg is None else f'{tg:.1f} s'}, centralized "
                  f"{c.get('wall_s', float('nan')):.1f} s ({c.get('status')}) -> {verdict}")  # fmt: skip
    # 3. N = 256: coordinated finishes; centralized slower or capped.
    if 256 in results:
        c = results[256]["centralized"]
        for config in ("workers-1", "workers-2", "dask-2"):
            r = results[256][config]
            ok = "wall_s" in r and ("wall_s" not in c or c.get("status") != "converged" or c["wall_s"] > r["wall_s"])
            verdict = "met" if ok else "MISSED"
            print(f"  N=256 {config}: {r.get('status')} in {r.get('wall_s', float('nan')):.1f} s, centralized "
                  f"{c.get('status')} in {c.get('wall_s', float('nan')):.1f} s -> {verdict}")  # fmt: skip
    # 4. memory at most linear in N: MiB above the N = smallest figure, per agent, does not grow.
    for config in CONFIGS:
        mem = {n: results[n][config].get("peak_mib") for n in sizes}
        if None in mem.values() or len(sizes) < 3:
            continue
        a, b, c = sizes[0], sizes[1], sizes[-1]
        slope1 = (mem[b] - mem[a]) / (b - a)
        slope2 = (mem[c] - mem[b]) / (c - b)
        ok = slope2 <= 1.25 * max(slope1, 1e-9) or slope2 <= 0.5  # within noise, or below 0.5 MiB per agent
        verdict = "met" if ok else "MISSED"
        print(f"  memory {config}: " + ", ".join(f"N={n}: {m:.0f} MiB" for n, m in mem.items())
              + f"; {slope1:.2f} then {slope2:.2f} MiB per agent -> {verdict} (at most linear)")  # fmt: skip
        built = {n: results[n][config].get("mem_before_mib") for n in sizes}
        if None not in built.values():
            print("    of which with the agents built, before coordinating: "
                  + ", ".join(f"N={n}: {m:.0f} MiB" for n, m in built.items()))  # fmt: skip


if __name__ == "__main__":
    main()
