"""Coupling rules of the shared resources: the polyhedral feasible set of all agents' parameters.

The upper-level variables are all agents' shared parameters stacked into one vector ``P`` (agent by agent,
in the order of the fleet, each agent's parameters in its own order). For fixed orders on the exclusive
resources the feasible set is the polyhedron ::

    lower <= P <= upper,   A P <= b

made of

* every agent's reachable set (its box and its own rows ``A_i p_i <= b_i``, which include the sequence of
  its slots along its route), plus ``enter <= leave`` for each of its slots;
* every resource's own rows (:meth:`~negotiate.resources.base.ResourceKind.coupling_rows`), e.g. for an
  exclusive resource and its order ``a_1, a_2, ...``: ``leave(a_k) + gap <= enter(a_{k+1})``; for a capacity
  resource, in each time block ``j``: ``sum_i share_ij <= limit_j`` (shares are >= 0 through the agents'
  boxes).

Orders are checked for deadlocks first: the precedence graph (networkx) has a node per (agent, resource)
slot, an edge from each slot to the agent's next slot along its route, and an edge from each user of an
exclusive resource to the next; a cycle means no schedule exists and raises :class:`DeadlockError`
naming the agents and resources on it. Orders without a cycle can still admit no schedule (a gap too long
for the agents' reachable windows, say): :func:`check_orders` then decides emptiness with a linear program
(HiGHS through :func:`scipy.optimize.linprog`) and raises :class:`InfeasibleOrdersError` naming the rows
that conflict. Projection onto the polyhedron is a small sparse convex QP (:mod:`negotiate.core.qp`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import networkx as nx
import numpy as np
from scipy.optimize import linprog

from negotiate.core.agent import AgentModel
from negotiate.core.qp import solve_qp
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.resources import Resource
from negotiate.resources.base import param_index

__all__ = [
    "DeadlockError",
    "FeasibleSet",
    "InfeasibleOrdersError",
    "Layout",
    "build_feasible_set",
    "check_orders",
    "fcfs_orders",
    "first_orders",
    "precedence_graph",
    "ranked_orders",
]


@dataclass(frozen=True)
class Layout:
    """Where each agent's parameters sit in the stacked vector ``P``."""

    names: tuple[str, ...]
    offsets: tuple[int, ...]
    sizes: tuple[int, ...]
    params: tuple[str, ...] = ()
    """Every stacked parameter as ``"agent: name"`` (e.g. ``"truck-03: bridge.enter"``)."""

    @classmethod
    def of(cls, agents: Sequence[AgentModel]) -> Layout:
        sizes = tuple(a.problem.n_p for a in agents)
        offsets = tuple(int(v) for v in np.concatenate([[0], np.cumsum(sizes)[:-1]])) if sizes else ()
        params = tuple(f"{a.name}: {q.name}" for a in agents for q in a.params)
        return cls(tuple(a.name for a in agents), offsets, sizes, params if len(params) == sum(sizes) else ())

    @property
    def n(self) -> int:
        return int(sum(self.sizes))

    def slice(self, i: int) -> slice:
        return slice(self.offsets[i], self.offsets[i] + self.sizes[i])

    def split(self, P: np.ndarray) -> list[np.ndarray]:
        """The per-agent pieces of a stacked vector."""
        return [np.asarray(P[self.slice(i)], dtype=float) for i in range(len(self.names))]

    def stack(self, parts: Sequence[np.ndarray]) -> np.ndarray:
        return np.concatenate([np.asarray(q, dtype=float).ravel() for q in parts]) if parts else np.zeros(0)


_slot_index = param_index


def _slots(agent: AgentModel) -> list[str]:
    """Exclusive resources the agent uses, in the order its 'enter' parameters appear (its route order)."""
    return [q.resource for q in agent.params if q.kind == "enter"]


