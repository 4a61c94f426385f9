"""The one remote executor: agents solved outside this process, over a transport (worker processes, a Dask cluster).

A :class:`RemoteExecutor` owns the policy -- which worker gets which agents, in how many batches, how long a batch
may take, what happens to a batch that is lost or hangs -- and a :class:`Transport` owns the workers: it builds
agents on them, sends a batch of requests to one, waits for answers, says which were lost with their worker,
and restarts a worker that hangs. The policy is written once, here; each transport is one module
(:mod:`negotiate.execution.processes`, :mod:`negotiate.execution.dask`).

What travels. Requests carry *fleet records*, not solvers: the agent's :class:`~negotiate.fleet.spec.AgentSpec`
with the fleet's resources and the solver options, pickled once, and the warm-start data; a worker builds the
agent the first time it meets the record and keeps it (:mod:`negotiate.execution.worker`). Results are pickled
without their CasADi problem and re-attached to the coordinator's copy of the agent, so
``result.sensitivity()`` keeps working there.

Batching. The transport offers ``W`` worker slots for a round; agent ``i`` always goes to slot ``i mod W`` first
(builds ahead of the round too), which keeps the workers' caches disjoint. A slot receives its agents of a round
in ``transport.batches`` batches, queued on it in order, so that a round costs a few round trips per worker, not
one per agent.

Faults. A batch whose worker was lost with it (the process died, or left the cluster) is sent again, with every
batch queued behind it on that worker, up to ``retries`` times per request and round (:class:`_Losses`); after
that its agents are failed solves for the round. A solve has a wall-time limit ``time_limit`` (s) when one is
given: inside the solver through IPOPT's ``max_wall_time`` option (the agent reports ``time-limit``), and for a
batch that gets no answer at all (a solve stuck outside IPOPT) through its time budget: ``time_limit`` per solve
a request may make (the solve and the guard's probes) plus ``grace`` s (:data:`REPLY_GRACE`), per request of
the batch, counted from when the batch reached the head of its worker's queue. A batch past its budget has its
worker restarted; a single request is then reported with status ``time-limit`` for the round, a larger batch is
split and its requests sent again one by one to find the one that hangs. A transport that can reach no worker at
all says so (``stranded``): the round's unanswered agents are failed solves -- a round never waits forever.
"""

from __future__ import annotations

import hashlib
import pickle
import time
from collections import deque
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from negotiate.core.guard import MAX_PROBED_ROWS
from negotiate.core.nlp import LocalResult
from negotiate.core.status import Status
from negotiate.execution.base import AgentOutcome, Executor
from negotiate.fleet.spec import AgentSpec, FleetSpec

if TYPE_CHECKING:
    from negotiate.core.agent import AgentModel

__all__ = ["REPLY_GRACE", "Record", "RemoteExecutor", "Settled", "Transport"]

REPLY_GRACE = 10.0
"""Seconds added to a remote request's time budget for building the agent, certification and transport."""

Record = tuple[str, bytes]
"""An agent's fleet record as it travels: (digest, pickled (resources, AgentSpec, solver options))."""


@dataclass
class Settled:
    """What a transport's :meth:`Transport.wait` saw; keys are positions in the list of handles it was given.

    Attributes
    ----------
    answers : dict
        Handles answered: the worker's reply (a batch: one ``(AgentOutcome, process id)`` per request, in order).
    lost : set of int
        Handles lost with their worker (died, left the cluster, or cancelled by it): sent again by the policy.
    errors : dict
        Handles whose worker raised instead of answering (not a solver failure: those are answers).
    stranded : str or None
        No worker is left to answer anything: the reason, which becomes the message of every unanswered agent.
    """

    answers: dict[int, Any] = field(default_factory=dict)
    lost: set[int] = field(default_factory=set)
    errors: dict[int, BaseException] = field(default_factory=dict)
    stranded: str | None = None

    def __bool__(self) -> bool:
        return bool(self.answers or self.lost or self.errors) or self.stranded is not None


class Transport:
    """Where a :class:`RemoteExecutor` sends its requests: a set of worker slots. Handles are the transport's own
    objects, passed back to it unchanged.

    Attributes
    ----------
    batches : int
        Batches a slot receives its agents of a round in (more: finer splitting of a hung batch; fewer: fewer
        round trips).
    lost_workers : int
        Workers lost (died, left, replaced or restarted after a hang) since the transport was made.
    """

    batches: ClassVar[int] = 1
    lost_workers: int = 0

    def slots(self) -> int:
        """Number of worker slots to spread a round (or the builds ahead of it) over, at least 1."""
        raise NotImplementedError

    def build(self, slot: int, record: Record) -> Any:
        """Start building one agent (and its warm-start solver) on worker ``slot``; a handle."""
        raise NotImplementedError

    def submit(self, slot: int, requests: list[tuple[Any, ...]]) -> Any:
        """Queue a batch of requests ``(digest, blob, p, warm, use_guard, want_hessian)`` on worker ``slot``;
        a handle whose answer is one ``(AgentOutcome, process id)`` per request."""
        raise NotImplementedError

    def wait(self, handles: Sequence[Any], timeout: float | None) -> Settled:
        """Wait until at least one of ``handles`` is answered, lost or failed, or no worker is left, or
        ``timeout`` s have passed (``None``: no limit); what was seen (empty after the timeout)."""
        raise NotImplementedError

    def discard(self, handles: Sequence[Any]) -> None:
        """Forget ``handles`` (cancel what has not run): the policy will not wait for them."""

    def restart(self, slot: int, handles: Sequence[Any]) -> None:
        """The worker running ``handles[0]`` hangs: stop it and give ``slot`` a fresh worker; ``handles`` (the
        batches queued on that worker) are dropped, the policy sends again those it still wants."""
        raise NotImplementedError

    def terminate(self) -> None:
        """Kill the worker processes the transport started, at once (signal-handler safe)."""

    def close(self) -> None:
        """Stop the workers and release the connections."""


