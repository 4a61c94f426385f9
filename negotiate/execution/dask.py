"""A transport over a Dask distributed cluster, local or external, and :class:`DaskExecutor`, the remote executor
over it (the optional ``cluster`` extra: ``pip install 'negotiate[cluster]'``).

Worker slot ``j`` of a round is the ``j``-th worker by address (the scheduler may move a task when that worker is
gone). A slot receives its agents of a round as one task: the scheduler's round trips cost more than a truck's
solve, and a task queued behind another could be stolen by an idle worker, which would then build those agents
first (~0.2 s each, a hundred solves' worth). Every worker keeps its own cache of built agents
(:mod:`negotiate.execution.worker`).

Faults. A lost worker's tasks are rescheduled by Dask itself; a task still bound to a worker that has left the
cluster (Dask leaves it waiting for that worker), or that fails with a lost worker, is reported lost, and the
policy of :mod:`negotiate.execution.remote` sends it again. A cluster left with no worker at all is waited for
at most ``worker_wait`` s (:data:`WORKER_WAIT`): then a local cluster is replaced by a new one (every task is
lost with it), and on another scheduler the transport is stranded: the round's unanswered agents are failed
solves. A worker that hangs is restarted (on the local cluster its process is killed and its nanny starts a new
one).

The local cluster listens on 127.0.0.1 only, on ports the system chooses, and speaks TLS with credentials made for
that cluster alone, so that no other user of the machine can connect to it and run code in a worker.
"""

from __future__ import annotations

import contextlib
import os
import pickle
import signal
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

from negotiate.execution.remote import REPLY_GRACE, Record, RemoteExecutor, Settled, Transport
from negotiate.execution.worker import prepare, serve_packed
from negotiate.fleet.spec import FleetSpec

__all__ = ["WORKER_WAIT", "DaskCluster", "DaskExecutor"]

WORKER_WAIT = 60.0
"""Seconds a Dask executor waits while its cluster has no worker at all (a nanny restarting a killed worker
takes a few): then a local cluster is replaced by a new one, and on another scheduler the round's
unanswered agents are failed solves."""

_POLL = 0.5
"""Seconds between two looks at a Dask cluster's workers while a round waits for its answers."""


@dataclass(frozen=True)
class _Task:
    """A handle: the Dask future, the worker it was sent to (``None``: any), whether its answer is pickled."""

    future: Any
    target: str | None
    packed: bool


