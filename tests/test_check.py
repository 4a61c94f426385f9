"""Tests of ``negotiate check`` (negotiate.tools.check and the CLI subcommand) on the shipped examples and on bad files.

Each example is built once per module (building agents is the slow part). The examples are invented demo
data; what is asserted about them is what they are meant to show: every agent builds, each resource is
contended (free optima collide) and the conflict graph groups the agents as the file says.
"""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import networkx as nx
import pytest

from negotiate import cli
from negotiate.errors import FleetError
from negotiate.fleet.parse import parse_fleet
from negotiate.tools.check import CheckResult, check_data, check_fleet, conflict_graph

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
NAMES = ["quarry_bridge", "machining_cell", "charging_depot", "four_way_crossing"]


@pytest.fixture(scope="module")
def checked() -> dict[str, CheckResult]:
    """check_fleet on each example, built once for the module."""
    return {name: check_fleet(EXAMPLES / f"{name}.toml") for name in NAMES}


def two_groups() -> dict:
    """Two trucks at a gate and a tractor on a feeder: two independent groups (invented, parse-only)."""
    zone = {"resource": "gate", "entry": 400.0, "exit": 420.0}
    return {
        "resources": {
            "gate": {"kind": "exclusive"},
            "feeder": {"kind": "capacity", "limits": [1e5, 1e5]},
            "spare": {"kind": "exclusive"},
        },
        "agents": {
            "t1": {"model": "vehicle", "zones": [zone]},
            "t2": {"model": "vehicle", "zones": [zone]},
            "c1": {"model": "capacity", "resource": "feeder", "tariff": 1.0},
        },
    }


class TestCheckFleet:
    @pytest.mark.parametrize("name", NAMES)
    def test_example_is_clean(self, checked, name):
        """Every agent of every example builds and no problem is found."""
        res = checked[name]
        assert res.ok and res.error is None, res.to_text()
        assert all(a.built for a in res.agents)

    @pytest.mark.parametrize("name", NAMES)
    def test_rows_hold_windows_and_free_optima(self, checked, name):
        """Each parameter row has a unit and a free optimum inside its reachable [lower, upper]."""
        for agent in checked[name].agents:
            assert agent.params
            for p in agent.params:
                assert p.unit in ("s", "W")
                # 1e-6 relative: the builders clip the free optimum onto the reachable set exactly.
                tol = 1e-6 * max(1.0, abs(p.free))
                assert p.lower - tol <= p.free <= p.upper + tol, (agent.name, p)

    @pytest.mark.parametrize("name", NAMES)
    def test_resources_contended(self, checked, name):
        """The examples are meant to be contended: on every resource some free optima collide."""
        res = checked[name]
        assert res.resources and all(r.contended for r in res.resources), [r.detail for r in res.resources]

    @pytest.mark.parametrize("name, size", [("quarry_bridge", 8), ("machining_cell", 6), ("charging_depot", 6)])
    def test_example_sizes_and_build_times(self, checked, name, size):
        """At least the promised number of agents, each with a measured build time (one group sharing everything).

        How long a build takes is measured in benchmarks/, not asserted here: it depends on the machine's load."""
        res = checked[name]
        assert len(res.agents) >= size
        assert all(math.isfinite(a.build_time) and a.build_time > 0 for a in res.agents)
        assert len(res.groups) == 1

    def test_quarry_table_text(self, checked):
        """The text report names each agent with model and weight and each parameter with its unit."""
        text = checked["quarry_bridge"].to_text()
        assert "agent truck-07   model vehicle   weight 1.5   built in" in text
        assert "bridge.enter  s" in text and "bridge.leave  s" in text
        assert "conflict graph: 8 agent(s), 1 resource(s), 8 use(s); 1 group(s)" in text
        assert text.rstrip().endswith("no problems found")

    def test_machining_graph(self, checked):
        """Every machine uses both stations: 6 agents, 2 resources, 12 edges, one component."""
        g = checked["machining_cell"].graph
        kinds = nx.get_node_attributes(g, "kind")
        assert sorted(set(kinds.values())) == ["agent", "exclusive"]
        assert g.number_of_edges() == 12 and nx.number_connected_components(g) == 1
        assert set(g["furnace"]) == set(g["inspection"]) == {a.name for a in checked["machining_cell"].agents}

    def test_to_dict_is_json(self, checked):
        """The result is plain data for json.dumps."""
        d = json.loads(json.dumps(checked["charging_depot"].to_dict()))
        assert len(d["agents"]) == 6 and len(d["agents"][0]["params"]) == 8
        assert {e["resource"] for e in d["edges"]} == {"grid"} and d["problems"] == []


