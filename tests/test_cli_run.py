"""negotiate run from the command line: exit codes, files, verification, a user method, user mistakes."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from negotiate.cli import main

EXAMPLES = Path(__file__).parents[1] / "examples"


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
