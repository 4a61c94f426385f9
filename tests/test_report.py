"""Tests of the run's files (negotiate.output.results) and the HTML report (negotiate.output.report,
``negotiate report``).

One small invented fleet with every kind of agent and resource (two trucks on a bridge, two machines on a
furnace, two tractors on a grid connection) is run once per test session (:func:`mixed_run`, shared with the
browser test). What is checked: the CSV files give back the very numbers of the RunResult (floats are
written in shortest round-trip form, so equality is exact); the schedule they describe keeps the gaps and
limits of the fleet file; the report is one file with every image embedded and decodable, the tables and
the caution; ``negotiate report DIR`` rebuilds it byte for byte from the files alone.
"""

from __future__ import annotations

import atexit
import base64
import functools
import io
import math
import re
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pytest

from negotiate import cli
from negotiate.core.kkt import Tolerances
from negotiate.fleet.parse import load_fleet
from negotiate.output.report import CAUTION, _cost, _pct, _sig
from negotiate.output.results import RunFiles, load_run
from negotiate.run import RunResult, run_fleet, write_outputs

# INVENTED test fleet (every number made up, physically plausible); SI units.
MIXED_FLEET = """
[fleet]
name = "tiny-mixed"

[resources.bridge]
kind = "exclusive"
gap = 6.0

[resources.furnace]
kind = "exclusive"
gap = 300.0

[resources.grid]
kind = "capacity"
limits = [200e3, 150e3, 150e3, 250e3]
start = 0.0
block_length = 900.0

[coordinator]
method = "bundle"
max_rounds = 40

[defaults.vehicle]
route_length = 1200.0
stages = 12
speed_limit = 13.0
min_speed = 1.0

[agents.truck-a]
model = "vehicle"
initial_speed = 6.0
departure = 0.0
desired_arrival = 140.0
latest_arrival = 600.0
[[agents.truck-a.zones]]
resource = "bridge"
entry = 600.0
exit = 660.0
speed_limit = 6.0

[agents.truck-b]
model = "vehicle"
initial_speed = 6.0
departure = 5.0
desired_arrival = 145.0
latest_arrival = 600.0
[[agents.truck-b.zones]]
resource = "bridge"
entry = 500.0
exit = 560.0
speed_limit = 6.0

[defaults.machine]
blocks = 6
horizon = 14400.0

[agents.lathe]
model = "machine"
work = 300.0
max_rate = 0.3
power_coeff = 4.0e5
due = 3600.0
tardiness_weight = 2.0e4
[[agents.lathe.stations]]
resource = "furnace"
duration = 1200.0
transfer = 120.0
holding_cost = 5.0

[agents.mill]
model = "machine"
work = 400.0
max_rate = 0.4
power_coeff = 3.0e5
due = 3600.0
tardiness_weight = 2.0e4
[[agents.mill.stations]]
resource = "furnace"
duration = 1500.0
transfer = 120.0
holding_cost = 5.0

[defaults.capacity]
resource = "grid"
tariff = [1.0, 1.4, 1.2, 0.8]
charger_power = 1.5e5

[agents.tractor-1]
model = "capacity"
battery_capacity = 3.6e8
initial_soc = 0.3
target_soc = 0.8

[agents.tractor-2]
model = "capacity"
battery_capacity = 3.6e8
initial_soc = 0.4
target_soc = 0.9
"""


@functools.cache
def mixed_run() -> tuple[RunResult, Path]:
    """Run the mixed fleet once (with the centralized check) and write its folder; shared by test modules."""
    root = Path(tempfile.mkdtemp(prefix="negotiate-report-"))
    atexit.register(shutil.rmtree, root, ignore_errors=True)
    fleet = root / "tiny_mixed.toml"
    fleet.write_text(MIXED_FLEET)
    run = run_fleet(load_fleet(fleet), verify=True)
    out = root / "run"
    write_outputs(run, out)
    return run, out


@pytest.fixture(scope="module")
def run() -> RunResult:
    return mixed_run()[0]


@pytest.fixture(scope="module")
def folder() -> Path:
    return mixed_run()[1]


@pytest.fixture(scope="module")
def files(folder: Path) -> RunFiles:
    return load_run(folder)


def _same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or a == b


