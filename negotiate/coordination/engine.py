"""The upper level: one front, ``coordinate(...)``, over pluggable coordination methods.

Problem: minimise the weighted sum of the agents' optimal values ``sum_i w_i V_i(p_i)`` over the stacked
shared parameters ``P`` in the coupling polyhedron (:mod:`negotiate.resources.coupling`). The coordinator only ever
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

Method options
--------------
A method declares its options (``[coordinator.options]`` in a fleet file, ``CoordinatorSettings.options``
from Python) as a frozen dataclass in its ``Options`` class attribute: one field per option with its type,
default and a docstring-like ``metadata["doc"]``. The engine hands the method ``self.options``, a plain dict
holding every declared option (the default where none was given). An unknown key or a value of the wrong
type is refused: :func:`option_problems` lists them, a fleet file's are a ``FleetError`` (see
:func:`negotiate.run.check_method_options`), and from Python they are a warning and the default is used.
A method whose ``Options`` is ``None`` receives the options as given, unchecked. :func:`options_table`
writes the Markdown table of a method's options that docs/methods.md shows.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from negotiate.coordination.methods import AgentReport, Evaluation, Method, Proposal, method_class
from negotiate.core.agent import AgentModel
from negotiate.core.nlp import LocalResult
from negotiate.core.qp import solve_qp
from negotiate.core.status import CoordinationStatus, Status
from negotiate.execution.base import AgentOutcome, Executor, InProcessExecutor, evaluate_agent
from negotiate.fleet.spec import CoordinatorSettings, Resource
from negotiate.resources.coupling import FeasibleSet, build_feasible_set, fcfs_orders

__all__ = [
    "CoordinationResult",
    "EngineState",
    "Oracle",
    "RoundRecord",
    "SLACK_TOLERANCE",
    "coordinate",
    "missed_slots",
]


@dataclass(frozen=True)
class RoundRecord:
    """One line of the history: round number, the trial's total, the incumbent's total, the stopping
    measure, the number of agent solves so far, flagged and failed agents, the method's note, the wall
    time since the start of the coordination (s), and which order trial of a run it belongs to (0 for the
    first order; set by :func:`negotiate.run.run_fleet`)."""

    round: int
    trial_total: float
    best_total: float
    measure: float
    agent_solves: int
    flagged: tuple[str, ...]
    failed: tuple[str, ...]
    note: str
    wall_time: float = 0.0
    trial: int = 0


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
    status : CoordinationStatus
        ``converged``, ``max-rounds``, ``stalled``, ``failed`` or ``unreachable`` (a string enum;
        ``status.usable`` says whether the schedule is one where every agent converged and meets its parameters).
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
    status: CoordinationStatus
    message: str
    rounds: int
    agent_solves: int
    history: tuple[RoundRecord, ...]
    orders: dict[str, list[str]]
    method: str
    wall_time: float

    @property
    def success(self) -> bool:
        return self.status is CoordinationStatus.CONVERGED

    def params(self) -> dict[str, np.ndarray]:
        """Per-agent parameter vectors of the schedule."""
        lay = self.evaluation.feasible.layout
        return dict(zip(lay.names, lay.split(self.P), strict=True))


class Oracle:
    """Evaluates all agents at a stacked point: warm-started solves, then the nonsmooth guard.

    With an :class:`~negotiate.execution.base.Executor` the guard's probes and the value Hessians are computed by
    the executor, where the agents' solvers live (possibly other processes); with a plain callable
    ``executor(agents, params, warm) -> results`` they are computed here from ``agent.problem``.
    """

    def __init__(
        self,
        agents: Sequence[AgentModel],
        feasible: FeasibleSet,
        use_guard: bool = True,
        want_hessian: bool = False,
        executor: Executor
        | Callable[[Sequence[AgentModel], list[np.ndarray], list[LocalResult | None]], list[LocalResult]]
        | None = None,
    ) -> None:
        self.agents = list(agents)
        self.feasible = feasible
        self.use_guard = use_guard
        self.want_hessian = want_hessian
        self.executor = executor if executor is not None else InProcessExecutor()
        # The first round starts from each agent's solve at its free optimum, where the builder made one.
        self.last: list[LocalResult | None] = [a.start for a in self.agents]
        self.solves = 0
        self.slide = True

    def _outcomes(self, parts: list[np.ndarray], warm: list[LocalResult | None]) -> list[AgentOutcome]:
        if isinstance(self.executor, Executor):
            return self.executor.evaluate(
                self.agents, parts, warm, use_guard=self.use_guard, want_hessian=self.want_hessian
            )
        results = self.executor(self.agents, parts, warm)
        # The callable's answers are checked and completed (guard, Hessian) as an executor's would be.
        return [
            evaluate_agent(
                a.problem, p, w, use_guard=self.use_guard, want_hessian=self.want_hessian, result=res
            )
            for a, p, w, res in zip(self.agents, parts, warm, results, strict=True)
        ]

    def __call__(self, P: np.ndarray) -> Evaluation:
        ev = self.evaluate(P)
        if not self.slide or ev.ok or any(not r.result.success for r in ev.reports):
            return ev
        # Some elastic agent cannot meet ``P`` (and every solve converged): evaluate instead the point next to
        # what the agents met, as the restoration does (a point on the near side of the unreachable edge, so
        # that a step towards the edge slides along it rather than only stepping back).
        moved = self.evaluate(self.feasible.project(achieved(self.agents, ev), _held(self.agents, ev)))
        return moved if moved.ok else ev

    def evaluate(self, P: np.ndarray) -> Evaluation:
        """Every agent's report at ``P`` (one solve each, plus the guard's probes)."""
        parts = self.feasible.layout.split(P)
        warm = [r if r is not None and r.success else None for r in self.last]
        outcomes = self._outcomes(parts, warm)
        reports = []
        widths = self.feasible.layout.split(self.feasible.scale)
        for i, (a, out) in enumerate(zip(self.agents, outcomes, strict=True)):
            res, rep = out.result, out.guard
            self.solves += out.solves
            report = AgentReport(
                a.name, parts[i], res.value, res.gradient, res.status, res.certificate, rep, res, out.hessian
            )
            if res.success and _misses(a, res, widths[i]):
                # The agent cannot meet these values: its priced miss is not a value of the problem, and the
                # methods treat the point as one where the agent failed (a hidden constraint: they step back).
                report = replace(report, gradient=None, status=Status.INFEASIBLE, guard=None, hessian=None)
            reports.append(report)
            if res.success:
                self.last[i] = res
        return Evaluation(
            np.asarray(P, dtype=float).copy(),
            tuple(reports),
            np.array([a.weight for a in self.agents]),
            self.feasible,
            self.solves,
        )


@dataclass(frozen=True)
class EngineState:
    """The engine between two rounds: everything needed to continue a run exactly where it stopped.

    Handed to the ``checkpoint`` callback of :func:`coordinate` after the start and after every round, and
    accepted back as ``resume``. ``round`` is the number of the next proposal, ``rounds`` the evaluations
    after the start so far, ``method`` the method object itself (its bundles, metric, step sizes),
    ``latest`` the evaluation the method has not seen yet, ``last`` each agent's latest converged result
    (the warm-start data), ``solves`` the agent solves so far and ``elapsed`` the run's wall time so far, s.
    """

    round: int
    rounds: int
    method: Method
    latest: Evaluation
    last: tuple[LocalResult | None, ...]
    solves: int
    history: tuple[RoundRecord, ...]
    orders: dict[str, list[str]]
    elapsed: float


SLACK_TOLERANCE = 1e-6
"""Largest elastic slack that counts as met, relative to the parameter's window width (at least 1 unit)."""