class DaskCluster(Transport):
    """The workers of a Dask cluster: a local one started here (``scheduler=None``) or the scheduler's.

    Parameters
    ----------
    scheduler : str or None
        Address of a running scheduler; ``None`` starts a local cluster of ``workers`` worker processes.
    workers : int
        Number of workers of the local cluster.
    worker_wait : float
        Seconds to wait while the cluster has no worker at all.
    """

    batches: ClassVar[int] = 1

    def __init__(self, scheduler: str | None, workers: int, worker_wait: float) -> None:
        import distributed

        self.workers = workers
        self.worker_wait = worker_wait
        self.lost_workers = 0
        self.cluster: Any = None
        self._tag = os.urandom(4).hex()  # task keys unique to this transport on a shared scheduler
        self._tasks = 0
        self._workerless_since: float | None = None  # when the cluster was first seen without a worker
        self._addresses: list[str] = []  # the slots, as last seen
        if scheduler is None:
            self.cluster = _local_cluster(workers)
            self.client = distributed.Client(self.cluster)  # with the cluster's credentials
        else:
            self.client = distributed.Client(scheduler)
        self.scheduler = self.client.scheduler.address

    def worker_addresses(self) -> list[str]:
        """Addresses of the cluster's workers, sorted."""
        return sorted(self.client.scheduler_info(n_workers=-1)["workers"])

    def slots(self) -> int:
        self._addresses = self.worker_addresses()
        return max(1, len(self._addresses))

    def _send(self, slot: int, fn: Any, *args: Any, packed: bool) -> _Task:
        target = self._addresses[slot % len(self._addresses)] if self._addresses else None
        where = {"workers": [target], "allow_other_workers": True} if target is not None else {}
        self._tasks += 1
        key = f"negotiate-{self._tag}-{self._tasks}"
        return _Task(self.client.submit(fn, *args, key=key, pure=False, **where), target, packed)

    def build(self, slot: int, record: Record) -> _Task:
        return self._send(slot, prepare, *record, packed=False)

    def submit(self, slot: int, requests: list[tuple[Any, ...]]) -> _Task:
        # One pickled frame each way: Dask would otherwise send every NumPy array of every request and answer
        # as a frame of its own, which at a hundred agents per task costs more than the solves.
        return self._send(slot, serve_packed, pickle.dumps(requests, protocol=pickle.HIGHEST_PROTOCOL), packed=True)

    def _settled(self, handles: Sequence[_Task]) -> Settled:
        import distributed

        seen = Settled()
        for k, h in enumerate(handles):
            status = h.future.status
            if status == "finished":
                value = h.future.result()
                seen.answers[k] = pickle.loads(value) if h.packed else value
            elif status == "error":
                error = h.future.exception()
                if isinstance(error, distributed.KilledWorker):
                    seen.lost.add(k)
                    self.lost_workers += 1
                else:
                    seen.errors[k] = error
            elif status in ("cancelled", "lost"):
                seen.lost.add(k)
                self.lost_workers += 1
        return seen

    def wait(self, handles: Sequence[_Task], timeout: float | None) -> Settled:
        """Wait as :meth:`Transport.wait` does, looking at the cluster's workers every :data:`_POLL` s: tasks
        bound to a worker that has left the cluster are lost (Dask would keep them waiting for it); after
        ``worker_wait`` s without any worker a local cluster is replaced (every task lost with it), and on another
        scheduler the transport is stranded."""
        import distributed

        futures = [h.future for h in handles]
        end = None if timeout is None else time.monotonic() + timeout
        while True:
            step = _POLL if end is None else max(0.0, min(_POLL, end - time.monotonic()))
            with contextlib.suppress(TimeoutError):
                distributed.wait(futures, timeout=step, return_when="FIRST_COMPLETED")
            seen = self._settled(handles)
            if seen:
                return seen
            now = time.monotonic()
            if end is not None and now >= end:
                return seen
            alive = self.worker_addresses()
            if alive:
                self._workerless_since = None
                self._addresses = alive
                gone = {k for k, h in enumerate(handles) if h.target is not None and h.target not in alive}
                if gone:
                    self.lost_workers += len({handles[k].target for k in gone})
                    return Settled(lost=gone)
                continue
            if self._workerless_since is None:
                self._workerless_since = now
            if now - self._workerless_since < self.worker_wait:
                continue
            if self.cluster is None:
                return Settled(stranded=f"no worker alive on the Dask scheduler {self.scheduler} for "
                                        f"{self.worker_wait:.3g} s; the request was not answered")  # fmt: skip
            self._restart_local()
            return Settled(lost=set(range(len(handles))))

    def discard(self, handles: Sequence[_Task]) -> None:
        for h in handles:
            with contextlib.suppress(Exception):  # (a replaced local cluster took its client along)
                h.future.cancel()

    def restart(self, slot: int, handles: Sequence[_Task]) -> None:
        """Restart the workers running ``handles[0]``. On the local cluster the worker processes are killed and
        their nannies start new ones at once: Dask's graceful restart can time out on a busy machine, and the
        scheduler then closes the nanny for good; the new workers are waited for."""
        where = set(self._where(handles[0].future)) if handles else set()
        self.discard(handles)
        if not where:
            return
        self.lost_workers += len(where)
        if self.cluster is None:
            self.client.restart_workers(sorted(where), raise_for_error=False)
        else:
            self._kill_workers(lambda nanny: nanny.worker_address in where)
            # The batches sent next start their clocks at once: wait (at most worker_wait s) until the new
            # workers have joined, so that no budget pays for a worker's start.
            end = time.monotonic() + self.worker_wait
            while time.monotonic() < end:
                alive = set(self.worker_addresses())
                if len(alive - where) >= self.workers:
                    break
                time.sleep(_POLL / 5)
        self._addresses = [a for a in self.worker_addresses() if a not in where]

    def _where(self, fut: Any) -> list[str]:
        """Workers processing ``fut`` (empty when unknown)."""
        try:
            info = self.client.who_has([fut])
            processing = self.client.processing()
        except Exception:  # noqa: BLE001 - diagnostics only
            return []
        where = [w for w, keys in processing.items() if fut.key in keys]
        return where or list(info.get(fut.key, ()))

    def _kill_workers(self, which: Any) -> None:
        """SIGKILL the local cluster's worker processes whose nanny passes ``which`` (signal-handler safe)."""
        for nanny in list(self.cluster.workers.values()) if self.cluster is not None else ():
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
            self.cluster.close()
        self.cluster = _local_cluster(self.workers)
        self.client = distributed.Client(self.cluster)
        self.scheduler = self.client.scheduler.address
        self._addresses = self.worker_addresses()

    def terminate(self) -> None:
        self._kill_workers(lambda nanny: True)

    def close(self) -> None:
        self.client.close()
        if self.cluster is not None:
            self.cluster.close()
            self.cluster = None


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


class DaskExecutor(RemoteExecutor):
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
        As for :class:`negotiate.execution.processes.ProcessExecutor`.
    worker_wait : float
        Seconds to wait while the cluster has no worker at all (:data:`WORKER_WAIT`). After that the local
        cluster is replaced by a new one (scheduler, workers and credentials) and the round's unanswered
        requests are sent again; on another scheduler they are failed solves, and later rounds fail at once
        until a worker shows up. This bound holds with or without ``time_limit``.
    """

    transport: DaskCluster

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
            import distributed  # noqa: F401 - checked here, used by the transport
        except ImportError as exc:
            raise ImportError(
                "the Dask executor needs the optional 'cluster' extra: pip install 'negotiate[cluster]'"
            ) from exc
        if not (isinstance(workers, int) and workers >= 1):
            raise ValueError(f"'workers' must be an integer >= 1, got {workers!r}")
        if not (isinstance(worker_wait, int | float) and 0 < worker_wait < float("inf")):
            raise ValueError(f"'worker_wait' must be a number of seconds > 0, got {worker_wait!r}")
        super().__init__(
            spec, lambda: DaskCluster(scheduler, workers, float(worker_wait)), solver_options=solver_options,
            time_limit=time_limit, retries=retries, grace=grace,
        )  # fmt: skip
        self.workers = workers
        self.worker_wait = float(worker_wait)

    @property
    def client(self) -> Any:
        """The ``distributed.Client`` (a new one after the local cluster was replaced)."""
        return self.transport.client

    @property
    def scheduler(self) -> str:
        """The scheduler's address."""
        return self.transport.scheduler

    @property
    def _cluster(self) -> Any:
        """The local cluster (``None`` on a scheduler this executor did not start)."""
        return self.transport.cluster

    def worker_addresses(self) -> list[str]:
        """Addresses of the cluster's workers, sorted."""
        return self.transport.worker_addresses()
