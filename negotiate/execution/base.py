"""The executor interface, what the coordination engine imports: one agent's answer, how it is computed, and the
in-process executor.

Agent solves within a round are independent, so the coordinator hands a whole round to an *executor*. All
executors share one small interface, :class:`Executor`:

``evaluate(agents, params, warm, *, use_guard, want_hessian) -> list[AgentOutcome]``
    Solve agent ``i`` at ``params[i]``, warm-started from ``warm[i]`` (its previous converged
    :class:`~negotiate.core.nlp.LocalResult`, or ``None``), and return, in the order of ``agents``, the result
    plus -- when asked -- the nonsmooth guard's one-sided gradients (:func:`negotiate.core.guard.guard`) and the
    value Hessian of a smooth agent. Both are computed where the agent's solver lives, by the same function
    (:func:`evaluate_agent`) whatever the executor, so the schedule does not depend on the executor.
``executor(agents, params, warm) -> list[LocalResult]``
    The plain call (results only) that :func:`negotiate.coordination.engine.coordinate` also accepts from any
    user-written callable.

:class:`InProcessExecutor` (the default) solves ``agent.problem`` in the calling process. The executors that
solve elsewhere share one policy (:mod:`negotiate.execution.remote`: batching, time budget, retries, hung
batches) over a transport: local worker processes (:mod:`negotiate.execution.processes`) or a Dask cluster
(:mod:`negotiate.execution.dask`); :func:`negotiate.execution.make.make_executor` picks one for the command line.

Determinism: the same fleet and settings give the same schedule with every executor. Each request is a
pure function of (agent record, parameters, warm start), the answers are put back in the order of the
agents, and nothing depends on which worker answered first.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, ClassVar

import numpy as np

from negotiate.core.guard import GuardReport, guard
from negotiate.core.nlp import LocalResult, ParametricNLP, screen_result, try_solve

if TYPE_CHECKING:
    from negotiate.core.agent import AgentModel

__all__ = ["AgentOutcome", "Executor", "InProcessExecutor", "evaluate_agent"]


@dataclass(frozen=True)
class AgentOutcome:
    """One agent's answer in a round.

    Attributes
    ----------
    result : LocalResult
        The solve at the offered parameters.
    guard : GuardReport or None
        The nonsmooth guard's probes (``None``: not flagged, not asked, or the solve failed).
    hessian : numpy.ndarray or None
        The value Hessian (cost per unit p squared) when asked and the certificate is ``smooth``.
    solves : int
        Agent solves this answer took (1 plus the guard's probes).
    """

    result: LocalResult
    guard: GuardReport | None = None
    hessian: np.ndarray | None = None
    solves: int = 1


def evaluate_agent(
    problem: ParametricNLP,
    p: np.ndarray,
    warm: LocalResult | None,
    *,
    use_guard: bool = False,
    want_hessian: bool = False,
    result: LocalResult | None = None,
) -> AgentOutcome:
    """Solve one agent and, when asked, probe it with the guard and compute its value Hessian.

    ``warm`` is the agent's previous converged result: the solver starts from it and the guard compares
    active sets with it. Every executor calls this function where the agent's solver lives; ``result`` is an
    answer already at hand (from a plain executor callable), checked and completed here instead of a solve.

    Any agent answers here, built-in or user-written: an exception raised by its code (the solve, the guard's
    probes, the Hessian) makes the answer a ``failed`` result whose message names the exception's type and
    text, and a result claiming a solution whose value or gradient is not finite is ``failed`` too
    (:func:`negotiate.core.nlp.try_solve`). A value Hessian that is not finite is not passed on.
    """
    res = try_solve(problem, p, warm) if result is None else screen_result(problem, p, result)
    try:
        rep = guard(problem, res, warm) if use_guard else None
        hess = None
        if want_hessian and res.success and res.certificate is not None and res.certificate.verdict == "smooth":
            sens = problem.sensitivity(res)
            hess = sens.value_hessian if sens.available else None
            if hess is not None and not np.all(np.isfinite(hess)):
                hess = None
    except Exception as exc:  # noqa: BLE001 - user code: any exception is a failed answer of this agent
        res = LocalResult.failure(problem, p, f"the agent raised {type(exc).__name__}: {exc} (after its solve)")
        return AgentOutcome(res, None, None, 1)
    return AgentOutcome(res, rep, hess, 1 + (rep.solves if rep is not None else 0))


class Executor:
    """Base class of executors (see the module docstring); subclasses implement :meth:`evaluate`.

    An executor may hold processes or a cluster connection: use it as a context manager, or call
    :meth:`close` when done. ``remote`` is True when the agents are solved outside the calling process.
    """

    remote: ClassVar[bool] = False

    def evaluate(
        self,
        agents: Sequence[AgentModel],
        params: Sequence[np.ndarray],
        warm: Sequence[LocalResult | None],
        *,
        use_guard: bool = False,
        want_hessian: bool = False,
    ) -> list[AgentOutcome]:
        """Solve every agent once (see the module docstring); answers in the order of ``agents``."""
        raise NotImplementedError

    def __call__(
        self, agents: Sequence[AgentModel], params: Sequence[np.ndarray], warm: Sequence[LocalResult | None]
    ) -> list[LocalResult]:
        return [o.result for o in self.evaluate(agents, params, warm)]

    def prepare(self, agents: Sequence[AgentModel]) -> None:
        """Build the agents and their warm-start solvers where they will be solved, ahead of the first round
        (optional: the first requests build them anyway)."""

    def start(self) -> None:
        """Begin building the fleet's agents where they will be solved, without waiting: the workers build
        while the caller builds its own copies (``negotiate run`` calls this first). The first
        :meth:`evaluate` waits for these builds before its clock starts. Nothing to do in process."""

    def close(self) -> None:
        """Release processes or connections (nothing for the in-process executor)."""

    def terminate(self) -> None:
        """Kill the worker processes this executor started, at once, without waiting for anything: for a
        coordinator about to exit without cleaning up (a second interrupt). Safe to call from a signal handler.
        Nothing to do in process or on a cluster the executor did not start."""

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class InProcessExecutor(Executor):
    """Solve each ``agent.problem`` in the calling process, one after the other (the default).

    A per-solve time limit here is IPOPT's own: build the agents with
    ``build_agents(spec, solver_options={"ipopt.max_wall_time": seconds})``.
    """

    def prepare(self, agents: Sequence[AgentModel]) -> None:
        for a in agents:
            a.problem.warm_solver()

    def evaluate(
        self,
        agents: Sequence[AgentModel],
        params: Sequence[np.ndarray],
        warm: Sequence[LocalResult | None],
        *,
        use_guard: bool = False,
        want_hessian: bool = False,
    ) -> list[AgentOutcome]:
        return [
            evaluate_agent(a.problem, p, w, use_guard=use_guard, want_hessian=want_hessian)
            for a, p, w in zip(agents, params, warm, strict=True)
        ]
