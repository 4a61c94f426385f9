"""Cost of certification: our solve (polish + certificate + gradient) and sensitivities vs a bare IPOPT solve.

Run:  python benchmarks/bench_core.py [--stages 60] [--repeats 15]

Two vehicle-like NLPs with 60 stages: the model library's vehicle on a path (agents.vehicle: distance
stages, kinetic energy per mass and time per node, traction and braking, rolling resistance, drag, a
bridge zone whose entry and exit times are the parameters), and a plainer stand-in written here (states
time and kinetic energy per mass, an acceleration control, the slot as equality rows), which IPOPT solves in
few iterations. Each repeat solves at a slightly different slot, cold, so the bare solve and ours do the
same IPOPT work. Targets: certificate + gradient add at most 25 % to a solve; the sensitivity step costs
at most half a solve.
"""

from __future__ import annotations

import argparse
import statistics
import time

import casadi as ca
import numpy as np

from negotiate import ParametricNLP


def vehicle_like(stages: int) -> tuple[dict, dict, np.ndarray, np.ndarray]:
    """Build the benchmark NLP; return (nlp, bounds, x0, p0)."""
    length, mass, crr, cda, rho, grav = 600.0, 20e3, 0.008, 6.0, 1.2, 9.81
    ds = length / stages
    t = ca.SX.sym("t", stages + 1)
    e = ca.SX.sym("e", stages + 1)  # kinetic energy per unit mass, m^2/s^2
    u = ca.SX.sym("u", stages)  # traction acceleration (force per unit mass), m/s^2
    p = ca.SX.sym("p", 2)  # zone entry and exit time, s
    x = ca.vertcat(t, e, u)
    g, lbg, ubg = [], [], []
    energy, comfort = 0, 0
    for k in range(stages):
        v0, v1 = ca.sqrt(2 * e[k]), ca.sqrt(2 * e[k + 1])
        resist = crr * grav + rho * cda * (e[k] + e[k + 1]) / 2 / mass  # m/s^2
        g += [e[k + 1] - e[k] - ds * (u[k] - resist), t[k + 1] - t[k] - 2 * ds / (v0 + v1)]
        lbg += [0, 0]
        ubg += [0, 0]
        work = mass * u[k] * ds / 1e3  # traction work of the stage, kJ
        energy += 0.5 * (work + ca.sqrt(work**2 + 100.0))  # smooth positive part (10 kJ scale), kJ
        if k:
            comfort += (u[k] - u[k - 1]) ** 2
    enter, leave = stages // 3, 2 * stages // 3
    g += [t[enter] - p[0], t[leave] - p[1]]
    lbg += [0, 0]
    ubg += [0, 0]
    f = energy / 100 + 10 * comfort + (t[-1] - 60.0) ** 2
    lbx = np.concatenate([[0.0], np.zeros(stages), [50.0], np.full(stages, 2.0), np.full(stages, -3.0)])
    ubx = np.concatenate([[0.0], np.full(stages, 200.0), [50.0], np.full(stages, 200.0), np.full(stages, 2.0)])
    x0 = np.concatenate([np.linspace(0, 60, stages + 1), np.full(stages + 1, 50.0), np.zeros(stages)])
    bounds = {"lbx": lbx, "ubx": ubx, "lbg": np.array(lbg, float), "ubg": np.array(ubg, float)}
    return {"x": x, "p": p, "f": f, "g": ca.vertcat(*g)}, bounds, x0, np.array([20.0, 40.0])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--stages", type=int, default=60)
    ap.add_argument("--repeats", type=int, default=15)
    args = ap.parse_args()

    from agents import VehicleParams, build_vehicle

    agent = build_vehicle("bench", VehicleParams(stages=args.stages))
    lib = agent.problem
    plain_nlp, bounds, x0, p0 = vehicle_like(args.stages)
    cases = [
        ("library vehicle", lib, lib._problem_expr, {"lbx": lib.lbx, "ubx": lib.ubx, "lbg": lib.lbg, "ubg": lib.ubg},
         lib.x0, agent.free_optimum, 0.5),
        ("plain stand-in", ParametricNLP(plain_nlp, **bounds, x0=x0), plain_nlp, bounds, x0, p0, 2.0),
    ]  # fmt: skip
    rng = np.random.default_rng(0)
    med = statistics.median
    print(f"{'NLP':<17}{'n_x':>5}{'n_g':>5}{'bare ms':>9}{'ours ms':>9}{'cert ms':>9}{'sens ms':>9}"
          f"{'overhead':>10}{'cert/solve':>11}{'sens/solve':>12}  verdicts")  # fmt: skip
    for label, prob, nlp, bnds, xs, pc, spread in cases:
        bare = ca.nlpsol("bare", "ipopt", nlp, {"ipopt.print_level": 0, "ipopt.sb": "yes", "print_time": False})
        t_bare, t_ours, t_cert, t_sens, verdicts = [], [], [], [], set()
        for k, d in enumerate(rng.uniform(-spread, spread, size=(args.repeats, pc.size))):
            p = pc + d

            # alternate which runs first: whichever goes second at the same p runs measurably faster
            for which in ("bare", "ours") if k % 2 else ("ours", "bare"):
                t0 = time.perf_counter()
                if which == "bare":
                    bare(x0=xs, p=p, **bnds)
                    t_bare.append(time.perf_counter() - t0)
                    continue
                res = prob.solve(p)
                t_ours.append(time.perf_counter() - t0)
                t_cert.append(res.certify_time)
                verdicts.add(res.certificate.verdict if res.certificate else str(res.status))
                t0 = time.perf_counter()
                available = res.sensitivity().available
                t_sens.append(time.perf_counter() - t0)
                verdicts.add("sensitivity" if available else "no sensitivity")
        over = med(t_ours) / med(t_bare) - 1.0
        cert = med(t_cert) / med(t_bare)
        ratio = med(t_sens) / med(t_bare)
        print(f"{label:<17}{prob.n_x:>5}{prob.n_g:>5}{1e3 * med(t_bare):>9.2f}{1e3 * med(t_ours):>9.2f}"
              f"{1e3 * med(t_cert):>9.2f}{1e3 * med(t_sens):>9.2f}{100 * over:>+9.1f}%{100 * cert:>10.1f}%"
              f"{ratio:>12.2f}  {sorted(verdicts)}")  # fmt: skip
    print("overhead: our whole solve vs the bare one; cert/solve: polish + certificate + gradient time alone")
    print("targets: overhead <= +25 % of a bare solve; sensitivity step <= 0.50 of a bare solve")


if __name__ == "__main__":
    main()