def _time_options(time_limit: float | None, solver_options: Mapping[str, Any] | None) -> dict[str, Any] | None:
    opts = dict(solver_options or {})
    if time_limit is not None:
        opts.setdefault("ipopt.max_wall_time", float(time_limit))
    return opts or None


def _failed(agent: AgentModel, p: np.ndarray, status: Status, message: str) -> AgentOutcome:
    return AgentOutcome(LocalResult.failure(agent.problem, p, message, status), None, None, 1)


class _Losses:
    """The retry policy, kept per round: a request whose worker was lost with it is sent again, at most
    ``retries`` times; after that its agent is a failed solve for the round."""

    def __init__(self, retries: int) -> None:
        self.retries = retries
        self.count: dict[int, int] = {}

    def resend(self, batch: Sequence[int]) -> bool:
        """Count one loss for each request of ``batch``; True while they may be sent again."""
        for i in batch:
            self.count[i] = self.count.get(i, 0) + 1
        return all(self.count[i] <= self.retries for i in batch)

    def failed(self, agent: AgentModel, p: np.ndarray, i: int) -> AgentOutcome:
        return _failed(agent, p, Status.FAILED, f"worker lost {self.count[i]} times in this round")


class RemoteExecutor(Executor):
    """Solve agents on the workers of a :class:`Transport`, under the policy of the module docstring.

    Parameters
    ----------
    spec : FleetSpec
        The fleet whose agents are solved (the workers build them from its records).
    transport : callable
        Makes the transport, called once the arguments are checked (a transport may start processes).
    solver_options : mapping, optional
        Solver options for every agent, as for :func:`negotiate.fleet.build_agents`.
    time_limit : float, optional
        Wall-time limit per solve, s (IPOPT's ``max_wall_time`` plus a time budget on each batch).
    retries : int
        How often the requests of a lost worker are sent again within one round.
    grace : float
        Seconds added to a request's time budget (building the agent, certification, transport).
    """

    remote = True

    def __init__(
        self,
        spec: FleetSpec,
        transport: Callable[[], Transport],
        *,
        solver_options: Mapping[str, Any] | None = None,
        time_limit: float | None = None,
        retries: int = 2,
        grace: float = REPLY_GRACE,
    ) -> None:
        if time_limit is not None and not time_limit > 0:
            raise ValueError(f"'time_limit' must be a number of seconds > 0, got {time_limit!r}")
        if not (isinstance(retries, int) and retries >= 0):
            raise ValueError(f"'retries' must be an integer >= 0, got {retries!r}")
        self.spec = spec
        self.time_limit = time_limit
        self.retries = retries
        self.grace = float(grace)
        self.solver_options = _time_options(time_limit, solver_options)
        self._building: list[Any] = []  # handles of start()'s builds, waited for by the first evaluate()
        self._records: dict[str, Record] = {}
        for a in spec.agents:
            blob = pickle.dumps((spec.resources, a, self.solver_options), protocol=pickle.HIGHEST_PROTOCOL)
            self._records[a.name] = (hashlib.sha256(blob).hexdigest(), blob)
        self.transport = transport()

    @property
    def lost_workers(self) -> int:
        """Workers lost (died, left, or replaced after a timeout) since the executor was made."""
        return self.transport.lost_workers

    # -- building ahead ------------------------------------------------------------------------------------

    def prepare(self, agents: Sequence[AgentModel]) -> None:
        self._submit_builds(agents)
        self._built()

    def start(self) -> None:
        if not self._building:
            self._submit_builds(self.spec.agents)  # the fleet's order, as build_agents returns them

    def _submit_builds(self, agents: Sequence[AgentModel | AgentSpec]) -> None:
        w = self.transport.slots()
        for i, a in enumerate(agents):
            self._building.append(self.transport.build(i % w, self._record(a)))

    def _built(self) -> None:
        """Wait for the builds that :meth:`start` began, as a round waits for its answers; builds that fail or
        are lost are left to the requests, which build what is missing."""
        building, self._building = self._building, []
        pending = building
        while pending:
            seen = self.transport.wait(pending, None)
            if seen.stranded is not None:
                break
            settled = seen.answers.keys() | seen.lost | seen.errors.keys()
            pending = [h for k, h in enumerate(pending) if k not in settled]
        self.transport.discard(building)

    # -- a round -------------------------------------------------------------------------------------------

    def _record(self, agent: AgentModel | AgentSpec) -> Record:
        try:
            return self._records[agent.name]
        except KeyError:
            raise ValueError(
                f"agent {agent.name!r} is not in fleet {self.spec.name!r}: remote executors build agents "
                "from the fleet's records (use the in-process executor for hand-built agents)"
            ) from None

    def _budget(self, use_guard: bool) -> float | None:
        """Seconds a request may take before it counts as hung (None: no limit)."""
        if self.time_limit is None:
            return None
        solves = 1 + (2 * MAX_PROBED_ROWS if use_guard else 0)
        return self.time_limit * solves + self.grace

    @staticmethod
    def _attach(agent: AgentModel, out: AgentOutcome) -> AgentOutcome:
        return replace(out, result=replace(out.result, _problem=agent.problem))

    def _hung(self, agent: AgentModel, p: np.ndarray, budget: float) -> AgentOutcome:
        assert self.time_limit is not None
        return _failed(
            agent, p, Status.TIME_LIMIT,
            f"no answer from the worker within {budget:.3g} s (per-solve limit {self.time_limit:.3g} s); "
            "the worker was replaced",
        )  # fmt: skip

    def evaluate(
        self,
        agents: Sequence[AgentModel],
        params: Sequence[np.ndarray],
        warm: Sequence[LocalResult | None],
        *,
        use_guard: bool = False,
        want_hessian: bool = False,
    ) -> list[AgentOutcome]:
        self._built()
        t = self.transport
        n = len(agents)
        records = [self._record(a) for a in agents]
        budget = self._budget(use_guard)
        out: list[AgentOutcome | None] = [None] * n
        losses = _Losses(self.retries)
        # Agent i goes to slot i mod W, where its solver is cached, in a few batches queued on that worker.
        w = t.slots()
        queues: list[deque[tuple[int, ...]]] = []
        for j in range(w):
            mine = [i for i in range(n) if i % w == j]
            size = max(1, -(-len(mine) // t.batches))
            queues.append(deque(tuple(mine[k : k + size]) for k in range(0, len(mine), size)))
        handles: dict[tuple[int, ...], Any] = {}
        started = [0.0] * w  # when the batch at the head of each queue began, s (monotonic clock)

        def submit(j: int) -> None:
            """Send every batch queued for slot ``j`` (the head's clock starts now)."""
            for batch in queues[j]:
                reqs = [(*records[i], params[i], warm[i], use_guard, want_hessian) for i in batch]
                handles[batch] = t.submit(j, reqs)
            started[j] = time.monotonic()

        def fail(batch: Sequence[int], message: str) -> None:
            for i in batch:
                out[i] = _failed(agents[i], params[i], Status.FAILED, message)

        for j in range(w):
            if queues[j]:
                submit(j)
        while any(queues):
            live = [j for j in range(w) if queues[j]]
            timeout = None
            if budget is not None:
                ends = [started[j] + budget * len(queues[j][0]) for j in live]
                timeout = max(0.0, min(ends) - time.monotonic())
            seen = t.wait([handles[queues[j][0]] for j in live], timeout)
            now = time.monotonic()
            if seen.stranded is not None:
                for j in live:
                    t.discard([handles[b] for b in queues[j]])
                    for batch in queues[j]:
                        fail(batch, seen.stranded)
                    queues[j].clear()
                break
            for k, j in enumerate(live):
                batch = queues[j][0]
                if k in seen.answers:
                    for i, (reply, _pid) in zip(batch, seen.answers[k], strict=True):
                        out[i] = self._attach(agents[i], reply)
                    queues[j].popleft()
                    started[j] = now
                elif k in seen.errors:
                    fail(batch, f"worker error: {seen.errors[k]!r}")
                    queues[j].popleft()
                    started[j] = now
                elif k in seen.lost:
                    # The worker is gone with every batch queued on it: they go again (the transport gives the
                    # slot a fresh worker), as long as the retry policy allows.
                    t.discard([handles[b] for b in queues[j]])
                    again = [b for b in queues[j] if losses.resend(b)]
                    for b in set(queues[j]) - set(again):
                        for i in b:
                            out[i] = losses.failed(agents[i], params[i], i)
                    queues[j] = deque(again)
                    if again:
                        submit(j)
                elif budget is not None and now - started[j] >= budget * len(batch):
                    # No answer within the budget: the worker is restarted; a single request counts as hung, a
                    # batch is split and sent again one by one to find the request that hangs.
                    t.restart(j, [handles[b] for b in queues[j]])
                    queues[j].popleft()
                    if len(batch) == 1:
                        out[batch[0]] = self._hung(agents[batch[0]], params[batch[0]], budget)
                    else:
                        queues[j].extendleft((i,) for i in reversed(batch))
                    if queues[j]:
                        submit(j)
        assert all(o is not None for o in out)
        return out  # type: ignore[return-value]

    def terminate(self) -> None:
        self.transport.terminate()

    def close(self) -> None:
        self.transport.close()
