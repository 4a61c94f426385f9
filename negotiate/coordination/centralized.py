"""Centralized reference: the monolithic NLP of all agents plus the coupling rules, solved by IPOPT.

It stacks every agent's decision variables and shared parameters into one NLP ::

    min  sum_i w_i f_i(x_i, p_i)
    s.t. lbg_i <= g_i(x_i, p_i) <= ubg_i,  lbx_i <= x_i <= ubx_i      (every agent's own problem)
         P = (p_1, ..., p_N) in the coupling polyhedron for the given orders (reachable sets included)

and solves it with IPOPT. With the same orders and the same feasible set of shared parameters it is the
problem the coordinator solves by decomposition, so its optimal value is the reference for ``--verify``.
Being one large nonconvex NLP it may end at another local minimum than the coordinator; it is started from
the coordinated solution when one is given (then it can only confirm or improve it), else from the agents'
free optima.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import casadi as ca
import numpy as np

from negotiate.core.agent import AgentModel
from negotiate.core.status import Status, from_ipopt
from negotiate.resources.coupling import FeasibleSet

__all__ = ["CentralizedResult", "solve_centralized"]


@dataclass(frozen=True)
class CentralizedResult:
    """Outcome of the monolithic solve: total cost, stacked parameters, per-agent values, status, time (s)."""

    total: float
    P: np.ndarray
    values: np.ndarray
    status: Status
    message: str
    iterations: int
    wall_time: float

    @property
    def success(self) -> bool:
        return self.status is Status.CONVERGED


def solve_centralized(
    agents: Sequence[AgentModel],
    feasible: FeasibleSet,
    *,
    start: Sequence[np.ndarray] | None = None,
    start_P: np.ndarray | None = None,
    max_wall_time: float | None = None,
    solver_options: dict[str, Any] | None = None,
) -> CentralizedResult:
    """Solve the monolithic NLP (see the module docstring).

    Parameters
    ----------
    agents : sequence of AgentModel
    feasible : FeasibleSet
        The coupling polyhedron for the chosen orders.
    start : sequence of arrays, optional
        Each agent's primal start ``x_i`` (e.g. from the coordinated solution); its ``x0`` when omitted.
    start_P : array, optional
        Stacked parameter start; the projected free optima when omitted.
    max_wall_time : float, optional
        IPOPT wall-time limit, s (the status is then ``time-limit``).
    """
    t0 = time.perf_counter()
    lay = feasible.layout
    xs, ps, fs, gs = [], [], [], []
    lbx, ubx, lbg, ubg, x0 = [], [], [], [], []
    for i, a in enumerate(agents):
        prob = a.problem
        F = ca.Function(f"agent{i}", [prob.x_symbol, prob.p_symbol], [prob.f_expr, prob.g_expr])
        xi = ca.MX.sym(f"x{i}", prob.n_x)
        pi = ca.MX.sym(f"p{i}", prob.n_p)
        fi, gi = F(xi, pi)
        xs.append(xi)
        ps.append(pi)
        fs.append(a.weight * fi)
        gs.append(gi)
        lbx.append(prob.lbx)
        ubx.append(prob.ubx)
        lbg.append(prob.lbg)
        ubg.append(prob.ubg)
        x0.append(prob.x0 if start is None else np.asarray(start[i], dtype=float))
    P = ca.vertcat(*ps)
    coupling = ca.mtimes(ca.DM(feasible.A), P) if feasible.A.shape[0] else ca.MX(0, 1)
    z = ca.vertcat(*xs, P)
    nlp = {"x": z, "f": ca.sum1(ca.vertcat(*fs)), "g": ca.vertcat(*gs, coupling)}
    options: dict[str, Any] = {"ipopt.print_level": 0, "ipopt.sb": "yes", "print_time": False, "expand": True}
    if max_wall_time is not None:
        options["ipopt.max_wall_time"] = float(max_wall_time)
    options.update(solver_options or {})
    try:
        solver = ca.nlpsol("centralized", "ipopt", nlp, options)
    except RuntimeError:
        options.pop("expand")
        solver = ca.nlpsol("centralized", "ipopt", nlp, options)
    if start_P is None:
        start_P = feasible.project(lay.stack([a.free_optimum for a in agents]))
    out = solver(
        x0=np.concatenate([*x0, start_P]),
        lbx=np.concatenate([*lbx, feasible.lower]),
        ubx=np.concatenate([*ubx, feasible.upper]),
        lbg=np.concatenate([*lbg, np.full(feasible.b.size, -np.inf)]),
        ubg=np.concatenate([*ubg, feasible.b]),
    )
    stats = solver.stats()
    raw = str(stats.get("return_status", "unknown"))
    zopt = np.asarray(out["z"] if "z" in out else out["x"]).ravel()
    n_x = sum(a.problem.n_x for a in agents)
    P_opt = zopt[n_x:]
    values: list[float] = []
    off = 0
    for a in agents:
        x_opt = zopt[off : off + a.problem.n_x]
        off += a.problem.n_x
        values.append(float(a.problem.objective(x_opt, P_opt[lay.slice(len(values))])))
    return CentralizedResult(
        total=float(out["f"]),
        P=P_opt,
        values=np.array(values),
        status=from_ipopt(raw),
        message=raw,
        iterations=int(stats.get("iter_count", 0)),
        wall_time=time.perf_counter() - t0,
    )
