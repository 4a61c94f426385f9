"""The order master: orders on exclusive resources chosen by a mixed-integer linear program over value cuts.

For fixed orders the coordinator finds the best schedule; the master chooses the orders. It is a
mixed-integer linear program (HiGHS through :func:`scipy.optimize.milp`) in the stacked parameters ``P``,
one epigraph variable ``theta_i`` per agent and one binary ``y_uv`` per pair of users ``u, v`` of an
exclusive resource (1: ``u`` goes first):

* the rows of the coupling polyhedron that hold for every order: the agents' reachable sets, ``enter <=
  leave`` on every slot, the rows of the resources without an order (capacity) and the rows of an ordered
  resource that do not depend on the order (a dwell zone's minimum stay);
* for each pair the disjunction of the resource's rows for ``u`` before ``v`` and for ``v`` before ``u``
  (for an exclusive resource ``leave_u + gap <= enter_v`` or ``leave_v + gap <= enter_u``), each switched
  off by a big-M that is the row's largest violation over the reachable boxes (the tightest constant that
  switches the row off for every reachable point);
* no cycle among three users of one resource (``y_ab + y_bc + y_ca <= 2``), so that the binaries always
  spell an order; a cycle across resources along the agents' routes (a deadlock) has no schedule, since
  each agent's own rows (its route sequence, ``enter <= leave``) and the order rows then contradict, and
  :func:`~negotiate.resources.coupling.check_orders` confirms every proposal before it is coordinated;
* for each agent an outer model of its value function from the cuts the coordination collected:
  ``theta_i >= V_i(p_k) + g . (p_i - p_k)`` for every evaluated point ``p_k`` whose solve converged, with
  the plain gradient and the nonsmooth guard's one-sided gradients (a failed solve gives no cut), and
  ``theta_i >= V_i(free optimum)`` (the free optimum minimises ``V_i`` over the reachable set).

Its objective is ``sum_i w_i theta_i``. The loop (generalized Benders decomposition, Geoffrion 1972; the
logic-based form, Hooker and Ottosson 2003): solve the master, read the orders from its binaries, check them
(:func:`~negotiate.resources.coupling.check_orders`; an order that admits no schedule, or whose
coordination fails, is excluded by a no-good cut on its binaries), coordinate with those orders fixed (warm-
started from the best schedule so far, as the neighbour-swap search does), add the new cuts, and again,
until the master's lower bound meets the best total within the tolerance, the master repeats an order
already coordinated, or a budget is spent: coordinations, or the wall time of the whole search (the options of
:class:`~negotiate.coordination.orders.MasterOptions`, ``[coordinator.order_options]``). No coordination is
started once the wall time is spent; the best orders so far are what the search returns. The MILP's fixed rows
are assembled once and each cut adds its row when it comes; every solve has HiGHS's time limit
(``milp_time_limit``), and a solve stopped there still proposes its best orders and gives its dual bound. With
``trust_radius`` the master first searches near the best order (a local-branching row, Fischetti and Lodi
2003) and over all orders only when it finds nothing better there.

When the loop stops short of a certified gap within the tolerance, adjacent swaps refine the best order (the
step of the ``swap`` rule, :class:`~negotiate.coordination.orders.Incumbent`; each candidate checked, then
coordinated warm with its orders fixed, an order already coordinated skipped). Each candidate is first screened
by the cut model (``screen_swaps``): the master as a linear program with the candidate's orders fixed; one whose
estimate is not below the best total is passed over without a coordination (where the value functions are
convex the estimate is a lower bound on that order's total, so nothing better is lost). Their cuts enter the
master and the convexity checks too; the bound stays the master's (it covers every order), so a better total
only shrinks the gap, and a swap's cuts that show a non-convex value function make it heuristic.

The bound and its honesty
-------------------------
The master's bound (HiGHS's dual bound of the MILP) is a lower bound on the best total over all orders only
where every cut under-estimates its agent's value function everywhere, which holds when each ``V_i`` is
convex in its parameters. That is checked where it can be: every cut must under-estimate the values at all
other evaluated points of its agent (a necessary condition of convexity), and every value Hessian that the
coordination computed must have no eigenvalue below ``-CONVEXITY_RTOL`` times its largest magnitude. The
gap (best total minus bound) is reported as ``"certified"`` when every check passes and as ``"heuristic"``
otherwise, with the first failing check as the reason. A passed check is evidence, not proof: convexity
between the evaluated points is not seen.

Where a value function is not convex a cut can lie above the agent's values elsewhere, and the master would
then cut off orders it has not seen and report a "bound" above the best total. Every cut is therefore shifted
down by its largest excess over the agent's values at all its evaluated points (the downshift of nonconvex
bundle methods, Kiwiel 1985 and Schramm and Zowe 1992), updated as points come in: each cut then lies below
every value the agent reported, so the master's objective at the best schedule found is at most its total, and
the reported bound never exceeds the best total (up to HiGHS's tolerances). For a convex value function the
shifts are zero up to the solves' accuracy. The shifted cuts still guide the search; the bound stays heuristic
(the check above names why), since between evaluated points a nonconvex function may dip below any cut.
"""