def _inequality(row: np.ndarray, rhs: float, names: Sequence[str]) -> str:
    """A row ``row @ p <= rhs`` as readable text, e.g. ``"bridge.enter - bridge.leave <= -12.5"``; when every
    coefficient is negative it is written the other way round (``"bridge.leave - ... >= 12.5"``)."""
    row = np.asarray(row, dtype=float)
    big = float(np.max(np.abs(row), initial=0.0)) or 1.0  # written with its largest coefficient 1
    sign, op = (-1.0 / big, ">=") if np.all(row[row != 0] < 0) else (1.0 / big, "<=")
    terms = []
    for c, name in zip(sign * row, names, strict=True):
        if c == 0:
            continue
        mag = "" if f"{abs(c):.6g}" == "1" else f"{abs(c):.6g}*"
        terms.append(("- " if c < 0 else "+ ") + mag + name)
    text = " ".join(terms).removeprefix("+ ") or "0"
    return f"{text.replace('- ', '-', 1) if text.startswith('- ') else text} {op} {sign * rhs:.6g}"


def fcfs_orders(agents: Sequence[AgentModel], resources: Sequence[Resource]) -> dict[str, list[str]]:
    """First-come-first-served orders: users of each resource that needs an order (an exclusive one), sorted
    by free-optimum entry time."""
    return {r.name: r.first_come_order(agents) for r in resources if r.needs_order}


def ranked_orders(agents: Sequence[AgentModel], resources: Sequence[Resource]) -> dict[str, list[str]]:
    """Orders from one ranking of all agents: by the earliest entry time of their free optimum on any resource
    that needs an order (first come, first served at the first resource each agent reaches).

    Every resource's users follow the same ranking, so no two agents swap places from one resource to the
    next: no agent overtakes another inside a run of adjacent zones, and the orders form no cycle with the
    routes. With one ordered resource per agent it is :func:`fcfs_orders`.
    """
    per_resource = fcfs_orders(agents, resources)
    first: dict[str, float] = {}
    for a in agents:
        times = [a.free_optimum[k] for k, q in enumerate(a.params) if q.kind == "enter" and q.resource in per_resource]
        if times:
            first[a.name] = float(min(times))
    return {r: sorted(users, key=lambda n: (first[n], n)) for r, users in per_resource.items()}


def first_orders(agents: Sequence[AgentModel], resources: Sequence[Resource]) -> dict[str, list[str]]:
    """The orders a search starts from: :func:`fcfs_orders` when some schedule meets them, else
    :func:`ranked_orders` when those admit one.

    Raises
    ------
    DeadlockError, InfeasibleOrdersError
        The first-come-first-served orders' error, when neither admits a schedule.
    """
    orders = fcfs_orders(agents, resources)
    try:
        check_orders(agents, resources, orders)
    except (DeadlockError, InfeasibleOrdersError) as exc:
        ranked = ranked_orders(agents, resources)
        if ranked == orders:
            raise
        try:
            check_orders(agents, resources, ranked)
        except (DeadlockError, InfeasibleOrdersError):
            raise exc from None
        return ranked
    return orders


def precedence_graph(agents: Sequence[AgentModel], orders: Mapping[str, Sequence[str]]) -> nx.DiGraph:
    """Directed graph of slot precedences; nodes are ``(agent, resource)``."""
    G = nx.DiGraph()
    for a in agents:
        seq = _slots(a)
        G.add_nodes_from((a.name, r) for r in seq)
        G.add_edges_from(((a.name, r0), (a.name, r1)) for r0, r1 in zip(seq, seq[1:], strict=False))
    for r, users in orders.items():
        G.add_edges_from(((u0, r), (u1, r)) for u0, u1 in zip(users, users[1:], strict=False))
    return G


def check_deadlock(agents: Sequence[AgentModel], orders: Mapping[str, Sequence[str]]) -> None:
    """Raise :class:`DeadlockError` if the orders and the agents' routes form a cycle."""
    G = precedence_graph(agents, orders)
    try:
        cycle = nx.find_cycle(G)
    except nx.NetworkXNoCycle:
        return
    steps = " -> ".join(f"{a} on {r}" for (a, r), _ in cycle)
    first = cycle[0][0]
    raise DeadlockError(
        f"the orders form a cycle (deadlock), no schedule can meet them: {steps} -> {first[0]} on {first[1]}"
    )


