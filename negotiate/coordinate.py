"""The upper level: one front, ``coordinate(...)``, over pluggable coordination methods.

Problem: minimise the weighted sum of the agents' optimal values ``sum_i w_i V_i(p_i)`` over the stacked
shared parameters ``P`` in the coupling polyhedron (:mod:`negotiate.coupling`). The coordinator only ever
sees what the agents report: value, value gradient and certificate.

The method interface
--------------------
A method is a class derived from :class:`Method`, registered under a name with :func:`register_method`
(the built-ins are ``"gradient"``, ``"bundle"`` and ``"newton"``). The engine drives it ask-and-tell::

    method = MethodClass(feasible, settings)      # FeasibleSet and CoordinatorSettings
    method.start(first)                           # Evaluation at the starting point
    loop:
        proposal = method.propose(latest)         # latest: Evaluation at the previous proposal
        if proposal.converged: stop
        latest = evaluate(proposal.point)         # one round: every agent solves once (+ guard probes)

Each :class:`Evaluation` carries, per agent, the value, the value gradient (``None`` when the solve
failed: never use it), the one-sided gradients gathered by the nonsmooth guard, the certificate and the
status, plus the weighted total. A :class:`Proposal` carries the next point, the method's stopping
measure (a predicted decrease relative to ``max(1, |total|)``), whether it has converged, and a short
note. ``method.incumbent`` is the best accepted evaluation; the engine reports it at the end. Everything
the CLI does with a built-in method (progress, outputs, ``--verify``) works with a user method too.
"""

from __future__ import annotations

import time
from abc import ABC, abstractmethod
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from negotiate.agent import AgentModel
from negotiate.coupling import FeasibleSet, build_feasible_set, fcfs_orders
from negotiate.guard import GuardReport, guard
from negotiate.kkt import Certificate
from negotiate.nlp import LocalResult
from negotiate.spec import CoordinatorSettings, Resource
from negotiate.status import Status

__all__ = [
    "AgentReport",
    "CoordinationResult",
    "Evaluation",
    "Method",
    "Proposal",
    "RoundRecord",
    "coordinate",
    "method_names",
    "register_method",
]


@dataclass(frozen=True)
class AgentReport:
    """What one agent said at its parameters ``p`` (value in the agent's cost unit, gradient per unit p)."""

    name: str
    p: np.ndarray
    value: float
    gradient: np.ndarray | None
    status: Status
    certificate: Certificate | None
    guard: GuardReport | None
    result: LocalResult = field(repr=False)
    hessian: np.ndarray | None = None

    @property
    def ok(self) -> bool:
        return self.gradient is not None

    @property
    def flagged(self) -> bool:
        return self.guard is not None

    @property
    def gradients(self) -> list[np.ndarray]:
        """The plain gradient followed by the guard's one-sided gradients (empty when the solve failed)."""
        if self.gradient is None:
            return []
        extra = list(self.guard.gradients) if self.guard else []
        return [self.gradient, *extra]


@dataclass(frozen=True)
class Evaluation:
    """All agents' reports at one stacked point ``P``."""

    P: np.ndarray
    reports: tuple[AgentReport, ...]
    weights: np.ndarray
    feasible: FeasibleSet = field(repr=False)
    solves: int = 0

    @property
    def ok(self) -> bool:
        """Whether every agent converged (only then are ``total`` and ``gradient`` meaningful)."""
        return all(r.ok for r in self.reports)

    @property
    def values(self) -> np.ndarray:
        return np.array([r.value for r in self.reports])

    @property
    def total(self) -> float:
        """Weighted total cost (``inf`` when an agent failed)."""
        return float(self.weights @ self.values) if self.ok else float("inf")

    @property
    def gradient(self) -> np.ndarray:
        """Stacked weighted value gradient (only when ``ok``)."""
        if not self.ok:
            raise ValueError("the gradient of a failed evaluation must not be used")
        return self.feasible.layout.stack([w * r.gradient for w, r in zip(self.weights, self.reports, strict=True)])

    @property
    def flagged(self) -> list[str]:
        return [r.name for r in self.reports if r.flagged]

    @property
    def failed(self) -> list[str]:
        return [r.name for r in self.reports if not r.ok]


@dataclass(frozen=True)
class Proposal:
    """A method's answer to one evaluation."""

    point: np.ndarray | None
    measure: float
    converged: bool = False
    note: str = ""


