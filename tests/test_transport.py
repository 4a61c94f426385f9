"""The remote executors' one policy (batching, retries, hung-batch splitting, failed outcomes) over a transport.

The process and Dask executors are the same :class:`RemoteExecutor` over two transports. Here the policy is
driven through a test double of a transport that answers in this process (the worker side's own
``serve_batch``) and loses a worker or hangs a batch on cue. The reference is the in-process executor on agents
built with the same solver options: every answer the policy lets through must equal it bit for bit (a request
is a pure function of its arguments); the others must be the documented failed outcomes.
"""

from __future__ import annotations

import pickle
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from negotiate.core.status import Status
from negotiate.execution.base import InProcessExecutor
from negotiate.execution.dask import DaskCluster, DaskExecutor
from negotiate.execution.processes import BATCHES, ProcessExecutor, WorkerProcesses
from negotiate.execution.remote import RemoteExecutor, Settled, Transport
from negotiate.execution.worker import serve_batch
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
OPTIONS = {"ipopt.max_wall_time": 1e4}
"""Solver options of both the records and the reference agents (a time budget below never reaches IPOPT)."""


@dataclass
class _Handle:
    kind: str  # "answered", "lost" or "hung"
    value: Any = None


class FakeWorkers(Transport):
    """A test double of a transport: ``slots`` workers in this process. A request of an agent named in
    ``deaths`` loses its worker (with the batch) as many times as given; a batch holding an agent named in
    ``hangs`` never answers; ``stranded`` leaves no worker at all."""

    def __init__(self, slots: int, batches: int, deaths=None, hangs=(), stranded=None) -> None:  # type: ignore[no-untyped-def]
        self.n = slots
        self.batches = batches  # type: ignore[misc]
        self.deaths = dict(deaths or {})
        self.hangs = set(hangs)
        self.stranded = stranded
        self.lost_workers = 0
        self.sent: list[tuple[int, tuple[str, ...]]] = []
        self.restarts: list[int] = []

    def slots(self) -> int:
        return self.n

    def build(self, slot, record):  # type: ignore[no-untyped-def]
        return _Handle("answered", 0)

    def submit(self, slot, requests):  # type: ignore[no-untyped-def]
        names = tuple(pickle.loads(r[1])[1].name for r in requests)
        self.sent.append((slot, names))
        dying = [n for n in names if self.deaths.get(n, 0) > 0]
        if dying:
            self.deaths[dying[0]] -= 1
            self.lost_workers += 1
            return _Handle("lost")
        if self.hangs & set(names):
            return _Handle("hung")
        return _Handle("answered", serve_batch(requests))

    def wait(self, handles, timeout):  # type: ignore[no-untyped-def]
        if self.stranded is not None:
            return Settled(stranded=self.stranded)
        seen = Settled(
            answers={k: h.value for k, h in enumerate(handles) if h.kind == "answered"},
            lost={k for k, h in enumerate(handles) if h.kind == "lost"},
        )
        if not seen:  # only hung batches at the heads: nothing comes before the timeout
            assert timeout is not None, "the policy would wait forever for a hung batch"
            time.sleep(timeout)
        return seen

    def restart(self, slot, handles):  # type: ignore[no-untyped-def]
        self.restarts.append(slot)
        self.lost_workers += 1


@pytest.fixture(scope="module")
def cell():
    """The shipped machining cell (invented data, six machines), its agents and one in-process round near the
    free optima (each agent at its free optimum shifted by 30 s, no warm start)."""
    spec = load_fleet(EXAMPLES / "machining_cell.toml")
    agents = build_agents(spec, solver_options=OPTIONS)
    params, warm = [a.free_optimum + 30.0 for a in agents], [None] * len(agents)
    return spec, agents, params, warm, InProcessExecutor().evaluate(agents, params, warm)


def _same(o, r) -> bool:  # type: ignore[no-untyped-def]
    return (
        o.result.status == r.result.status
        and o.result.value == r.result.value
        and np.array_equal(o.result.gradient, r.result.gradient)
    )


def _run(cell, fake: FakeWorkers, **kw):  # type: ignore[no-untyped-def]
    spec, agents, params, warm, _ = cell
    ex = RemoteExecutor(spec, lambda: fake, solver_options=OPTIONS, **kw)
    return ex, ex.evaluate(agents, params, warm)


