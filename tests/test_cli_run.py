"""negotiate run from the command line: exit codes, files, verification, a user method, user mistakes."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from negotiate.cli import main

EXAMPLES = Path(__file__).parents[1] / "examples"

# Two loaded haul trucks (invented numbers, the quarry example's truck data) and a bridge with a long gap.
# Their reachable windows (computed by the vehicle builder): early enters in [125.4, 798.0] s and leaves no
# sooner than 137.9 s; late enters in [245.4, 918.0] s and leaves no sooner than 257.9 s. So early-first
# admits gaps up to 918.0 - 137.9 = 780 s, late-first only up to 798.0 - 257.9 = 540 s.
TWO_TRUCKS = """
[fleet]
name = "two-trucks-long-gap"
description = "Invented: two haul trucks and a bridge whose gap leaves room for only one of the two orders"

[resources.bridge]
kind = "exclusive"
gap = GAP

[coordinator]
method = "bundle"
order = "swap"

[defaults.vehicle]
route_length = 2400.0
stages = 24
mass = 28000.0
length = 10.0
speed_limit = 13.0
min_speed = 1.0
max_brake = 2.0
rolling_coeff = 0.02
drag_area = 8.0
arrival_weight = 2000.0
comfort_weight = 20000.0
payload = 36000.0
max_accel = 0.5
initial_speed = 6.0
latest_arrival = 900.0

[agents.early]
model = "vehicle"
departure = 0.0
desired_arrival = 250.0
[[agents.early.zones]]
resource = "bridge"
entry = 1500.0
exit = 1560.0
speed_limit = 6.0