def _misses(agent: AgentModel, result: LocalResult, width: np.ndarray) -> list[tuple[int, float]]:
    """``(index, miss)`` for every parameter an elastic agent misses by more than :data:`SLACK_TOLERANCE`."""
    if agent.slack is None:
        return []
    miss = np.asarray(agent.slack(result), dtype=float).ravel()
    return [(j, float(m)) for j, (m, w) in enumerate(zip(miss, width, strict=True))
            if abs(m) > SLACK_TOLERANCE * max(1.0, float(w))]  # fmt: skip


def missed_slots(agents: Sequence[AgentModel], ev: Evaluation) -> list[str]:
    """Texts naming every parameter an elastic agent misses at ``ev`` by more than :data:`SLACK_TOLERANCE`.

    ``"truck-03 reaches bridge.enter 0.41 s late"``; empty when every agent meets its parameters (or none is
    elastic).
    """
    out = []
    scale = ev.feasible.layout.split(ev.feasible.scale)
    for a, rep, width in zip(agents, ev.reports, scale, strict=True):
        if not rep.result.success:
            continue
        for j, m in _misses(a, rep.result, width):
            q = a.params[j]
            word = "late" if m > 0 else "early"
            out.append(f"{a.name} meets {q.name} {abs(m):.4g} {q.unit} {word}" if q.unit == "s"
                       else f"{a.name} misses {q.name} by {m:+.4g} {q.unit}")
    return out