class Method(ABC):
    """Base class of coordination methods (see the module docstring for the protocol)."""

    name: ClassVar[str] = "method"
    wants_hessian: ClassVar[bool] = False
    """Set to True to receive each smooth agent's value Hessian in ``AgentReport.hessian``."""

    def __init__(self, feasible: FeasibleSet, settings: CoordinatorSettings) -> None:
        self.feasible = feasible
        self.settings = settings
        self.options = dict(settings.options)
        self.incumbent: Evaluation | None = None

    @abstractmethod
    def start(self, first: Evaluation) -> None:
        """Receive the evaluation at the starting point."""

    @abstractmethod
    def propose(self, latest: Evaluation) -> Proposal:
        """Receive the evaluation of the previous proposal; return the next one."""

    def tolerance_reached(self, measure: float) -> bool:
        return measure <= self.settings.tolerance


_METHODS: dict[str, type[Method]] = {}


def register_method(cls: type[Method]) -> type[Method]:
    """Register a :class:`Method` subclass under ``cls.name`` (usable as a decorator)."""
    if not (isinstance(cls, type) and issubclass(cls, Method)):
        raise TypeError(f"a coordination method must subclass negotiate.coordinate.Method, got {cls!r}")
    _METHODS[cls.name] = cls
    return cls


def method_names() -> list[str]:
    _load_builtins()
    return sorted(_METHODS)


def _load_builtins() -> None:
    from negotiate import _bundle, _gradient, _newton  # noqa: F401  (registration side effect)


@dataclass(frozen=True)
class RoundRecord:
    """One line of the history: round number, the trial's total, the incumbent's total, the stopping
    measure, the number of agent solves so far, flagged and failed agents, the method's note, and the wall
    time since the start of the run (s)."""

    round: int
    trial_total: float
    best_total: float
    measure: float
    agent_solves: int
    flagged: tuple[str, ...]
    failed: tuple[str, ...]
    note: str
    wall_time: float = 0.0


@dataclass(frozen=True)
class CoordinationResult:
    """Outcome of a coordination run.

    Attributes
    ----------
    P : numpy.ndarray
        Stacked parameters of the incumbent (the schedule).
    total : float
        Weighted total cost there.
    evaluation : Evaluation
        All agents' reports there.
    status : str
        ``"converged"``, ``"max-rounds"`` or ``"failed"``.
    message : str
        Why it stopped.
    rounds : int
        Evaluations after the start (each = every agent solved once).
    agent_solves : int
        All agent solves, guard probes included.
    history : tuple of RoundRecord
    orders : dict
        Order of users per exclusive resource.
    method : str
    wall_time : float
        s.
    """

    P: np.ndarray
    total: float
    evaluation: Evaluation
    status: str
    message: str
    rounds: int
    agent_solves: int
    history: tuple[RoundRecord, ...]
    orders: dict[str, list[str]]
    method: str
    wall_time: float

    @property
    def success(self) -> bool:
        return self.status == "converged"

    def params(self) -> dict[str, np.ndarray]:
        """Per-agent parameter vectors of the schedule."""
        lay = self.evaluation.feasible.layout
        return dict(zip(lay.names, lay.split(self.P), strict=True))


class Oracle:
    """Evaluates all agents at a stacked point: warm-started solves, then the nonsmooth guard."""

    def __init__(
        self,
        agents: Sequence[AgentModel],
        feasible: FeasibleSet,
        use_guard: bool = True,
        want_hessian: bool = False,
        executor: Callable[[Sequence[AgentModel], list[np.ndarray], list[LocalResult | None]], list[LocalResult]]
        | None = None,
    ) -> None:
        self.agents = list(agents)
        self.feasible = feasible
        self.use_guard = use_guard
        self.want_hessian = want_hessian
        self.executor = executor or _solve_in_process
        self.last: list[LocalResult | None] = [None] * len(self.agents)
        self.solves = 0

    def __call__(self, P: np.ndarray) -> Evaluation:
        parts = self.feasible.layout.split(P)
        warm = [r if r is not None and r.success else None for r in self.last]
        results = self.executor(self.agents, parts, warm)
        self.solves += len(results)
        reports = []
        for i, (a, res) in enumerate(zip(self.agents, results, strict=True)):
            rep = guard(a.problem, res, self.last[i]) if self.use_guard else None
            if rep is not None:
                self.solves += rep.solves
            hess = None
            if (
                self.want_hessian
                and res.success
                and res.certificate is not None
                and res.certificate.verdict == "smooth"
            ):
                sens = res.sensitivity()
                hess = sens.value_hessian if sens.available else None
            reports.append(
                AgentReport(a.name, parts[i], res.value, res.gradient, res.status, res.certificate, rep, res, hess)
            )
            if res.success:
                self.last[i] = res
        return Evaluation(
            np.asarray(P, dtype=float).copy(),
            tuple(reports),
            np.array([a.weight for a in self.agents]),
            self.feasible,
            self.solves,
        )