class TestResultFiles:
    """The CSV files written by write_outputs, read back with load_run."""

    def test_run_converged(self, run: RunResult) -> None:
        """The fixture's run converged and its centralized check agrees (else the rest tests a failure)."""
        assert run.coordination.status == "converged", run.coordination.message
        assert run.gap is not None and abs(run.gap) < 1e-4  # the run's own tolerance is 1e-6 relative

    def test_history_round_trip(self, run: RunResult, files: RunFiles) -> None:
        """history.csv holds every RoundRecord with exactly the same numbers."""
        hist = run.coordination.history
        assert len(files.history) == len(hist) > 1
        for got, want in zip(files.history, hist, strict=True):
            assert got.round == want.round and got.agent_solves == want.agent_solves
            for name in ("trial_total", "best_total", "measure"):
                assert _same(getattr(got, name), getattr(want, name)), name
            assert got.flagged == tuple(want.flagged) and got.failed == tuple(want.failed)
            assert got.note == want.note

    def test_prices_round_trip(self, run: RunResult, files: RunFiles) -> None:
        """prices.csv holds each parameter's coordinated value, free optimum and value gradient exactly."""
        rows = {(p.agent, p.parameter): p for p in files.prices}
        assert len(rows) == sum(len(a.params) for a in run.agents)
        for a, rep in zip(run.agents, run.coordination.evaluation.reports, strict=True):
            for k, q in enumerate(a.params):
                row = rows[(a.name, q.name)]
                assert row.value == rep.p[k] and row.free_optimum == a.free_optimum[k]
                assert row.price == rep.gradient[k]
                assert row.unit == q.unit and row.price_unit == f"cost/{q.unit}"
                assert row.block == q.block and row.kind == q.kind

    def test_agents_round_trip(self, run: RunResult, files: RunFiles) -> None:
        """agents.csv holds each agent's free-optimum cost, coordinated cost and certificate."""
        assert [a.agent for a in files.agents] == [a.name for a in run.agents]
        for row, a, rep, fv in zip(files.agents, run.agents, run.coordination.evaluation.reports, run.free_values,
                                   strict=True):  # fmt: skip
            assert row.value == rep.value and row.free_value == fv and row.weight == a.weight
            assert row.increase == rep.value - fv
            assert row.verdict == rep.certificate.verdict
            assert row.weakly_active == tuple(str(r) for r in rep.certificate.weakly_active)
            assert row.model == a.model

    def test_trajectories_round_trip(self, run: RunResult, files: RunFiles) -> None:
        """trajectories/<agent>.csv equals agent.trajectory(result) at the coordinated point, column by column."""
        assert set(files.trajectories) == {a.name for a in run.agents}
        for a, rep in zip(run.agents, run.coordination.evaluation.reports, strict=True):
            want = a.trajectory(rep.result)
            got = files.trajectories[a.name]
            assert list(got) == list(want)
            for col, values in want.items():
                np.testing.assert_array_equal(got[col], np.asarray(values, dtype=float), err_msg=col)

    def test_schedule_keeps_gaps_and_limits(self, run: RunResult, files: RunFiles) -> None:
        """The slots read back keep each resource's gap in the run's order, the shares each block's limit.

        Reference: the fleet file's own gaps (s) and limits (W). Tolerance 1e-8 relative to the numbers
        compared: the coupling polyhedron is met to the accuracy of its QP projection (about 1e-9 relative,
        a few microseconds on a 3600 s schedule).
        """
        gaps = {r.resource: r.gap_s for r in files.exclusive()}
        assert gaps == {"bridge": 6.0, "furnace": 300.0}
        t = {(p.agent, p.resource, p.kind): p.value for p in files.prices}
        for res, order in run.coordination.orders.items():
            for first, second in zip(order, order[1:], strict=False):
                earliest = t[(first, res, "leave")] + gaps[res]
                assert t[(second, res, "enter")] >= earliest - 1e-8 * earliest
            for a in order:  # schedule.csv (six decimals) shows the same slots
                row = next(s for s in files.schedule if s.agent == a and s.resource == res)
                assert abs(row.enter - t[(a, res, "enter")]) <= 1e-6 and abs(row.leave - t[(a, res, "leave")]) <= 1e-6
        limits = {b.block: b.limit for b in files.resources if b.resource == "grid"}
        assert list(limits.values()) == [200e3, 150e3, 150e3, 250e3]
        for p in files.prices:
            assert p.kind != "share" or p.value <= limits[p.block] * (1 + 1e-8)
        for k, lim in limits.items():
            total = sum(p.value for p in files.prices if p.resource == "grid" and p.block == k)
            assert total <= lim * (1 + 1e-8)

    def test_summary_has_the_run(self, run: RunResult, files: RunFiles) -> None:
        """run.json has the status, rounds, solves and the centralized gap the report shows."""
        s = files.summary
        assert s["status"] == run.coordination.status and s["rounds"] == run.coordination.rounds
        assert s["agent_solves"] == run.coordination.agent_solves
        assert s["relative_gap"] == run.gap and s["total_cost"] == run.total


def _images(html: str) -> list[str]:
    return re.findall(r'<img src="([^"]*)"', html)


