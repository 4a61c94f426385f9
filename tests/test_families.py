"""Model families describe themselves (agents.families): the registry agrees with agents.MODELS and
agents.PARAMETERS, reading a fleet loads no builder, and a family defined here -- outside negotiate/ -- is
read, documented, built and coordinated with no edit of the package."""

from __future__ import annotations

import subprocess
import sys
from dataclasses import dataclass, field

import casadi as ca
import numpy as np
import pytest

import agents
from agents.families import FAMILIES, Family, family_records, register_family
from agents.params import MachineParams, StationParams, VehicleParams, ZoneParams
from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam
from negotiate.coordination.engine import coordinate
from negotiate.core.ranges import MAX_BLOCKS, Range
from negotiate.errors import FieldError, FleetError, check_field
from negotiate.fleet.build import build_agents
from negotiate.fleet.docs import schema_markdown
from negotiate.fleet.parse import parse_fleet
from negotiate.output.checkpoint import _record_type, read_checkpoint
from negotiate.run import run_fleet

POWER = Range(0.0, 1e6)


@dataclass(frozen=True)
class HeaterParams:
    """An electric heater drawing power from a shared supply in time blocks (invented test numbers)."""

    resource: str = field(default="supply", metadata={"unit": "-", "doc": "name of the shared capacity resource"})
    start: float = field(default=0.0, metadata={"unit": "s", "doc": "start of the first block"})
    block_length: float = field(default=600.0, metadata={"unit": "s", "doc": "length of each block"})
    demand: tuple[float, ...] = field(
        default=(1.0,),
        metadata={"unit": "W", "doc": "power wanted in each block", "range": POWER, "count": Range(1, MAX_BLOCKS)},
    )
    curvature: float = field(default=1.0, metadata={"unit": "1/W", "doc": "cost curvature",
                                                    "range": Range(0.0, 1e6, lo_open=True)})  # fmt: skip
    max_power: float = field(default=10.0, metadata={"unit": "W", "doc": "largest draw", "range": POWER})

    def __post_init__(self) -> None:
        object.__setattr__(self, "demand", tuple(self.demand))
        check_field("heater", "curvature", self.curvature, self.curvature in Range(0.0, 1e6, lo_open=True),
                    "within (0, 1e6]")  # fmt: skip
        for d in self.demand:
            check_field("heater", "demand", d, 0.0 <= d < self.max_power, f"made of numbers < max_power = "
                        f"{self.max_power}")  # fmt: skip


def build_heater(name: str, prm: HeaterParams, weight: float = 1.0, solver_options: dict | None = None) -> AgentModel:
    """Draw x_k <= share_k in each block at cost curvature * sum_k (x_k - demand_k)^2 (a C^1 value function)."""
    k = len(prm.demand)
    x, p = ca.SX.sym("x", k), ca.SX.sym("p", k)
    d = ca.DM(prm.demand)
    prob = ParametricNLP({"x": x, "p": p, "f": prm.curvature * ca.sumsqr(x - d), "g": x - p}, ubg=0, lbx=0, name=name)
    params = tuple(SlotParam(f"{prm.resource}.share[{j}]", prm.resource, "share", "W", j) for j in range(k))
    free = [min(v + 0.5, prm.max_power) for v in prm.demand]
    return AgentModel(name, prob, params, ReachableSet([0.0] * k, [prm.max_power] * k), free, weight, model="heater")


HEATER = Family(
    name="heater",
    params=HeaterParams,
    builder=build_heater,
    summary="an electric heater sharing a supply's power (W) in each block",
    required=frozenset({"resource", "demand"}),
    resource_kind="capacity",
    inherited=("start", "block_length"),
    per_block={"demand": "power"},
    resource_unit="W",
    shares="power",
)


@pytest.fixture
def heater():
    register_family(HEATER)
    yield HEATER
    del FAMILIES["heater"]


