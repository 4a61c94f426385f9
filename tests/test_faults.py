"""Faults: a worker killed in the middle of a round (local process and Dask worker), a solve that hangs past
its time limit, IPOPT's own wall-time limit.

The killed worker's requests are sent again, so the run must end at exactly the undisturbed schedule
(compared to 1e-9 relative, far below the solver tolerance). A hung solve must come back as a failed
status for that agent within its time budget, not as a hung run.
"""

from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from refproblems import by_name

from negotiate.executor import DaskExecutor, ProcessExecutor
from negotiate.fleet import build_agents, load_fleet
from negotiate.nlp import ParametricNLP
from negotiate.run import run_fleet
from negotiate.spec import AgentSpec
from negotiate.status import Status

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
SKIP_DASK = "Dask is not installed: the optional 'cluster' extra (pip install -e '.[test,cluster]') runs these tests"


def _fleet(builder: str, marker: Path, index: int = 2, size: int = 6):
    """The machining cell (invented data, fcfs orders) with agent ``index`` made by a misbehaving builder."""
    spec = load_fleet(EXAMPLES / "machining_cell.toml")
    ags = list(spec.agents)[:size]
    a = ags[index]
    ags[index] = AgentSpec(
        a.name, f"test_faults_agents:{builder}", {"template": a.name, "marker": str(marker)}, a.weight
    )
    return replace(spec, agents=tuple(ags), coordinator=replace(spec.coordinator, order="fcfs"))


def _rel(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(a - b) / np.maximum(1.0, np.abs(b))))


@pytest.fixture(scope="module")
def dying(tmp_path_factory):
    marker = tmp_path_factory.mktemp("faults") / "die-now"
    spec = _fleet("dying_machine", marker)
    agents = build_agents(spec)
    return spec, agents, marker, run_fleet(spec, agents)


def _kill_in_round(marker: Path, k: int):
    """A progress callback that arms the marker after round k: the agent's worker dies during round k + 1."""

    def progress(rec):
        if rec.round == k:
            marker.touch()

    return progress


class TestWorkerLoss:
    def test_local_worker_killed_mid_round(self, dying):
        """A worker process killed in round 3 is replaced, its requests are sent again, same schedule."""
        spec, agents, marker, ref = dying
        assert ref.coordination.rounds >= 3
        with ProcessExecutor(spec, 2) as ex:
            res = run_fleet(spec, agents, executor=ex, progress=_kill_in_round(marker, 2))
            lost = ex.lost_workers
        assert not marker.exists()  # the agent really killed its worker
        assert lost == 1
        assert (
            np.max(np.abs(res.coordination.P - ref.coordination.P) / np.maximum(1, np.abs(ref.coordination.P))) <= 1e-9
        )
        assert res.coordination.agent_solves == ref.coordination.agent_solves

    def test_dask_worker_killed_mid_round(self, dying):
        """A Dask worker killed in round 3 is restarted by its nanny and the task rescheduled: same schedule."""
        pytest.importorskip("distributed", reason=SKIP_DASK)
        spec, agents, marker, ref = dying
        with DaskExecutor(spec, workers=2) as ex:
            res = run_fleet(spec, agents, executor=ex, progress=_kill_in_round(marker, 2))
        assert not marker.exists()
        assert (
            np.max(np.abs(res.coordination.P - ref.coordination.P) / np.maximum(1, np.abs(ref.coordination.P))) <= 1e-9
        )


class TestTimeLimit:
    def test_hung_solve_is_a_failed_agent(self, tmp_path):
        """A solve stuck for 120 s under a 1 s limit (budget 1 s + 2 s grace) is reported as time-limit."""
        marker = tmp_path / "hang"
        spec = _fleet("hanging_machine", marker, index=1, size=4)
        agents = build_agents(spec)
        P = [a.free_optimum for a in agents]
        with ProcessExecutor(spec, 2, time_limit=1.0, grace=2.0) as ex:
            assert all(o.result.success for o in ex.evaluate(agents, P, [None] * 4))
            marker.touch()
            t0 = time.perf_counter()
            out = ex.evaluate(agents, P, [None] * 4)
            elapsed = time.perf_counter() - t0
            marker.unlink()
            again = ex.evaluate(agents, P, [None] * 4)
            lost = ex.lost_workers
        assert [str(o.result.status) for o in out] == ["converged", "time-limit", "converged", "converged"]
        hung = out[1].result
        assert hung.gradient is None and np.isnan(hung.value)
        assert hung.message == "no answer from the worker within 3 s (per-solve limit 1 s); the worker was replaced"
        assert elapsed < 15.0  # the budget (3 s) plus one rebuild of the other agent on that worker
        assert lost == 1
        assert all(o.result.success for o in again)  # the replaced worker serves the next round

    def test_hung_solve_on_dask_is_a_failed_agent(self, tmp_path):
        """The same on a two-worker LocalCluster (one batch per worker and round): the stuck batch (agents 1, 3)
        is split and sent again one by one, the hanging request is reported as time-limit and the other
        answered; the stuck worker is restarted and serves the next round."""
        pytest.importorskip("distributed", reason=SKIP_DASK)
        marker = tmp_path / "hang"
        spec = _fleet("hanging_machine", marker, index=1, size=4)
        agents = build_agents(spec)
        P = [a.free_optimum for a in agents]
        with DaskExecutor(spec, workers=2, time_limit=1.0, grace=2.0) as ex:
            assert all(o.result.success for o in ex.evaluate(agents, P, [None] * 4))
            marker.touch()
            out = ex.evaluate(agents, P, [None] * 4)
            marker.unlink()
            again = ex.evaluate(agents, P, [None] * 4)
            lost = ex.lost_workers
        assert [str(o.result.status) for o in out] == ["converged", "time-limit", "converged", "converged"]
        assert out[1].result.gradient is None
        assert lost >= 1
        assert all(o.result.success for o in again)

    def test_ipopt_wall_time_limit(self):
        """IPOPT's max_wall_time ends a solve with status time-limit and no gradient."""
        prob = by_name("HS071")  # Hock & Schittkowski 1981, problem 71: IPOPT needs several iterations
        nlp = ParametricNLP(
            prob.symbols(), x0=list(prob.x0), solver_options={"ipopt.max_wall_time": 1e-9}, **prob.bounds()
        )
        res = nlp.solve(list(prob.p0))
        assert res.status is Status.TIME_LIMIT
        assert res.gradient is None and "WallTime" in res.message

    def test_remote_solver_gets_the_limit(self, dying):
        """A remote executor's time limit reaches every agent's IPOPT as max_wall_time."""
        spec = dying[0]
        ex = ProcessExecutor(spec, 1, time_limit=7.5)
        assert ex.solver_options == {"ipopt.max_wall_time": 7.5}
        assert ex._budget(use_guard=False) == 7.5 + ex.grace
        ex.close()
