"""Executors: who solves the agents of a round (in this process, in local worker processes, on a Dask cluster).

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

:class:`InProcessExecutor` (the default) solves ``agent.problem`` in the calling process.
:class:`ProcessExecutor` runs ``workers`` local worker processes (``concurrent.futures`` with the
``spawn`` start method); :class:`DaskExecutor` submits to a Dask distributed cluster (the optional
``cluster`` extra: ``pip install 'negotiate[cluster]'``). Both remote executors ship *fleet records*, not
solvers: each request carries the agent's :class:`~negotiate.fleet.spec.AgentSpec` (with the fleet's resources
and the solver options, pickled once) and the warm-start data; a worker builds the agent's NLP the first
time it sees that record and keeps it in a per-process cache keyed by a digest of the record, so each agent
is built once per worker, never per round. Agent ``i`` is always sent to the same worker first (its
``i mod workers``), which keeps the caches disjoint; a local worker receives its agents of a round in
:data:`BATCHES` batches, so that a round costs a few round trips per worker, not one per agent. Results
are pickled without their CasADi problem and re-attached to the coordinator's copy of the agent, so
``result.sensitivity()`` keeps working there.

Faults. A worker process that dies during a round (killed, out of memory, a crash in a solver) loses only
its unanswered requests: they are sent again (to a fresh process) up to ``retries`` times, so the round
completes with the answers it would have had; one that died between rounds is replaced before the next
round's requests are sent (nothing was lost with it). One policy (:class:`_Losses`) counts the losses of
both remote executors. A Dask cluster left with no worker at all is waited for at most ``worker_wait`` s
(:data:`WORKER_WAIT`): then a local cluster is replaced by a new one, and on another scheduler the
round's unanswered agents are failed solves -- a round never waits forever. A solve has a wall-time limit
``time_limit`` (s) when one is given: inside the solver through IPOPT's ``max_wall_time`` option (the agent
reports ``time-limit``), and for a request that gets no answer at all (a solve stuck outside IPOPT) through
the request's future, after ``time_limit`` per solve the request may make (the solve and the guard's
probes) plus :data:`REPLY_GRACE` s. Such an agent is reported with status ``time-limit`` for that round and
its worker is replaced; the run goes on.

Processes. Local worker processes end with their coordinator, however it ends (:func:`_die_with_parent`);
:meth:`Executor.terminate` kills them at once, for a coordinator that exits without cleaning up. The local
Dask cluster listens on 127.0.0.1 only, on ports the system chooses, and speaks TLS with credentials made for
that cluster alone, so that no other user of the machine can connect to it and run code in a worker.

Determinism: the same fleet and settings give the same schedule with every executor. Each request is a
pure function of (agent record, parameters, warm start), the answers are put back in the order of the
agents, and nothing depends on which worker answered first.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import pickle
import signal
import sys
import threading
import time
from collections import deque
from collections.abc import Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from negotiate.core.guard import MAX_PROBED_ROWS, GuardReport, guard
from negotiate.core.nlp import LocalResult, ParametricNLP, screen_result, try_solve
from negotiate.core.status import Status
from negotiate.fleet.spec import AgentSpec, FleetSpec

if TYPE_CHECKING:
    from negotiate.core.agent import AgentModel

__all__ = [
    "REPLY_GRACE",
    "WORKER_WAIT",
    "AgentOutcome",
    "DaskExecutor",
    "Executor",
    "InProcessExecutor",
    "ProcessExecutor",
    "evaluate_agent",
    "make_executor",
]

BATCHES = 4
"""A local worker receives its agents of a round in this many batches (fewer round trips; a hung batch is
split into single requests to find the agent that hangs)."""

REPLY_GRACE = 10.0
"""Seconds added to a remote request's time budget for building the agent, certification and transport."""

WORKER_WAIT = 60.0
"""Seconds a Dask executor waits while its cluster has no worker at all (a nanny restarting a killed worker
takes a few): then a local cluster is replaced by a new one, and on another scheduler the round's
unanswered agents are failed solves."""