def heater_fleet() -> dict:
    """Three heaters on a supply of two blocks; only the first block binds (9 W < 4 + 3 + 5 W)."""
    return {
        "resources": {"supply": {"kind": "capacity", "limits": [9.0, 20.0], "block_length": 600.0}},
        "coordinator": {"method": "bundle", "max_rounds": 200, "tolerance": 1e-9, "guard": False},
        "defaults": {"heater": {"resource": "supply", "max_power": 10.0}},
        "agents": {
            "h0": {"model": "heater", "demand": 4.0, "curvature": 1.0},
            "h1": {"model": "heater", "demand": [3.0, 3.0], "curvature": 2.0},
            "h2": {"model": "heater", "demand": [5.0, 5.0], "curvature": 0.5},
        },
    }


def closed_form() -> np.ndarray:
    """Shares of the binding 9 W block: equal marginal values (KKT by hand: s_i = t_i - lam / (2 c_i),
    sum s_i = C, the closed form of tests/test_coordinate.py)."""
    t, c = np.array([4.0, 3.0, 5.0]), np.array([1.0, 2.0, 0.5])
    lam = 2 * (t.sum() - 9.0) / np.sum(1 / c)
    return t - lam / (2 * c)


class TestRegistry:
    def test_models_and_parameters_follow_the_registry(self):
        """agents.MODELS and agents.PARAMETERS are the registered families' builders and records."""
        assert list(agents.PARAMETERS) == list(FAMILIES) == ["vehicle", "machine", "capacity"]
        for name, family in FAMILIES.items():
            assert agents.PARAMETERS[name] is family.params
            assert agents.MODELS[name] is getattr(agents, f"build_{name}")

    def test_every_nested_list_is_declared(self):
        """Each family declares every tuple-of-records field of its record as a nested list, and no other."""
        import typing

        for family in FAMILIES.values():
            hints = typing.get_type_hints(family.params)
            tuples = {k: typing.get_args(h)[0] for k, h in hints.items() if typing.get_origin(h) is tuple}
            lists = {k for k, item in tuples.items() if item is not float}
            assert lists == {n.key for n in family.nested}
            for n in family.nested:
                assert typing.get_args(hints[n.key])[0] is n.record

    def test_a_family_refuses_keys_its_record_lacks(self):
        """A family naming a key its record does not have is refused when it is declared."""
        with pytest.raises(ValueError, match=r"family 'x': \['nope'\] are not fields of HeaterParams"):
            Family("x", HeaterParams, build_heater, required=frozenset({"nope"}))

    @pytest.mark.parametrize(
        ("make", "text"),
        [
            (lambda: VehicleParams(zones=(ZoneParams("a", 100.0, 200.0), ZoneParams("a", 300.0, 400.0))),
             "vehicle: 'zones' must be zones of distinct resources, got resources ['a', 'a']"),
            (lambda: VehicleParams(zones=({"resource": "a"},)),
             "vehicle: 'zones' must be a list of ZoneParams, got a dict in it"),
            (lambda: MachineParams(stations=(StationParams("a"), StationParams("a"))),
             "machine: 'stations' must be stations of distinct resources, got resources ['a', 'a']"),
            (lambda: MachineParams(stations=("oven",)),
             "machine: 'stations' must be a list of StationParams, got a str in it"),
        ],
    )  # fmt: skip
    def test_nested_lists_refused_with_their_key(self, make, text):
        """A record refuses a bad nested list with a FieldError on the list's key (its exact message)."""
        with pytest.raises(FieldError) as info:
            make()
        assert str(info.value) == text and info.value.key == text.split("'")[1]

    def test_reading_a_fleet_loads_no_builder(self):
        """Parsing a fleet of every built-in family imports neither CasADi nor a builder module."""
        code = (
            "import sys; sys.path.insert(0, 'tests'); from test_fleet import small_fleet; "
            "from negotiate.fleet.parse import parse_fleet; parse_fleet(small_fleet()); "
            "print(sorted(m for m in sys.modules if m.startswith(('casadi', 'agents.vehicle', 'agents.machine', "
            "'agents.capacity'))))"
        )
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
        assert out.strip() == "[]"