from __future__ import annotations

import contextlib
import itertools
import math
import os
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, milp
from scipy.sparse import coo_array

from negotiate.coordination.methods.base import Evaluation
from negotiate.coordination.orders import Incumbent, OrderTrial, order_key, order_options
from negotiate.core.agent import AgentModel
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.fleet.spec import Resource
from negotiate.resources.coupling import Layout, build_feasible_set, check_orders, first_orders

__all__ = [
    "CONVEXITY_RTOL",
    "GAP_TOLERANCE",
    "MASTER_BUDGET",
    "MasterSolution",
    "OrderMaster",
    "SWAP_PASSES",
    "search_master",
]

_DEFAULTS = order_options("master", {})
MASTER_BUDGET: int = _DEFAULTS["max_coordinations"]
"""Default largest number of coordinations (order trials handed to the coordinator) the master loop spends
(the option ``max_coordinations`` of :class:`~negotiate.coordination.orders.MasterOptions`)."""
SWAP_PASSES: int = _DEFAULTS["swap_passes"]
"""Default largest number of passes of adjacent swaps over the master's best order (option ``swap_passes``)."""
GAP_TOLERANCE: float = _DEFAULTS["gap_tolerance"]
"""Default tolerance: the loop stops when best total - bound <= GAP_TOLERANCE * max(1, |best total|)
(option ``gap_tolerance``)."""
CONVEXITY_RTOL = 1e-6
"""Relative slack of the convexity checks (the agents' solves are converged to about 1e-8; see the module
docstring)."""

_Row = tuple[dict[int, float], float]  # sum coef[j] * P[j] <= rhs, over stacked indices j


@contextlib.contextmanager
def _quiet_stdout() -> Iterator[None]:
    """Silence the process's standard output (file descriptor 1) for a while: HiGHS's MIP solver (1.x, as
    SciPy ships it) prints debugging lines straight to it, whatever its options say. Standard error, where
    the progress bar and the warnings go, is left alone."""
    try:
        sys.stdout.flush()
        saved = os.dup(1)
    except (OSError, ValueError):  # no descriptor 1 (a closed or replaced stdout): nothing to silence
        yield
        return
    null = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(null, 1)
        yield
    finally:
        os.dup2(saved, 1)
        os.close(saved)
        os.close(null)


def _roworder_key(row: _Row) -> tuple[tuple[tuple[int, float], ...], float]:
    return tuple(sorted(row[0].items())), row[1]


@dataclass(frozen=True)
class MasterSolution:
    """One solve of the master: its status (``"optimal"``, ``"infeasible"``, ``"unbounded"``, ``"stopped"``),
    the orders its binaries spell, its stacked parameters ``P`` (s, or the resource's unit), its objective
    and its dual bound (cost units; ``-inf`` when there is none), and HiGHS's message."""

    status: str
    orders: dict[str, list[str]]
    P: np.ndarray
    objective: float
    bound: float
    message: str
    y: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))