class TestConflictGraph:
    def test_independent_groups(self):
        """Agents sharing nothing fall into separate components; an unused resource is its own group."""
        res = check_data(two_groups(), "two.toml", build=False)
        assert res.ok
        assert res.groups == (("t1", "t2", "gate"), ("c1", "feeder"), ("spare",))
        row = {r.name: r for r in res.resources}["spare"]
        assert row.users == () and row.detail == "no agent uses it"

    def test_graph_from_spec(self):
        """Edges come from the zones / stations / resource of the parameter records."""
        g = conflict_graph(parse_fleet(two_groups()))
        assert {frozenset(e) for e in g.edges()} == {
            frozenset(e) for e in [("t1", "gate"), ("t2", "gate"), ("c1", "feeder")]
        }


class TestProblems:
    def test_parse_errors_listed(self, tmp_path):
        """A file with mistakes gives no spec and every problem, in the FleetError's words."""
        path = tmp_path / "fleet.toml"
        path.write_text(
            textwrap.dedent("""
            [resources.bridge]
            kind = "exclusive"
            [agents.truck-03]
            model = "vehicle"
            mass = -5
            [[agents.truck-03.zones]]
            resource = "brdge"
            entry = 900.0
            exit = 1100.0
        """),
            encoding="utf-8",
        )
        res = check_fleet(path)
        assert res.spec is None and not res.ok
        assert isinstance(res.error, FleetError)
        assert str(res.error).splitlines() == [
            f"{path}: [agents.truck-03.zones[0]] key 'resource': expected the name of a declared exclusive "
            'resource (bridge), found "brdge"',
            f"{path}: [agents.truck-03] key 'mass': expected a number within (0, 1e7] (kg), found -5",
        ]

    def test_build_error_keeps_other_rows(self):
        """An agent that cannot be built is a problem naming it; the other agents still get their rows."""
        data = two_groups()
        data["agents"]["t2"]["latest_arrival"] = 101.0  # 2000 m at 20 m/s take 100 s, from 10 m/s more
        data["agents"]["t1"]["stages"] = data["agents"]["t2"]["stages"] = 8
        res = check_data(data, "fleet.toml")
        assert [a.built for a in res.agents] == [True, False, True]
        (problem,) = res.problems
        assert problem.table == "agents.t2" and "non-empty reachable window" in problem.expected
        assert {r.name: r.contended for r in res.resources}["gate"] is None


class TestSchedule:
    @pytest.mark.parametrize("name", NAMES)
    def test_examples_schedulable(self, checked, name):
        """The examples stay feasible: a schedule exists with first-come-first-served orders."""
        res = checked[name]
        assert res.schedule is True, res.schedule_detail

    def test_gap_too_long(self):
        """Two trucks that must both cross a gate before their deadlines cannot be 2000 s apart.

        Each reaches the gate (400 m into a 2000 m route) between about 20 s and 350 s after departure
        (latest_arrival 400 s), so a gap of 2000 s between them cannot be met: the LP is infeasible.
        """
        data = two_groups()
        data["resources"]["gate"]["gap"] = 2000.0
        data["agents"]["t1"]["stages"] = data["agents"]["t2"]["stages"] = 8
        res = check_data(data, "fleet.toml")
        assert res.schedule is False
        (problem,) = res.problems
        assert (problem.table, problem.key) == ("", None)
        text = str(problem)
        assert text.startswith(
            "fleet.toml: expected a fleet whose agents' reachable sets admit a schedule with "
            "first-come-first-served orders, found none: no schedule meets the orders gate: t1 > t2: these rules "
            "conflict: "
        )
        # the conflict: the gap, t1's earliest entry and t2's latest entry (the windows' bounds)
        assert "gate: t1 leaves + gap <= t2 enters" in text
        assert "t1: gate.enter >= " in text and "t2: gate.enter <= " in text


class TestCli:
    @pytest.mark.parametrize("name", NAMES)
    def test_examples_exit_zero(self, name, capsys):
        """`negotiate check` on each example exits 0 and prints a table per agent."""
        assert cli.main(["check", str(EXAMPLES / f"{name}.toml")]) == 0
        out = capsys.readouterr().out
        assert out.count("\nagent ") >= 6 and "free optimum" in out and "no problems found" in out

    def test_bad_file_exits_one_without_traceback(self, tmp_path, capsys):
        """Mistakes: exit 1, the FleetError lines printed, no traceback."""
        path = tmp_path / "fleet.toml"
        path.write_text('[agents.a]\nmodel = "bus"\n', encoding="utf-8")
        assert cli.main(["check", str(path)]) == 1
        captured = capsys.readouterr()
        assert (
            f'{path}: [agents.a] key \'model\': expected one of "vehicle", "machine", "capacity" or '
            '"package.module:function", found "bus"'
        ) in captured.out
        assert "Traceback" not in captured.out + captured.err

    def test_invalid_toml_exits_one(self, tmp_path, capsys):
        """A TOML syntax error is a user mistake too (exit 1)."""
        path = tmp_path / "fleet.toml"
        path.write_text("[agents\n", encoding="utf-8")
        assert cli.main(["check", str(path)]) == 1
        assert "expected valid TOML" in capsys.readouterr().out

    def test_missing_file_exits_two(self, tmp_path, capsys):
        """A file that does not exist: exit 2, a one-line message on stderr."""
        assert cli.main(["check", str(tmp_path / "absent.toml")]) == 2
        err = capsys.readouterr().err
        assert err.startswith("negotiate check: cannot read ") and "Traceback" not in err

    def test_no_build(self, capsys):
        """--no-build validates only: agents are listed as not built, and the exit status is 0."""
        assert cli.main(["check", "--no-build", str(EXAMPLES / "quarry_bridge.toml")]) == 0
        out = capsys.readouterr().out
        assert "agent truck-01   model vehicle   weight 1   not built" in out