[agents.late]
model = "vehicle"
departure = 120.0
desired_arrival = 370.0
latest_arrival = 1020.0
[[agents.late.zones]]
resource = "bridge"
entry = 1500.0
exit = 1560.0
speed_limit = 6.0
"""


class TestRun:
    def test_depot_run_writes_schedule_and_summary(self, tmp_path, capsys):
        """A verified run exits 0 and writes schedule.csv and run.json within 0.1 % of the centralized cost."""
        out = tmp_path / "depot"
        code = main(["run", str(EXAMPLES / "charging_depot.toml"), "--out", str(out), "--method", "newton",
                     "--verify", "--quiet"])  # fmt: skip
        text = capsys.readouterr().out
        assert code == 0, text
        summary = json.loads((out / "run.json").read_text())
        assert summary["status"] == "converged"
        for key in ("settings", "orders", "rounds", "agent_solves", "total_cost", "centralized_cost"):
            assert key in summary
        # the acceptance test: within 0.1 % of the centralized IPOPT optimum
        assert abs(summary["total_cost"] - summary["centralized_cost"]) <= 1e-3 * abs(summary["centralized_cost"])
        header = (out / "schedule.csv").read_text().splitlines()[0].split(",")
        assert header[:5] == ["agent", "resource", "enter", "leave", "value"]
        assert "not a safety controller" in text

    def test_user_method_from_a_file(self, tmp_path, capsys):
        """--method path.py:Class imports a user Method and runs it through the same outputs."""
        fleet = (EXAMPLES / "charging_depot.toml").read_text().replace("max_rounds = 60", "max_rounds = 15")
        path = tmp_path / "depot.toml"
        path.write_text(fleet)
        out = tmp_path / "custom"
        code = main(["run", str(path), "--out", str(out), "--method",
                     f"{EXAMPLES / 'custom_method.py'}:ShrinkingStep", "--quiet"])  # fmt: skip
        assert code in (0, 3)  # a plain method may stop on its round limit
        summary = json.loads((out / "run.json").read_text())
        assert summary["settings"]["method"] == "shrinking-step"
        assert summary["rounds"] >= 1

    def test_bad_fleet_file_is_reported_without_traceback(self, tmp_path, capsys):
        """A mistake in the fleet file exits 1 with the located message on stderr."""
        path = tmp_path / "bad.toml"
        path.write_text(
            (EXAMPLES / "charging_depot.toml").read_text().replace("[coordinator]", "[coordinator]\nspeed = 3")
        )
        code = main(["run", str(path), "--out", str(tmp_path / "o"), "--quiet"])
        err = capsys.readouterr().err
        assert code == 1
        assert "[coordinator] key 'speed'" in err and "Traceback" not in err

    def test_order_search_skips_an_infeasible_candidate(self, tmp_path, capsys):
        """Gap 600 s: the swapped order admits no schedule; it is recorded and skipped, the run completes."""
        path = tmp_path / "two.toml"
        path.write_text(TWO_TRUCKS.replace("GAP", "600.0"))
        out = tmp_path / "two"
        code = main(["run", str(path), "--out", str(out), "--quiet"])
        text = capsys.readouterr().out
        assert code == 0, text
        summary = json.loads((out / "run.json").read_text())
        assert summary["orders"] == {"bridge": ["early", "late"]}
        assert summary["order_trials"] == 2 and summary["order_trials_infeasible"] == 1
        skipped = summary["order_search"][1]
        assert skipped["orders"] == {"bridge": ["late", "early"]} and not skipped["kept"]
        assert skipped["total_cost"] is None
        assert "no schedule meets the orders bridge: late > early" in skipped["infeasible"]
        assert "2 order(s) tried (1 infeasible, skipped)" in text
        phases = summary["phase_times_s"]
        assert set(phases) == {"build", "free_optima", "order_search", "verify"}
        assert phases["build"] > 0 and abs(sum(phases.values()) - summary["wall_time_s"]) < 1e-9
        # a resumed run of a finished search gives the same schedule, without a crash
        before = (out / "schedule.csv").read_bytes()
        assert main(["run", "--resume", str(out), "--quiet"]) == 0
        assert (out / "schedule.csv").read_bytes() == before

    def test_infeasible_first_order_exits_1_naming_resource_and_agents(self, tmp_path, capsys):
        """Gap 800 s: no order admits a schedule; exit 1 with a message, no traceback."""
        path = tmp_path / "two.toml"
        path.write_text(TWO_TRUCKS.replace("GAP", "800.0"))
        code = main(["run", str(path), "--out", str(tmp_path / "o"), "--quiet"])
        err = capsys.readouterr().err
        assert code == 1
        assert "no schedule meets the orders bridge: early > late" in err and "Traceback" not in err
        assert "bridge: early leaves + gap <= late enters" in err

    def test_missing_file_exits_2(self, tmp_path, capsys):
        """A file that cannot be read exits 2."""
        assert main(["run", str(tmp_path / "none.toml"), "--out", str(tmp_path / "o"), "--quiet"]) == 2

    def test_time_limit_reaches_every_solve(self, tmp_path, capsys):
        """--time-limit 1e-9: every IPOPT run stops at once (time-limit), the run fails (exit 3) with the
        agents named, and the schedule's certificate column says why; --time-limit 0 is a usage error."""
        out = tmp_path / "tl"
        code = main(["run", str(EXAMPLES / "charging_depot.toml"), "--out", str(out), "--time-limit", "1e-9",
                     "--quiet"])  # fmt: skip
        text = capsys.readouterr().out
        assert code == 3
        assert "status: failed" in text and "tractor-1" in text
        rows = (out / "schedule.csv").read_text().splitlines()
        assert all(line.endswith("time-limit") for line in rows[1:]), rows[:3]
        code = main(["run", str(EXAMPLES / "charging_depot.toml"), "--out", str(out), "--time-limit", "0"])
        assert code == 2
        assert "--time-limit must be a positive number of seconds" in capsys.readouterr().err

    def test_unknown_method_file_is_a_user_error(self, tmp_path, capsys):
        """A --method naming a missing file exits 1 with a message, not a traceback."""
        code = main(["run", str(EXAMPLES / "charging_depot.toml"), "--out", str(tmp_path / "o"), "--method",
                     "nowhere.py:Nothing", "--quiet"])  # fmt: skip
        assert code == 1
        assert "cannot import coordination method" in capsys.readouterr().err


@pytest.mark.parametrize("name", ["quarry_bridge", "machining_cell", "charging_depot"])
def test_every_example_verifies_within_a_tenth_of_a_percent(name, tmp_path):
    """Each shipped example, run with its own settings and --verify, is within 0.1 % of the centralized cost."""
    from negotiate.fleet import load_fleet
    from negotiate.run import run_fleet

    run = run_fleet(load_fleet(EXAMPLES / f"{name}.toml"), verify=True)
    assert run.centralized is not None and run.centralized.success
    assert abs(run.gap) <= 1e-3, run.gap