class TestReport:
    """report.html: self-contained, complete, reproducible from the files."""

    def test_self_contained(self, folder: Path) -> None:
        """No network fetch or script: every image is an embedded PNG that decodes to a picture."""
        from PIL import Image

        html = (folder / "report.html").read_text(encoding="utf-8")
        for bad in ("http://", "https://", "<script", "<link", "url(", "@import"):
            assert bad not in html, bad
        srcs = _images(html)
        assert srcs
        for src in srcs:
            assert src.startswith("data:image/png;base64,")
            data = base64.b64decode(src.split(",", 1)[1], validate=True)
            with Image.open(io.BytesIO(data)) as im:
                assert im.format == "PNG" and im.width >= 600 and im.height >= 150

    def test_contents(self, run: RunResult, folder: Path) -> None:
        """One chart per resource, the convergence chart, one per agent; the tables, units and caution."""
        html = (folder / "report.html").read_text(encoding="utf-8")
        # 2 exclusive + 1 time-space diagram (bridge; the furnace has no vehicle users) + 1 capacity
        # + convergence + 6 agents
        assert len(_images(html)) == 2 + 1 + 1 + 1 + len(run.agents)
        assert 'alt="time-space diagram of bridge"' in html and "time-space diagram of furnace" not in html
        for table in ("summary-table", "agents-table", "slot-prices", "prices-grid"):
            assert f'<table id="{table}"' in html, table
        assert html.count("<table") == 4
        assert "dV/d(enter) (cost/s)" in html and "dV/d(leave) (cost/s)" in html
        assert "dV/d(share) per block (cost/W)" in html
        for a in run.agents:
            assert f"<td>{a.name}</td>" in html
        assert CAUTION in html
        assert "relative gap to it" in html

    def test_report_command_rebuilds_it(self, folder: Path, tmp_path: Path) -> None:
        """``negotiate report DIR`` on a copy without report.html writes the same bytes."""
        copy = tmp_path / "copy"
        shutil.copytree(folder, copy)
        (copy / "report.html").unlink()
        assert cli.main(["report", str(copy)]) == 0
        assert (copy / "report.html").read_bytes() == (folder / "report.html").read_bytes()

    def test_missing_files_named(self, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
        """A folder that is not a run folder: exit status 2 and the missing files named, no traceback."""
        (tmp_path / "run.json").write_text("{}")
        assert cli.main(["report", str(tmp_path)]) == 2
        err = capsys.readouterr().err
        assert "missing schedule.csv, history.csv, prices.csv, agents.csv, resources.csv" in err
        assert "Traceback" not in err


class TestNumbers:
    """Rounding in the report tables."""

    def test_significant_digits(self) -> None:
        """Prices keep three significant digits, with thin-space thousands separators."""
        assert _sig(-47097.27) == "-47\u2009100"
        assert _sig(6.23721) == "6.24" and _sig(5.0) == "5.00" and _sig(0.0123456) == "0.0123"
        assert _sig(2.5e-5) == "2.50e-05" and _sig(float("nan")) == "–" and _sig(0.0) == "0"

    def test_costs_and_percent(self) -> None:
        """Large costs as whole numbers, small ones with four digits; increases as signed percent."""
        assert _cost(429217668.79) == "429\u2009217\u2009669" and _cost(12.3456) == "12.35"
        assert _pct(2.2) == "+220 %" and _pct(0.0744) == "+7.4 %" and _pct(-0.5) == "-50 %"


class TestLargeFleet:
    """A fleet too large for one chart per agent or one slot chart per resource (copies of one truck)."""

    def test_charts_are_split_and_capped(self, files: RunFiles, monkeypatch: pytest.MonkeyPatch) -> None:
        """36 bridge users: two slot charts (30 + 6); trajectories only for the agents whose cost rose most."""
        import dataclasses

        from negotiate.output import report

        monkeypatch.setattr(report, "MAX_TRAJECTORIES", 3)  # keeps the test fast; the rule is the same
        truck = next(a for a in files.agents if a.agent == "truck-a")
        copies = [f"truck-a{k:02d}" for k in range(34)]
        extra_agents = tuple(dataclasses.replace(truck, agent=n, increase=1e9 + k)
                             for k, n in enumerate(copies))  # fmt: skip
        extra_slots = tuple(dataclasses.replace(s, agent=n) for s in files.schedule if s.agent == "truck-a"
                            for n in copies)  # fmt: skip
        extra_prices = tuple(dataclasses.replace(p, agent=n) for p in files.prices if p.agent == "truck-a"
                             for n in copies)  # fmt: skip
        big = dataclasses.replace(
            files,
            agents=files.agents + extra_agents,
            schedule=files.schedule + extra_slots,
            prices=files.prices + extra_prices,
            trajectories={**files.trajectories, **{n: files.trajectories["truck-a"] for n in copies}},
        )
        html = report.render_report(big)
        assert "bridge: slots" not in html  # titles live in the images; the alt texts name the parts
        assert 'alt="slots on bridge, users 1–30"' in html and 'alt="slots on bridge, users 31–36"' in html
        assert "(exclusive, gap 6 s, 36 users)" in html
        traj = re.findall(r'alt="trajectories of ([^"]+)"', html)
        assert traj == ["truck-a33", "truck-a32", "truck-a31"]  # the largest increases, largest first
        assert "40 agents: shown are the 3 whose cost rose most" in html


class TestPlannedDraw:
    """schedule.csv's ``draw`` and the share chart: the power an agent plans to draw, beside the share it got."""

    EFFICIENCY = 0.92  # the mixed fleet's tractors keep CapacityParams' default charging efficiency
    CHARGER_POWER = 1.5e5  # W, MIXED_FLEET's charger_power

    def test_draw_matches_the_trajectory(self, files: RunFiles) -> None:
        """Each share row's draw equals the agent's own trajectory in that block, sampled and integrated here.

        Two references from trajectories/<agent>.csv, independent of the draw callable: ``power_W`` sampled
        at the block's midpoint (zero-order hold: the value at a node holds until the next node), and the
        energy balance of the block, (energy_J[k+1] - energy_J[k]) / (efficiency * h), the charging
        equation E_{k+1} = E_k + efficiency P_k h (conservation of energy). Tolerance 1e-6 W: schedule.csv
        has six decimals; the energies, ~1e8 J in double precision, give ~1e-7 W over 900 s.
        """
        rows = [s for s in files.schedule if s.resource == "grid"]
        assert len(rows) == 8
        for s in rows:
            tr = files.trajectories[s.agent]
            t, power, energy = tr["time_s"], tr["power_W"], tr["energy_J"]
            mid = 0.5 * (s.enter + s.leave)
            i = int(np.searchsorted(t, mid, side="right")) - 1
            assert t[i] <= mid < t[i + 1]
            assert abs(s.draw - power[i]) <= 1e-6, (s.agent, s.enter)
            h = t[i + 1] - t[i]
            assert h == s.leave - s.enter
            assert abs(s.draw - (energy[i + 1] - energy[i]) / (self.EFFICIENCY * h)) <= 1e-6, (s.agent, s.enter)
            # P_k <= share_k, a row of the model written in units of the charger power (agents/capacity.py),
            # met to the certificate's feasibility tolerance (negotiate.core.kkt.Tolerances.feasibility)
            assert s.draw <= s.share + Tolerances().feasibility * self.CHARGER_POWER
        # the point of the column: some shares are granted and left (partly) unused
        assert any(s.share - s.draw > 1e3 for s in rows)
        assert all(math.isnan(s.draw) for s in files.schedule if s.resource != "grid")

    def test_chart_splits_each_share(self) -> None:
        """In the share chart each user's bar is its draw (solid) and the rest of its share (hatched)."""
        from types import SimpleNamespace as Row

        from negotiate.output import plots

        blocks = [Row(block=k, start_s=900.0 * k, end_s=900.0 * (k + 1), limit=2e5) for k in range(2)]
        shares = [
            Row(agent="a", enter=0.0, share=1e5, draw=4e4),
            Row(agent="a", enter=900.0, share=5e4, draw=5e4),
            Row(agent="b", enter=0.0, share=6e4, draw=0.0),
            Row(agent="b", enter=900.0, share=7e4, draw=1e4),
        ]
        fig = plots.capacity_chart("grid", "W", blocks, shares)
        ax = fig.axes[0]
        bars = [[(p.get_y(), p.get_height(), p.get_hatch()) for p in c.patches] for c in ax.containers]
        assert bars == [
            [(0.0, 4e4, None), (0.0, 5e4, None)],  # a: drawn
            [(4e4, 6e4, "////"), (5e4, 0.0, "////")],  # a: granted, not drawn
            [(1e5, 0.0, None), (5e4, 1e4, None)],  # b: drawn, stacked on a's shares
            [(1e5, 6e4, "////"), (6e4, 6e4, "////")],  # b: not drawn
        ]
        assert "share not drawn" in [t.get_text() for t in ax.get_legend().get_texts()]

    def test_report_explains_it(self, folder: Path) -> None:
        """The report's share chart is followed by the note saying what solid and hatched mean."""
        html = (folder / "report.html").read_text(encoding="utf-8")
        assert "the solid part of its bar is what it plans to draw there (<code>draw</code> in schedule.csv)" in html

    def test_folder_without_draw(self, folder: Path, tmp_path: Path) -> None:
        """A run folder written before the column existed still loads (draw nan) and its report has no note."""
        copy = tmp_path / "old"
        shutil.copytree(folder, copy)
        lines = (copy / "schedule.csv").read_text().splitlines()
        col = lines[0].split(",").index("draw")
        (copy / "schedule.csv").write_text(
            "\n".join(",".join(c for j, c in enumerate(line.split(",")) if j != col) for line in lines) + "\n"
        )
        old = load_run(copy)
        assert all(math.isnan(s.draw) for s in old.schedule)
        assert cli.main(["report", str(copy)]) == 0
        assert "<code>draw</code>" not in (copy / "report.html").read_text(encoding="utf-8")


# ---------------------------------------------------------------------------------------------------------
# damaged run folders: `negotiate report DIR` exits 2 naming the file and what is wrong, never a traceback


def _edit_csv(path: Path, line: int, column: str, value: str) -> None:
    """Set one cell of a CSV file (line 1 is the header)."""
    import csv as _csv

    rows = list(_csv.reader(path.read_text().splitlines()))
    rows[line - 1][rows[0].index(column)] = value
    buf = io.StringIO()
    _csv.writer(buf).writerows(rows)
    path.write_text(buf.getvalue())


def _json_key(d: Path, key: str, value: object) -> None:
    import json

    data = json.loads((d / "run.json").read_text())
    data[key] = value
    (d / "run.json").write_text(json.dumps(data))


def _outside_csv(d: Path) -> Path:
    """A valid trajectory CSV outside the run folder (what a path leading out of it would reach)."""
    target = d.parent / "elsewhere.csv"
    target.write_text("time_s,position_m\n0.0,1.0\n1.0,2.0\n")
    return target


# (damage done to a copy of a good run folder, the file the message must name, what it must say)
DAMAGE = {
    "run.json missing": (lambda d: (d / "run.json").unlink(), "run.json", "missing run.json"),
    "run.json invalid JSON": (lambda d: (d / "run.json").write_text('{"status": "conv'), "run.json",
                              "expected JSON"),
    "run.json not an object": (lambda d: (d / "run.json").write_text("[1, 2]"), "run.json",
                               "expected a JSON object, found a list"),
    "run.json rounds not an integer": (lambda d: _json_key(d, "rounds", "many"), "run.json",
                                       "key 'rounds': expected an integer"),
    "run.json orders of the wrong shape": (lambda d: _json_key(d, "orders", {"bridge": 5}), "run.json",
                                           "key 'orders'"),
    "run.json total not a number": (lambda d: _json_key(d, "total_cost", "cheap"), "run.json",
                                    "key 'total_cost': expected a number"),
    "run.json binary garbage": (lambda d: (d / "run.json").write_bytes(bytes(range(256)) * 4), "run.json",
                                "expected UTF-8 text"),
    "run.json nested too deep": (lambda d: (d / "run.json").write_text("[" * 100000 + "]" * 100000), "run.json",
                                 "expected JSON"),
    "run.json is a folder": (lambda d: ((d / "run.json").unlink(), (d / "run.json").mkdir()), "run.json",
                             "expected a file, found a folder"),
    "schedule.csv empty": (lambda d: (d / "schedule.csv").write_text(""), "schedule.csv", "empty file"),
    "history.csv column missing": (
        lambda d: (d / "history.csv").write_text((d / "history.csv").read_text().replace("measure,", "", 1)),
        "history.csv", "expected the column(s) measure"),
    "history.csv round not an integer": (lambda d: _edit_csv(d / "history.csv", 2, "round", "1.5"),
                                         "history.csv line 2, column 'round'", "expected an integer"),
    "prices.csv value not a number": (lambda d: _edit_csv(d / "prices.csv", 3, "value", "soon"),
                                      "prices.csv line 3, column 'value'", "expected a number, found 'soon'"),
    "agents.csv row cut short": (
        lambda d: (d / "agents.csv").write_text("\n".join(
            line if k != 2 else ",".join(line.split(",")[:4])
            for k, line in enumerate((d / "agents.csv").read_text().splitlines()))),
        "agents.csv line 3", "expected 11 fields, found 4"),
    "resources.csv unknown kind": (lambda d: _edit_csv(d / "resources.csv", 2, "kind", "shared"),
                                   "resources.csv line 2, column 'kind'", "'exclusive', 'capacity' or 'dwell'"),
    "resources.csv limit infinite": (lambda d: _edit_csv(d / "resources.csv", 4, "limit", "inf"),
                                     "resources.csv line 4, column 'limit'", "expected a finite number"),
    "schedule.csv binary garbage": (lambda d: (d / "schedule.csv").write_bytes(b"\x00\xff\xfe" * 100),
                                    "schedule.csv", "expected UTF-8 text"),
    "trajectory file missing": (lambda d: (d / "trajectories" / "truck-a.csv").unlink(),
                                "trajectories/truck-a.csv", "missing (named in agents.csv for agent 'truck-a')"),
    "trajectory file empty": (lambda d: (d / "trajectories" / "lathe.csv").write_text(""),
                              "trajectories/lathe.csv", "empty file"),
    "trajectory value not a number": (lambda d: _edit_csv(d / "trajectories" / "mill.csv", 2, "time_s", "x"),
                                      "trajectories/mill.csv line 2, column 'time_s'", "expected a number, found 'x'"),
    "trajectory path leaving the folder": (
        lambda d: (_outside_csv(d), _edit_csv(d / "agents.csv", 2, "trajectory_file", "../elsewhere.csv")),
        "elsewhere.csv", "leads outside the run folder"),
    "trajectory path absolute": (
        lambda d: _edit_csv(d / "agents.csv", 2, "trajectory_file", str(_outside_csv(d).resolve())),
        "agents.csv for agent 'truck-a'", "expected a path inside the run folder"),
    "trajectory link leaving the folder": (
        lambda d: ((d / "trajectories" / "truck-b.csv").unlink(),
                   (d / "trajectories" / "truck-b.csv").symlink_to(_outside_csv(d))),
        "trajectories/truck-b.csv", "leads outside the run folder"),
    "run.json link leaving the folder": (
        lambda d: ((d.parent / "other.json").write_text((d / "run.json").read_text()), (d / "run.json").unlink(),
                   (d / "run.json").symlink_to(d.parent / "other.json")),
        "run.json", "leads outside the run folder"),
    "trajectories a file, not a folder": (
        lambda d: (shutil.rmtree(d / "trajectories"), (d / "trajectories").write_text("x")),
        "trajectories/truck-a.csv", "trajectories/truck-a.csv"),
}  # fmt: skip


@pytest.mark.parametrize("case", list(DAMAGE))
def test_damaged_folder_exits_2_naming_the_file(case: str, folder: Path, tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:  # fmt: skip
    """Each damaged copy of a good run folder: exit status 2, the file (and line, column) named with what is
    wrong, no traceback, and no report written (nor anything read from outside the folder)."""
    damage, where, what = DAMAGE[case]
    copy = tmp_path / "run"
    shutil.copytree(folder, copy, symlinks=True)
    (copy / "report.html").unlink()
    damage(copy)
    assert cli.main(["report", str(copy)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("negotiate report: ") and "Traceback" not in err
    assert where in err and what in err, err
    assert not (copy / "report.html").exists()


def test_folder_that_does_not_exist(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A DIR that does not exist, or is a file: exit 2 with the path named."""
    assert cli.main(["report", str(tmp_path / "nowhere")]) == 2
    assert "nowhere: no such run folder" in capsys.readouterr().err
    (tmp_path / "afile").write_text("x")
    assert cli.main(["report", str(tmp_path / "afile")]) == 2
    assert "afile: expected a run folder, found a file" in capsys.readouterr().err


class TestReportWritesInsideTheFolder:
    """The report is written to a new temporary file in DIR, then renamed: links placed in DIR at
    report.html or at a temporary name never redirect the write."""

    def test_link_at_report_html_is_replaced_not_followed(self, folder: Path, tmp_path: Path) -> None:
        copy = tmp_path / "run"
        shutil.copytree(folder, copy)
        victim = tmp_path / "victim.txt"
        victim.write_text("keep me")
        (copy / "report.html").unlink()
        (copy / "report.html").symlink_to(victim)
        (copy / "report.html.tmp").symlink_to(victim)  # the temporary name used before
        assert cli.main(["report", str(copy)]) == 0
        assert victim.read_text() == "keep me"
        assert not (copy / "report.html").is_symlink()
        assert (copy / "report.html").read_bytes() == (folder / "report.html").read_bytes()

    def test_link_at_the_temporary_name_is_not_followed(self, folder: Path, tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:  # fmt: skip
        """The temporary name is made predictable here and a link planted at it: creating the file with
        O_EXCL refuses the link, and the next name is used."""
        import os

        from negotiate.core import files as _files

        copy = tmp_path / "run"
        shutil.copytree(folder, copy)
        victim = tmp_path / "victim.txt"
        victim.write_text("keep me")
        tokens = iter(["planted", "free"])
        monkeypatch.setattr(_files.secrets, "token_hex", lambda n: next(tokens))
        (copy / f".report.html.{os.getpid()}.planted.tmp").symlink_to(victim)
        assert cli.main(["report", str(copy)]) == 0
        assert victim.read_text() == "keep me"
        assert (copy / "report.html").read_bytes() == (folder / "report.html").read_bytes()


TOLERATED = {
    "trajectory with infinite values": lambda d: _edit_csv(d / "trajectories" / "truck-a.csv", 3, "speed_m_per_s",
                                                           "inf"),
    "trajectory with only a time column": lambda d: (d / "trajectories" / "lathe.csv").write_text("time_s\n0.0\n"),
    "trajectory with a header only": lambda d: (d / "trajectories" / "mill.csv").write_text("time_s,rate_kg_per_s\n"),
    "run.json without optional keys": lambda d: (d / "run.json").write_text('{"fleet": "tiny-mixed"}'),
    "vehicle trajectory whose time goes back": lambda d: _edit_csv(d / "trajectories" / "truck-b.csv", 3, "time_s",
                                                                   "-1.0"),
    "vehicle trajectory that ends before its slot": lambda d: (d / "trajectories" / "truck-a.csv").write_text(
        "time_s,position_m\n0.0,0.0\n1.0,10.0\n"),
}  # fmt: skip


@pytest.mark.parametrize("case", list(TOLERATED))
def test_odd_but_readable_folder_gives_a_report(case: str, folder: Path, tmp_path: Path) -> None:
    """Files that are well formed but odd (a value that is not finite, a trajectory with nothing to draw, a
    run.json with only some keys) still give a report (exit 0): a dash or a note where nothing can be shown."""
    copy = tmp_path / "run"
    shutil.copytree(folder, copy)
    TOLERATED[case](copy)
    assert cli.main(["report", str(copy)]) == 0
    html = (copy / "report.html").read_text(encoding="utf-8")
    if "only a time column" in case:
        assert "No trajectory for: lathe" in html
    if case.startswith("vehicle trajectory"):  # that truck is left out of the bridge's time-space diagram
        assert 'alt="time-space diagram of bridge"' in html and "Not drawn: 1 user without a position" in html


# ---------------------------------------------------------------------------------------------------------
# time-space diagram


def _example_folder(name: str) -> Path:
    """The shipped example's verified run (shared with test_cli_run) written into a temporary folder."""
    from test_cli_run import verified_example

    root = Path(tempfile.mkdtemp(prefix=f"negotiate-{name}-"))
    atexit.register(shutil.rmtree, root, ignore_errors=True)
    write_outputs(verified_example(name), root / "run")
    return root / "run"


@pytest.fixture(scope="module")
def quarry_folder() -> Path:
    return _example_folder("quarry_bridge")


class TestSpaceTime:
    """The time-space diagram per exclusive resource with vehicle users, read from the run folder alone."""

    EXAMPLE = Path(__file__).parents[1] / "examples" / "quarry_bridge.toml"

    def _zones(self) -> dict[str, tuple[float, float]]:
        """Per truck, from the fleet file itself: where its front enters the bridge and where it has cleared it
        (front at the zone's exit plus the vehicle's length: agents/params.py ZoneParams.exit)."""
        import tomllib

        fleet = tomllib.loads(self.EXAMPLE.read_text())
        out = {}
        for name, a in fleet["agents"].items():
            length = a.get("length", fleet["defaults"]["vehicle"]["length"])
            (z,) = [z for z in a["zones"] if z["resource"] == "bridge"]
            out[name] = (z["entry"], z["exit"] + length)
        return out

    def test_lines_cross_the_band_at_the_schedule_times(self, quarry_folder: Path) -> None:
        """Every truck's line reaches distance 0 at its enter time and the cleared distance at its leave time of
        schedule.csv (read with the csv module), and the band's ends are the fleet file's zone positions.

        The vehicle model puts nodes at every zone entry and exit, so linear interpolation is exact there up to
        the 6 decimals (5e-7 s) of schedule.csv's times; 1e-6 s and, at <= 15 m/s, 2e-5 m are allowed."""
        import csv

        from negotiate.output.report import space_time_lines

        with open(quarry_folder / "schedule.csv", newline="") as fh:
            slots = {r["agent"]: (float(r["enter"]), float(r["leave"])) for r in csv.DictReader(fh)
                     if r["resource"] == "bridge"}  # fmt: skip
        zones = self._zones()
        lines = space_time_lines(load_run(quarry_folder), "bridge")
        assert sorted(x.agent for x in lines) == sorted(zones) == sorted(slots)
        assert [x.enter for x in lines] == sorted(x.enter for x in lines)  # in order of entry
        for x in lines:
            enter, leave = slots[x.agent]
            entry, cleared = zones[x.agent]
            assert x.entry_m == pytest.approx(entry, abs=2e-5), x.agent
            assert x.clear_m == pytest.approx(cleared - entry, abs=2e-5), x.agent
            # where the drawn line meets the band's edges (inverse interpolation of the drawn points)
            assert np.interp(0.0, x.distance_m, x.time_s) == pytest.approx(enter, abs=1e-6), x.agent
            assert np.interp(cleared - entry, x.distance_m, x.time_s) == pytest.approx(leave, abs=1e-6), x.agent
            # and the raw trajectory file, at the fleet file's positions
            with open(quarry_folder / "trajectories" / f"{x.agent}.csv", newline="") as fh:
                rows = list(csv.DictReader(fh))
            t = np.array([float(r["time_s"]) for r in rows])
            pos = np.array([float(r["position_m"]) for r in rows])
            assert np.interp(entry, pos, t) == pytest.approx(enter, abs=1e-6), x.agent
            assert np.interp(cleared, pos, t) == pytest.approx(leave, abs=1e-6), x.agent

    def test_drawn_for_the_quarry_with_each_line_labelled(self, quarry_folder: Path) -> None:
        """The report has the bridge's diagram; the figure shades the band 0..70 m (60 m deck + 10 m truck, from
        the fleet file) and labels the lines 1..8 in the order of schedule.csv's enter times."""
        from negotiate.output import plots
        from negotiate.output.report import space_time_lines

        html = (quarry_folder / "report.html").read_text(encoding="utf-8")
        assert html.count('alt="time-space diagram of bridge"') == 1
        assert "measured from where it enters bridge (0 m)" in html
        assert CAUTION in html
        files = load_run(quarry_folder)
        fig = plots.space_time_chart("bridge", space_time_lines(files, "bridge"), 6.0)
        ax = fig.axes[0]
        order = [s.agent for s in sorted((s for s in files.schedule if s.resource == "bridge"), key=lambda s: s.enter)]
        assert [t.get_text() for t in ax.texts] == [f"{i + 1} {a}" for i, a in enumerate(order)]
        band = ax.patches[0].get_path().get_extents(ax.patches[0].get_transform() - ax.transData)
        assert (band.y0, band.y1) == (pytest.approx(0.0, abs=1e-9), pytest.approx(70.0, abs=2e-5))
        assert "zone entry (m)" in ax.get_ylabel() and "own route" in ax.get_ylabel()
        assert ax.get_xlabel() == "time (s)"

    def test_skipped_for_the_machining_cell(self) -> None:
        """Machines have no position along a route: no resource of the machining cell gets a diagram."""
        from negotiate.output.report import space_time_lines

        folder = _example_folder("machining_cell")
        files = load_run(folder)
        assert files.exclusive() and all(not space_time_lines(files, r.resource) for r in files.exclusive())
        assert "time-space diagram" not in (folder / "report.html").read_text(encoding="utf-8")

    def test_folder_without_trajectories(self, folder: Path, tmp_path: Path) -> None:
        """A folder whose agents have no trajectory files (as written when no model gives one) still loads and
        gives a report, without a diagram."""
        copy = tmp_path / "old"
        shutil.copytree(folder, copy)
        shutil.rmtree(copy / "trajectories")
        import csv

        with open(copy / "agents.csv", newline="") as fh:
            rows = list(csv.DictReader(fh))
        for r in rows:
            r["trajectory_file"] = ""
        with open(copy / "agents.csv", "w", newline="") as fh:
            w = csv.DictWriter(fh, fieldnames=list(rows[0]))
            w.writeheader()
            w.writerows(rows)
        assert not load_run(copy).trajectories
        assert cli.main(["report", str(copy)]) == 0
        assert "time-space diagram" not in (copy / "report.html").read_text(encoding="utf-8")


# ---------------------------------------------------------------------------------------------------------
# the order's gap beside the time-space diagram


@pytest.fixture(scope="module")
def master_folder() -> Path:
    """Three generated trucks (invented data) on one bridge, orders by the order master, written to a folder."""
    import dataclasses
    import tomllib

    from negotiate.fleet.parse import parse_fleet
    from negotiate.tools.generate import generate_fleet

    spec = parse_fleet(tomllib.loads(generate_fleet("bridge", 3, 5)), "generated")
    spec = dataclasses.replace(spec, coordinator=dataclasses.replace(spec.coordinator, order="master"))
    root = Path(tempfile.mkdtemp(prefix="negotiate-master-"))
    atexit.register(shutil.rmtree, root, ignore_errors=True)
    run_fleet(spec, out=root / "run")
    return root / "run"


def _beside(html: str, resource: str) -> str:
    """The text beside the time-space diagram of ``resource`` (the paragraph in the same box as the image)."""
    box = re.search(r'<div class="beside"><img [^>]*alt="time-space diagram of ' + re.escape(resource)
                    + r'"[^>]*><p class="order-gap">(.*?)</p></div>', html)  # fmt: skip
    assert box is not None, "no order gap beside the diagram"
    import html as html_module

    return html_module.unescape(box.group(1))


class TestOrderGapBesideTheDiagram:
    """The order's gap is written next to each time-space diagram: certified or heuristic, and why."""

    def test_master_run_shows_its_bound_and_gap(self, master_folder: Path) -> None:
        """The figure beside the diagram repeats run.json's bound, total and gap; the relative gap is recomputed
        here by hand, gap / max(1, |total|), and printed to two significant digits."""
        import json

        from negotiate.output.report import order_gap_text

        data = json.loads((master_folder / "run.json").read_text())
        assert data["settings"]["order"] == "master" and data["order_gap_kind"] in ("certified", "heuristic")
        assert data["order_bound"] <= data["total_cost"] * (1 + 1e-9)  # a bound below the best total found
        text = _beside((master_folder / "report.html").read_text(encoding="utf-8"), "bridge")
        assert text == order_gap_text(data)
        rel = data["order_gap"] / max(1.0, abs(data["total_cost"]))
        assert f"({100 * rel:.2g} %)" in text
        assert _cost(data["order_bound"]) in text and _cost(data["total_cost"]) in text
        assert text.startswith(f"Order gap ({data['order_gap_kind']}):")
        if data["order_gap_kind"] == "certified":
            assert "passed the convexity checks" in text
        else:
            assert f"Heuristic: {data['order_gap_reason']}" in text

    def test_heuristic_gap_names_its_reason(self, master_folder: Path, tmp_path: Path) -> None:
        """A heuristic gap in run.json (edited here) is shown as heuristic with its reason, never as certified."""
        import json

        copy = tmp_path / "run"
        shutil.copytree(master_folder, copy)
        data = json.loads((copy / "run.json").read_text())
        data.update(order_gap_kind="heuristic", order_gap_reason="agent 'truck-02': a value Hessian has the "
                    "eigenvalue -0.5 < 0 (its value function is not convex there)")  # fmt: skip
        (copy / "run.json").write_text(json.dumps(data))
        assert cli.main(["report", str(copy)]) == 0
        text = _beside((copy / "report.html").read_text(encoding="utf-8"), "bridge")
        assert text.startswith("Order gap (heuristic):") and "certified" not in text.lower()
        assert text.endswith("Heuristic: " + data["order_gap_reason"] + ".")

    def test_other_rules_say_no_gap_was_computed(self, quarry_folder: Path) -> None:
        """The quarry example orders by swaps, which compute no bound: the figure says so and names the rule."""
        text = _beside((quarry_folder / "report.html").read_text(encoding="utf-8"), "bridge")
        assert text.startswith("Order gap: not computed (orders by swap)")
