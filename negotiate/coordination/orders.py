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
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from negotiate.coordination.methods.base import declared_problems, declared_table, declared_values, option
from negotiate.core.agent import AgentModel
from negotiate.core.ranges import Range
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.fleet.spec import Resource
from negotiate.resources.coupling import check_orders, first_orders

__all__ = [
    "EXHAUSTIVE_LIMIT",
    "ORDER_OPTIONS",
    "Incumbent",
    "MasterOptions",
    "OrderTrial",
    "SwapOptions",
    "order_key",
    "order_option_problems",
    "order_options",
    "order_options_table",
    "search_orders",
]

EXHAUSTIVE_LIMIT = 7
"""Largest number of users of one resource for which every order is tried (7! = 5040 orders)."""

TIME_BUDGET = Range(0.0, 1e7)
"""Allowed wall-time budget of an order search, s (0: none)."""


@dataclass(frozen=True)
class SwapOptions:
    """Options of ``order = "swap"`` (``[coordinator.order_options]``)."""

    max_passes: int = option(3, "largest number of passes over all neighbours", Range(1, 1000))
    time_budget: float = option(
        0.0, "wall time of the order search, s (0: none); no candidate is started after it, the best "
        "order so far is kept", TIME_BUDGET,
    )  # fmt: skip


@dataclass(frozen=True)
class MasterOptions:
    """Options of ``order = "master"`` (``[coordinator.order_options]``; :mod:`negotiate.coordination.master`)."""

    max_coordinations: int = option(
        30, "largest number of coordinations of the master loop (the first order included; the swaps "
        "after it are not counted)", Range(1, 100_000),
    )  # fmt: skip
    gap_tolerance: float = option(
        1e-4, "the loop stops when best total - bound <= gap_tolerance * max(1, |best total|)",
        Range(0.0, 0.1, lo_open=True, hi_open=True),
    )  # fmt: skip
    time_budget: float = option(
        0.0, "wall time of the whole order search (master loop and swaps), s (0: none); no coordination is "
        "started after it, and the best order so far is what the run returns and writes (which one depends on "
        "the machine's speed)", TIME_BUDGET,
    )  # fmt: skip
    swap_passes: int = option(
        3, "largest number of passes of adjacent swaps over the master's best order (0: none)", Range(0, 1000)
    )
    milp_time_limit: float = option(
        0.0, "HiGHS's time limit per solve of the master, s (0: none); a stopped solve still proposes its best "
        "orders and gives its dual bound, but what it found depends on the machine's speed (the same fleet may "
        "then give another schedule)", TIME_BUDGET,
    )  # fmt: skip
    trust_radius: int = option(
        0, "search near the best order first: a master solve allows at most this many pairs in the other "
        "order (local branching); over all orders when it finds nothing better there (0: always all orders)",
        Range(0, 1_000_000),
    )  # fmt: skip
    screen_swaps: bool = option(
        True, "pass over an adjacent swap whose cut-model estimate (the master as a linear program with those "
        "orders fixed) is not below the best total; exact where the value functions are convex",
    )  # fmt: skip


ORDER_OPTIONS: dict[str, type | None] = {
    "fcfs": None, "swap": SwapOptions, "exhaustive": None, "master": MasterOptions
}  # fmt: skip
"""The options dataclass of each order rule (``None``: the rule takes no options)."""


def order_option_problems(rule: str, given: Mapping[str, Any]) -> list[tuple[str, str, Any]]:
    """The keys of ``given`` (``[coordinator.order_options]``) that the order ``rule`` does not accept, as
    ``(key, expected, found value)``: unknown keys, mistyped values and numbers out of range."""
    options = ORDER_OPTIONS.get(rule)
    if options is None:
        return [(key, f"no key: order = {rule!r} takes no options", value) for key, value in given.items()]
    return declared_problems(options, f"the {rule!r} order rule's", given)


def order_options(rule: str, given: Mapping[str, Any]) -> dict[str, Any]:
    """Every option of the order ``rule`` (defaults filled in); what :func:`order_option_problems` refuses is
    dropped with a warning (from Python; a fleet file's are refused before the run starts)."""
    options = ORDER_OPTIONS.get(rule)
    if options is None:
        for key in given:
            warnings.warn(f"order rule {rule!r} takes no options: {key!r} ignored", UserWarning, stacklevel=2)
        return {}
    return declared_values(options, f"order rule {rule!r}", given, stacklevel=4)


