"""negotiate run from the command line: exit codes, files, verification, a user method, user mistakes, and
the run folder (one run at a time, never mixed with another run's files, refused before solving when it
cannot be used)."""

from __future__ import annotations

import functools
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from fleets import ONE_TRACTOR, TWO_TRUCKS

from negotiate.cli import main
from negotiate.fleet.parse import load_fleet
from negotiate.run import LOCK_FILE, RunResult, claim_run_folder, run_fleet

EXAMPLES = Path(__file__).parents[1] / "examples"

# Two loaded haul trucks (invented numbers, the quarry example's truck data) and a bridge with a long gap.
# Their reachable windows (computed by the vehicle builder): early enters in [125.4, 798.0] s and leaves no
# sooner than 137.9 s; late enters in [245.4, 918.0] s and leaves no sooner than 257.9 s. So early-first
# admits gaps up to 918.0 - 137.9 = 780 s, late-first only up to 798.0 - 257.9 = 540 s.
LONG_GAP_TRUCKS = """
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

    def test_progress_to_a_log_is_plain_lines(self, tmp_path, capsys):
        """Progress written to a non-terminal (pytest's capture) is whole lines, no carriage returns."""
        code = main(["run", str(EXAMPLES / "charging_depot.toml"), "--out", str(tmp_path / "d")])
        err = capsys.readouterr().err
        assert code == 0, err
        assert "\r" not in err and "order 1, round 0: total " in err

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
        path.write_text(LONG_GAP_TRUCKS.replace("GAP", "600.0"))
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
        assert "2 (1 admitted no schedule and were skipped)" in (out / "report.html").read_text()
        phases = summary["phase_times_s"]
        assert set(phases) == {"build", "free_optima", "order_search"}  # "verify" only with --verify
        assert phases["build"] > 0 and abs(sum(phases.values()) - summary["wall_time_s"]) < 1e-9
        # a resumed run of a finished search gives the same schedule, without a crash
        before = (out / "schedule.csv").read_bytes()
        assert main(["run", "--resume", str(out), "--quiet"]) == 0
        assert (out / "schedule.csv").read_bytes() == before

    def test_infeasible_first_order_exits_1_naming_resource_and_agents(self, tmp_path, capsys):
        """Gap 1000 s: no order admits a schedule (early leaves the bridge after 124 s at the soonest, late must
        leave it by 950 s to meet its deadline); exit 1 with a message, no traceback."""
        path = tmp_path / "two.toml"
        path.write_text(LONG_GAP_TRUCKS.replace("GAP", "1000.0"))
        code = main(["run", str(path), "--out", str(tmp_path / "o"), "--quiet"])
        err = capsys.readouterr().err
        assert code == 1
        assert "no schedule meets the orders bridge: early > late" in err and "Traceback" not in err
        assert "bridge: early leaves + gap <= late enters" in err

    def test_unknown_method_options_exit_1_before_building(self, tmp_path, capsys):
        """A misspelt option and a mistyped switch: exit 1 naming both, nothing built or written."""
        path = tmp_path / "two.toml"
        path.write_text(LONG_GAP_TRUCKS.replace("GAP", "6.0").replace(
            'order = "swap"', 'order = "swap"\n\n[coordinator.options]\nfirst_stepp = 1\nhessian_metric = "no"'))
        code = main(["run", str(path), "--out", str(tmp_path / "o"), "--quiet"])
        text, err = capsys.readouterr()
        assert code == 1 and "Traceback" not in err and "agents" not in text
        assert f"{path}: [coordinator.options] key 'first_stepp': expected one of the bundle method's options" in err
        assert f"{path}: [coordinator.options] key 'hessian_metric': expected true or false, found \"no\"" in err
        assert not (tmp_path / "o" / "run.json").exists()
        assert main(["check", str(path)]) == 1
        assert "key 'first_stepp'" in capsys.readouterr().out

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


@functools.cache
def verified_example(name: str) -> RunResult:
    """The shipped example ``name`` run once with its own settings and the centralized check (shared with the
    report tests)."""
    return run_fleet(load_fleet(EXAMPLES / f"{name}.toml"), verify=True)


@pytest.mark.parametrize("name", ["quarry_bridge", "machining_cell", "charging_depot"])
def test_every_example_verifies_within_a_tenth_of_a_percent(name, tmp_path):
    """Each shipped example, run with its own settings and --verify, is within 0.1 % of the centralized cost."""
    run = verified_example(name)
    assert run.centralized is not None and run.centralized.success
    assert abs(run.gap) <= 1e-3, run.gap


@pytest.fixture()
def fleets(tmp_path):
    trucks, tractor = tmp_path / "trucks.toml", tmp_path / "tractor.toml"
    trucks.write_text(TWO_TRUCKS)
    tractor.write_text(ONE_TRACTOR)
    return trucks, tractor


class TestRunFolder:
    """One run per folder; a folder that cannot be used is refused (exit 2) before anything is built."""

    def test_folder_in_use_by_another_process(self, fleets, tmp_path, capsys):
        """While another process holds the folder, 'negotiate run' (fresh or --resume) exits 2 naming the
        folder and that process's id, before building, and writes nothing; once it ends, the run goes on."""
        out = tmp_path / "run"
        holder = subprocess.Popen(
            [sys.executable, "-c", "import sys\nfrom negotiate.run import claim_run_folder\n"
             "with claim_run_folder(sys.argv[1]):\n    print('held', flush=True)\n    sys.stdin.readline()\n",
             str(out)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
        )  # fmt: skip
        try:
            assert holder.stdout.readline().strip() == "held"
            for args in (["run", str(fleets[0]), "--out", str(out)], ["run", "--resume", str(out)]):
                assert main([*args, "--quiet"]) == 2
                text, err = capsys.readouterr()
                assert f"folder {out} is in use by another run (pid {holder.pid}" in err, err
                assert "agents" not in text  # the 'fleet ...: N agents' line comes after building
                assert os.listdir(out) == [LOCK_FILE]
        finally:
            holder.communicate("\n", timeout=60)
        assert holder.returncode == 0
        assert main(["run", str(fleets[0]), "--out", str(out), "--quiet"]) in (0, 3)
        assert json.loads((out / "run.json").read_text())["fleet"] == "two-trucks"
        assert LOCK_FILE not in os.listdir(out)

    def test_stale_lock_is_taken_over(self, fleets, tmp_path):
        """A lock file left by a process that has ended (its pid inside), with the temporary file of a
        checkpoint it was writing, does not block the next run; both are gone when the run ends."""
        dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                              text=True, check=True)  # fmt: skip
        out = tmp_path / "run"
        out.mkdir()
        (out / LOCK_FILE).write_text(dead.stdout)
        (out / f".checkpoint.bin.{dead.stdout.strip()}.0a1b2c3d.tmp").write_bytes(b"cut short")
        assert main(["run", str(fleets[1]), "--out", str(out), "--quiet"]) in (0, 3)
        assert (out / "run.json").is_file()
        assert not [n for n in os.listdir(out) if n.startswith(".")]

    def test_lock_released_on_every_exit_path(self, fleets, tmp_path, monkeypatch, capsys):
        """A user mistake (exit 1), an interrupt (exit 130) and an unexpected exception all release the
        folder: the lock file is gone, a folder the run created and left empty is removed, and the next run
        can take it."""
        out = tmp_path / "run"
        assert main(["run", str(fleets[1]), "--out", str(out), "--method", "nowhere.py:Nothing", "--quiet"]) == 1
        assert not out.exists()
        import negotiate.fleet.build

        def interrupt(*a, **k):
            raise KeyboardInterrupt

        # Building the agents happens inside the claimed folder (negotiate.run.run_fleet claims it first).
        monkeypatch.setattr(negotiate.fleet.build, "build_agents", interrupt)
        assert main(["run", str(fleets[1]), "--out", str(out), "--quiet"]) == 130
        assert not out.exists()

        def broken(*a, **k):
            (out / "partial.txt").write_text("x")
            raise RuntimeError("a bug")

        monkeypatch.setattr(negotiate.fleet.build, "build_agents", broken)
        with pytest.raises(RuntimeError, match="a bug"):
            main(["run", str(fleets[1]), "--out", str(out), "--quiet"])
        assert os.listdir(out) == ["partial.txt"]
        with claim_run_folder(out, resume=True):
            pass

    def test_not_a_run_folder(self, fleets, tmp_path, capsys):
        """A non-empty folder that is not a run folder is refused, naming what it holds; nothing is written."""
        out = tmp_path / "papers"
        out.mkdir()
        (out / "notes.txt").write_text("mine")
        assert main(["run", str(fleets[0]), "--out", str(out), "--quiet"]) == 2
        err = capsys.readouterr().err
        assert f"{out}: not a run folder (it holds notes.txt" in err and "Traceback" not in err
        assert os.listdir(out) == ["notes.txt"] and (out / "notes.txt").read_text() == "mine"

    def test_interrupted_run_is_not_overwritten(self, fleets, tmp_path, capsys):
        """A fresh run into a folder whose run was interrupted (checkpoint, no run.json) is refused and says
        how to continue it: the checkpoint --resume needs is kept."""
        out = tmp_path / "run"
        assert main(["run", str(fleets[1]), "--out", str(out), "--quiet"]) in (0, 3)
        (out / "run.json").unlink()
        saved = (out / "checkpoint.bin").read_bytes()
        assert main(["run", str(fleets[0]), "--out", str(out), "--quiet"]) == 2
        err = capsys.readouterr().err
        assert "holds an interrupted run" in err and f"negotiate run --resume {out}" in err
        assert (out / "checkpoint.bin").read_bytes() == saved

    def test_rerun_replaces_the_earlier_run(self, fleets, tmp_path):
        """A run into the folder of a run of another fleet leaves none of the earlier files (no trajectory
        of the other fleet), and a link planted at an output name is replaced, not written through."""
        out = tmp_path / "run"
        assert main(["run", str(fleets[1]), "--out", str(out), "--quiet"]) in (0, 3)
        assert os.listdir(out / "trajectories") == ["tractor-1.csv"]
        victim = tmp_path / "victim.csv"
        victim.write_text("keep me")
        (out / "schedule.csv").unlink()
        (out / "schedule.csv").symlink_to(victim)
        assert main(["run", str(fleets[0]), "--out", str(out), "--quiet"]) in (0, 3)
        assert sorted(os.listdir(out / "trajectories")) == ["truck-a.csv", "truck-b.csv"]
        assert json.loads((out / "run.json").read_text())["fleet"] == "two-trucks"
        assert "tractor-1" not in (out / "agents.csv").read_text()
        assert victim.read_text() == "keep me" and not (out / "schedule.csv").is_symlink()

    def test_out_that_cannot_be_a_folder(self, fleets, tmp_path, capsys):
        """--out naming a file, or a path under a file: exit 2 with the path named, before building."""
        afile = tmp_path / "afile"
        afile.write_text("x")
        for out, says in ((afile, "is a file, not a folder"), (afile / "sub", "cannot create this folder")):
            assert main(["run", str(fleets[0]), "--out", str(out), "--quiet"]) == 2
            text, err = capsys.readouterr()
            assert f"negotiate run: {out}: {says}" in err and "Traceback" not in err
            assert "agents" not in text
        assert afile.read_text() == "x"

    @pytest.mark.skipif(not Path("/proc/self").is_dir(), reason="needs Linux's /proc")
    def test_out_on_a_file_system_that_refuses_files(self, fleets, capsys):
        """/proc takes no new files or folders, not even from root: exit 2 before building."""
        for out, says in (("/proc/negotiate-out/sub", "cannot create this folder"), ("/proc", "cannot write into")):
            assert main(["run", str(fleets[0]), "--out", out, "--quiet"]) == 2
            text, err = capsys.readouterr()
            assert f"{out}: {says}" in err and "agents" not in text and "Traceback" not in err

    @pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0, reason="root may write anywhere")
    def test_out_without_write_permission(self, fleets, tmp_path, capsys):
        """A folder the user may not write into (or create a folder in): exit 2 before building."""
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        try:
            for out, says in ((ro / "sub", "cannot create this folder"), (ro, "cannot write into this folder")):
                assert main(["run", str(fleets[0]), "--out", str(out), "--quiet"]) == 2
                text, err = capsys.readouterr()
                assert f"{out}: {says}" in err and "agents" not in text
        finally:
            ro.chmod(0o700)