class TestNewFamily:
    """A family defined outside negotiate/ goes through parse, docs, build and coordination."""

    def test_parse_fills_defaults_and_inherited_keys(self, heater):
        """Defaults tables, the resource's grid and one number for every block follow from the family record."""
        spec = parse_fleet(heater_fleet())
        h0 = spec.agents[0].params
        assert isinstance(h0, HeaterParams)
        assert (h0.resource, h0.start, h0.block_length, h0.demand, h0.max_power) == ("supply", 0.0, 600.0,
                                                                                      (4.0, 4.0), 10.0)  # fmt: skip

    def test_mistakes_are_reported_from_the_family(self, heater):
        """Wrong block count, grid, unit and a refused field give FleetError lines naming key, expected, found."""
        data = heater_fleet()
        data["resources"]["heat"] = {"kind": "capacity", "limits": [1.0], "unit": "kW"}
        data["agents"]["h0"]["demand"] = [4.0, 4.0, 4.0]
        data["agents"]["h1"]["block_length"] = 60.0
        data["agents"]["h2"]["curvature"] = -1.0
        data["agents"]["h3"] = {"model": "heater", "resource": "heat", "demand": 1.0}
        data["agents"]["h4"] = {"model": "heater", "demand": 1.0, "max_power": 0.5}
        data["agents"]["h5"] = {"model": "boiler"}
        with pytest.raises(FleetError) as info:
            parse_fleet(data, "fleet.toml")
        assert str(info.value).splitlines() == [
            "fleet.toml: [agents.h0] key 'demand': expected one power per block of resource 'supply' (2 numbers) "
            "or a single number, found [4.0, 4.0, 4.0] (3 numbers)",
            "fleet.toml: [agents.h1] key 'block_length': expected 600.0 s, the block_length of resource 'supply' "
            "(or leave it out to use the resource's), found 60.0",
            "fleet.toml: [agents.h2] key 'curvature': expected a number within (0, 1e6] (1/W), found -1.0",
            'fleet.toml: [agents.h3] key \'resource\': expected a capacity resource with unit "W" (the heater model '
            'shares power), found "heat" (unit "kW")',
            "fleet.toml: [agents.h4] key 'demand': expected a list made of numbers < max_power = 0.5 (W), found 1.0",
            "fleet.toml: [agents.h5] key 'model': expected one of \"vehicle\", \"machine\", \"capacity\", \"heater\" "
            "or \"package.module:function\", found \"boiler\"",
        ]

    def test_documented(self, heater):
        """docs/fleet.md's generator lists the family and its keys with units and the fleet-file defaults."""
        md = schema_markdown()
        assert '### `model = "heater"` (`HeaterParams`)' in md
        assert "| `demand` | number or list of numbers | W | required |" in md
        assert "| `block_length` | number | s | the resource's |" in md
        assert 'model family ("vehicle", "machine", "capacity", "heater")' in md

    def test_saved_in_a_checkpoint(self, heater):
        """A run state may hold the family's record (read back by name)."""
        assert HeaterParams in family_records() and _record_type("HeaterParams") is HeaterParams

    def test_coordinated_shares_match_closed_form(self, heater):
        """The binding block splits 9 W by equal marginal values (:func:`closed_form`); the slack block gives
        each heater at least its demand."""
        spec = parse_fleet(heater_fleet())
        built = build_agents(spec)
        assert [a.model for a in built] == ["heater"] * 3
        res = coordinate(built, spec.resources, spec.coordinator)
        assert res.success, res.message
        shares = res.P.reshape(3, 2)
        # 1e-4: the stopping tolerance 1e-9 on the relative predicted decrease bounds the distance to ~sqrt(1e-9)
        np.testing.assert_allclose(shares[:, 0], closed_form(), atol=1e-4)
        assert np.all(shares[:, 1] >= np.array([4.0, 3.0, 5.0]) - 1e-4) and shares[:, 1].sum() <= 20.0 + 1e-9

    def test_run_keeps_a_checkpoint(self, heater, tmp_path):
        """run_fleet builds the family's agents itself and saves its records in the run's checkpoint."""
        spec = parse_fleet(heater_fleet())
        run = run_fleet(spec, checkpoint_dir=tmp_path)
        assert run.coordination.success, run.coordination.message
        np.testing.assert_allclose(run.coordination.P.reshape(3, 2)[:, 0], closed_form(), atol=1e-4)  # as above
        assert read_checkpoint(tmp_path).spec == spec
