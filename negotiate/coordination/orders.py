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
from negotiate.resources.coupling import check_orders, fcfs_orders

__all__ = ["EXHAUSTIVE_LIMIT", "OrderTrial", "search_orders"]

EXHAUSTIVE_LIMIT = 7
"""Largest number of users of one resource for which every order is tried (7! = 5040 orders)."""


@dataclass(frozen=True)
class OrderTrial:
    """One order tried: the orders, the coordinated total (``inf`` if it failed or was infeasible), whether
    it was kept, and for an order skipped without coordinating, why (a deadlock or an empty polyhedron).

    The order master (:mod:`negotiate.coordination.master`) also fills in, after the trial's cuts entered:
    ``bound``, its lower bound on the best total over all orders (cost units), ``gap``, the best total so
    far minus that bound, and ``gap_kind``, ``"certified"`` or ``"heuristic"``, with ``gap_reason`` saying
    why a gap is heuristic. The other rules leave them empty (``nan``, ``""``).
    """

    orders: dict[str, list[str]]
    total: float
    kept: bool
    infeasible: str = ""
    bound: float = math.nan
    gap: float = math.nan
    gap_kind: str = ""
    gap_reason: str = ""

    def to_dict(self) -> dict[str, object]:
        out: dict[str, object] = {
            "orders": self.orders, "total_cost": self.total, "kept": self.kept, "infeasible": self.infeasible
        }  # fmt: skip
        if self.gap_kind:
            out.update(bound=self.bound, gap=self.gap, gap_kind=self.gap_kind, gap_reason=self.gap_reason)
        return out


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
        When the first order (``start`` or first-come-first-served) admits no schedule.
    """
    if rule == "master":
        raise ValueError('order = "master" is run by negotiate.coordination.master.search_master')
    orders = {k: list(v) for k, v in (start or fcfs_orders(agents, resources)).items()}
    check_orders(agents, resources, orders)
    best_total, best_P, best = run(orders, None)
    trials = [OrderTrial({k: list(v) for k, v in orders.items()}, best_total, True)]
    if rule == "fcfs":
        return best, orders, trials
    exclusive = [r.name for r in resources if r.needs_order]  # resources whose users take turns

    def attempt(candidate: dict[str, list[str]]) -> bool:
        nonlocal best_total, best_P, best, orders
        try:
            check_orders(agents, resources, candidate)
        except (DeadlockError, InfeasibleOrdersError) as exc:
            trials.append(OrderTrial(candidate, float("inf"), False, str(exc)))
            return False
        total, P, result = run(candidate, best_P)
        kept = total < best_total - 1e-9 * max(1.0, abs(best_total))
        trials.append(OrderTrial(candidate, total, kept))
        if kept:
            best_total, best_P, best, orders = total, P, result, candidate
        return kept

    if rule == "swap":
        for _ in range(max_passes):
            improved = False
            for name in exclusive:
                k = 0
                while k < len(orders[name]) - 1:
                    cand = {r: list(v) for r, v in orders.items()}
                    seq = cand[name]
                    seq[k], seq[k + 1] = seq[k + 1], seq[k]
                    improved |= attempt(cand)
                    k += 1
            if not improved:
                break
    elif rule == "exhaustive":
        for name in exclusive:
            users = list(orders[name])
            if len(users) > EXHAUSTIVE_LIMIT:
                raise ValueError(
                    f"exhaustive order search is limited to {EXHAUSTIVE_LIMIT} users per resource; "
                    f'resource {name!r} has {len(users)} (use order = "swap")'
                )
            current = tuple(orders[name])
            for perm in itertools.permutations(users):
                if perm == current:
                    continue
                cand = {r: list(v) for r, v in orders.items()}
                cand[name] = list(perm)
                attempt(cand)
    else:
        raise ValueError(f"unknown order rule {rule!r}; expected 'fcfs', 'swap' or 'exhaustive'")
    return best, orders, trials
