"""The dwell kind (negotiate/resources/dwell.py): an exclusive zone where every user stays at least min_dwell.

Checked against a case solved by hand (KKT conditions, below) and the fleet file's error rules.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest

from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam
from negotiate.coordination.engine import coordinate
from negotiate.errors import FieldError, FleetError
from negotiate.fleet.parse import parse_fleet
from negotiate.fleet.spec import CoordinatorSettings
from negotiate.resources import KINDS, DwellResource
from negotiate.resources.coupling import build_feasible_set


def wish_agent(name: str, enter: float, leave: float) -> AgentModel:
    """An agent whose value is ``V(p) = (p_enter - enter)^2 + (p_leave - leave)^2`` (s^2): it wants to pass
    the zone from ``enter`` to ``leave`` (s) and can take any slot within 100 s of that."""
    x, p = ca.SX.sym("x", 2), ca.SX.sym("p", 2)
    prob = ParametricNLP({"x": x, "p": p, "f": (x[0] - enter) ** 2 + (x[1] - leave) ** 2, "g": x - p},
                         lbg=0, ubg=0, name=name)  # fmt: skip
    params = (SlotParam("wash.enter", "wash", "enter"), SlotParam("wash.leave", "wash", "leave"))
    reach = ReachableSet(np.array([enter - 100.0] * 2), np.array([leave + 100.0] * 2), np.zeros((0, 2)), np.zeros(0))
    return AgentModel(name, prob, params, reach, np.array([enter, leave]))


class TestRecord:
    def test_registered_under_its_name(self):
        """A fleet file's kind = "dwell" names this record."""
        assert KINDS["dwell"] is DwellResource

    def test_negative_dwell_refused_with_its_field(self):
        """A negative minimum dwell is a FieldError naming the resource, the key and the allowed range."""
        with pytest.raises(FieldError) as info:
            DwellResource("wash", min_dwell=-1.0)
        e = info.value
        assert (e.owner, e.key, e.expected, e.found) == ("resource 'wash'", "min_dwell", "within [0, 1e10]", "-1.0")


class TestHandSolved:
    """Two agents on one dwell zone, gap 0, minimum dwell 20 s, order A then B. A wants (0, 10) s, B (10, 20) s.

    Minimise ``eA^2 + (lA - 10)^2 + (eB - 10)^2 + (lB - 20)^2`` subject to ``lA - eA >= 20``, ``lB - eB >= 20``
    and ``lA <= eB``. With all three rows active every slot follows from ``eA``: ``lA = eB = eA + 20``,
    ``lB = eA + 40``; setting the derivative ``8 eA + 80`` to zero gives ``eA = -10``, so the slots are
    (-10, 10) and (10, 30), total 200 s^2. Stationarity gives the multipliers 20, 20 (dwell rows) and 20 (the
    turn), all positive: the KKT conditions hold and, the problem being convex, this is the optimum
    (worked by hand from the KKT conditions, Nocedal and Wright 2006, Theorem 12.1 and Section 12.5).
    """

    wash = DwellResource("wash", gap=0.0, min_dwell=20.0)
    expected = np.array([-10.0, 10.0, 10.0, 30.0])

    def agents(self) -> list[AgentModel]:
        return [wish_agent("A", 0.0, 10.0), wish_agent("B", 10.0, 20.0)]

    def test_rows_of_the_polyhedron(self):
        """The set holds the turn row and one dwell row per user, and the hand optimum lies on all three."""
        fs = build_feasible_set(self.agents(), [self.wash], {"wash": ["A", "B"]})
        assert "wash: A stays >= min_dwell" in fs.labels and "wash: B stays >= min_dwell" in fs.labels
        assert "wash: A leaves + gap <= B enters" in fs.labels
        assert fs.contains(self.expected)
        # three rows active at the optimum (the hand solution above): residual 0 up to rounding
        active = [lab for lab, v in zip(fs.labels, fs.A @ self.expected - fs.b, strict=True) if abs(v) < 1e-12]
        assert len(active) == 3, active
        assert not fs.contains(np.array([0.0, 10.0, 10.0, 30.0]))  # A would stay 10 s only

    @pytest.mark.parametrize("method", ["bundle", "newton"])
    def test_coordination_reaches_the_hand_optimum(self, method):
        """Coordinating the two agents on the zone gives the slots and the total worked out by hand."""
        settings = CoordinatorSettings(method=method, max_rounds=80, tolerance=1e-10)
        res = coordinate(self.agents(), [self.wash], settings, orders={"wash": ["A", "B"]})
        assert res.success, res.message
        # 1e-3 s: the stopping tolerance 1e-10 on the relative decrease of a total of 200 s^2 bounds the
        # distance to the optimum to about sqrt(2e-8 / 2) ~ 1e-4 s (the value's curvature is 2 per s^2)
        np.testing.assert_allclose(res.P, self.expected, atol=1e-3)
        assert res.total == pytest.approx(200.0, abs=1e-6 * 200.0 + 1e-4)