class OrderMaster:
    """The mixed-integer master over ``agents`` sharing ``resources`` (see the module docstring).

    Raises
    ------
    ValueError
        When a parameter on an ordered resource has an infinite reachable bound (no big-M exists).
    """

    def __init__(self, agents: Sequence[AgentModel], resources: Sequence[Resource]) -> None:
        self.agents = list(agents)
        self.resources = list(resources)
        self.layout = Layout.of(self.agents)
        unordered = [r for r in self.resources if not r.needs_order]
        base = build_feasible_set(self.agents, unordered, {})
        self.lower, self.upper = base.lower, base.upper
        self.scale = base.scale
        self.fixed_A, self.fixed_b = base.A, base.b
        fixed_rows: list[_Row] = []
        # pairs[k] = (resource, u, v, rows if u first, rows if v first)
        self.pairs: list[tuple[str, str, str, list[_Row], list[_Row]]] = []
        self.users: dict[str, list[str]] = {}
        for res in self.resources:
            if not res.needs_order:
                continue
            users = res.users(self.agents)
            self.users[res.name] = users
            both = [self._rows(res, users), self._rows(res, users[::-1])]
            common = {_roworder_key(r) for r in both[0]} & {_roworder_key(r) for r in both[1]}
            fixed_rows += [r for r in both[0] if _roworder_key(r) in common]
            for u, v in itertools.combinations(users, 2):
                first = [r for r in self._rows(res, [u, v]) if _roworder_key(r) not in common]
                second = [r for r in self._rows(res, [v, u]) if _roworder_key(r) not in common]
                self.pairs.append((res.name, u, v, first, second))
        self.fixed_rows = fixed_rows
        self.pair_index = {(r, u, v): k for k, (r, u, v, _, _) in enumerate(self.pairs)}
        for _, u, v, first, second in self.pairs:
            for coef, _rhs in first + second:
                bad = [j for j in coef if not (np.isfinite(self.lower[j]) and np.isfinite(self.upper[j]))]
                if bad:
                    j = bad[0]
                    what = self.layout.params[j] if self.layout.params else f"parameter {j}"
                    raise ValueError(
                        f"the order master needs finite reachable windows: {what} (users {u}, {v}) has the window "
                        f"[{self.lower[j]}, {self.upper[j]}] s"
                    )
        self.cuts: list[list[tuple[np.ndarray, float, np.ndarray]]] = [[] for _ in self.agents]
        self.floor = np.full(len(self.agents), -np.inf)
        # The epigraph variables are theta_i / cost_scale: values of 1e8 next to binaries and scaled slot times
        # otherwise leave HiGHS's tolerances too coarse (it then prunes the branch of the true optimum).
        starts = [abs(a.start.value) for a in self.agents if a.start is not None and np.isfinite(a.start.value)]
        self.cost_scale = max(1.0, float(np.median(starts))) if starts else 1.0
        self.nogoods: list[np.ndarray] = []
        # The rows that never change (coupling, disjunctions, no cycle of three) are assembled once, on the
        # first solve; a cut or a no-good adds its own row when it comes, so that a solve only stacks them.
        self._static: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None
        self._added: list[tuple[np.ndarray, np.ndarray, float]] = []  # columns, values, upper
        self._lower: list[float] = []  # each added row's lower side (a cut's moves with its downshift)
        self._seen: set[tuple[int, bytes, float, bytes]] = set()
        # per agent: its evaluated points and values, and its cuts (point, value, gradient, downshift, row)
        nps = [self.layout.sizes[i] for i in range(len(self.agents))]
        self._points = [np.zeros((0, k)) for k in nps]
        self._values = [np.zeros(0) for _ in nps]
        self._point_keys: list[set[bytes]] = [set() for _ in nps]
        self._cp = [np.zeros((0, k)) for k in nps]
        self._cv = [np.zeros(0) for _ in nps]
        self._cg = [np.zeros((0, k)) for k in nps]
        self._shift = [np.zeros(0) for _ in nps]
        self._row = [np.zeros(0, dtype=np.int64) for _ in nps]

    def _rows(self, res: Resource, order: Sequence[str]) -> list[_Row]:
        out = []
        for c in res.coupling_rows(self.agents, order):
            coef: dict[int, float] = {}
            for (i, k), v in c.coef.items():
                j = self.layout.offsets[i] + k
                coef[j] = coef.get(j, 0.0) + float(v)
            out.append((coef, float(c.rhs)))
        return out

    def big_m(self, row: _Row) -> float:
        """The row's largest violation over the reachable boxes (0 when the box never violates it)."""
        coef, rhs = row
        top = sum(max(c * self.lower[j], c * self.upper[j]) for j, c in coef.items())
        return max(0.0, top - rhs)

    # -- cuts -------------------------------------------------------------------------------------------------
    def add_cut(self, i: int, p: np.ndarray, value: float, gradient: np.ndarray) -> bool:
        """Add ``theta_i >= value + gradient . (p_i - p)``; ``False`` when the same cut is already there."""
        p, g = np.asarray(p, float).ravel(), np.asarray(gradient, float).ravel()
        if not (np.isfinite(value) and np.all(np.isfinite(p)) and np.all(np.isfinite(g))):
            return False
        key = (i, p.tobytes(), float(value), g.tobytes())
        if key in self._seen:
            return False
        self._seen.add(key)
        self.cuts[i].append((p.copy(), float(value), g.copy()))
        if p.tobytes() not in self._point_keys[i]:
            # a new evaluated point: every cut of the agent that lies above its value there is shifted down
            self._point_keys[i].add(p.tobytes())
            self._points[i] = np.vstack([self._points[i], p[None, :]])
            self._values[i] = np.append(self._values[i], float(value))
            if len(self._cv[i]):
                over = self._cv[i] + np.einsum("cn,cn->c", self._cg[i], p[None, :] - self._cp[i]) - float(value)
                grow = over > self._shift[i]
                if np.any(grow):
                    self._shift[i] = np.where(grow, over, self._shift[i])
                    for c in np.flatnonzero(grow):
                        r = int(self._row[i][c])
                        lower = self._cv[i][c] - self._cg[i][c] @ self._cp[i][c] - self._shift[i][c]
                        self._lower[r] = float(lower) / self.cost_scale
        # the new cut's own downshift: its largest excess over the values at the agent's evaluated points
        shift = max(0.0, float(np.max(float(value) + (self._points[i] - p[None, :]) @ g - self._values[i],
                                      initial=0.0)))  # fmt: skip
        self._cp[i] = np.vstack([self._cp[i], p[None, :]])
        self._cv[i] = np.append(self._cv[i], float(value))
        self._cg[i] = np.vstack([self._cg[i], g[None, :]])
        self._shift[i] = np.append(self._shift[i], shift)
        self._row[i] = np.append(self._row[i], len(self._added))
        # theta_i - g.P_i >= V(p_k) - g.p_k - shift, in the master's scaled parameters and costs
        sl = self.layout.slice(i)
        cols = np.append(np.arange(sl.start, sl.stop), self.layout.n + i)
        vals = np.append(-g * self.scale[sl] / self.cost_scale, 1.0)
        keep = vals != 0.0
        self._added.append((cols[keep], vals[keep], np.inf))
        self._lower.append(float(value - g @ p - shift) / self.cost_scale)
        return True

    def downshift(self, i: int) -> np.ndarray:
        """How far each cut of agent ``i`` (in the order of ``cuts[i]``) is shifted down, cost units: its
        largest excess over the agent's values at its evaluated points (0 for a cut that lies below them all,
        as every cut of a convex value function does)."""
        return self._shift[i].copy()

    def add_floor(self, i: int, value: float) -> None:
        """``theta_i >= value`` (the agent's value at its free optimum, the least over its reachable set)."""
        if np.isfinite(value):
            self.floor[i] = max(self.floor[i], float(value))

    def exclude(self, y: np.ndarray) -> None:
        """A no-good cut: the binaries ``y`` (one order combination) are never proposed again."""
        y0 = np.round(np.asarray(y, float)).astype(int)
        self.nogoods.append(y0)
        # sum_{y0=1} (1 - y) + sum_{y0=0} y >= 1
        n, m, q = self.layout.n, len(self.agents), len(self.pairs)
        self._added.append((n + m + np.arange(q), np.where(y0 > 0, -1.0, 1.0), np.inf))
        self._lower.append(1.0 - float(y0.sum()))

    def binaries(self, orders: dict[str, list[str]]) -> np.ndarray:
        """The binaries that spell ``orders``."""
        y = np.zeros(len(self.pairs))
        for k, (r, u, v, _, _) in enumerate(self.pairs):
            seq = orders[r]
            y[k] = 1.0 if seq.index(u) < seq.index(v) else 0.0
        return y

    def _orders(self, y: np.ndarray) -> dict[str, list[str]]:
        out = {}
        for r, users in self.users.items():
            ahead = {u: 0 for u in users}  # how many users go before u
            for u, v in itertools.combinations(users, 2):
                if y[self.pair_index[(r, u, v)]] > 0.5:
                    ahead[v] += 1
                else:
                    ahead[u] += 1
            out[r] = sorted(users, key=lambda u: (ahead[u], users.index(u)))
        return out

    # -- the MILP ---------------------------------------------------------------------------------------------
    def _static_rows(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The rows that hold whatever the cuts (rows, columns, values, lower, upper), assembled once."""
        if self._static is not None:
            return self._static
        n, m = self.layout.n, len(self.agents)
        s = self.scale
        rows: list[int] = []
        cols: list[int] = []
        vals: list[float] = []
        lo: list[float] = []
        hi: list[float] = []

        def put(entries: dict[int, float], lb: float, ub: float) -> None:
            k = len(lo)
            for j, v in entries.items():
                if v != 0.0:
                    rows.append(k)
                    cols.append(j)
                    vals.append(v)
            lo.append(lb)
            hi.append(ub)

        for a_row, b in zip(self.fixed_A, self.fixed_b, strict=True):
            put({int(j): float(a_row[j] * s[j]) for j in np.flatnonzero(a_row)}, -np.inf, float(b))
        for coef, rhs in self.fixed_rows:
            put({j: c * s[j] for j, c in coef.items()}, -np.inf, rhs)
        for k, (_, _, _, first, second) in enumerate(self.pairs):
            yk = n + m + k
            for row in first:  # coef.P <= rhs + M (1 - y)
                M = self.big_m(row)
                put({**{j: c * s[j] for j, c in row[0].items()}, yk: M}, -np.inf, row[1] + M)
            for row in second:  # coef.P <= rhs + M y
                M = self.big_m(row)
                put({**{j: c * s[j] for j, c in row[0].items()}, yk: -M}, -np.inf, row[1])
        for r, users_r in self.users.items():
            for t1, t2, t3 in itertools.combinations(users_r, 3):
                # before(u, v) = y_uv (u listed first) or 1 - y_vu; a cycle 1>2>3>1 or 1>3>2>1 is refused
                for cyc in ((t1, t2), (t2, t3), (t3, t1)), ((t1, t3), (t3, t2), (t2, t1)):
                    entries: dict[int, float] = {}
                    const = 0.0
                    for before, after in cyc:
                        key = (r, before, after) if (r, before, after) in self.pair_index else (r, after, before)
                        j = n + m + self.pair_index[key]
                        if key == (r, before, after):
                            entries[j] = entries.get(j, 0.0) + 1.0
                        else:
                            entries[j] = entries.get(j, 0.0) - 1.0
                            const += 1.0
                    put(entries, -np.inf, 2.0 - const)
        self._static = (
            np.array(rows, dtype=np.int64), np.array(cols, dtype=np.int64), np.array(vals, dtype=float),
            np.array(lo, dtype=float), np.array(hi, dtype=float),
        )  # fmt: skip
        return self._static

    def solve(
        self,
        weights: np.ndarray,
        *,
        rel_gap: float = 1e-9,
        time_limit: float | None = None,
        orders: dict[str, list[str]] | None = None,
        near: tuple[dict[str, list[str]], int] | None = None,
    ) -> MasterSolution:
        """Solve the master for the agents' ``weights`` (dimensionless); ``time_limit`` is HiGHS's, s. With
        ``orders`` the binaries are fixed to spell them and the master is a linear program: its value is the
        cut model's estimate of the best total for those orders (a lower bound where the value functions are
        convex). With ``near = (orders, k)`` only order combinations within ``k`` flipped pairs of ``orders``
        are allowed (a local-branching row, Fischetti and Lodi 2003): a quicker solve near an incumbent, whose
        value is then no bound on all orders."""
        n, m, q = self.layout.n, len(self.agents), len(self.pairs)
        s = self.scale
        nv = n + m + q
        r0, c0, v0, lo0, hi0 = self._static_rows()
        k0 = len(lo0)
        sizes = np.array([len(c) for c, _, _ in self._added], dtype=np.int64)
        rows = np.concatenate([r0, np.repeat(k0 + np.arange(len(self._added), dtype=np.int64), sizes)])
        cols = np.concatenate([c0, *(c for c, _, _ in self._added)]) if self._added else c0
        vals = np.concatenate([v0, *(v for _, v, _ in self._added)]) if self._added else v0
        lo = np.concatenate([lo0, np.array(self._lower, dtype=float)])
        hi = np.concatenate([hi0, np.array([ub for _, _, ub in self._added], dtype=float)])
        if near is not None:  # sum_{y0=1} (1 - y) + sum_{y0=0} y <= k
            y0 = self.binaries(near[0])
            k = len(lo)
            rows = np.concatenate([rows, np.full(q, k, dtype=np.int64)])
            cols = np.concatenate([cols, n + m + np.arange(q, dtype=np.int64)])
            vals = np.concatenate([vals, np.where(y0 > 0.5, -1.0, 1.0)])
            lo = np.append(lo, -np.inf)
            hi = np.append(hi, float(near[1]) - float(y0.sum()))

        cost = np.zeros(nv)
        cost[n : n + m] = weights
        lb = np.concatenate([self.lower / s, self.floor / self.cost_scale, np.zeros(q)])
        ub = np.concatenate([self.upper / s, np.full(m, np.inf), np.ones(q)])
        integrality = np.concatenate([np.zeros(n + m), np.ones(q)])
        if orders is not None:
            lb[n + m :] = ub[n + m :] = self.binaries(orders)
            integrality[:] = 0
        options: dict[str, Any] = {"mip_rel_gap": rel_gap}
        if time_limit is not None:
            options["time_limit"] = time_limit
        constraints = []
        if len(lo):
            A = coo_array((vals, (rows, cols)), shape=(len(lo), nv)).tocsr()
            constraints.append(LinearConstraint(A, lo, hi))
        with _quiet_stdout():
            res = milp(cost, integrality=integrality, bounds=Bounds(lb, ub), constraints=constraints, options=options)
        status = {0: "optimal", 1: "stopped", 2: "infeasible", 3: "unbounded"}.get(res.status, "failed")
        if res.x is None:
            return MasterSolution(status, {}, np.zeros(n), math.inf, -math.inf, str(res.message))
        x = np.asarray(res.x)
        y = np.round(x[n + m :])
        fun = float(res.fun) * self.cost_scale
        bound = getattr(res, "mip_dual_bound", None)
        if bound is None or not np.isfinite(bound):
            bound = fun if status == "optimal" else -math.inf  # a stopped solve without a dual bound has none
        else:
            bound = float(bound) * self.cost_scale
        if status == "optimal":
            bound = min(bound, fun)
        return MasterSolution(status, self._orders(y), x[:n] * s, fun, bound, str(res.message), y)


# -- convexity checks ---------------------------------------------------------------------------------------
class _Convexity:
    """Keeps, per agent, the evaluated points and whether every cut under-estimates every other value."""

    def __init__(self, names: Sequence[str]) -> None:
        self.names = list(names)
        # per agent: points (K x n), values (K), cut gradients (C x n) and the point each cut was taken at (C)
        self.P: list[np.ndarray | None] = [None for _ in names]
        self.V: list[np.ndarray] = [np.zeros(0) for _ in names]
        self.G: list[np.ndarray | None] = [None for _ in names]
        self.at: list[np.ndarray] = [np.zeros(0, dtype=int) for _ in names]
        self.reason = ""

    def add(self, i: int, p: np.ndarray, value: float, gradients: list[np.ndarray]) -> None:
        p = np.asarray(p, float).ravel()
        g_new = np.array([np.asarray(g, float).ravel() for g in gradients])
        P, V, G, at = self.P[i], self.V[i], self.G[i], self.at[i]
        if P is None or G is None:
            P, V, G, at = p[None, :], np.array([value]), g_new, np.zeros(len(g_new), dtype=int)
        else:
            if not self.reason:
                # the old cuts at the new point, then the new cuts at the old points
                d = p[None, :] - P[at]
                under = V[at] + np.sum(G * d, axis=1)
                slack = CONVEXITY_RTOL * np.maximum.reduce(
                    [np.ones(len(at)), np.abs(V[at]), np.full(len(at), abs(value)), np.sum(np.abs(G * d), axis=1)]
                )
                excess = under - value - slack
                d2 = P[None, :, :] - p[None, None, :]  # (1, K, n)
                under2 = value + np.einsum("gn,kn->gk", g_new, d2[0])
                slack2 = CONVEXITY_RTOL * np.maximum.reduce(
                    [np.ones(under2.shape), np.broadcast_to(np.abs(V)[None, :], under2.shape),
                     np.full(under2.shape, abs(value)), np.abs(g_new) @ np.abs(d2[0]).T]
                )  # fmt: skip
                excess2 = under2 - V[None, :] - slack2
                worst = max(float(np.max(excess, initial=-np.inf)), float(np.max(excess2, initial=-np.inf)))
                if worst > 0:
                    self.reason = (
                        f"agent {self.names[i]!r}: a cut at one evaluated point over-estimates its value at "
                        f"another evaluated point by more than {worst:.6g} (its value function is not convex "
                        "there, so its cuts are not lower bounds)"
                    )
            k = len(V)
            P, V = np.vstack([P, p[None, :]]), np.append(V, value)
            G, at = np.vstack([G, g_new]), np.append(at, np.full(len(g_new), k, dtype=int))
        self.P[i], self.V[i], self.G[i], self.at[i] = P, V, G, at

    def hessian(self, i: int, H: np.ndarray) -> None:
        if self.reason or H is None:
            return
        H = np.asarray(H, float)
        if H.size == 0 or not np.all(np.isfinite(H)):
            return
        eig = np.linalg.eigvalsh(0.5 * (H + H.T))
        if eig[0] < -CONVEXITY_RTOL * max(1.0, float(np.max(np.abs(eig)))):
            self.reason = (
                f"agent {self.names[i]!r}: a value Hessian has the eigenvalue {eig[0]:.6g} < 0 (its value function "
                "is not convex there)"
            )


def _text(orders: dict[str, list[str]]) -> str:
    return "; ".join(f"{r}: {' > '.join(v)}" for r, v in orders.items())


def search_master(
    agents: Sequence[AgentModel],
    resources: Sequence[Resource],
    run: Callable[[dict[str, list[str]], np.ndarray | None], tuple[float, np.ndarray, object]],
    *,
    evaluations: list[Evaluation] | None = None,
    start: dict[str, list[str]] | None = None,
    options: Mapping[str, Any] | None = None,
    budget: int | None = None,
    tolerance: float | None = None,
    time_limit: float | None = None,
    swap_passes: int | None = None,
    time_budget: float | None = None,
) -> tuple[object, dict[str, list[str]], list[OrderTrial]]:
    """Choose orders with the order master (see the module docstring).

    Parameters
    ----------
    agents, resources
        The fleet.
    run : callable
        ``run(orders, start_P) -> (total, P, result)`` coordinates for fixed orders (as for
        :func:`~negotiate.coordination.orders.search_orders`); ``result.evaluation``, when present, gives cuts.
    evaluations : list of Evaluation, optional
        A list that ``run`` appends every evaluation of its coordination to; the master takes the cuts of all
        of them (without it, only the final evaluation of each coordination gives cuts).
    start : dict, optional
        The first orders (first-come-first-served when omitted).
    options : mapping, optional
        The rule's options (:class:`~negotiate.coordination.orders.MasterOptions`: ``max_coordinations``,
        ``gap_tolerance``, ``time_budget``, ``swap_passes``; defaults for those not given). The keyword
        arguments below, when given, override them.
    budget : int, optional
        Largest number of coordinations (``max_coordinations``).
    tolerance : float, optional
        Relative gap at which the loop stops (relative to ``max(1, |best total|)``; ``gap_tolerance``).
    time_limit : float, optional
        HiGHS's time limit per master solve, s (``milp_time_limit``; also capped by what is left of
        ``time_budget``).
    swap_passes : int, optional
        Largest number of passes of adjacent swaps over the best order after the loop (0: none); no pass is
        made when the loop ended with a certified gap within ``tolerance``.
    time_budget : float, optional
        Wall time of the whole search, s (0: none; ``time_budget``). No coordination is started after it (the
        one under way finishes, bounded by the coordinator's ``max_rounds``); the best orders so far and
        their schedule are returned, with the gap of the last bound the master computed.

    Returns
    -------
    best, orders, trials
        The best coordination result, its orders and every trial, each with the master's bound and gap after
        its cuts entered (see :class:`~negotiate.coordination.orders.OrderTrial`).

    Raises
    ------
    DeadlockError, InfeasibleOrdersError
        When the first order admits no schedule.
    """
    t0 = time.perf_counter()
    opts = order_options("master", options or {})
    budget = int(opts["max_coordinations"]) if budget is None else budget
    tolerance = float(opts["gap_tolerance"]) if tolerance is None else tolerance
    swap_passes = int(opts["swap_passes"]) if swap_passes is None else swap_passes
    time_budget = float(opts["time_budget"]) if time_budget is None else time_budget
    if time_limit is None and opts["milp_time_limit"] > 0:
        time_limit = float(opts["milp_time_limit"])
    deadline = t0 + time_budget if time_budget > 0 else None
    spent = f"the time budget of {time_budget:g} s is spent"
    master = OrderMaster(agents, resources)
    weights = np.array([a.weight for a in agents], dtype=float)
    convex = _Convexity([a.name for a in agents])
    seen = 0
    unsure = ""  # a reason besides convexity why the bound is heuristic

    def take(result: object) -> None:
        nonlocal seen
        evs: list[Evaluation] = []
        if evaluations is not None:
            evs, seen = list(evaluations[seen:]), len(evaluations)
        final = getattr(result, "evaluation", None)
        if isinstance(final, Evaluation):
            evs.append(final)
        for ev in evs:
            for i, rep in enumerate(ev.reports):
                grads = rep.gradients  # empty when the solve failed: no cut from it
                if not grads:
                    continue
                new = [master.add_cut(i, rep.p, rep.value, g) for g in grads]
                if any(new):
                    convex.add(i, np.asarray(rep.p, float).copy(), float(rep.value), grads)
                if rep.hessian is not None:
                    convex.hessian(i, rep.hessian)

    for i, a in enumerate(agents):
        if a.start is not None and a.start.success and a.start.gradient is not None:
            master.add_floor(i, a.start.value)
            if master.add_cut(i, a.free_optimum, a.start.value, a.start.gradient):
                convex.add(i, a.free_optimum.copy(), float(a.start.value), [a.start.gradient])

    orders = {k: list(v) for k, v in (start or first_orders(agents, resources)).items()}
    check_orders(agents, resources, orders)
    best_total, best_P, best = run(orders, None)
    take(best)
    trials = [OrderTrial({k: list(v) for k, v in orders.items()}, best_total, True, stage="master")]
    if not np.isfinite(best_total):
        master.exclude(master.binaries(orders))
        unsure = f"the first coordination failed (orders {_text(orders)}) and its orders were left out"
    tried = {order_key(orders)}
    coordinations = 1
    last = 0  # the trial whose bound the next master solve gives
    known = -math.inf  # the bound of the latest solve over all orders
    known_reason = ""  # why that bound is not certified, besides convexity
    radius = int(opts["trust_radius"])
    widen = radius <= 0  # the next solve is over all orders (else near the best order only)
    for _ in range(50 * max(1, budget)):  # no-good cuts may need several master solves per coordination
        left = None if deadline is None else deadline - time.perf_counter()
        if left is not None and left <= 0:
            # no time for another master solve: the last bound stands, the gap follows the best total
            reason = unsure or convex.reason or known_reason
            gap = best_total - known
            kind = "heuristic" if reason or not np.isfinite(gap) else "certified"
            trials[last] = replace(trials[last], bound=known, gap=gap, gap_kind=kind, gap_reason=reason or spent)
            break
        limit = left if time_limit is None else (time_limit if left is None else min(time_limit, left))
        if not widen:
            # near the best order: a quick proposal, no bound; when the model sees nothing better there (or
            # repeats itself), the next solve is over all orders, for the bound and a proposal from anywhere
            sol = master.solve(weights, rel_gap=min(1e-6, 0.1 * tolerance), time_limit=limit, near=(orders, radius))
            if (
                sol.status not in ("optimal", "stopped") or not sol.orders or order_key(sol.orders) in tried
                or sol.objective >= best_total - tolerance * max(1.0, abs(best_total))
            ):  # fmt: skip
                widen = True
                continue
            reason = unsure or convex.reason or known_reason
            if not np.isfinite(known):
                reason = reason or "no bound yet: the master searched near the best order only"
            gap = best_total - known
            kind = "heuristic" if reason or not np.isfinite(gap) else "certified"
            trials[last] = replace(trials[last], bound=known, gap=gap, gap_kind=kind, gap_reason=reason)
        else:
            sol = master.solve(weights, rel_gap=min(1e-6, 0.1 * tolerance), time_limit=limit)
            widen = radius <= 0
            bound = sol.bound if sol.status in ("optimal", "stopped") else -math.inf
            reason = unsure or convex.reason
            if sol.status != "optimal" and not (sol.status == "stopped" and np.isfinite(bound)):
                # (a solve stopped at its time limit still gives HiGHS's dual bound, a bound like any other)
                reason = reason or f"the master was not solved to optimality ({sol.status}: {sol.message})"
            if not sol.orders and sol.status == "stopped" and known > bound:
                bound, reason = known, unsure or convex.reason or known_reason  # stopped before it had anything
            if best_total < bound <= best_total + 1e-12 * max(1.0, abs(best_total)):
                bound = best_total  # equal up to the rounding of the sums (a bound never exceeds a total)
            known, known_reason = bound, reason  # the latest bound, from every cut so far
            gap = best_total - bound
            kind = "heuristic" if reason or not np.isfinite(gap) else "certified"
            trials[last] = replace(trials[last], bound=bound, gap=gap, gap_kind=kind, gap_reason=reason)
            if sol.status not in ("optimal", "stopped") or not sol.orders:
                if deadline is not None and time.perf_counter() >= deadline and not trials[last].gap_reason:
                    trials[last] = replace(trials[last], gap_reason=spent)
                break
            if gap <= tolerance * max(1.0, abs(best_total)):
                break
            if order_key(sol.orders) in tried:
                note = "the master proposes an order already coordinated"
                trials[last] = replace(trials[last], gap_kind="heuristic", gap_reason=reason or note)
                break
        if coordinations >= budget:
            note = f"the budget of {budget} coordinations is spent"
            if not trials[last].gap_reason:
                trials[last] = replace(trials[last], gap_reason=note)
            break
        if deadline is not None and time.perf_counter() >= deadline:
            if not trials[last].gap_reason:
                trials[last] = replace(trials[last], gap_reason=spent)
            break
        cand = sol.orders
        tried.add(order_key(cand))
        try:
            check_orders(agents, resources, cand)
        except (DeadlockError, InfeasibleOrdersError) as exc:
            master.exclude(sol.y)
            trials.append(OrderTrial(cand, math.inf, False, str(exc), stage="master"))
            last = len(trials) - 1
            continue
        total, P, result = run(cand, best_P)
        coordinations += 1
        take(result)
        if not np.isfinite(total):
            master.exclude(sol.y)
            # its orders may admit a schedule the coordinator did not find: the bound no longer covers them
            unsure = unsure or f"a coordination failed (orders {_text(cand)}) and its orders were left out"
        kept = total < best_total - 1e-9 * max(1.0, abs(best_total))
        trials.append(OrderTrial(cand, total, kept, stage="master"))
        last = len(trials) - 1
        if kept:
            best_total, best_P, best, orders = total, P, result, cand

    # adjacent swaps of the best order, each a warm fixed-order coordination whose cuts enter the master too
    end = trials[last]
    if swap_passes <= 0 or (end.gap_kind == "certified" and end.gap <= tolerance * max(1.0, abs(best_total))):
        return best, orders, trials
    first = len(trials)

    def screen(candidate: dict[str, list[str]], total: float) -> bool:
        # the cut model's best total for the candidate's orders; with convex value functions a lower bound,
        # so a candidate whose estimate is not below the best total cannot improve on it
        left = None if deadline is None else max(1e-3, deadline - time.perf_counter())
        est = master.solve(weights, orders=candidate, time_limit=left)
        return est.status == "optimal" and est.objective >= total - 1e-9 * max(1.0, abs(total))

    refine = Incumbent(
        agents, resources, run, orders, best_total, best_P, best, trials, tried=tried, stage="swap", on_result=take,
        deadline=deadline, screen=screen if opts["screen_swaps"] else None,
    )  # fmt: skip
    refine.swaps(swap_passes)
    # the master's bound covers every order whatever the swaps found; a better incumbent only shrinks the gap,
    # and a swap's cuts that reveal a non-convex value function take the certificate away
    running = best_total
    for k in range(first, len(trials)):
        running = trials[k].total if trials[k].kept else running
        reason = end.gap_reason if end.gap_kind == "heuristic" else convex.reason or end.gap_reason
        if refine.out_of_time and k == len(trials) - 1 and end.gap_kind != "heuristic" and not convex.reason:
            reason = spent
        gap = running - end.bound
        kind = "heuristic" if end.gap_kind == "heuristic" or convex.reason or not np.isfinite(gap) else "certified"
        trials[k] = replace(trials[k], bound=end.bound, gap=gap, gap_kind=kind, gap_reason=reason)
    return refine.best, refine.orders, trials