_POLL = 0.5
"""Seconds between two looks at a Dask cluster's workers while a round waits for its answers."""


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


# ------------------------------------------------------------------------------------------------------
# the worker side (runs in worker processes; module level so that it pickles by reference)
# ------------------------------------------------------------------------------------------------------

_CACHE: dict[str, tuple[ParametricNLP, threading.Lock]] = {}
_CACHE_LOCK = threading.Lock()


def _build_from_record(blob: bytes) -> ParametricNLP:
    """Build one agent from its pickled (resources, AgentSpec, solver options) record, as build_agents does."""
    from negotiate.fleet.parse import build_report

    resources, agent, solver_options = pickle.loads(blob)
    built, problems = build_report(FleetSpec(f"worker:{agent.name}", resources, (agent,)), solver_options)
    if problems or built[0].model is None:
        raise RuntimeError("; ".join(str(p) for p in problems) or f"agent {agent.name!r} could not be built")
    return built[0].model.problem


def _worker_init(kernel_watch: bool) -> None:
    """Start of a local worker process: Ctrl-C is left to the coordinator (an interrupt inside IPOPT ends the
    solve as failed), and the worker ends with the coordinator."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _die_with_parent(kernel_watch)


def _die_with_parent(kernel_watch: bool) -> None:
    """End this process as soon as its parent process ends, however it ends (killed outright, or exiting at
    once on a second interrupt): an orphaned worker would otherwise wait for requests forever.

    Everywhere: a daemon thread waits on multiprocessing's sentinel of the parent (a pipe the parent holds
    open, readable once it is gone) and exits. On Linux, with ``kernel_watch``, the kernel also sends SIGKILL
    when the parent ends (``prctl(PR_SET_PDEATHSIG)``), which reaches a worker busy in compiled code that does
    not let the thread run. The kernel's signal follows the *thread* that started the process, so it is asked
    for only by processes started from the parent's main thread.
    """
    import multiprocessing
    from multiprocessing.connection import wait

    parent = multiprocessing.parent_process()
    if parent is None:  # not started by multiprocessing
        return
    if kernel_watch and sys.platform.startswith("linux"):
        import ctypes

        with contextlib.suppress(OSError, AttributeError):
            ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)  # 1: PR_SET_PDEATHSIG
        if os.getppid() != parent.pid:  # the parent ended before the request took effect
            os._exit(1)

    def watch() -> None:
        wait([parent.sentinel])
        os._exit(1)

    threading.Thread(target=watch, name="negotiate-parent-watch", daemon=True).start()


def _cached(digest: str, blob: bytes) -> tuple[ParametricNLP, threading.Lock]:
    with _CACHE_LOCK:
        entry = _CACHE.get(digest)
    if entry is None:
        entry = (_build_from_record(blob), threading.Lock())
        with _CACHE_LOCK:
            entry = _CACHE.setdefault(digest, entry)
    return entry


def _serve(
    digest: str, blob: bytes, p: np.ndarray, warm: LocalResult | None, use_guard: bool, want_hessian: bool
) -> tuple[AgentOutcome, int]:
    """One request in a worker: the cached agent's answer and the worker's process id."""
    problem, lock = _cached(digest, blob)
    with lock:  # a ParametricNLP is not thread-safe; Dask workers may run several threads
        out = evaluate_agent(problem, p, warm, use_guard=use_guard, want_hessian=want_hessian)
    return out, os.getpid()


def _serve_batch(requests: list[tuple[Any, ...]]) -> list[tuple[AgentOutcome, int]]:
    """Several requests in a worker, answered in order."""
    return [_serve(*r) for r in requests]


def _serve_packed(blob: bytes) -> bytes:
    """:func:`_serve_batch` on a pickled batch, answered pickled: one frame each way. (Dask would otherwise
    send every NumPy array of every request and answer as a frame of its own, which at a hundred agents per
    task costs more than the solves.)"""
    return pickle.dumps(_serve_batch(pickle.loads(blob)), protocol=pickle.HIGHEST_PROTOCOL)


def _prepare(digest: str, blob: bytes) -> int:
    """Build (or find) one agent in this worker's cache, with its warm-start solver; the worker's process id."""
    _cached(digest, blob)[0].warm_solver()
    return os.getpid()


def cached_agents() -> int:
    """Number of agents built in this process by executor requests (for tests and diagnostics)."""
    with _CACHE_LOCK:
        return len(_CACHE)


# ------------------------------------------------------------------------------------------------------
# the coordinator side of remote executors
# ------------------------------------------------------------------------------------------------------


def _time_options(time_limit: float | None, solver_options: Mapping[str, Any] | None) -> dict[str, Any] | None:
    opts = dict(solver_options or {})
    if time_limit is not None:
        opts.setdefault("ipopt.max_wall_time", float(time_limit))
    return opts or None


def _failed(agent: AgentModel, p: np.ndarray, status: Status, message: str) -> AgentOutcome:
    return AgentOutcome(LocalResult.failure(agent.problem, p, message, status), None, None, 1)


class _Losses:
    """The remote executors' one retry policy, kept per round: a request whose worker was lost with it (the
    process died, or left the cluster) is sent again, at most ``retries`` times; after that its agent is a
    failed solve for the round."""

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


class _RemoteExecutor(Executor):
    """What the process and Dask executors share: fleet records, time budget, re-attachment."""

    remote = True

    def __init__(
        self,
        spec: FleetSpec,
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
        self.lost_workers = 0
        """Worker processes lost (died or replaced after a timeout) since the executor was made."""
        self._building: list[Any] = []  # futures of start()'s builds, waited for by the first evaluate()
        self._records: dict[str, tuple[str, bytes]] = {}
        for a in spec.agents:
            blob = pickle.dumps((spec.resources, a, self.solver_options), protocol=pickle.HIGHEST_PROTOCOL)
            self._records[a.name] = (hashlib.sha256(blob).hexdigest(), blob)

    def _built(self) -> None:
        """Wait for the builds that :meth:`start` began (a failed one is left to the first request)."""
        building, self._building = self._building, []
        for fut in building:
            with contextlib.suppress(Exception):
                fut.result()

    def _record(self, agent: AgentModel | AgentSpec) -> tuple[str, bytes]:
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
        return _failed(
            agent, p, Status.TIME_LIMIT,
            f"no answer from the worker within {budget:.3g} s (per-solve limit {self.time_limit:.3g} s); "
            "the worker was replaced",
        )  # fmt: skip


class ProcessExecutor(_RemoteExecutor):
    """Solve agents in ``workers`` local worker processes (``concurrent.futures``, ``spawn`` start method).

    Parameters
    ----------
    spec : FleetSpec
        The fleet whose agents are solved (the workers build them from its records).
    workers : int
        Number of worker processes (each a one-process pool, so that agent ``i`` always meets its own
        cache in worker ``i mod workers``).
    solver_options : mapping, optional
        Solver options for every agent, as for :func:`negotiate.fleet.build_agents`.
    time_limit : float, optional
        Wall-time limit per solve, s (IPOPT's ``max_wall_time`` plus a timeout on each request).
    retries : int
        How often the requests of a lost worker are sent again within one round.
    grace : float
        Seconds added to a request's time budget (building the agent, certification, transport).
    context : {"spawn", "forkserver"}
        Start method of the worker processes (never ``fork``: CasADi and BLAS threads do not survive it).
    """

    def __init__(
        self,
        spec: FleetSpec,
        workers: int = 2,
        *,
        solver_options: Mapping[str, Any] | None = None,
        time_limit: float | None = None,
        retries: int = 2,
        grace: float = REPLY_GRACE,
        context: str = "spawn",
    ) -> None:
        if not (isinstance(workers, int) and workers >= 1):
            raise ValueError(f"'workers' must be an integer >= 1, got {workers!r}")
        if context not in ("spawn", "forkserver"):
            raise ValueError(f"'context' must be 'spawn' or 'forkserver', got {context!r}")
        super().__init__(spec, solver_options=solver_options, time_limit=time_limit, retries=retries, grace=grace)
        import multiprocessing

        self.workers = workers
        self._context = multiprocessing.get_context(context)
        self._pools: list[ProcessPoolExecutor | None] = [None] * workers

    def _pool(self, j: int) -> ProcessPoolExecutor:
        pool = self._pools[j]
        if pool is None:
            # The pool starts its process in the thread that submits to it, which is this one (see _send).
            main = threading.current_thread() is threading.main_thread()
            pool = self._pools[j] = ProcessPoolExecutor(
                max_workers=1, mp_context=self._context, initializer=_worker_init, initargs=(main,)
            )
        return pool

    def _send(self, j: int, fn: Any, *args: Any) -> Future[Any]:
        """Submit ``fn(*args)`` to worker ``j``. A worker found dead before anything is sent to it (it died
        between rounds) is replaced first: no request was lost with it. One that dies while requests are being
        sent hands back a failed future, which the round treats as any worker lost with its requests."""
        try:
            return self._pool(j).submit(fn, *args)
        except BrokenProcessPool:
            self._replace(j, kill=False)
        try:
            return self._pool(j).submit(fn, *args)
        except BrokenProcessPool as exc:
            fut: Future[Any] = Future()
            fut.set_exception(exc)
            return fut

    def _replace(self, j: int, kill: bool) -> None:
        """Drop worker ``j`` (killing its process when it hangs); the next request starts a fresh one."""
        pool = self._pools[j]
        self._pools[j] = None
        self.lost_workers += 1
        if pool is None:
            return
        if kill:
            # concurrent.futures has no public way to stop a busy worker before Python 3.14.
            for proc in _processes(pool):
                proc.kill()
        pool.shutdown(wait=False, cancel_futures=True)

    def prepare(self, agents: Sequence[AgentModel]) -> None:
        self._submit_builds(agents)
        self._built()

    def start(self) -> None:
        if not self._building:
            self._submit_builds(self.spec.agents)  # the fleet's order, as build_agents returns them

    def _submit_builds(self, agents: Sequence[AgentModel | AgentSpec]) -> None:
        for i, a in enumerate(agents):
            self._building.append(self._send(i % self.workers, _prepare, *self._record(a)))

    def worker_pids(self) -> list[int | None]:
        """Process id of each running worker (``None`` where none has started yet)."""
        pids: list[int | None] = []
        for pool in self._pools:
            procs = _processes(pool)
            pids.append(procs[0].pid if procs else None)
        return pids

    def terminate(self) -> None:
        for pool in list(self._pools):
            for proc in _processes(pool):
                with contextlib.suppress(Exception):
                    proc.kill()

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
        n = len(agents)
        records = [self._record(a) for a in agents]
        budget = self._budget(use_guard)
        out: list[AgentOutcome | None] = [None] * n
        # Each worker gets its agents in a few batches (one round trip per batch, not per agent).
        queues: list[deque[tuple[int, ...]]] = []
        for j in range(self.workers):
            mine = [i for i in range(n) if i % self.workers == j]
            size = max(1, -(-len(mine) // BATCHES))
            queues.append(deque(tuple(mine[k : k + size]) for k in range(0, len(mine), size)))
        futures: dict[tuple[int, ...], Future[Any]] = {}
        started = [0.0] * self.workers  # when the batch at the head of each queue began, s

        losses = _Losses(self.retries)

        def submit(j: int) -> None:
            for batch in queues[j]:
                reqs = [(*records[i], params[i], warm[i], use_guard, want_hessian) for i in batch]
                futures[batch] = self._send(j, _serve_batch, reqs)
            started[j] = time.perf_counter()

        for j in range(self.workers):
            if queues[j]:
                submit(j)
        while any(queues):
            heads = {futures[q[0]]: j for j, q in enumerate(queues) if q}
            timeout = None
            if budget is not None:
                ends = [started[j] + budget * len(queues[j][0]) for j in heads.values()]
                timeout = max(0.0, min(ends) - time.perf_counter())
            done, _ = wait(heads, timeout=timeout, return_when=FIRST_COMPLETED)
            now = time.perf_counter()
            for fut, j in heads.items():
                batch = queues[j][0]
                if fut in done:
                    try:
                        replies = fut.result()
                    except BrokenProcessPool:
                        # The worker died: its unanswered requests go again to a fresh process (_send
                        # replaces the dead one), as long as the retry policy allows.
                        again = [b for b in queues[j] if losses.resend(b)]
                        for b in set(queues[j]) - set(again):
                            for k in b:
                                out[k] = losses.failed(agents[k], params[k], k)
                        queues[j] = deque(again)
                        if again:
                            submit(j)
                        continue
                    for i, (reply, _pid) in zip(batch, replies, strict=True):
                        out[i] = self._attach(agents[i], reply)
                    queues[j].popleft()
                    started[j] = now
                elif budget is not None and now - started[j] >= budget * len(batch):
                    queues[j].popleft()
                    self._replace(j, kill=True)
                    if len(batch) == 1:
                        out[batch[0]] = self._hung(agents[batch[0]], params[batch[0]], budget)
                    else:  # send the batch's requests one by one to find the one that hangs
                        queues[j].extendleft((i,) for i in reversed(batch))
                    if queues[j]:
                        submit(j)
        assert all(o is not None for o in out)
        return out  # type: ignore[return-value]

    def close(self) -> None:
        for j, pool in enumerate(self._pools):
            if pool is not None:
                pool.shutdown(wait=True, cancel_futures=True)
            self._pools[j] = None


def _processes(pool: ProcessPoolExecutor | None) -> list[Any]:
    """The live processes of a pool (concurrent.futures keeps them in a private mapping)."""
    return list((getattr(pool, "_processes", None) or {}).values()) if pool is not None else []


class DaskExecutor(_RemoteExecutor):
    """Solve agents on a Dask distributed cluster (the optional ``cluster`` extra).

    Parameters
    ----------
    spec : FleetSpec
        The fleet whose agents are solved (the workers build them from its records).
    scheduler : str, optional
        Address of a running scheduler, ``tcp://HOST:PORT``. When omitted, a ``LocalCluster`` of
        ``workers`` single-threaded worker processes is started and closed with the executor: on the
        loopback interface (127.0.0.1), on ports the system chooses (no dashboard), speaking TLS with
        temporary credentials made for it alone (``distributed.security.Security.temporary``; the
        ``cryptography`` package, part of the ``cluster`` extra).
    workers : int
        Number of workers of the local cluster.
    solver_options, time_limit, retries, grace
        As for :class:`ProcessExecutor`.
    worker_wait : float
        Seconds to wait while the cluster has no worker at all (:data:`WORKER_WAIT`). After that the local
        cluster is replaced by a new one (scheduler, workers and credentials) and the round's unanswered
        requests are sent again; on another scheduler they are failed solves, and later rounds fail at once
        until a worker shows up. This bound holds with or without ``time_limit``.

    Agent ``i`` is sent preferably to the ``i mod W``-th worker (by address); the scheduler may move it when
    that worker is gone. Every worker keeps its own cache of built agents (a module-level dictionary of the
    worker process). A lost worker's requests are rescheduled by Dask itself; a request still bound to a
    worker that has left the cluster (Dask leaves it waiting for that worker), or that fails with a lost
    worker, is sent again up to ``retries`` times.
    """

    def __init__(
        self,
        spec: FleetSpec,
        scheduler: str | None = None,
        workers: int = 2,
        *,
        solver_options: Mapping[str, Any] | None = None,
        time_limit: float | None = None,
        retries: int = 2,
        grace: float = REPLY_GRACE,
        worker_wait: float = WORKER_WAIT,
    ) -> None:
        try:
            import distributed
        except ImportError as exc:
            raise ImportError(
                "the Dask executor needs the optional 'cluster' extra: pip install 'negotiate[cluster]'"
            ) from exc
        if not (isinstance(workers, int) and workers >= 1):
            raise ValueError(f"'workers' must be an integer >= 1, got {workers!r}")
        if not (isinstance(worker_wait, int | float) and 0 < worker_wait < float("inf")):
            raise ValueError(f"'worker_wait' must be a number of seconds > 0, got {worker_wait!r}")
        super().__init__(spec, solver_options=solver_options, time_limit=time_limit, retries=retries, grace=grace)
        self.workers = workers
        self.worker_wait = float(worker_wait)
        self._cluster = None
        self._tag = os.urandom(4).hex()  # task keys unique to this executor on a shared scheduler
        self._workerless_since: float | None = None  # when the cluster was first seen without a worker
        if scheduler is None:
            self._cluster = _local_cluster(workers)
            self.client = distributed.Client(self._cluster)  # with the cluster's credentials
        else:
            self.client = distributed.Client(scheduler)
        self.scheduler = self.client.scheduler.address
        self._round = 0

    def prepare(self, agents: Sequence[AgentModel]) -> None:
        self._submit_builds(agents)
        self._built()

    def start(self) -> None:
        if not self._building:
            self._submit_builds(self.spec.agents)

    def _submit_builds(self, agents: Sequence[AgentModel | AgentSpec]) -> None:
        addresses = self.worker_addresses()
        for i, a in enumerate(agents):
            target = addresses[i % len(addresses)] if addresses else None
            key = f"negotiate-{self._tag}-build-{i}"
            self._building.append((self._submit(target, _prepare, *self._record(a), key=key), target))

    def _built(self) -> None:
        """Wait for the builds that :meth:`start` began, as a round waits for its answers; builds left
        unfinished (a worker gone, no worker) are dropped: the requests build what is missing."""
        building, self._building = self._building, []
        if building:
            futures, targets = zip(*building, strict=True)
            self._await(futures, targets, None)
            for fut in futures:
                with contextlib.suppress(Exception):  # nothing for finished ones, nor on a replaced cluster
                    fut.cancel()

    def _submit(self, target: str | None, fn: Any, *args: Any, key: str) -> Any:
        where = {"workers": [target], "allow_other_workers": True} if target is not None else {}
        return self.client.submit(fn, *args, key=key, pure=False, **where)

    def worker_addresses(self) -> list[str]:
        """Addresses of the cluster's workers, sorted."""
        return sorted(self.client.scheduler_info(n_workers=-1)["workers"])

    def evaluate(
        self,
        agents: Sequence[AgentModel],
        params: Sequence[np.ndarray],
        warm: Sequence[LocalResult | None],
        *,
        use_guard: bool = False,
        want_hessian: bool = False,
    ) -> list[AgentOutcome]:
        import distributed

        self._built()
        n = len(agents)
        records = [self._record(a) for a in agents]
        budget = self._budget(use_guard)
        self._round += 1
        out: list[AgentOutcome | None] = [None] * n
        pending = list(range(n))
        alone: set[int] = set()  # requests of a batch that hung: sent one per task to find the one that hangs
        losses = _Losses(self.retries)
        passes = 0
        while pending:
            addresses = self.worker_addresses()
            w = max(1, len(addresses))
            # One task per worker and round, not per agent: the scheduler's round trips cost more than a
            # truck's solve, and a task queued behind another could be stolen by an idle worker, which would
            # then build those agents first (~0.2 s each, a hundred solves' worth). Agent i goes to worker
            # i mod W, where its solver is cached.
            batches: list[tuple[int, tuple[int, ...]]] = []
            for j in range(w):
                mine = tuple(i for i in pending if i % w == j and i not in alone)
                if mine:
                    batches.append((j, mine))
            # Requests under suspicion of hanging go alone, at most one per worker at a time, so that none
            # waits in a queue behind another that may hang; the rest wait for the next pass.
            singles = [i for i in pending if i in alone]
            batches += [(k, (i,)) for k, i in enumerate(singles[:w])]
            later = singles[w:]
            futures, targets = [], []
            for b, (j, batch) in enumerate(batches):
                reqs = [(*records[i], params[i], warm[i], use_guard, want_hessian) for i in batch]
                target = addresses[j] if addresses else None
                packed = pickle.dumps(reqs, protocol=pickle.HIGHEST_PROTOCOL)
                key = f"negotiate-{self._tag}-{self._round}-{passes}-{b}"
                futures.append(self._submit(target, _serve_packed, packed, key=key))
                targets.append(target)
            # Requests queue on single-threaded workers, so the budget covers the longest queue.
            load = [0] * w
            for j, batch in batches:
                load[j] += len(batch)
            timeout = None if budget is None else budget * max(load)
            gone, workerless = self._await(futures, targets, timeout)
            retry: list[int] = []
            stuck_workers: set[str] = set()
            for k, ((_, batch), fut) in enumerate(zip(batches, futures, strict=True)):
                if k not in gone and fut.status == "finished":
                    for i, (reply, _pid) in zip(batch, pickle.loads(fut.result()), strict=True):
                        out[i] = self._attach(agents[i], reply)
                    continue
                error = fut.exception() if k not in gone and fut.status == "error" else None
                if workerless:
                    fut.cancel()
                    for i in batch:
                        out[i] = _failed(agents[i], params[i], Status.FAILED,
                                         f"no worker alive on the Dask scheduler {self.scheduler} for "
                                         f"{self.worker_wait:.3g} s; the request was not answered")  # fmt: skip
                elif (
                    k in gone
                    or fut.status in ("cancelled", "lost")
                    or isinstance(error, distributed.KilledWorker)
                    or budget is None  # (not answered though the wait had no end: lost too)
                ):
                    # Lost with its worker, left bound to a worker that is gone, or cancelled by the cluster.
                    with contextlib.suppress(Exception):  # (a replaced local cluster took its client along)
                        fut.cancel()
                    self.lost_workers += 1
                    if losses.resend(batch):
                        retry += batch
                    else:
                        for i in batch:
                            out[i] = losses.failed(agents[i], params[i], i)
                elif error is not None:
                    for i in batch:
                        out[i] = _failed(agents[i], params[i], Status.FAILED, f"worker error: {error!r}")
                else:
                    # Still running or queued after the budget: a single request counts as hung, a batch is
                    # split and sent again one by one.
                    if len(batch) == 1:
                        out[batch[0]] = self._hung(agents[batch[0]], params[batch[0]], budget)
                    else:
                        retry += batch
                        alone.update(batch)
                    stuck_workers.update(self._where(fut))
                    fut.cancel()
            if stuck_workers:
                self.lost_workers += len(stuck_workers)
                self._restart_workers(stuck_workers)
            pending = sorted(retry + later)
            passes += 1
        return out  # type: ignore[return-value]

    def _await(
        self, futures: Sequence[Any], targets: Sequence[str | None], timeout: float | None
    ) -> tuple[set[int], bool]:
        """Wait until every future is done or ``timeout`` s have passed, looking at the cluster's workers every
        :data:`_POLL` s. Returns early with the indices of unfinished futures bound to a worker that has left
        the cluster (Dask would keep them waiting for it), or with True when the cluster has had no worker for
        ``worker_wait`` s (on a scheduler this executor did not start; a local cluster is replaced instead, and
        every future counts as gone with it)."""
        import distributed

        end = None if timeout is None else time.monotonic() + timeout
        while True:
            step = _POLL if end is None else max(0.0, min(_POLL, end - time.monotonic()))
            with contextlib.suppress(TimeoutError):
                distributed.wait(futures, timeout=step)
                return set(), False
            now = time.monotonic()
            if end is not None and now >= end:
                return set(), False
            alive = set(self.worker_addresses())
            if alive:
                self._workerless_since = None
                gone = {k for k, (f, t) in enumerate(zip(futures, targets, strict=True))
                        if t is not None and t not in alive and not f.done()}  # fmt: skip
                if gone:
                    return gone, False
                continue
            if self._workerless_since is None:
                self._workerless_since = now
            if now - self._workerless_since < self.worker_wait:
                continue
            if self._cluster is None:
                return set(), True
            self._restart_local()
            return set(range(len(futures))), False

    def _restart_workers(self, addresses: set[str]) -> None:
        """Restart the workers at ``addresses`` (a hung request occupies them). On the local cluster the worker
        processes are killed and their nannies start new ones at once: Dask's graceful restart can time out
        on a busy machine, and the scheduler then closes the nanny for good."""
        if self._cluster is None:
            self.client.restart_workers(sorted(addresses), raise_for_error=False)
            return
        self._kill_workers(lambda nanny: nanny.worker_address in addresses)

    def _kill_workers(self, which: Any) -> None:
        """SIGKILL the local cluster's worker processes whose nanny passes ``which`` (signal-handler safe)."""
        for nanny in list(self._cluster.workers.values()) if self._cluster is not None else ():
            with contextlib.suppress(Exception):
                if which(nanny) and nanny.pid:
                    os.kill(nanny.pid, signal.SIGKILL)

    def _restart_local(self) -> None:
        """Replace the local cluster after it lost every worker for good: a new scheduler and new workers
        (and credentials), started as at construction, which returns once they are up."""
        import distributed

        self._workerless_since = None
        self.lost_workers += self.workers
        with contextlib.suppress(Exception):
            self.client.close()
        with contextlib.suppress(Exception):
            self._cluster.close()
        self._cluster = _local_cluster(self.workers)
        self.client = distributed.Client(self._cluster)
        self.scheduler = self.client.scheduler.address

    def _where(self, fut: Any) -> list[str]:
        """Workers processing ``fut`` (empty when unknown)."""
        try:
            info = self.client.who_has([fut])
            processing = self.client.processing()
        except Exception:  # noqa: BLE001 - diagnostics only
            return []
        where = [w for w, keys in processing.items() if fut.key in keys]
        return where or list(info.get(fut.key, ()))

    def terminate(self) -> None:
        self._kill_workers(lambda nanny: True)

    def close(self) -> None:
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None


def _local_cluster(workers: int) -> Any:
    """A Dask ``LocalCluster`` of ``workers`` single-threaded worker processes that only this process can use:
    loopback interface, ports chosen by the system (the scheduler's HTTP endpoint, which Dask always opens,
    included: no dashboard, health check only), TLS with temporary credentials made here."""
    import logging

    import dask
    import distributed

    try:
        from distributed.security import Security

        security = Security.temporary()
    except ImportError as exc:
        raise ImportError(
            "the local Dask cluster needs the 'cryptography' package for its TLS credentials: "
            "pip install 'negotiate[cluster]'"
        ) from exc
    settings = {
        # No work stealing on our own cluster: moving an agent's request means building it again.
        "distributed.scheduler.work-stealing": False,
        "distributed.scheduler.http.routes": ["distributed.http.health"],
    }
    with dask.config.set(settings):
        return distributed.LocalCluster(
            n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1", protocol="tls://",
            security=security, scheduler_port=0, dashboard_address=None,
            scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}, silence_logs=logging.ERROR,
        )  # fmt: skip


def make_executor(
    spec: FleetSpec,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    cluster: str | None = None,
    time_limit: float | None = None,
) -> Executor:
    """The executor the command line asks for: ``scheduler`` (an address) or ``cluster="local"`` gives a
    :class:`DaskExecutor` (``workers`` local workers, default 2), ``workers`` alone a
    :class:`ProcessExecutor`, nothing the :class:`InProcessExecutor`."""
    if scheduler is not None and cluster is not None:
        raise ValueError("give either a scheduler address or --cluster local, not both")
    if cluster is not None and cluster != "local":
        raise ValueError(f"'cluster' must be 'local', got {cluster!r}")
    if scheduler is not None and not scheduler.startswith(("tcp://", "tls://", "inproc://", "ucx://")):
        raise ValueError(f"'scheduler' must be an address like tcp://HOST:PORT, got {scheduler!r}")
    if scheduler is not None or cluster is not None:
        return DaskExecutor(spec, scheduler, workers or 2, time_limit=time_limit)
    if workers is not None:
        return ProcessExecutor(spec, workers, time_limit=time_limit)
    return InProcessExecutor()
