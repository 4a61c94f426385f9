"""A transport over local worker processes (``concurrent.futures``, ``spawn`` start method), and
:class:`ProcessExecutor`, the remote executor over it.

Each worker slot is a one-process pool, so that agent ``i`` always meets its own cache in worker ``i mod
workers``; a worker receives its agents of a round in :data:`BATCHES` batches. A worker that died between rounds
is replaced before anything is sent to it (nothing was lost with it); one that dies during a round hands back
its unanswered batches as lost (the policy of :mod:`negotiate.execution.remote` sends them again), and one that
hangs past its budget is killed and replaced.

Worker processes end with their coordinator, however it ends (:func:`negotiate.execution.worker.worker_init`);
:meth:`ProcessExecutor.terminate` kills them at once, for a coordinator that exits without cleaning up.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Any, ClassVar

from negotiate.execution.remote import REPLY_GRACE, Record, RemoteExecutor, Settled, Transport
from negotiate.execution.worker import prepare, serve_batch, worker_init
from negotiate.fleet.spec import FleetSpec

__all__ = ["BATCHES", "ProcessExecutor", "WorkerProcesses"]

BATCHES = 4
"""A local worker receives its agents of a round in this many batches (fewer round trips; a hung batch is
split into single requests to find the agent that hangs)."""


class WorkerProcesses(Transport):
    """``workers`` local worker processes, one one-process pool per slot, started on first use.

    Parameters
    ----------
    workers : int
        Number of worker processes.
    context : {"spawn", "forkserver"}
        Start method of the worker processes.
    """

    batches: ClassVar[int] = BATCHES

    def __init__(self, workers: int, context: str) -> None:
        import multiprocessing

        self.workers = workers
        self.lost_workers = 0
        self._context = multiprocessing.get_context(context)
        self._pools: list[ProcessPoolExecutor | None] = [None] * workers

    def pool(self, j: int) -> ProcessPoolExecutor:
        """Worker ``j``'s pool, started when it has none."""
        pool = self._pools[j]
        if pool is None:
            # The pool starts its process in the thread that submits to it, which is this one (see _send).
            main = threading.current_thread() is threading.main_thread()
            pool = self._pools[j] = ProcessPoolExecutor(
                max_workers=1, mp_context=self._context, initializer=worker_init, initargs=(main,)
            )
        return pool

    def _send(self, j: int, fn: Any, *args: Any) -> Future[Any]:
        """Submit ``fn(*args)`` to worker ``j``. A worker found dead before anything is sent to it (it died
        between rounds, or during the round with the batches now sent again) is replaced first. One that dies
        while requests are being sent hands back a failed future: lost with its requests."""
        try:
            return self.pool(j).submit(fn, *args)
        except BrokenProcessPool:
            self._replace(j, kill=False)
        try:
            return self.pool(j).submit(fn, *args)
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

    def slots(self) -> int:
        return self.workers

    def build(self, slot: int, record: Record) -> Future[Any]:
        return self._send(slot, prepare, *record)

    def submit(self, slot: int, requests: list[tuple[Any, ...]]) -> Future[Any]:
        return self._send(slot, serve_batch, requests)

    def wait(self, handles: Sequence[Future[Any]], timeout: float | None) -> Settled:
        done, _ = wait(handles, timeout=timeout, return_when=FIRST_COMPLETED)
        seen = Settled()
        for k, fut in enumerate(handles):
            if fut not in done:
                continue
            if fut.cancelled():
                seen.lost.add(k)
                continue
            exc = fut.exception()
            if exc is None:
                seen.answers[k] = fut.result()
            elif isinstance(exc, BrokenProcessPool):  # the process died: replaced by the next _send
                seen.lost.add(k)
            else:
                seen.errors[k] = exc
        return seen

    def discard(self, handles: Sequence[Future[Any]]) -> None:
        for fut in handles:
            fut.cancel()

    def restart(self, slot: int, handles: Sequence[Future[Any]]) -> None:
        self._replace(slot, kill=True)  # (its pool's futures are cancelled with it)

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

    def close(self) -> None:
        for j, pool in enumerate(self._pools):
            if pool is not None:
                pool.shutdown(wait=True, cancel_futures=True)
            self._pools[j] = None


def _processes(pool: ProcessPoolExecutor | None) -> list[Any]:
    """The live processes of a pool (concurrent.futures keeps them in a private mapping)."""
    return list((getattr(pool, "_processes", None) or {}).values()) if pool is not None else []


class ProcessExecutor(RemoteExecutor):
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

    transport: WorkerProcesses

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
        super().__init__(
            spec, lambda: WorkerProcesses(workers, context), solver_options=solver_options, time_limit=time_limit,
            retries=retries, grace=grace,
        )  # fmt: skip
        self.workers = workers

    def _pool(self, j: int) -> ProcessPoolExecutor:
        """Worker ``j``'s pool (started when it has none)."""
        return self.transport.pool(j)

    def worker_pids(self) -> list[int | None]:
        """Process id of each running worker (``None`` where none has started yet)."""
        return self.transport.worker_pids()