def check_orders(
    agents: Sequence[AgentModel], resources: Sequence[Resource], orders: Mapping[str, Sequence[str]]
) -> FeasibleSet:
    """The coupling polyhedron for ``orders``, after checking that some schedule meets it.

    Raises
    ------
    DeadlockError
        If the orders and the agents' routes form a cycle.
    InfeasibleOrdersError
        If the polyhedron is empty; the message names the resources, agents and rules that conflict.
    """
    feasible = build_feasible_set(agents, resources, orders)
    rows = feasible.conflict()
    if rows is not None:
        users = {k: " > ".join(v) for k, v in orders.items()}
        named = [r for r in users if any(line.startswith(f"{r}:") for line in rows)]
        where = "; ".join(f"{r}: {users[r]}" for r in (named or list(users))) or "no exclusive resource"
        raise InfeasibleOrdersError(
            f"no schedule meets the orders {where}: these rules conflict: " + "; ".join(rows), rows
        )
    return feasible


@dataclass
class FeasibleSet:
    """The polyhedron ``lower <= P <= upper, A P <= b`` of stacked parameters, with its row labels.

    ``scale`` holds a positive scale per parameter (the width of its reachable box, at least 1) that the
    coordination methods use to make times (s) and shares (W) comparable.
    """

    layout: Layout
    lower: np.ndarray
    upper: np.ndarray
    A: np.ndarray
    b: np.ndarray
    labels: tuple[str, ...]
    orders: dict[str, list[str]]

    def __post_init__(self) -> None:
        width = self.upper - self.lower
        self.scale = np.where(np.isfinite(width) & (width > 1.0), width, 1.0)

    @property
    def n(self) -> int:
        return self.layout.n

    def violation(self, P: np.ndarray) -> float:
        """Largest violation of any bound or row, in the parameters' units."""
        P = np.asarray(P, dtype=float)
        v = [np.max(self.lower - P, initial=0.0), np.max(P - self.upper, initial=0.0)]
        if self.A.shape[0]:
            v.append(float(np.max(self.A @ P - self.b)))
        return float(max(0.0, *v))

    def contains(self, P: np.ndarray, tol: float = 1e-7) -> bool:
        return self.violation(P) <= tol

    def conflict(self) -> list[str] | None:
        """``None`` when the set is non-empty, else the rules that conflict (row labels and bounds).

        The test is a phase-one linear program in the scaled parameters: minimise the total violation
        ``sum(v)`` subject to ``A P - v <= b``, ``v >= 0`` and the box. The set is empty when the least total
        violation exceeds the LP's feasibility tolerance (1e-7 in scaled units, HiGHS's default primal
        tolerance); the rows and bounds with non-zero multipliers at that optimum form the certificate of
        emptiness (Farkas' lemma: a non-negative combination of them reads ``0 <= negative``)."""
        s = self.scale
        m, n = self.A.shape
        lo, hi = self.lower / s, self.upper / s
        if np.any(lo > hi):
            return [f"{self._param_name(int(j))}: lower bound {self.lower[j]:.6g} > upper bound {self.upper[j]:.6g}"
                    for j in np.flatnonzero(lo > hi)]  # fmt: skip
        if m == 0:
            return None
        As = self.A * s[None, :]
        norm = np.maximum(np.linalg.norm(As, axis=1), 1e-300)  # violations measured along unit row normals
        A_ub = np.hstack([As / norm[:, None], -np.eye(m)])
        c = np.concatenate([np.zeros(n), np.ones(m)])
        bounds = [*zip(lo, hi, strict=True), *([(0.0, None)] * m)]
        res = linprog(c, A_ub=A_ub, b_ub=self.b / norm, bounds=bounds, method="highs")
        if res.status != 0:
            # The phase-one LP is always feasible and bounded below by 0; anything else is a solver fault.
            raise RuntimeError(f"feasibility test of the coupling polyhedron failed: {res.message}")
        if res.fun <= 1e-7:
            return None
        rows = [self.labels[k] for k in np.flatnonzero(np.abs(res.ineqlin.marginals) > 1e-9)]
        for j in np.flatnonzero(np.abs(res.lower.marginals[:n]) > 1e-9):
            rows.append(f"{self._param_name(int(j))} >= {self.lower[j]:.6g} (reachable window)")
        for j in np.flatnonzero(np.abs(res.upper.marginals[:n]) > 1e-9):
            rows.append(f"{self._param_name(int(j))} <= {self.upper[j]:.6g} (reachable window)")
        return rows

    def _param_name(self, j: int) -> str:
        if self.layout.params:
            return self.layout.params[j]
        i = int(np.searchsorted(np.asarray(self.layout.offsets), j, side="right")) - 1
        return f"{self.layout.names[i]}: parameter {j - self.layout.offsets[i]}"

    def project(self, Y: np.ndarray, weight: np.ndarray | None = None) -> np.ndarray:
        """Nearest point of the set to ``Y`` in the scaled norm ``||(P - Y) / scale||`` (a QP), each squared
        entry multiplied by ``weight`` when given (positive, one per parameter: a large weight holds that
        parameter near its value in ``Y``)."""
        s = self.scale
        u = np.asarray(Y, dtype=float) / s
        w = np.ones(self.n) if weight is None else np.asarray(weight, dtype=float)
        res = solve_qp(
            np.diag(w),
            -w * u,
            self.A * s[None, :],
            np.full(self.b.size, -np.inf),
            self.b,
            self.lower / s,
            self.upper / s,
        )
        if not res.success:
            # A target far outside the box makes the QP badly scaled; the nearest point of the box is a
            # well-scaled stand-in (exact when only box bounds bind).
            ub = np.clip(u, self.lower / s, self.upper / s)
            res = solve_qp(
                np.diag(w), -w * ub, self.A * s[None, :], np.full(self.b.size, -np.inf), self.b, self.lower / s,
                self.upper / s,
            )  # fmt: skip
        if not res.success:
            raise RuntimeError(f"projection onto the coupling polyhedron failed ({res.message}); is it empty?")
        return np.clip(res.z * s, self.lower, self.upper)


