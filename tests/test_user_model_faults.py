"""User-written agents that misbehave: a value gradient that is not finite, a solve that raises.

Either is a failed solve of that agent, never a crashed run: ``negotiate run`` ends with exit 3 (its
stopping test not met), writes its outputs and reports the agent failed with the reason. The agents are
the heaters of ``test_faults_agents`` (invented numbers) on a grid connection whose limit is 0 W, beside a
built-in capacity user that converges.
"""

from __future__ import annotations

import csv
import json
from dataclasses import replace

import numpy as np
import pytest

from negotiate.cli import main
from negotiate.coordination.engine import coordinate
from negotiate.core.status import Status
from negotiate.execution.base import evaluate_agent
from negotiate.fleet.build import build_agents
from negotiate.fleet.parse import parse_fleet

# The tractor charges from a connection of its own, so that the heater's share is 0 W exactly.
FLEET = """\
[resources.grid]
kind = "capacity"
limits = [0.0]
block_length = 900.0

[resources.depot]
kind = "capacity"
limits = [1.0e5]
block_length = 900.0

[agents.heater]
model = "test_faults_agents:{builder}"

[agents.tractor]
model = "capacity"
resource = "depot"
tariff = 1.0
battery_capacity = 3.6e8
"""


def _run(tmp_path, capsys, builder: str, *options: str) -> tuple[int, dict, dict[str, dict[str, str]], str]:
    path = tmp_path / "fleet.toml"
    path.write_text(FLEET.format(builder=builder), encoding="utf-8")
    out = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out), "--quiet", *options])
    err = capsys.readouterr().err
    summary = json.loads((out / "run.json").read_text())
    with (out / "agents.csv").open(newline="") as fh:
        rows = {r["agent"]: r for r in csv.DictReader(fh)}
    return code, summary, rows, err


class TestInfiniteGradient:
    @pytest.mark.parametrize("method", ["bundle", "gradient", "newton"])
    def test_run_ends_with_the_agent_failed(self, tmp_path, capsys, method):
        """dV/dshare = +inf at the 0 W limit: exit 3, outputs written, the heater failed and says why."""
        code, summary, rows, err = _run(tmp_path, capsys, "sqrt_heater", "--method", method)
        assert code == 3 and "Traceback" not in err
        assert summary["status"] == "failed" and "heater" in summary["message"]
        assert rows["heater"]["status"] == "failed"
        assert rows["heater"]["reason"].endswith("re-check failed: gradient not finite: dV/d(share) = inf")
        assert rows["tractor"]["status"] == "converged"

    def test_plain_callable_executor(self):
        """A plain executor callable whose answer carries an infinite gradient: that agent fails, no crash."""
        data = {
            "resources": {"grid": {"kind": "capacity", "limits": [500.0], "block_length": 900.0}},
            "agents": {"heater": {"model": "test_faults_agents:sqrt_heater", "k": 1.0}},
        }
        spec = parse_fleet(data, "fleet.toml")
        agents = build_agents(spec)

        def executor(ags, params, warm):
            out = [a.problem.solve(p, warm=w) for a, p, w in zip(ags, params, warm, strict=True)]
            return [replace(r, gradient=np.full(r.p.shape, np.inf)) if r.success else r for r in out]

        res = coordinate(agents, spec.resources, replace(spec.coordinator, method="gradient"), executor=executor)
        assert res.status == "failed" and res.evaluation.failed == ["heater"]
        rep = res.evaluation.reports[0]
        assert rep.status is Status.FAILED and rep.gradient is None
        assert rep.result.message.endswith("gradient not finite: dV/d(share) = inf")


class TestRaisingSolve:
    @pytest.mark.parametrize("options", [(), ("--workers", "1")], ids=["in-process", "worker"])
    def test_run_ends_with_the_agent_failed(self, tmp_path, capsys, options):
        """A user solve that raises: exit 3, outputs written, the heater failed with the exception's text."""
        code, summary, rows, err = _run(tmp_path, capsys, "raising_heater", *options)
        assert code == 3 and "Traceback" not in err
        assert summary["status"] == "failed"
        assert rows["heater"]["status"] == "failed"
        assert rows["heater"]["reason"] == "the solve raised ZeroDivisionError: share / 0"
        assert rows["tractor"]["status"] == "converged"

    def test_evaluate_agent(self):
        """evaluate_agent, which every executor calls, answers a failed outcome instead of raising."""
        from test_faults_agents import raising_heater

        model = raising_heater("heater")
        out = evaluate_agent(model.problem, np.array([10.0]), None, use_guard=True, want_hessian=True)
        assert out.result.status is Status.FAILED and out.result.gradient is None
        assert out.result.message == "the solve raised ZeroDivisionError: share / 0"
        assert out.guard is None and out.hessian is None and out.solves == 1
