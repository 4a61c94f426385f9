"""Executors: the same schedule in process, in two worker processes and on a two-worker Dask LocalCluster;
worker-side caches, guard probes and value Hessians computed where the solver lives, plain-callable executors.

The reference everywhere is the in-process run of the same fleet: a remote executor must not change a single
number, so schedules are compared to 1e-9 relative (far below IPOPT's tolerance of 1e-8 on the KKT error, so a
different warm start or a different solve order would show).
"""

from __future__ import annotations

import asyncio
import contextlib
import pickle
import socket
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from negotiate.coordination.engine import coordinate
from negotiate.execution.base import AgentOutcome, Executor, InProcessExecutor
from negotiate.execution.dask import DaskExecutor
from negotiate.execution.make import make_executor
from negotiate.execution.processes import ProcessExecutor
from negotiate.execution.worker import cached_agents
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet
from negotiate.fleet.spec import CoordinatorSettings
from negotiate.run import run_fleet

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
SKIP_DASK = "Dask is not installed: the optional 'cluster' extra (pip install -e '.[test,cluster]') runs these tests"


def _rel(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / np.maximum(1.0, np.abs(b))))


@pytest.fixture(scope="module")
def cell():
    """The shipped machining cell (invented data), first-come-first-served orders, and its in-process run."""
    spec = load_fleet(EXAMPLES / "machining_cell.toml")
    spec = replace(spec, coordinator=replace(spec.coordinator, order="fcfs"))
    agents = build_agents(spec)
    return spec, agents, run_fleet(spec, agents)


class TestProcessExecutor:
    def test_same_schedule_as_in_process(self, cell):
        """Two worker processes, started building ahead (start), give the in-process schedule, rounds and
        solve count."""
        spec, agents, ref = cell
        with ProcessExecutor(spec, 2) as ex:
            ex.start()
            res = run_fleet(spec, agents, executor=ex)
            pids = ex.worker_pids()
            # Each worker built only its own agents (i mod 2), once: start() and the rounds agree on who.
            counts = [ex._pool(j).submit(cached_agents).result() for j in range(2)]
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-9
        assert res.coordination.rounds == ref.coordination.rounds
        assert res.coordination.agent_solves == ref.coordination.agent_solves
        assert len(set(pids)) == 2 and None not in pids
        assert counts == [3, 3]

    def test_guard_and_hessian_computed_in_the_worker(self, cell):
        """Guard probes and value Hessians from a worker equal the in-process ones; results are re-attached."""
        spec, agents, ref = cell
        rep = ref.coordination.evaluation.reports
        params = [r.p + 30.0 for r in rep]  # a nearby point: active sets may change, so the guard probes
        warm = [r.result for r in rep]
        local = InProcessExecutor().evaluate(agents, params, warm, use_guard=True, want_hessian=True)
        with ProcessExecutor(spec, 2) as ex:
            remote = ex.evaluate(agents, params, warm, use_guard=True, want_hessian=True)
        for lo, re in zip(local, remote, strict=True):
            assert re.result.value == lo.result.value
            assert np.array_equal(re.result.gradient, lo.result.gradient)
            assert re.solves == lo.solves
            assert (re.guard is None) == (lo.guard is None)
            if lo.guard is not None:
                assert len(re.guard.gradients) == len(lo.guard.gradients)
            assert (re.hessian is None) == (lo.hessian is None)
            if lo.hessian is not None:
                assert np.array_equal(re.hessian, lo.hessian)
            assert re.result.sensitivity().available == lo.result.sensitivity().available
        assert any(o.hessian is not None for o in remote)

    def test_newton_same_schedule(self, cell):
        """The Newton method (it asks for value Hessians) gives the same schedule with worker processes."""
        spec, agents, _ = cell
        settings = CoordinatorSettings(method="newton", max_rounds=15)
        ref = coordinate(agents, spec.resources, settings)
        with ProcessExecutor(spec, 2) as ex:
            res = coordinate(agents, spec.resources, settings, executor=ex)
        assert _rel(res.P, ref.P) <= 1e-9
        assert res.agent_solves == ref.agent_solves

    def test_agent_outside_the_fleet(self, cell):
        """A hand-built agent cannot be solved remotely: the message says why."""
        spec, agents, _ = cell
        other = replace(spec, agents=spec.agents[:2])
        ex = ProcessExecutor(other, 1)
        with pytest.raises(ValueError, match=r"agent 'mill-a' is not in fleet 'machining-cell'"):
            ex.evaluate(agents, [a.free_optimum for a in agents], [None] * len(agents))
        ex.close()

    def test_bad_arguments(self, cell):
        """Worker counts and start methods are checked."""
        spec = cell[0]
        with pytest.raises(ValueError, match=r"'workers' must be an integer >= 1, got 0"):
            ProcessExecutor(spec, 0)
        with pytest.raises(ValueError, match=r"'context' must be 'spawn' or 'forkserver', got 'fork'"):
            ProcessExecutor(spec, 1, context="fork")
        with pytest.raises(ValueError, match=r"'time_limit' must be a number of seconds > 0"):
            ProcessExecutor(spec, 1, time_limit=0)