def build_feasible_set(
    agents: Sequence[AgentModel], resources: Sequence[Resource], orders: Mapping[str, Sequence[str]]
) -> FeasibleSet:
    """Assemble the polyhedron for the given orders (see the module docstring).

    Raises
    ------
    DeadlockError
        If the orders and routes form a cycle.
    ValueError
        If an order names an agent that does not use the resource, or misses one that does.
    """
    layout = Layout.of(agents)
    rows: list[np.ndarray] = []
    rhs: list[float] = []
    labels: list[str] = []
    lower = layout.stack([a.reachable.lower for a in agents])
    upper = layout.stack([a.reachable.upper for a in agents])

    def row() -> np.ndarray:
        return np.zeros(layout.n)

    for i, a in enumerate(agents):
        off = layout.offsets[i]
        for k in range(a.reachable.A.shape[0]):
            r = row()
            r[layout.slice(i)] = a.reachable.A[k]
            rows.append(r)
            rhs.append(float(a.reachable.b[k]))
            labels.append(f"{a.name}: {_inequality(a.reachable.A[k], a.reachable.b[k], a.param_names)} (reachable set)")
        for zone in _slots(a):
            r = row()
            r[off + _slot_index(a, zone, "enter")] = 1.0
            r[off + _slot_index(a, zone, "leave")] = -1.0
            rows.append(r)
            rhs.append(0.0)
            labels.append(f"{a.name}: enter <= leave on {zone}")

    for res in resources:
        order: list[str] = []
        if res.needs_order:
            order = list(orders.get(res.name, []))
            expected = sorted(res.users(agents))
            if sorted(order) != expected:
                raise ValueError(f"order for resource {res.name!r} must list exactly its users {expected}, got {order}")
        for c in res.coupling_rows(agents, order):
            r = row()
            for (i, k), v in c.coef.items():
                r[layout.offsets[i] + k] = v
            rows.append(r)
            rhs.append(float(c.rhs))
            labels.append(c.label)
    check_deadlock(agents, orders)
    A = np.vstack(rows) if rows else np.zeros((0, layout.n))
    return FeasibleSet(
        layout, lower, upper, A, np.asarray(rhs, dtype=float), tuple(labels), {k: list(v) for k, v in orders.items()}
    )