class TestOnePolicy:
    def test_both_executors_are_the_policy_over_a_transport(self, cell):
        """The process and Dask executors add no round logic of their own: the batching, budgets, retries and
        splitting they run are :class:`RemoteExecutor`'s, over a :class:`Transport`."""
        policy = ("evaluate", "prepare", "start", "_built", "_budget", "_hung", "_attach")
        for executor, transport in ((ProcessExecutor, WorkerProcesses), (DaskExecutor, DaskCluster)):
            assert issubclass(executor, RemoteExecutor) and issubclass(transport, Transport)
            assert not set(policy) & set(vars(executor)), executor
            assert not set(policy) & set(vars(transport)), transport
        ex = ProcessExecutor(cell[0], 1)  # no process starts before a request
        assert isinstance(ex.transport, WorkerProcesses)
        ex.close()

    @pytest.mark.parametrize("batches", [1, BATCHES])
    def test_undisturbed(self, cell, batches):
        """Without faults the round gets the in-process answers; agent i goes to slot i mod 2, in the
        transport's number of batches (one per slot for 1; single requests for 4, three agents per slot)."""
        ref = cell[4]
        fake = FakeWorkers(2, batches)
        _, out = _run(cell, fake)
        assert all(_same(o, r) for o, r in zip(out, ref, strict=True))
        names = [a.name for a in cell[1]]
        sent = [(slot, tuple(names.index(n) for n in batch)) for slot, batch in fake.sent]
        expected = [(0, (0, 2, 4)), (1, (1, 3, 5))] if batches == 1 else [
            (0, (0,)), (0, (2,)), (0, (4,)), (1, (1,)), (1, (3,)), (1, (5,))]  # fmt: skip
        assert sent == expected


class TestLostWorker:
    @pytest.mark.parametrize("batches", [1, BATCHES])
    def test_lost_batch_sent_again(self, cell, batches):
        """A worker lost twice with agent 3's batch (retries=2): the batch goes again, same answers as in
        process, two workers lost."""
        spec, agents, _, _, ref = cell
        fake = FakeWorkers(2, batches, deaths={agents[3].name: 2})
        ex, out = _run(cell, fake, retries=2)
        assert all(_same(o, r) for o, r in zip(out, ref, strict=True))
        assert ex.lost_workers == 2

    @pytest.mark.parametrize(("batches", "failed"), [(1, {1, 3, 5}), (BATCHES, {3, 5})])
    def test_past_the_retries_a_failed_solve(self, cell, batches, failed):
        """Lost three times with retries=2: the lost batch and every batch queued behind it on that worker are
        failed solves ("worker lost 3 times in this round"); every other agent has its in-process answer."""
        agents, ref = cell[1], cell[4]
        fake = FakeWorkers(2, batches, deaths={agents[3].name: 3})
        _, out = _run(cell, fake, retries=2)
        for i, (o, r) in enumerate(zip(out, ref, strict=True)):
            if i in failed:
                assert o.result.status is Status.FAILED and o.result.gradient is None
                assert o.result.message == "worker lost 3 times in this round"
            else:
                assert _same(o, r), i


class TestHungBatch:
    @pytest.mark.parametrize(("batches", "restarts"), [(1, [1, 1]), (BATCHES, [1])])
    def test_split_to_find_the_hung_request(self, cell, batches, restarts):
        """Agent 3's request never answers (budget 0.01 s per request: time limit 0.01 s, no grace). One batch
        per slot: the batch (1, 3, 5) is split after its budget, its worker restarted, and the single request 3
        restarted again; single requests: only request 3's worker is restarted. Agent 3 is ``time-limit`` with
        the documented message, the others have their in-process answers."""
        agents, ref = cell[1], cell[4]
        fake = FakeWorkers(2, batches, hangs={agents[3].name})
        ex, out = _run(cell, fake, time_limit=0.01, grace=0.0)
        assert fake.restarts == restarts
        assert ex.lost_workers == len(restarts)
        hung = out[3].result
        assert hung.status is Status.TIME_LIMIT and hung.gradient is None and np.isnan(hung.value)
        assert hung.message == (
            "no answer from the worker within 0.01 s (per-solve limit 0.01 s); the worker was replaced"
        )
        assert all(_same(o, r) for i, (o, r) in enumerate(zip(out, ref, strict=True)) if i != 3)


class TestStranded:
    def test_no_worker_at_all(self, cell):
        """A transport with no worker left: every agent of the round is a failed solve with its reason."""
        fake = FakeWorkers(2, 1, stranded="no worker alive on the test cluster")
        _, out = _run(cell, fake)
        assert all(o.result.status is Status.FAILED for o in out)
        assert {o.result.message for o in out} == {"no worker alive on the test cluster"}