def depot_with_limits(scale: float) -> dict:
    """The charging depot example with every grid limit multiplied by ``scale`` (1e-3: kW written as W)."""
    import tomllib

    data = tomllib.loads((EXAMPLES / "charging_depot.toml").read_text(encoding="utf-8"))
    data["resources"]["grid"]["limits"] = [v * scale for v in data["resources"]["grid"]["limits"]]
    return data


class TestLimitWarning:
    """A capacity limit far below what its users ask for (a unit mistake, e.g. kW written as W) is warned about."""

    def test_kilowatts_written_as_watts(self):
        """Limits 1000x too small: one warning naming the resource, the worst block and both powers; no problem.

        Reference: the ratio is recomputed here from the check's own parameter rows (free optimum of every
        share in the block, summed) and the fleet's limits; the example's W limits give none (smallest ratio
        of limit to demand 0.62, far above the 3.2 % threshold).
        """
        assert not check_data(depot_with_limits(1.0), "depot.toml").warnings
        res = check_data(depot_with_limits(1e-3), "depot.toml")
        assert res.ok and res.schedule is True  # legal: only a warning
        limits = [v * 1e-3 for v in (450e3, 450e3, 350e3, 300e3, 350e3, 450e3, 500e3, 500e3)]
        demand = [sum(p.free for a in res.agents for p in a.params if p.name == f"grid.share[{k}]") for k in range(8)]
        ratio = [lim / d for lim, d in zip(limits, demand, strict=True)]
        k = min(range(8), key=ratio.__getitem__)
        (text,) = res.warnings
        assert text.startswith(f"depot.toml: [resources.grid] key 'limits': limit {limits[k]:.3g} W in block {k} is ")
        assert f"is {100 * ratio[k]:.2g} % of the {demand[k] / 1e3:.3g} kW its users' free optima ask for" in text
        assert "(8 of 8 blocks below 3.2 %); limits are in W" in text
        assert res.to_dict()["warnings"] == [text]

    def test_threshold_is_per_block(self):
        """Only blocks below 10^-1.5 of their demand count; a zero limit (an outage) is never warned about.

        The limit of block 0 is set just below and then just above 10^-1.5 times the block's demand (from
        the check's rows), every other block as in the example."""
        base = check_data(depot_with_limits(1.0), "depot.toml")
        demand0 = sum(p.free for a in base.agents for p in a.params if p.name == "grid.share[0]")
        for factor, warned in ((0.99, True), (1.01, False)):
            data = depot_with_limits(1.0)
            data["resources"]["grid"]["limits"][0] = factor * 10**-1.5 * demand0
            res = check_data(data, "depot.toml")
            assert bool(res.warnings) is warned, (factor, res.warnings)
            if warned:
                assert "in block 0 is" in res.warnings[0] and "(1 of 8 blocks" in res.warnings[0]
        data = depot_with_limits(1.0)
        data["resources"]["grid"]["limits"][0] = 0.0
        assert not check_data(data, "depot.toml").warnings

    def test_cli_prints_warning_and_exits_zero(self, tmp_path, capsys):
        """`negotiate check` prints the warning and still exits 0 (the file is legal)."""
        path = tmp_path / "depot.toml"
        text = (EXAMPLES / "charging_depot.toml").read_text(encoding="utf-8")
        watts = "limits = [450e3, 450e3, 350e3, 300e3, 350e3, 450e3, 500e3, 500e3]"
        assert watts in text
        path.write_text(text.replace(watts, "limits = [450, 450, 350, 300, 350, 450, 500, 500]"), encoding="utf-8")
        assert cli.main(["check", str(path)]) == 0
        out = capsys.readouterr().out
        assert "1 warning(s) (the check does not fail on them):" in out
        assert f"{path}: [resources.grid] key 'limits': limit 500 W in block 7 is" in out
        assert out.rstrip().endswith("no problems found")
