"""Faults: a worker killed in the middle of a round or between rounds (local process and Dask worker), a
cluster left without workers, a solve that hangs past its time limit, IPOPT's own wall-time limit, a run
stopped at once by a second signal.

The killed worker's requests are sent again, so the run must end at exactly the undisturbed schedule
(compared to 1e-9 relative, far below the solver tolerance) and a round at exactly the in-process answers.
A hung solve must come back as a failed status for that agent, not as a hung run. Nothing here depends on
how fast the machine is: waits are for events (a process gone, a line printed), polled with generous
deadlines, and time budgets are far above what an undisturbed request takes.
"""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import threading
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from refproblems import by_name

from negotiate.core.nlp import ParametricNLP
from negotiate.core.status import Status
from negotiate.execution.base import InProcessExecutor
from negotiate.execution.dask import DaskExecutor
from negotiate.execution.processes import ProcessExecutor
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import load_fleet
from negotiate.fleet.spec import AgentSpec
from negotiate.run import run_fleet
from negotiate.tools.generate import generate_fleet

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
ROOT = EXAMPLES.parent
DEADLINE = 300.0
"""Seconds after which a wait for an event counts as a hang (far beyond any expected duration)."""
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


def _round(agents):
    """One round's arguments near the free optima: agent i at its free optimum shifted by 30 s, no warm start."""
    return [a.free_optimum + 30.0 for a in agents], [None] * len(agents)


def _same(outcomes, reference) -> bool:
    """Bit-for-bit equal answers (status, value, gradient): a request is a pure function of its arguments."""
    return all(
        o.result.status == r.result.status
        and o.result.value == r.result.value
        and np.array_equal(o.result.gradient, r.result.gradient)
        for o, r in zip(outcomes, reference, strict=True)
    )


def _until(test, what: str, deadline: float = DEADLINE) -> None:
    """Poll ``test()`` until it holds; fail naming ``what`` after ``deadline`` seconds."""
    end = time.monotonic() + deadline
    while not test():
        assert time.monotonic() < end, f"{what}: not within {deadline:.0f} s"
        time.sleep(0.01)


def _kill(pids, wait: bool = True) -> None:
    """SIGKILL each process; with ``wait``, wait until it is gone (reaped by its parent: the executor noticed)."""
    import psutil

    procs = [psutil.Process(pid) for pid in pids]
    for proc in procs:
        proc.kill()
    for proc in procs if wait else ():
        _until(lambda p=proc: not _exists(p), f"process {proc.pid} gone")


def _exists(proc) -> bool:
    import psutil

    try:
        return proc.is_running()
    except psutil.Error:
        return False


def _returns(call, deadline: float = DEADLINE):
    """``call()``'s value, run in a thread; a test failure instead of a hung test if it does not return."""
    box: list = []

    def run():
        try:
            box.append((True, call()))
        except BaseException as exc:  # noqa: BLE001 - handed back to the test
            box.append((False, exc))

    t = threading.Thread(target=run, daemon=True)
    t.start()
    t.join(deadline)
    assert box, f"no answer within {deadline:.0f} s: the executor hangs"
    ok, value = box[0]
    if not ok:
        raise value
    return value


@pytest.fixture(scope="module")
def cell():
    """The shipped machining cell (invented data), its agents and one in-process round near the free optima."""
    spec = load_fleet(EXAMPLES / "machining_cell.toml")
    agents = build_agents(spec)
    params, warm = _round(agents)
    return spec, agents, params, warm, InProcessExecutor().evaluate(agents, params, warm)


