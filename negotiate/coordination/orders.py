"""Orders on exclusive resources: first-come-first-served, neighbour swaps, exhaustive search.

An exclusive resource needs an order of its users before its coupling rules are linear. The start is
first-come-first-served by the agents' free-optimum entry times (:func:`negotiate.resources.coupling.fcfs_orders`).
``swap`` then tries exchanging neighbours in each order, re-coordinates (warm-started from the best
schedule so far) and keeps a swap when it lowers the total; it repeats until a pass over all neighbours
brings no improvement. ``exhaustive`` tries every order of each resource with at most
:data:`EXHAUSTIVE_LIMIT` users (one resource at a time, the others held at their best order). A candidate
whose orders form a cycle with the agents' routes (a deadlock) or whose coupling polyhedron is empty
(:func:`negotiate.resources.coupling.check_orders`: a linear program, no agent solve) is recorded as an infeasible
trial with the reason and skipped, never handed to the solver. When the first order itself is infeasible
the search raises (:class:`~negotiate.errors.DeadlockError` or
:class:`~negotiate.errors.InfeasibleOrdersError`), since there is nothing to start from.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from negotiate.core.agent import AgentModel
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.fleet.spec import Resource
from negotiate.resources.coupling import check_orders, first_orders

__all__ = ["EXHAUSTIVE_LIMIT", "Incumbent", "OrderTrial", "order_key", "search_orders"]

EXHAUSTIVE_LIMIT = 7
"""Largest number of users of one resource for which every order is tried (7! = 5040 orders)."""


@dataclass(frozen=True)
class OrderTrial:
    """One order tried: the orders, the coordinated total (``inf`` if it failed or was infeasible), whether
    it was kept, and for an order skipped without coordinating, why (a deadlock or an empty polyhedron).

    The order master (:mod:`negotiate.coordination.master`) also fills in, after the trial's cuts entered:
    ``bound``, its lower bound on the best total over all orders (cost units), ``gap``, the best total so
    far minus that bound, and ``gap_kind``, ``"certified"`` or ``"heuristic"``, with ``gap_reason`` saying
    why a gap is heuristic, and ``stage``, ``"master"`` for an order the master proposed (or the first one)
    and ``"swap"`` for one of the adjacent swaps that refine the master's best order. The other rules leave
    them empty (``nan``, ``""``).
    """

    orders: dict[str, list[str]]
    total: float
    kept: bool
    infeasible: str = ""
    bound: float = math.nan
    gap: float = math.nan
    gap_kind: str = ""
    gap_reason: str = ""
    stage: str = ""

    def to_dict(self) -> dict[str, object]:
        out: dict[str, object] = {
            "orders": self.orders, "total_cost": self.total, "kept": self.kept, "infeasible": self.infeasible
        }  # fmt: skip
        if self.gap_kind:
            out.update(bound=self.bound, gap=self.gap, gap_kind=self.gap_kind, gap_reason=self.gap_reason)
        if self.stage:
            out["stage"] = self.stage
        return out


def order_key(orders: dict[str, list[str]]) -> tuple[tuple[str, tuple[str, ...]], ...]:
    """A hashable key of ``orders`` (the same orders give the same key whatever the resources' sequence)."""
    return tuple(sorted((r, tuple(v)) for r, v in orders.items()))


class Incumbent:
    """The best orders so far and the trials that led there: the neighbour-swap step that the ``swap`` rule
    and the order master's refinement share.

    Parameters
    ----------
    agents, resources
        The fleet.
    run : callable
        ``run(orders, start_P) -> (total, P, result)`` coordinates for fixed orders.
    orders, total, P, best
        The best orders so far, their coordinated total (cost units), stacked parameters and result.
    trials : list of OrderTrial
        The search's trials; every candidate is appended to it.
    tried : set, optional
        Keys (:func:`order_key`) of orders already coordinated: a candidate among them is not coordinated again
        and adds no trial (without it every candidate is coordinated). New candidates join it.
    stage : str
        The :attr:`OrderTrial.stage` of the trials this search appends.
    on_result : callable, optional
        Called with every coordination's result (the order master takes its cuts from it).
    """

    def __init__(
        self,
        agents: Sequence[AgentModel],
        resources: Sequence[Resource],
        run: Callable[[dict[str, list[str]], np.ndarray | None], tuple[float, np.ndarray, object]],
        orders: dict[str, list[str]],
        total: float,
        P: np.ndarray,
        best: object,
        trials: list[OrderTrial],
        *,
        tried: set[tuple[tuple[str, tuple[str, ...]], ...]] | None = None,
        stage: str = "",
        on_result: Callable[[object], None] | None = None,
    ) -> None:
        self.agents, self.resources, self.run = agents, resources, run
        self.orders, self.total, self.P, self.best = orders, total, P, best
        self.trials, self.tried, self.stage, self.on_result = trials, tried, stage, on_result
        self.coordinations = 0  # candidates handed to ``run`` by this search

    def attempt(self, candidate: dict[str, list[str]]) -> bool:
        """Check ``candidate`` (skipped as an infeasible trial when it admits no schedule), coordinate it warm-
        started from the best schedule so far and keep it when it lowers the total; True when kept."""
        if self.tried is not None:
            key = order_key(candidate)
            if key in self.tried:
                return False
            self.tried.add(key)
        try:
            check_orders(self.agents, self.resources, candidate)
        except (DeadlockError, InfeasibleOrdersError) as exc:
            self.trials.append(OrderTrial(candidate, float("inf"), False, str(exc), stage=self.stage))
            return False
        total, P, result = self.run(candidate, self.P)
        self.coordinations += 1
        if self.on_result is not None:
            self.on_result(result)
        kept = total < self.total - 1e-9 * max(1.0, abs(self.total))
        self.trials.append(OrderTrial(candidate, total, kept, stage=self.stage))
        if kept:
            self.total, self.P, self.best, self.orders = total, P, result, candidate
        return kept

    def swaps(self, max_passes: int) -> None:
        """Exchange neighbours in the order of each exclusive resource, one candidate at a time (each through
        :meth:`attempt`), until a pass over all neighbours brings no improvement or ``max_passes`` are done."""
        exclusive = [r.name for r in self.resources if r.needs_order]  # resources whose users take turns
        for _ in range(max_passes):
            improved = False
            for name in exclusive:
                k = 0
                while k < len(self.orders[name]) - 1:
                    cand = {r: list(v) for r, v in self.orders.items()}
                    seq = cand[name]
                    seq[k], seq[k + 1] = seq[k + 1], seq[k]
                    improved |= self.attempt(cand)
                    k += 1
            if not improved:
                break


def search_orders(
    agents: Sequence[AgentModel],
    resources: Sequence[Resource],
    rule: str,
    run: Callable[[dict[str, list[str]], np.ndarray | None], tuple[float, np.ndarray, object]],
    *,
    max_passes: int = 3,
    start: dict[str, list[str]] | None = None,
) -> tuple[object, dict[str, list[str]], list[OrderTrial]]:
    """Choose orders by ``rule`` ("fcfs", "swap" or "exhaustive").

    ``run(orders, start_P) -> (total, P, result)`` coordinates for fixed orders. Returns the best result,
    its orders and the list of trials (infeasible candidates included, with their reason).

    Raises
    ------
    DeadlockError, InfeasibleOrdersError
        When the first order (``start``, or first-come-first-served per resource, or else by one ranking of
        all agents: :func:`~negotiate.resources.coupling.first_orders`) admits no schedule.
    """
    if rule == "master":
        raise ValueError('order = "master" is run by negotiate.coordination.master.search_master')
    orders = {k: list(v) for k, v in (start or first_orders(agents, resources)).items()}
    check_orders(agents, resources, orders)
    best_total, best_P, best = run(orders, None)
    trials = [OrderTrial({k: list(v) for k, v in orders.items()}, best_total, True)]
    if rule == "fcfs":
        return best, orders, trials
    search = Incumbent(agents, resources, run, orders, best_total, best_P, best, trials)
    if rule == "swap":
        search.swaps(max_passes)
    elif rule == "exhaustive":
        for name in (r.name for r in resources if r.needs_order):
            users = list(search.orders[name])
            if len(users) > EXHAUSTIVE_LIMIT:
                raise ValueError(
                    f"exhaustive order search is limited to {EXHAUSTIVE_LIMIT} users per resource; "
                    f'resource {name!r} has {len(users)} (use order = "swap")'
                )
            current = tuple(search.orders[name])
            for perm in itertools.permutations(users):
                if perm == current:
                    continue
                cand = {r: list(v) for r, v in search.orders.items()}
                cand[name] = list(perm)
                search.attempt(cand)
    else:
        raise ValueError(f"unknown order rule {rule!r}; expected 'fcfs', 'swap' or 'exhaustive'")
    return search.best, search.orders, trials