def rigid_start(agents: Sequence[AgentModel], feasible: FeasibleSet) -> np.ndarray:
    """The first point: every agent's free optimum with all its slot times shifted by one common amount.

    The shifts ``tau`` (s, one per agent) are the least-squares smallest that meet the coupling polyhedron:
    ``min ||tau||^2`` s.t. ``A (F + E tau) <= b`` and the box, a QP. Shifting an agent's times together keeps
    the durations between them (dwell, gaps between zones), which its kinematics fix much more tightly than
    the times themselves, so the start is a point the agents can meet where a plain projection of the free
    optima would squeeze or stretch those durations. Where no such shifts exist (or the agent has no slot
    times) the free optima are projected onto the polyhedron as they are.
    """
    F = feasible.layout.stack([a.free_optimum for a in agents])
    E = np.zeros((F.size, len(agents)))
    for i, a in enumerate(agents):
        sl = feasible.layout.slice(i)
        for j, q in enumerate(a.params):
            if q.kind in ("enter", "leave"):
                E[sl.start + j, i] = 1.0
    used = E.any(axis=0)
    if not used.any():
        return feasible.project(F)
    E = E[:, used]
    lo = np.array([np.max((feasible.lower - F)[E[:, k] > 0]) for k in range(E.shape[1])])
    hi = np.array([np.min((feasible.upper - F)[E[:, k] > 0]) for k in range(E.shape[1])])
    res = solve_qp(np.eye(E.shape[1]), np.zeros(E.shape[1]), feasible.A @ E, np.full(feasible.b.size, -np.inf),
                   feasible.b - feasible.A @ F, lo, hi)  # fmt: skip
    if not res.success or not np.all(lo <= hi):
        return feasible.project(F)
    return feasible.project(F + E @ res.z)


RESTORE_ROUNDS = 10
"""Most rounds of the restoration at the start of a coordination (see :func:`restore`)."""


def achieved(agents: Sequence[AgentModel], ev: Evaluation) -> np.ndarray:
    """The stacked values the agents' solves at ``ev`` actually meet: ``P`` plus every elastic slack."""
    parts = []
    for a, rep in zip(agents, ev.reports, strict=True):
        miss = a.slack(rep.result) if a.slack is not None and rep.result.success else np.zeros(rep.p.size)
        parts.append(np.asarray(rep.p, dtype=float) + np.asarray(miss, dtype=float))
    return np.concatenate(parts) if parts else np.zeros(0)


def restore(agents: Sequence[AgentModel], feasible: FeasibleSet, oracle: Oracle, ev: Evaluation) -> Evaluation:
    """A start every elastic agent can meet, by alternating projections from ``ev``.

    An elastic agent's window may hold values it cannot meet (:attr:`~negotiate.core.agent.AgentModel.slack`),
    and the methods treat such a point as one where the agent failed. While some agent misses its values,
    each round takes the values the agents' solves actually met (a point each of them can reach) and
    projects it onto the coupling polyhedron, as in von Neumann's alternating projections between two
    convex sets (Bauschke & Borwein, SIAM Review 38 (1996) 367-426), for at most :data:`RESTORE_ROUNDS`
    rounds; the projection holds every agent that has missed so far near what it met (weight 1e4 in the
    projection's metric), so that the others make room, which is what a tight schedule needs (plain
    alternating projections zig-zag slowly between two sets that nearly touch). Returns the first evaluation
    without a miss, else the last one. A fleet without elastic agents costs nothing here.

    During the coordination the :class:`Oracle` does the same once for every trial point an agent misses
    (one projection of what the agents met, one more round of solves), so that a step towards the edge of
    what the agents can reach slides along it instead of only stepping back.
    """
    held = np.ones(feasible.n)
    for _ in range(RESTORE_ROUNDS):
        if not missed_slots(agents, ev) or any(not r.result.success for r in ev.reports):
            break
        held = np.maximum(held, _held(agents, ev))  # once held, held for the rest of the restoration
        ev = oracle.evaluate(feasible.project(achieved(agents, ev), held))
    return ev


def _held(agents: Sequence[AgentModel], ev: Evaluation) -> np.ndarray:
    """Projection weights: 1e4 on the parameters of every agent that misses its values at ``ev`` (held near
    what it met), 1 elsewhere (those make room)."""
    weight = np.ones(ev.feasible.n)
    widths = ev.feasible.layout.split(ev.feasible.scale)
    for i, (a, rep) in enumerate(zip(agents, ev.reports, strict=True)):
        if rep.result.success and _misses(a, rep.result, widths[i]):
            weight[ev.feasible.layout.slice(i)] = 1e4
    return weight


