"""Scan one agent's value function along one parameter: V, dV/dp and the multipliers, point by point.

:func:`sweep_problem` solves a :class:`~negotiate.core.nlp.ParametricNLP` at ``base`` with one entry replaced by
each value of a path, warm-starting every solve from the previous converged one, and records the value,
the value gradient, every multiplier of a constraint that is active somewhere on the path, the certificate
and the active set. Where the active set changes from one point to the next, V may have a kink (its slope
jumps) or the solution map may bend; where a constraint is weakly active (active with a zero multiplier),
V is not differentiable in general. Both are marked in :attr:`SweepResult.changes` and
:attr:`SweepResult.weakly_active`. :func:`sweep_agent` does this for an agent's named parameter, the
other parameters at the agent's free optimum; :func:`sweep_fleet` builds that one agent from a fleet.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from negotiate.core.agent import AgentModel
from negotiate.core.nlp import LocalResult, ParametricNLP, try_solve
from negotiate.fleet.spec import FleetSpec

__all__ = ["SweepResult", "sweep_agent", "sweep_fleet", "sweep_problem", "write_sweep"]


@dataclass(frozen=True)
class SweepResult:
    """One parameter path and what the agent reported along it.

    Attributes
    ----------
    agent, param, unit : str
        Agent name, swept parameter's name and unit.
    index : int
        Position of the swept parameter in the agent's parameter vector.
    p_names : tuple of str
        Names of all parameters (columns of ``gradient``).
    values : numpy.ndarray, shape (n,)
        The swept parameter's values, in ``unit``.
    value : numpy.ndarray, shape (n,)
        Optimal value V at each point (``nan`` where the solve failed).
    gradient : numpy.ndarray, shape (n, n_p)
        Value gradient dV/dp at each point, cost per unit of each parameter (``nan`` where failed).
    status, verdict : tuple of str
        Solve status and certificate verdict per point (verdict empty where failed).
    active, weakly_active : tuple of tuple of str
        Names of the active (and weakly active) constraint sides per point.
    multipliers : dict of str to numpy.ndarray
        Multiplier along the path of each constraint active at some point (CasADi's sign: positive at an
        active upper bound, negative at an active lower bound), keyed by the constraint's name.
    changes : tuple of int
        Indices ``k`` where the active set differs from the one at point ``k - 1`` (both converged).
    results : tuple of LocalResult
        The solves themselves.
    window : tuple of float or None
        The interval of the swept parameter inside the agent's reachable set with the other parameters held
        where they are (``None`` for a bare problem; ``(nan, nan)`` when the line misses the set), in
        ``unit``. See :attr:`in_window`.
    """

    agent: str
    param: str
    unit: str
    index: int
    p_names: tuple[str, ...]
    values: np.ndarray
    value: np.ndarray
    gradient: np.ndarray
    status: tuple[str, ...]
    verdict: tuple[str, ...]
    active: tuple[tuple[str, ...], ...]
    weakly_active: tuple[tuple[str, ...], ...]
    multipliers: dict[str, np.ndarray]
    changes: tuple[int, ...]
    results: tuple[LocalResult, ...] = field(repr=False, default=())
    window: tuple[float, float] | None = None

    @property
    def slope(self) -> np.ndarray:
        """dV/d(swept parameter) along the path, cost per ``unit``."""
        return self.gradient[:, self.index]

    @property
    def converged(self) -> np.ndarray:
        """Boolean mask of the points whose solve converged (a gradient is present)."""
        return np.isfinite(self.gradient[:, self.index])

    @property
    def in_window(self) -> np.ndarray:
        """Boolean mask of the points inside :attr:`window` (all True for a bare problem).

        Outside its reachable set an agent is never offered the parameter: a solve there may converge and yet
        describe a plan the agent cannot carry out (a machine's slot shorter than the station's duration),
        or fail. The ends count as inside to 1e-9 relative (the window's own rounding)."""
        if self.window is None:
            return np.ones(self.values.size, dtype=bool)
        lo, hi = self.window
        tol = 1e-9 * max(1.0, abs(lo), abs(hi)) if np.isfinite(lo) and np.isfinite(hi) else 0.0
        return (self.values >= lo - tol) & (self.values <= hi + tol)

    def kinks(self) -> list[float]:
        """Midpoints between the points where the active set changed: where V may have a kink, in ``unit``."""
        return [0.5 * (self.values[k - 1] + self.values[k]) for k in self.changes]


def sweep_problem(
    problem: ParametricNLP,
    base: Sequence[float] | np.ndarray,
    index: int,
    values: Sequence[float] | np.ndarray,
    *,
    agent: str = "",
    unit: str = "",
) -> SweepResult:
    """Solve ``problem`` at ``base`` with entry ``index`` set to each of ``values`` (warm-started in turn).

    A failed solve is recorded with its status (and ``nan`` numbers); the next solve then starts warm from
    the last converged one.
    """
    base = np.asarray(base, dtype=float).ravel()
    if base.shape != (problem.n_p,):
        raise ValueError(f"'base' must have shape ({problem.n_p},), got {base.shape}")
    if not 0 <= index < problem.n_p:
        raise ValueError(f"'index' must be in 0..{problem.n_p - 1}, got {index}")
    values = np.asarray(values, dtype=float).ravel()
    warm: LocalResult | None = None
    results: list[LocalResult] = []
    for v in values:
        p = base.copy()
        p[index] = v
        res = try_solve(problem, p, warm=warm)
        results.append(res)
        if res.success:
            warm = res
    n = values.size
    value = np.full(n, np.nan)
    grad = np.full((n, problem.n_p), np.nan)
    status, active, weak = [], [], []
    verdict: list[str] = []  # a certificate's verdict, or "" where the solve failed
    keys: list[tuple[str, int]] = []  # (kind, index) of every row active somewhere, in order of appearance
    sides: list[frozenset[tuple[str, int, str]] | None] = []
    for k, r in enumerate(results):
        status.append(str(r.status))
        cert = r.certificate
        if r.success and cert is not None:
            value[k] = r.value
            grad[k] = r.gradient
            verdict.append(cert.verdict)
            active.append(tuple(str(c) for c in cert.active))
            weak.append(tuple(str(c) for c in cert.weakly_active))
            sides.append(frozenset((c.kind, c.index, c.side) for c in cert.active))
            for c in cert.active:
                if (c.kind, c.index) not in keys:
                    keys.append((c.kind, c.index))
        else:
            verdict.append("")
            active.append(())
            weak.append(())
            sides.append(None)
    changes = tuple(
        k for k in range(1, n) if sides[k] is not None and sides[k - 1] is not None and sides[k] != sides[k - 1]
    )
    mult: dict[str, np.ndarray] = {}
    for kind, i in keys:
        name = problem.g_names[i] if kind == "g" else problem.x_names[i]
        col = np.array([
            (r.lam_g[i] if kind == "g" else r.lam_x[i]) if r.success else np.nan for r in results
        ])  # fmt: skip
        mult[name if name not in mult else f"{name} [{kind}{i}]"] = col
    return SweepResult(
        agent=agent or problem.name,
        param=problem.p_names[index],
        unit=unit,
        index=index,
        p_names=tuple(problem.p_names),
        values=values,
        value=value,
        gradient=grad,
        status=tuple(status),
        verdict=tuple(verdict),
        active=tuple(active),
        weakly_active=tuple(weak),
        multipliers=mult,
        changes=changes,
        results=tuple(results),
    )


def sweep_agent(
    agent: AgentModel,
    param: str,
    start: float,
    stop: float,
    steps: int,
    *,
    base: Sequence[float] | np.ndarray | None = None,
) -> SweepResult:
    """Sweep ``agent``'s parameter named ``param`` over ``steps`` evenly spaced values from ``start`` to
    ``stop`` (both included, in the parameter's unit), the other parameters at ``base`` (the agent's free
    optimum when omitted).

    Raises
    ------
    ValueError
        For an unknown parameter name (the message lists the agent's parameters) or ``steps < 2``.
    """
    names = agent.param_names
    if param not in names:
        raise ValueError(f"agent {agent.name!r} has no parameter {param!r}; expected one of {names}")
    if int(steps) != steps or steps < 2:
        raise ValueError(f"'steps' must be an integer >= 2, got {steps!r}")
    k = names.index(param)
    values = np.linspace(float(start), float(stop), int(steps))
    b = agent.free_optimum if base is None else np.asarray(base, dtype=float)
    res = sweep_problem(agent.problem, b, k, values, agent=agent.name, unit=agent.params[k].unit)
    return replace(res, param=param, window=line_window(agent, b, k))


def line_window(agent: AgentModel, base: np.ndarray, index: int) -> tuple[float, float]:
    """Interval of parameter ``index`` inside the agent's reachable set with the others held at ``base``.

    The reachable set is ``lower <= p <= upper, A p <= b``; along ``p = base + t e_index`` each row gives
    one bound on ``t``. An empty interval comes back as ``(nan, nan)``."""
    R = agent.reachable
    lo, hi = float(R.lower[index]), float(R.upper[index])
    if R.A.shape[0]:
        a = R.A[:, index]
        rest = R.b - R.A @ base + a * base[index]  # a_k * v <= b - sum_{j != k} a_j base_j
        for ak, rk in zip(a, rest, strict=True):
            if ak > 0:
                hi = min(hi, rk / ak)
            elif ak < 0:
                lo = max(lo, rk / ak)
    return (lo, hi) if lo <= hi else (float("nan"), float("nan"))


def sweep_fleet(spec: FleetSpec, agent: str, param: str, start: float, stop: float, steps: int) -> SweepResult:
    """Build the agent named ``agent`` of a fleet (only that one) and sweep it (see :func:`sweep_agent`).

    Raises
    ------
    ValueError
        For an agent name not in the fleet (the message lists the fleet's agents).
    FleetError
        If the agent cannot be built.
    """
    from negotiate.fleet.build import build_agents

    names = [a.name for a in spec.agents]
    if agent not in names:
        raise ValueError(f"fleet {spec.name!r} has no agent {agent!r}; expected one of {names}")
    one = replace(spec, agents=tuple(a for a in spec.agents if a.name == agent))
    (model,) = build_agents(one)
    return sweep_agent(model, param, start, stop, steps)


def _safe(s: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]", "_", s)


def write_sweep(sweep: SweepResult, out_dir: str | Path, *, plot: bool = True) -> list[Path]:
    """Write ``sweep-<agent>-<param>.csv`` (and ``.png`` with ``plot``) into ``out_dir``; return the paths.

    CSV columns (see ``docs/outputs.md``): ``step``, ``p`` (the swept value, in the parameter's unit),
    ``value``, ``d_<name>`` per parameter (cost per unit), ``status``, ``verdict``, ``active_set_changed``
    (1 where the active set differs from the previous point), ``in_window`` (1 inside the agent's reachable
    window, 0 outside, empty for a bare problem), ``weakly_active`` and ``active`` (``;``-separated constraint
    names) and ``lam[<constraint>]`` per constraint active somewhere.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stem = f"sweep-{_safe(sweep.agent)}-{_safe(sweep.param)}"
    path = out / f"{stem}.csv"
    changed = set(sweep.changes)
    inside = ["" if sweep.window is None else str(int(v)) for v in sweep.in_window]

    def num(v: float) -> str:
        return "" if not np.isfinite(v) else repr(float(v))

    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        lam = list(sweep.multipliers)
        w.writerow(["step", "p", "value", *(f"d_{n}" for n in sweep.p_names), "status", "verdict",
                    "active_set_changed", "in_window", "weakly_active", "active",
                    *(f"lam[{n}]" for n in lam)])  # fmt: skip
        for k in range(sweep.values.size):
            w.writerow([k, num(sweep.values[k]), num(sweep.value[k]), *(num(g) for g in sweep.gradient[k]),
                        sweep.status[k], sweep.verdict[k], int(k in changed), inside[k],
                        ";".join(sweep.weakly_active[k]),
                        ";".join(sweep.active[k]), *(num(sweep.multipliers[n][k]) for n in lam)])  # fmt: skip
    paths = [path]
    if plot:
        from negotiate.output import plots

        png = out / f"{stem}.png"
        png.write_bytes(plots.png(plots.sweep_chart(sweep)))
        paths.append(png)
    return paths