class TestWorkerLossBetweenRounds:
    def test_local_worker_killed_between_rounds(self, cell):
        """A worker process killed between two rounds, then its replacement and the other worker together: every
        round gets the in-process answers, one pool replaced per dead process."""
        spec, agents, params, warm, ref = cell
        with ProcessExecutor(spec, 2) as ex:
            first = ex.evaluate(agents, params, warm)
            _kill(ex.worker_pids()[:1])
            second = ex.evaluate(agents, params, warm)
            _kill(ex.worker_pids())
            third = ex.evaluate(agents, params, warm)
            lost = ex.lost_workers
        assert _same(first, ref) and _same(second, ref) and _same(third, ref)
        assert lost == 3

    def test_dask_workers_all_killed_between_rounds(self, cell):
        """Every worker process of the local cluster killed just before a round (their nannies start new ones;
        the round is sent before the scheduler has noticed): the round gets the in-process answers instead of
        waiting forever for the dead workers."""
        pytest.importorskip("distributed", reason=SKIP_DASK)
        spec, agents, params, warm, ref = cell
        with DaskExecutor(spec, workers=2) as ex:
            first = ex.evaluate(agents, params, warm)
            _kill(ex.client.run(os.getpid).values(), wait=False)
            second = _returns(lambda: ex.evaluate(agents, params, warm))
        assert _same(first, ref) and _same(second, ref)

    def test_dask_local_cluster_without_workers(self, cell):
        """The local cluster's workers all gone for good (scaled to none): after ``worker_wait`` s without a
        worker the executor starts them again and the round gets the in-process answers. (The short wait does
        not race anything: no worker would ever come back on its own.)"""
        pytest.importorskip("distributed", reason=SKIP_DASK)
        spec, agents, params, warm, ref = cell
        with DaskExecutor(spec, workers=2, worker_wait=0.5) as ex:
            first = ex.evaluate(agents, params, warm)
            ex._cluster.scale(0)
            _until(lambda: not ex.worker_addresses(), "workers retired")
            second = _returns(lambda: ex.evaluate(agents, params, warm))
            _until(lambda: len(ex.worker_addresses()) == 2, "both workers started again")
        assert _same(first, ref) and _same(second, ref)

    def test_external_scheduler_without_workers(self, cell):
        """A scheduler the executor did not start, with no worker: the builds that ``start`` sent and each round
        give up after ``worker_wait`` s; every agent of both rounds is a failed solve whose message names the
        scheduler."""
        distributed = pytest.importorskip("distributed", reason=SKIP_DASK)
        spec, agents, params, warm, _ = cell
        with distributed.LocalCluster(
            n_workers=0, processes=False, protocol="tcp://", host="127.0.0.1", scheduler_port=0,
            dashboard_address=None, scheduler_kwargs={"dashboard_address": "127.0.0.1:0"},
        ) as bare:  # fmt: skip
            address = bare.scheduler_address
            with DaskExecutor(spec, address, worker_wait=0.5) as ex:
                ex.start()
                out = _returns(lambda: ex.evaluate(agents, params, warm))
                again = _returns(lambda: ex.evaluate(agents, params, warm))
        for o in out + again:
            assert o.result.status is Status.FAILED and o.result.gradient is None
            assert o.result.message == (
                f"no worker alive on the Dask scheduler {address} for 0.5 s; the request was not answered"
            )