@pytest.fixture(scope="module")
def local_cluster(cell):
    """A two-worker local cluster started while port 8787 (Dask's usual dashboard port) is taken: bound here when
    free, else already held by another program. Any warning while it starts is an error."""
    pytest.importorskip("distributed", reason=SKIP_DASK)
    with socket.socket() as taken:
        with contextlib.suppress(OSError):
            taken.bind(("127.0.0.1", 8787))
            taken.listen()
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            ex = DaskExecutor(cell[0], workers=2)
    with ex:
        yield ex


class TestDaskExecutor:
    def test_same_schedule_as_in_process(self, cell, local_cluster):
        """A two-worker local cluster on 127.0.0.1 gives the in-process schedule."""
        spec, agents, ref = cell
        ex = local_cluster
        ex.start()
        addresses = ex.worker_addresses()
        res = run_fleet(spec, agents, executor=ex)
        assert len(addresses) == 2 and all(a.startswith("tls://127.0.0.1:") for a in addresses)
        assert _rel(res.coordination.P, ref.coordination.P) <= 1e-9
        assert res.coordination.agent_solves == ref.coordination.agent_solves

    def test_no_fixed_port(self, local_cluster):
        """The local cluster started (the fixture) although 8787 was taken: its scheduler and its HTTP endpoint
        listen on ports the system chose, never on Dask's default ones (8786, 8787)."""
        ex = local_cluster
        http = ex.client.run_on_scheduler(_http_port)
        port = int(ex.client.scheduler.address.rsplit(":", 1)[1])
        assert http not in (None, 8787) and port not in (8786, 8787)

    def test_strangers_are_refused(self, local_cluster):
        """The local cluster speaks TLS with credentials made for this run only: a client without them -- plain,
        over TCP, or with credentials of its own -- cannot connect, so no other local user can run code in a
        worker. The executor's own client works (the other tests)."""
        import distributed
        from distributed.security import Security

        address = local_cluster.client.scheduler.address
        assert address.startswith("tls://127.0.0.1:")

        async def ask(where: str, security: Security | None = None) -> None:
            # What a client does first: open a connection and ask the scheduler who it is. Done on this event
            # loop with Dask's own comm layer (a full Client starts an IO-loop thread whose start Dask bounds by
            # a fixed wall-clock wait that a loaded machine can miss).
            args = (security or Security()).get_connection_args("client")
            comm = await distributed.comm.connect(where, timeout=5, **args)
            try:
                await comm.write({"op": "identity"})
                await comm.read()
            finally:
                await comm.close()

        for security in (None, Security.temporary()):
            with pytest.raises((OSError, TypeError)):  # TypeError: no TLS context at all for a tls:// address
                asyncio.run(ask(address, security))
        with pytest.raises(OSError):
            asyncio.run(ask("tcp://" + address.split("://", 1)[1]))
        # The same request with the run's own credentials is answered: the refusals above are about them.
        asyncio.run(ask(address, local_cluster.client.security))


def _http_port(dask_scheduler) -> int | None:  # type: ignore[no-untyped-def]
    server = getattr(dask_scheduler, "http_server", None)
    return None if server is None else server.port


class TestPlainCallable:
    def test_user_callable_still_accepted(self, cell):
        """A plain ``executor(agents, params, warm) -> results`` callable works as before."""
        spec, agents, _ = cell
        calls = []

        def mine(agents_, params, warm):
            calls.append(len(params))
            return [a.problem.solve(p, warm=w) for a, p, w in zip(agents_, params, warm, strict=True)]

        settings = CoordinatorSettings(max_rounds=5)
        ref = coordinate(agents, spec.resources, settings)
        res = coordinate(agents, spec.resources, settings, executor=mine)
        assert calls and all(n == len(agents) for n in calls)
        assert _rel(res.P, ref.P) <= 1e-9

    def test_executor_call_returns_results(self, cell):
        """Calling an Executor directly returns the LocalResults only."""
        _, agents, _ = cell
        out = InProcessExecutor()(agents[:2], [a.free_optimum for a in agents[:2]], [None, None])
        assert [r.status for r in out] == ["converged", "converged"]
        assert isinstance(InProcessExecutor(), Executor)


class TestPickling:
    def test_result_travels_without_its_problem(self, cell):
        """A pickled LocalResult keeps every number and drops the CasADi problem."""
        _, agents, _ = cell
        res = agents[0].problem.solve(agents[0].free_optimum)
        back = pickle.loads(pickle.dumps(res))
        assert back.value == res.value and np.array_equal(back.gradient, res.gradient)
        assert back.certificate == res.certificate
        assert res._problem is not None and back._problem is None
        assert back.sensitivity().reason == "this result is not attached to its problem"
        out = pickle.loads(pickle.dumps(AgentOutcome(res)))
        assert out.result.value == res.value


class TestMakeExecutor:
    def test_choice(self, cell):
        """No option: in process; --workers: processes."""
        spec = cell[0]
        assert isinstance(make_executor(spec), InProcessExecutor)
        ex = make_executor(spec, workers=2)
        assert isinstance(ex, ProcessExecutor) and ex.workers == 2
        ex.close()

    def test_mistakes(self, cell):
        """Both a scheduler and a local cluster, or a malformed address, are refused with a message."""
        spec = cell[0]
        with pytest.raises(ValueError, match="either a scheduler address or --cluster local"):
            make_executor(spec, scheduler="tcp://127.0.0.1:1", cluster="local")
        with pytest.raises(ValueError, match=r"like tcp://HOST:PORT, got '127.0.0.1:8786'"):
            make_executor(spec, scheduler="127.0.0.1:8786")