def fleet(trucks: int = 1, **wash) -> dict:
    """A fleet file (as decoded TOML) with trucks, 10 s apart, on a 60 m dwell zone."""
    return {
        "resources": {"wash": {"kind": "dwell", **wash}},
        "coordinator": {"method": "bundle", "max_rounds": 40, "tolerance": 1e-6},
        "defaults": {"vehicle": {"route_length": 1200.0, "stages": 8, "mass": 20000.0}},
        "agents": {
            f"truck-{k}": {"model": "vehicle", "departure": 10.0 * k, "desired_arrival": 110.0 + 10.0 * k,
                           "zones": [{"resource": "wash", "entry": 500.0, "exit": 560.0}]}
            for k in range(trucks)
        },
    }  # fmt: skip


class TestFleetFile:
    def test_parses_into_the_record(self):
        """kind = "dwell" with its keys gives a DwellResource that a zone may name."""
        spec = parse_fleet(fleet(gap=3.0, min_dwell=30.0), "f.toml")
        assert spec.resources == (DwellResource("wash", gap=3.0, min_dwell=30.0),)

    def test_missing_dwell_is_named(self):
        """min_dwell is required in a file: its absence names the table, the key and the unit."""
        with pytest.raises(FleetError) as info:
            parse_fleet(fleet(gap=3.0), "f.toml")
        assert str(info.value) == "f.toml: [resources.wash] key 'min_dwell': expected a number (s), found nothing"

    def test_negative_dwell_is_named(self):
        """A negative minimum dwell names the table, the key, the range with its unit and the value written."""
        with pytest.raises(FleetError) as info:
            parse_fleet(fleet(min_dwell=-5.0), "f.toml")
        assert str(info.value) == (
            "f.toml: [resources.wash] key 'min_dwell': expected a number within [0, 1e10] (s), found -5.0"
        )


class TestRun:
    def test_a_run_keeps_every_user_in_the_zone_long_enough(self, tmp_path):
        """Two trucks that would cross the 60 m zone in a few seconds each stay at least 25 s and take turns
        6 s apart; the run's files and report name the kind."""
        from negotiate.output.results import load_run
        from negotiate.run import run_fleet, write_outputs

        spec = parse_fleet(fleet(trucks=2, gap=6.0, min_dwell=25.0), "f.toml")
        run = run_fleet(spec)
        alone = [a.free_optimum[1] - a.free_optimum[0] for a in run.agents]
        assert max(alone) < 10.0  # the rule binds: alone each truck would stay about 6 s in the zone
        rows = sorted(run.schedule, key=lambda r: r.enter)
        assert [r.kind for r in rows] == ["dwell", "dwell"]
        # 1e-6 s: the coupling rows hold at the coordinated point up to the projection's tolerance
        assert all(r.leave - r.enter >= 25.0 - 1e-6 for r in rows)
        assert rows[1].enter - rows[0].leave >= 6.0 - 1e-6
        write_outputs(run, tmp_path)
        files = load_run(tmp_path)
        assert [(r.resource, r.kind, r.gap_s, r.limit) for r in files.resources] == [("wash", "dwell", 6.0, 25.0)]
        assert {s.kind for s in files.schedule} == {"dwell"}
        html = (tmp_path / "report.html").read_text(encoding="utf-8")
        assert "<h3>wash (dwell, gap 6 s, each user stays ≥ 25 s, 2 users)</h3>" in html


def test_guide_shows_the_module_as_it_is():
    """docs/extend.md walks through this kind: its copy of the module is the file, character for character."""
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    guide = (root / "docs" / "extend.md").read_text(encoding="utf-8")
    copy = guide.split("<!-- file: dwell.py -->\n```python\n", 1)[1].split("\n```\n", 1)[0] + "\n"
    assert copy == (root / "negotiate" / "resources" / "dwell.py").read_text(encoding="utf-8")