class TestTimeLimit:
    def test_hung_solve_is_a_failed_agent(self, tmp_path):
        """A solve stuck (120 s) under a 1 s limit is reported as time-limit after its budget (1 s + 4 s grace);
        its worker is replaced and serves the next round.

        No budget here races the machine's speed: the agents are built ahead (``prepare``: no budget), so a
        budget only has to cover prepared solves (a machine solves in ~5 ms: 200 times under the limit), and
        the hanging agent is the last of its worker's round (agents 1 and 3 go to worker 1), so no request
        waits in that round for a fresh process to start."""
        marker = tmp_path / "hang"
        spec = _fleet("hanging_machine", marker, index=3, size=4)
        agents = build_agents(spec)
        P = [a.free_optimum for a in agents]
        with ProcessExecutor(spec, 2, time_limit=1.0, grace=4.0) as ex:
            ex.prepare(agents)
            assert all(o.result.success for o in ex.evaluate(agents, P, [None] * 4))
            marker.touch()
            out = ex.evaluate(agents, P, [None] * 4)
            marker.unlink()
            lost = ex.lost_workers
            ex.prepare(agents)
            again = ex.evaluate(agents, P, [None] * 4)
        assert [str(o.result.status) for o in out] == ["converged", "converged", "converged", "time-limit"]
        hung = out[3].result
        assert hung.gradient is None and np.isnan(hung.value)
        assert hung.message == "no answer from the worker within 5 s (per-solve limit 1 s); the worker was replaced"
        assert lost == 1
        assert all(o.result.success for o in again)  # the replaced worker serves the next round

    def test_hung_solve_on_dask_is_a_failed_agent(self, tmp_path):
        """The same on a two-worker local cluster (one batch per worker and round): the stuck batch (agents 1, 3)
        is split and sent again one by one, the hanging request is reported as time-limit and the other
        answered; the stuck workers are restarted and serve the next round. Budgets as above (prepared
        solves; the one build inside a budget, agent 3 on its restarted worker, takes ~50 ms of 5 s)."""
        pytest.importorskip("distributed", reason=SKIP_DASK)
        marker = tmp_path / "hang"
        spec = _fleet("hanging_machine", marker, index=1, size=4)
        agents = build_agents(spec)
        P = [a.free_optimum for a in agents]
        with DaskExecutor(spec, workers=2, time_limit=1.0, grace=4.0) as ex:
            ex.prepare(agents)
            assert all(o.result.success for o in ex.evaluate(agents, P, [None] * 4))
            marker.touch()
            out = ex.evaluate(agents, P, [None] * 4)
            marker.unlink()
            lost = ex.lost_workers
            ex.client.wait_for_workers(2, timeout=DEADLINE)
            ex.prepare(agents)
            again = ex.evaluate(agents, P, [None] * 4)
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


def _workers(proc) -> list:
    """The worker processes below ``proc`` (spawned interpreters: multiprocessing's ``spawn_main``)."""
    import psutil

    found = []
    for child in proc.children(recursive=True):
        with contextlib.suppress(psutil.Error):
            if any("spawn_main" in part for part in child.cmdline()):
                found.append(child)
    return found


class TestSecondSignal:
    @pytest.mark.parametrize("executor", [["--workers", "2"], ["--cluster", "local", "--workers", "2"]])
    def test_no_worker_outlives_the_run(self, tmp_path, executor):
        """``negotiate run`` with two workers, sent SIGTERM twice while it builds (a generated fleet of 24 bridge
        trucks): the first signal is acknowledged, the second stops the run at once (exit 130), and no process
        it started survives it."""
        if executor[0] == "--cluster":
            pytest.importorskip("distributed", reason=SKIP_DASK)
        psutil = pytest.importorskip("psutil")
        fleet = tmp_path / "bridge-24.toml"
        fleet.write_text(generate_fleet("bridge", 24, seed=0))
        run = subprocess.Popen(
            [sys.executable, "-m", "negotiate.cli", "run", str(fleet), "--out", str(tmp_path / "run"), "--quiet",
             *executor],
            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
        )  # fmt: skip
        try:
            proc = psutil.Process(run.pid)
            _until(lambda: len(_workers(proc)) >= 2 or run.poll() is not None, "two worker processes started")
            assert run.poll() is None, run.stderr.read()
            run.send_signal(signal.SIGTERM)
            seen = []
            for line in run.stderr:  # until the first signal's acknowledgement (or the end of the output)
                seen.append(line)
                if "a second signal stops at once" in line:
                    break
            assert seen and "a second signal stops at once" in seen[-1], "".join(seen)
            started = proc.children(recursive=True)
            assert len(_workers(proc)) >= 2
            run.send_signal(signal.SIGTERM)
            assert run.wait(timeout=DEADLINE) == 130
            _, alive = psutil.wait_procs(started, timeout=DEADLINE)
            assert alive == [], f"left running: {[(p.pid, p.cmdline()) for p in alive]}"
        finally:
            if run.poll() is None:
                run.kill()
            run.wait()
            run.stderr.close()