def _solve_in_process(
    agents: Sequence[AgentModel], parts: list[np.ndarray], warm: list[LocalResult | None]
) -> list[LocalResult]:
    return [a.problem.solve(p, warm=w) for a, p, w in zip(agents, parts, warm, strict=True)]


def coordinate(
    agents: Sequence[AgentModel],
    resources: Sequence[Resource],
    settings: CoordinatorSettings | None = None,
    *,
    orders: dict[str, list[str]] | None = None,
    start: np.ndarray | None = None,
    executor: Any = None,
    progress: Callable[[RoundRecord], None] | None = None,
) -> CoordinationResult:
    """Coordinate ``agents`` on ``resources`` with the method named in ``settings.method``.

    Parameters
    ----------
    agents : sequence of AgentModel
    resources : sequence of ExclusiveResource / CapacityResource
    settings : CoordinatorSettings, optional
        Method, rounds, tolerance, guard and method options (defaults when omitted).
    orders : dict, optional
        Order of users per exclusive resource; first-come-first-served by free optimum when omitted.
    start : array, optional
        Stacked starting parameters (projected onto the feasible set); the free optima when omitted.
    executor : callable, optional
        ``executor(agents, params, warm) -> results`` solving the agents (in process when omitted).
    progress : callable, optional
        Called with each :class:`RoundRecord` as it is made.

    Raises
    ------
    DeadlockError
        If the orders and the agents' routes form a cycle.
    ValueError
        For an unknown method name.
    """
    t0 = time.perf_counter()
    settings = settings or CoordinatorSettings()
    _load_builtins()
    if settings.method not in _METHODS:
        raise ValueError(f"unknown coordination method {settings.method!r}; expected one of {sorted(_METHODS)}")
    orders = orders if orders is not None else fcfs_orders(agents, resources)
    feasible = build_feasible_set(agents, resources, orders)
    P0 = feasible.layout.stack([a.free_optimum for a in agents]) if start is None else np.asarray(start, float)
    P0 = feasible.project(P0)
    method_cls = _METHODS[settings.method]
    oracle = Oracle(agents, feasible, settings.guard, method_cls.wants_hessian, executor)
    method = method_cls(feasible, settings)
    latest = oracle(P0)
    method.start(latest)
    history: list[RoundRecord] = []

    def record(k: int, ev: Evaluation, prop: Proposal) -> None:
        best = method.incumbent.total if method.incumbent is not None else float("inf")
        rec = RoundRecord(
            k, ev.total, best, prop.measure, oracle.solves, tuple(ev.flagged), tuple(ev.failed), prop.note,
            time.perf_counter() - t0,
        )  # fmt: skip
        history.append(rec)
        if progress is not None:
            progress(rec)

    status, message = "max-rounds", f"stopped after {settings.max_rounds} rounds"
    rounds = 0
    for k in range(settings.max_rounds + 1):
        prop = method.propose(latest)
        record(k, latest, prop)
        if prop.converged:
            status, message = "converged", prop.note or "stopping test met"
            break
        if prop.point is None:
            status, message = "failed", prop.note or "the method produced no point"
            break
        if k == settings.max_rounds:
            break
        latest = oracle(prop.point)
        rounds += 1
    inc = method.incumbent if method.incumbent is not None else latest
    if not inc.ok:
        status, message = "failed", f"no evaluation where all agents converged (failed: {', '.join(inc.failed)})"
    return CoordinationResult(
        P=inc.P,
        total=inc.total,
        evaluation=inc,
        status=status,
        message=message,
        rounds=rounds,
        agent_solves=oracle.solves,
        history=tuple(history),
        orders={k: list(v) for k, v in feasible.orders.items()},
        method=settings.method,
        wall_time=time.perf_counter() - t0,
    )