def coordinate(
    agents: Sequence[AgentModel],
    resources: Sequence[Resource],
    settings: CoordinatorSettings | None = None,
    *,
    orders: dict[str, list[str]] | None = None,
    start: np.ndarray | None = None,
    executor: Any = None,
    progress: Callable[[RoundRecord], None] | None = None,
    checkpoint: Callable[[EngineState], None] | None = None,
    resume: EngineState | None = None,
) -> CoordinationResult:
    """Coordinate ``agents`` on ``resources`` with the method named in ``settings.method``.

    Parameters
    ----------
    agents : sequence of AgentModel
    resources : sequence of Resource
        Records of registered kinds (:mod:`negotiate.resources`).
    settings : CoordinatorSettings, optional
        Method, rounds, tolerance, guard and method options (defaults when omitted).
    orders : dict, optional
        Order of users per exclusive resource; first-come-first-served by free optimum when omitted.
    start : array, optional
        Stacked starting parameters (projected onto the feasible set); the free optima when omitted.
    executor : Executor or callable, optional
        An :class:`~negotiate.execution.base.Executor` (in-process, worker processes, Dask), or any callable
        ``executor(agents, params, warm) -> results``; in process when omitted.
    progress : callable, optional
        Called with each :class:`RoundRecord` as it is made.
    checkpoint : callable, optional
        Called with an :class:`EngineState` after the start and after every round (e.g. to save it:
        :mod:`negotiate.output.checkpoint`).
    resume : EngineState, optional
        Continue from this state (same agents, settings and orders) instead of starting afresh; the run
        then ends exactly as the uninterrupted run would have.

    Raises
    ------
    DeadlockError
        If the orders and the agents' routes form a cycle.
    ValueError
        For an unknown method name, or a ``resume`` state made for other orders or agents.
    """
    t0 = time.perf_counter() - (resume.elapsed if resume is not None else 0.0)
    settings = settings or CoordinatorSettings()
    method_cls = method_class(settings.method)
    orders = orders if orders is not None else fcfs_orders(agents, resources)
    feasible = build_feasible_set(agents, resources, orders)
    oracle = Oracle(agents, feasible, settings.guard, method_cls.wants_hessian, executor)
    history: list[RoundRecord] = []
    rounds, k0 = 0, 0
    if resume is None:
        P0 = rigid_start(agents, feasible) if start is None else feasible.project(np.asarray(start, float))
        method = method_cls(feasible, settings)
        latest = restore(agents, feasible, oracle, oracle(P0))
        method.start(latest)
    else:
        names = [a.name for a in agents]
        if {k: list(v) for k, v in resume.orders.items()} != {k: list(v) for k, v in feasible.orders.items()}:
            raise ValueError("the state to resume was made for other orders than the ones given")
        if [r.name for r in resume.latest.reports] != names or type(resume.method) is not method_cls:
            raise ValueError(f"the state to resume was made for other agents or another method than {names}")
        method, latest, rounds, k0 = resume.method, resume.latest, resume.rounds, resume.round
        history = list(resume.history)
        oracle.solves = resume.solves
        # Results come back from a checkpoint without their problems: re-attach the local ones.
        oracle.last = [
            None if r is None else replace(r, _problem=a.problem) for a, r in zip(agents, resume.last, strict=True)
        ]

    def save(k: int) -> None:
        if checkpoint is not None:
            checkpoint(
                EngineState(
                    k, rounds, method, latest, tuple(oracle.last), oracle.solves, tuple(history),
                    {r: list(v) for r, v in feasible.orders.items()}, time.perf_counter() - t0,
                )
            )  # fmt: skip

    def record(k: int, ev: Evaluation, prop: Proposal) -> None:
        best = method.incumbent.total if method.incumbent is not None else float("inf")
        rec = RoundRecord(
            k, ev.total, best, prop.measure, oracle.solves, tuple(ev.flagged), tuple(ev.failed), prop.note,
            time.perf_counter() - t0,
        )  # fmt: skip
        history.append(rec)
        if progress is not None:
            progress(rec)

    if resume is None:
        save(0)
    status, message = CoordinationStatus.MAX_ROUNDS, f"stopped after {settings.max_rounds} rounds"
    for k in range(k0, settings.max_rounds + 1):
        prop = method.propose(latest)
        record(k, latest, prop)
        if prop.converged:
            status, message = CoordinationStatus.CONVERGED, prop.note or "stopping test met"
            break
        if prop.point is None:
            stuck = method.incumbent is not None and method.incumbent.ok
            status = CoordinationStatus.STALLED if stuck else CoordinationStatus.FAILED
            message = prop.note or "the method produced no point"
            break
        if k == settings.max_rounds:
            break
        latest = oracle(prop.point)
        rounds += 1
        save(k + 1)
    inc = method.incumbent if method.incumbent is not None else latest
    if misses := missed_slots(agents, inc):
        status = CoordinationStatus.UNREACHABLE
        message = "the schedule asks for times an agent cannot meet: " + "; ".join(misses)
    elif not inc.ok:
        status = CoordinationStatus.FAILED
        message = f"no evaluation where all agents converged (failed: {', '.join(inc.failed)})"
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