def order_options_table(rule: str) -> str:
    """The Markdown table of the order ``rule``'s options, as docs/methods.md shows it."""
    return declared_table(ORDER_OPTIONS.get(rule), f"{rule!r} order rule")


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
    deadline : float, optional
        A :func:`time.perf_counter` reading after which no candidate is coordinated (a coordination under way
        finishes); :attr:`out_of_time` then turns True and the best orders so far stay the result.
    screen : callable, optional
        ``screen(candidate, total)`` is called for a candidate that admits a schedule before it is coordinated;
        when it returns True the candidate is passed over (not coordinated, no trial, counted in
        :attr:`screened`). The order master screens with its cut model.
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
        deadline: float | None = None,
        screen: Callable[[dict[str, list[str]], float], bool] | None = None,
    ) -> None:
        self.agents, self.resources, self.run = agents, resources, run
        self.orders, self.total, self.P, self.best = orders, total, P, best
        self.trials, self.tried, self.stage, self.on_result = trials, tried, stage, on_result
        self.coordinations = 0  # candidates handed to ``run`` by this search
        self.deadline = deadline
        self.out_of_time = False
        self.screen = screen
        self.screened = 0  # candidates the screen passed over

    def attempt(self, candidate: dict[str, list[str]]) -> bool:
        """Check ``candidate`` (skipped as an infeasible trial when it admits no schedule), coordinate it warm-
        started from the best schedule so far and keep it when it lowers the total; True when kept. After the
        deadline nothing is tried (False)."""
        if self.deadline is not None and time.perf_counter() >= self.deadline:
            self.out_of_time = True
        if self.out_of_time:
            return False
        key = order_key(candidate)
        if self.tried is not None and key in self.tried:
            return False
        try:
            check_orders(self.agents, self.resources, candidate)
        except (DeadlockError, InfeasibleOrdersError) as exc:
            if self.tried is not None:
                self.tried.add(key)
            self.trials.append(OrderTrial(candidate, float("inf"), False, str(exc), stage=self.stage))
            return False
        if self.screen is not None and self.screen(candidate, self.total):
            self.screened += 1  # not marked as tried: a later screen, with more cuts, may let it through
            return False
        if self.tried is not None:
            self.tried.add(key)
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
            if not improved or self.out_of_time:
                break


def search_orders(
    agents: Sequence[AgentModel],
    resources: Sequence[Resource],
    rule: str,
    run: Callable[[dict[str, list[str]], np.ndarray | None], tuple[float, np.ndarray, object]],
    *,
    max_passes: int | None = None,
    start: dict[str, list[str]] | None = None,
    options: Mapping[str, Any] | None = None,
) -> tuple[object, dict[str, list[str]], list[OrderTrial]]:
    """Choose orders by ``rule`` ("fcfs", "swap" or "exhaustive").

    ``run(orders, start_P) -> (total, P, result)`` coordinates for fixed orders. Returns the best result,
    its orders and the list of trials (infeasible candidates included, with their reason). ``options`` are
    the rule's (:class:`SwapOptions` for "swap"; :func:`order_options` fills in the defaults); ``max_passes``,
    when given, overrides the option of that name. With a ``time_budget`` no candidate is started after it
    (the one under way finishes) and the best orders so far are returned.

    Raises
    ------
    DeadlockError, InfeasibleOrdersError
        When the first order (``start``, or first-come-first-served per resource, or else by one ranking of
        all agents: :func:`~negotiate.resources.coupling.first_orders`) admits no schedule.
    """
    if rule == "master":
        raise ValueError('order = "master" is run by negotiate.coordination.master.search_master')
    if rule not in ORDER_OPTIONS:
        raise ValueError(f"unknown order rule {rule!r}; expected 'fcfs', 'swap' or 'exhaustive'")
    opts = order_options(rule, options or {})
    t0 = time.perf_counter()
    budget = float(opts.get("time_budget", 0.0))
    orders = {k: list(v) for k, v in (start or first_orders(agents, resources)).items()}
    check_orders(agents, resources, orders)
    best_total, best_P, best = run(orders, None)
    trials = [OrderTrial({k: list(v) for k, v in orders.items()}, best_total, True)]
    if rule == "fcfs":
        return best, orders, trials
    search = Incumbent(agents, resources, run, orders, best_total, best_P, best, trials,
                       deadline=t0 + budget if budget > 0 else None)  # fmt: skip
    if rule == "swap":
        search.swaps(max_passes if max_passes is not None else int(opts["max_passes"]))
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
