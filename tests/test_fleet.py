"""Tests of the fleet file (negotiate.fleet, negotiate.errors): parsing, exact messages, building, docs.

The messages are part of the interface (users read them, scripts may match them), so most assertions are on
exact strings. Fleets here are invented test data.
"""

from __future__ import annotations

import copy
import pickle
import textwrap
import tomllib
from pathlib import Path

import pytest

from agents.params import CapacityParams, MachineParams, VehicleParams
from negotiate.errors import FleetError, Problem, describe, table_path
from negotiate.fleet.build import build_agents
from negotiate.fleet.docs import BEGIN_MARK, END_MARK, schema_markdown
from negotiate.fleet.parse import load_fleet, parse_fleet
from negotiate.fleet.spec import CapacityResource, ExclusiveResource, FleetSpec

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"


def small_fleet() -> dict:
    """A valid fleet with every kind of resource and model, small enough to build in well under a second."""
    return {
        "fleet": {"name": "tiny", "description": "invented test fleet"},
        "resources": {
            "bridge": {"kind": "exclusive", "gap": 5.0},
            "oven": {"kind": "exclusive", "gap": 60.0},
            "grid": {"kind": "capacity", "limits": [2.0e5, 2.0e5, 1.0e5], "block_length": 600.0},
        },
        "coordinator": {
            "method": "gradient",
            "max_rounds": 20,
            "tolerance": 1e-5,
            "order": "swap",
            "guard": False,
            "options": {"step": 0.5},
        },
        "defaults": {"vehicle": {"route_length": 1200.0, "stages": 8, "mass": 20000.0}},
        "agents": {
            "truck-01": {
                "model": "vehicle",
                "payload": 5000.0,
                "desired_arrival": 110.0,
                "zones": [{"resource": "bridge", "entry": 500.0, "exit": 560.0}],
            },
            "mill": {
                "model": "machine",
                "work": 100.0,
                "max_rate": 0.2,
                "blocks": 4,
                "weight": 2.0,
                "stations": [{"resource": "oven", "duration": 600.0}],
            },
            "tractor": {"model": "capacity", "resource": "grid", "tariff": [1.0, 0.8, 1.2], "battery_capacity": 3.6e8},
        },
    }


def problems_of(data: dict, source: str = "fleet.toml") -> list[str]:
    """The lines of the FleetError that parse_fleet raises for ``data``."""
    with pytest.raises(FleetError) as info:
        parse_fleet(data, source)
    return str(info.value).splitlines()


class TestExamples:
    @pytest.mark.parametrize("name", ["quarry_bridge", "machining_cell", "charging_depot", "four_way_crossing"])
    def test_example_parses(self, name):
        """Each shipped example parses into a FleetSpec named in its [fleet] table."""
        spec = load_fleet(EXAMPLES / f"{name}.toml")
        assert isinstance(spec, FleetSpec)
        assert spec.name == name.replace("_", "-")
        assert spec.source == str(EXAMPLES / f"{name}.toml")

    @pytest.mark.parametrize("name", ["quarry_bridge", "machining_cell", "charging_depot", "four_way_crossing"])
    def test_example_marked_invented(self, name):
        """Every example says in its header that it is invented."""
        head = (EXAMPLES / f"{name}.toml").read_text(encoding="utf-8").splitlines()[0]
        assert head.startswith("# INVENTED SCENARIO")

    def test_quarry_both_directions(self):
        """At least 8 trucks, loaded and empty, meeting the one bridge at different route positions."""
        spec = load_fleet(EXAMPLES / "quarry_bridge.toml")
        assert len(spec.agents) >= 8
        assert spec.resource("bridge") == ExclusiveResource("bridge", 6.0)
        entries = {a.params.zones[0].entry for a in spec.agents}
        loaded = {a.params.payload > 0 for a in spec.agents}
        assert len(entries) == 2 and loaded == {True, False}
        # [defaults.vehicle] applies to every truck; the agents' own keys override it.
        assert all(a.params.mass == 28000.0 and a.params.stages == 24 for a in spec.agents)
        assert {a.name: a.weight for a in spec.agents}["truck-07"] == 1.5

    def test_machining_cell(self):
        """At least 6 machines, each through the furnace and then inspection."""
        spec = load_fleet(EXAMPLES / "machining_cell.toml")
        assert len(spec.agents) >= 6
        for a in spec.agents:
            assert isinstance(a.params, MachineParams)
            assert [s.resource for s in a.params.stations] == ["furnace", "inspection"]
        assert len({a.params.work for a in spec.agents}) == len(spec.agents)  # heterogeneous

    def test_charging_depot_inherits_grid(self):
        """Tractors without start / block_length take the grid's; the tariff matches its blocks."""
        spec = load_fleet(EXAMPLES / "charging_depot.toml")
        grid = spec.resource("grid")
        assert isinstance(grid, CapacityResource) and grid.blocks == 8
        assert len(spec.agents) >= 6
        for a in spec.agents:
            assert isinstance(a.params, CapacityParams)
            assert (a.params.start, a.params.block_length, a.params.blocks) == (0.0, 900.0, 8)


class TestParseFleet:
    def test_small_fleet(self):
        """Every section of a valid dictionary reaches the typed spec."""
        spec = parse_fleet(small_fleet(), "tiny.toml")
        assert spec.name == "tiny" and spec.source == "tiny.toml"
        assert [a.name for a in spec.agents] == ["truck-01", "mill", "tractor"]
        c = spec.coordinator
        assert (c.method, c.max_rounds, c.tolerance, c.order, c.guard, c.options) == (
            "gradient",
            20,
            1e-5,
            "swap",
            False,
            {"step": 0.5},
        )
        truck, mill, tractor = (a.params for a in spec.agents)
        assert isinstance(truck, VehicleParams) and truck.route_length == 1200.0 and truck.payload == 5000.0
        assert spec.agents[1].weight == 2.0 and mill.stations[0].transfer == 0.0
        assert tractor.block_length == 600.0 and tractor.tariff == (1.0, 0.8, 1.2)

    def test_defaults_when_sections_omitted(self):
        """Without [fleet] and [coordinator] the name comes from the source and the settings are defaults."""
        data = small_fleet()
        del data["fleet"], data["coordinator"]
        spec = parse_fleet(data, "some/dir/yard.toml")
        assert spec.name == "yard" and spec.coordinator.method == "bundle"

    def test_integers_become_floats(self):
        """TOML integers are accepted where a number is wanted and stored as float."""
        data = small_fleet()
        data["agents"]["truck-01"]["payload"] = 5000
        assert parse_fleet(data).agents[0].params.payload == 5000.0

    def test_scalar_tariff_fills_the_grid(self):
        """A single tariff number means that price in every block of the resource."""
        data = small_fleet()
        data["agents"]["tractor"]["tariff"] = 1.1
        assert parse_fleet(data).agents[2].params.tariff == (1.1, 1.1, 1.1)

    def test_registered_user_method(self, monkeypatch):
        """A coordination method the caller names (the run layer names every registered one) is accepted."""
        data = small_fleet()
        data["coordinator"]["method"] = "mine"
        assert parse_fleet(data, methods=["bundle", "gradient", "mine", "newton"]).coordinator.method == "mine"
        data["coordinator"]["method"] = "yours"
        with pytest.raises(FleetError) as err:
            parse_fleet(data, "fleet.toml", methods=["bundle", "gradient", "mine", "newton"])
        assert str(err.value).splitlines() == [
            'fleet.toml: [coordinator] key \'method\': expected one of "bundle", "gradient", "newton", "mine", '
            'found "yours"'
        ]

    def test_custom_model_keys_pass_through(self):
        """A user-written model's keys go to its builder unchecked (parsing never imports it)."""
        data = small_fleet()
        data["defaults"]["nowhere.to_be_found:build"] = {"size": 3}
        data["agents"]["heater"] = {"model": "nowhere.to_be_found:build", "power": 2.5e3, "weight": 0.5}
        agent = parse_fleet(data).agents[-1]
        assert (agent.model, agent.params, agent.weight) == (
            "nowhere.to_be_found:build",
            {"size": 3, "power": 2.5e3},
            0.5,
        )


class TestMessages:
    def test_negative_mass(self):
        """The message format of the interface: file, table, key, expected (with unit), found."""
        data = small_fleet()
        data["agents"]["truck-03"] = copy.deepcopy(data["agents"].pop("truck-01"))
        data["agents"]["truck-03"]["mass"] = -5
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-03] key 'mass': expected a number within (0, 1e7] (kg), found -5"
        ]

    def test_all_errors_collected(self):
        """Independent mistakes in different tables and in one record are all reported, in file order."""
        data = small_fleet()
        data["resources"]["bridge"]["gap"] = -1.0
        data["coordinator"]["max_rounds"] = 0
        truck = data["agents"]["truck-01"]
        truck.update(mass=-5, efficiency=1.5, stages=7.5)
        truck["zones"][0]["exit"] = 400.0
        data["agents"]["mill"]["work"] = "heavy"
        assert problems_of(data) == [
            "fleet.toml: [resources.bridge] key 'gap': expected a number within [0, 1e10] (s), found -1.0",
            "fleet.toml: [coordinator] key 'max_rounds': expected an integer within [1, 10000], found 0",
            "fleet.toml: [agents.truck-01] key 'stages': expected an integer, found 7.5",
            "fleet.toml: [agents.truck-01.zones[0]] key 'exit': expected a number > entry = 500.0 (m), found 400.0",
            "fleet.toml: [agents.truck-01] key 'mass': expected a number within (0, 1e7] (kg), found -5",
            "fleet.toml: [agents.truck-01] key 'efficiency': expected a number within (0, 1], found 1.5",
            "fleet.toml: [agents.mill] key 'work': expected a number (kg), found \"heavy\"",
        ]

    def test_unknown_key_lists_valid_keys(self):
        """An unknown key names every valid key of the table and the closest one."""
        data = small_fleet()
        data["agents"]["mill"]["wrok"] = 100.0
        valid = ", ".join(
            [
                "weight",
                "work",
                "release",
                "max_rate",
                "power_coeff",
                "blocks",
                "stations",
                "base_price",
                "peak_price",
                "peak_start",
                "peak_end",
                "price_ramp",
                "due",
                "tardiness_weight",
                "tardiness_smoothing",
                "horizon",
            ]
        )
        assert problems_of(data) == [
            f"fleet.toml: [agents.mill] key 'wrok': expected one of the keys {valid}, "
            "found an unknown key (did you mean 'work'?)"
        ]

    def test_unknown_top_level_table(self):
        """A misspelt top-level table is named with the valid ones."""
        data = small_fleet()
        data["coordinater"] = {}
        assert problems_of(data) == [
            "fleet.toml: key 'coordinater': expected one of the tables fleet, "
            "resources, coordinator, defaults, agents, found an unknown table "
            "(did you mean 'coordinator'?)"
        ]

    def test_undeclared_resource(self):
        """A zone naming no declared resource lists the declared ones of the right kind."""
        data = small_fleet()
        data["agents"]["truck-01"]["zones"][0]["resource"] = "brige"
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-01.zones[0]] key 'resource': expected the name of a declared exclusive "
            'resource (bridge, oven), found "brige"'
        ]

    def test_wrong_kind_of_resource(self):
        """A station on a capacity resource and a capacity user on an exclusive one are both reported."""
        data = small_fleet()
        data["agents"]["mill"]["stations"][0]["resource"] = "grid"
        data["agents"]["tractor"]["resource"] = "oven"
        assert problems_of(data) == [
            "fleet.toml: [agents.mill.stations[0]] key 'resource': expected the name of a declared exclusive "
            'resource (bridge, oven), found "grid" (a capacity resource)',
            "fleet.toml: [agents.tractor] key 'resource': expected the name of a declared capacity resource "
            '(grid), found "oven" (an exclusive resource)',
        ]

    def test_renamed_resource_breaks_references(self):
        """Renaming a resource table leaves its users pointing at nothing."""
        data = small_fleet()
        data["resources"]["deck"] = data["resources"].pop("bridge")
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-01.zones[0]] key 'resource': expected the name of a declared exclusive "
            'resource (oven, deck), found "bridge"'
        ]

    def test_capacity_grid_mismatch(self):
        """A capacity user off its resource's block grid is told the resource's grid."""
        data = small_fleet()
        data["agents"]["tractor"].update(start=300.0, block_length=900.0, tariff=[1.0, 1.0])
        assert problems_of(data) == [
            "fleet.toml: [agents.tractor] key 'start': expected 0.0 s, the start of resource 'grid' (or leave it "
            "out to use the resource's), found 300.0",
            "fleet.toml: [agents.tractor] key 'block_length': expected 600.0 s, the block_length of resource "
            "'grid' (or leave it out to use the resource's), found 900.0",
            "fleet.toml: [agents.tractor] key 'tariff': expected one price per block of resource 'grid' "
            "(3 numbers) or a single number, found [1.0, 1.0] (2 numbers)",
        ]

    def test_missing_required_keys(self):
        """Zones, a zone's positions, a model and a capacity user's tariff must be written."""
        data = small_fleet()
        del data["agents"]["truck-01"]["zones"][0]["exit"]
        del data["agents"]["tractor"]["tariff"]
        del data["agents"]["mill"]["model"]
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-01.zones[0]] key 'exit': expected a number (m), found nothing",
            'fleet.toml: [agents.mill] key \'model\': expected one of "vehicle", "machine", "capacity" or '
            '"package.module:function", found nothing',
            "fleet.toml: [agents.tractor] key 'tariff': expected a number or a list of numbers, found nothing",
        ]

    def test_duplicate_zone_resource(self):
        """A vehicle's zones must name distinct resources (the earlier entry is named)."""
        data = small_fleet()
        data["agents"]["truck-01"]["zones"].append({"resource": "bridge", "entry": 700.0, "exit": 760.0})
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-01.zones[1]] key 'resource': expected a resource not used by an earlier "
            'zone of this agent (zones[0] uses it), found "bridge"'
        ]

    def test_agent_named_like_resource(self):
        """Agent and resource names share the conflict graph, so they must differ."""
        data = small_fleet()
        data["agents"]["oven"] = data["agents"].pop("mill")
        assert problems_of(data) == [
            "fleet.toml: [agents.oven]: expected an agent name different from every resource name, "
            'found "oven" (a resource)'
        ]

    def test_value_from_defaults(self):
        """A bad value inherited from [defaults.<model>] is reported on the agent, saying where it was set."""
        data = small_fleet()
        data["defaults"]["vehicle"]["mass"] = -1.0
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-01] key 'mass': expected a number within (0, 1e7] (kg), found -1.0 (set in "
            "[defaults.vehicle])"
        ]

    def test_defaults_for_unknown_model(self):
        """A defaults table must belong to a model used in the file."""
        data = small_fleet()
        data["defaults"]["vehicles"] = {"mass": 1.0}
        assert problems_of(data) == [
            "fleet.toml: [defaults] key 'vehicles': expected a model used in this file "
            "(vehicle, machine, capacity), found an unknown model"
        ]

    @pytest.mark.parametrize(
        "value, found",
        [(float("nan"), "nan"), (float("inf"), "inf"), (True, "true"), ([1.0], "[1.0]"), ({"a": 1}, "a table (a)")],
    )
    def test_not_a_finite_number(self, value, found):
        """NaN, infinities, booleans, lists and tables are refused where a number is wanted."""
        data = small_fleet()
        data["agents"]["truck-01"]["payload"] = value
        expected = "a finite number (kg)" if isinstance(value, float) else "a number (kg)"
        assert problems_of(data) == [f"fleet.toml: [agents.truck-01] key 'payload': expected {expected}, found {found}"]

    def test_bad_names(self):
        """Names must be bare keys: letters, digits, '-' and '_'."""
        data = small_fleet()
        data["agents"]["truck 2"] = data["agents"]["truck-01"]
        assert problems_of(data) == [
            "fleet.toml: [agents] key 'truck 2': expected a name of letters, digits, '-' and '_', found \"truck 2\""
        ]

    def test_no_agents(self):
        """A fleet needs at least one agent."""
        data = small_fleet()
        data["agents"] = {}
        assert problems_of(data) == [
            "fleet.toml: [agents]: expected at least one agent ([agents.<name>] with a model), found an empty table"
        ]


def _zones(n: int) -> tuple[dict, list[dict]]:
    """``n`` exclusive resources and one zone on each, in route order on a 1200 m route (invented)."""
    resources = {f"z{i}": {"kind": "exclusive"} for i in range(n)}
    return resources, [{"resource": f"z{i}", "entry": 100.0 + 200 * i, "exit": 150.0 + 200 * i} for i in range(n)]


def _stations(n: int) -> tuple[dict, list[dict]]:
    """``n`` exclusive resources and a 600 s station on each (invented)."""
    resources = {f"s{i}": {"kind": "exclusive"} for i in range(n)}
    return resources, [{"resource": f"s{i}", "duration": 600.0} for i in range(n)]


# (path in small_fleet(), value, the FleetError's one line); every range documented in docs/fleet.md has a
# case here, at or beyond its bound.
OUT_OF_RANGE = [
    (("coordinator", "tolerance"), 1e300,
     "[coordinator] key 'tolerance': expected a number within (0, 0.1), found 1e+300"),
    (("coordinator", "tolerance"), 0.1, "[coordinator] key 'tolerance': expected a number within (0, 0.1), found 0.1"),
    (("coordinator", "max_rounds"), 10**6,
     "[coordinator] key 'max_rounds': expected an integer within [1, 10000], found 1000000"),
    (("agents", "truck-01", "weight"), 1e300,
     "[agents.truck-01] key 'weight': expected a number within (0, 1e6], found 1e+300"),
    (("agents", "mill", "weight"), 0.0, "[agents.mill] key 'weight': expected a number within (0, 1e6], found 0.0"),
    (("defaults", "vehicle", "weight"), 2e6,
     "[agents.truck-01] key 'weight': expected a number within (0, 1e6], found 2000000.0 (set in [defaults.vehicle])"),
    (("resources", "bridge", "gap"), 1e300,
     "[resources.bridge] key 'gap': expected a number within [0, 1e10] (s), found 1e+300"),
    (("resources", "grid", "start"), -1.0,
     "[resources.grid] key 'start': expected a number within [0, 1e10] (s), found -1.0"),
    (("resources", "grid", "block_length"), 1e11,
     "[resources.grid] key 'block_length': expected a number within (0, 1e10] (s), found 100000000000.0"),
    (("resources", "grid", "limits"), [2e5, 1e300, 1e5],
     "[resources.grid] key 'limits': expected a list made of numbers within [0, 1e12] (W), found 1e+300"),
    (("resources", "grid", "limits"), [1e5] * 501,
     "[resources.grid] key 'limits': expected a list of 1 to 500 entries, found 501 entries"),
    (("agents", "truck-01", "stages"), 10**8,
     "[agents.truck-01] key 'stages': expected an integer within [4, 500], found 100000000"),
    (("agents", "truck-01", "stages"), 501,
     "[agents.truck-01] key 'stages': expected an integer within [4, 500], found 501"),
    (("agents", "truck-01", "zones"), _zones(9),
     "[agents.truck-01] key 'zones': expected a list of 1 to 8 entries, found 9 entries"),
    (("agents", "truck-01", "departure"), -1.0,
     "[agents.truck-01] key 'departure': expected a number within [0, 1e10] (s), found -1.0"),
    (("agents", "truck-01", "desired_arrival"), 1e300,
     "[agents.truck-01] key 'desired_arrival': expected a number within [0, 1e10] (s), found 1e+300"),
    (("agents", "truck-01", "mass"), 1e300,
     "[agents.truck-01] key 'mass': expected a number within (0, 1e7] (kg), found 1e+300"),
    (("agents", "truck-01", "length"), 2e4,
     "[agents.truck-01] key 'length': expected a number within [0, 10000] (m), found 20000.0"),
    (("agents", "truck-01", "max_accel"), 1e3,
     "[agents.truck-01] key 'max_accel': expected a number within (0, 100] (m/s^2), found 1000.0"),
    (("agents", "truck-01", "rolling_coeff"), 2.0,
     "[agents.truck-01] key 'rolling_coeff': expected a number within [0, 1], found 2.0"),
    (("agents", "truck-01", "air_density"), 1e300,
     "[agents.truck-01] key 'air_density': expected a number within [0, 100] (kg/m^3), found 1e+300"),
    (("agents", "truck-01", "arrival_weight"), 1e300,
     "[agents.truck-01] key 'arrival_weight': expected a number within (0, 1e12] (J/s^2), found 1e+300"),
    (("agents", "truck-01", "comfort_weight"), 1e13,
     "[agents.truck-01] key 'comfort_weight': expected a number within [0, 1e12] (kg*s), found 10000000000000.0"),
    (("agents", "truck-01", "zones", 0, "speed_limit"), 1e300,
     "[agents.truck-01.zones[0]] key 'speed_limit': expected a number within (0, 1000] (m/s), found 1e+300"),
    (("agents", "truck-01", "zones", 0, "exit"), 1e300,
     "[agents.truck-01.zones[0]] key 'exit': expected a number within (0, 1e7] (m), found 1e+300"),
    (("agents", "mill", "due"), -1.0, "[agents.mill] key 'due': expected a number within [0, 1e10] (s), found -1.0"),
    (("agents", "mill", "release"), -1.0,
     "[agents.mill] key 'release': expected a number within [0, 1e10] (s), found -1.0"),
    (("agents", "mill", "blocks"), 10**6,
     "[agents.mill] key 'blocks': expected an integer within [1, 1000], found 1000000"),
    (("agents", "mill", "stations"), _stations(21),
     "[agents.mill] key 'stations': expected a list of 1 to 20 entries, found 21 entries"),
    (("agents", "mill", "peak_end"), 100.0,
     "[agents.mill] key 'peak_end': expected a number >= peak_start = 1200.0 (s), found 100.0"),
    (("agents", "mill", "peak_price"), 1e300,
     "[agents.mill] key 'peak_price': expected a number within (0, 1e6], found 1e+300"),
    (("agents", "mill", "tardiness_weight"), 1e300,
     "[agents.mill] key 'tardiness_weight': expected a number within [0, 1e12] (J/s), found 1e+300"),
    (("agents", "mill", "price_ramp"), 1e300,
     "[agents.mill] key 'price_ramp': expected a number within (0, 1e10] (s), found 1e+300"),
    (("agents", "mill", "power_coeff"), 1e300,
     "[agents.mill] key 'power_coeff': expected a number within (0, 1e12] (W*s^2/kg^2), found 1e+300"),
    (("agents", "mill", "stations", 0, "duration"), 1e300,
     "[agents.mill.stations[0]] key 'duration': expected a number within (0, 1e10] (s), found 1e+300"),
    (("agents", "mill", "stations", 0, "holding_cost"), 1e300,
     "[agents.mill.stations[0]] key 'holding_cost': expected a number within [0, 1e12] (J/s), found 1e+300"),
    (("agents", "tractor", "tariff"), [1.0, 1e300, 1.0],
     "[agents.tractor] key 'tariff': expected a list made of numbers within [0, 1e6], found 1e+300"),
    (("agents", "tractor", "battery_capacity"), 1e300,
     "[agents.tractor] key 'battery_capacity': expected a number within (0, 1e13] (J), found 1e+300"),
    (("agents", "tractor", "charger_power"), 1e300,
     "[agents.tractor] key 'charger_power': expected a number within (0, 1e10] (W), found 1e+300"),
    (("agents", "tractor", "wear_coeff"), 1e300,
     "[agents.tractor] key 'wear_coeff': expected a number within [0, 1e12] (1/W), found 1e+300"),
    (("agents", "tractor", "efficiency"), 0.0,
     "[agents.tractor] key 'efficiency': expected a number within (0, 1], found 0.0"),
]  # fmt: skip


class TestRanges:
    @pytest.mark.parametrize(("path", "value", "line"), OUT_OF_RANGE, ids=lambda v: None)
    def test_out_of_range(self, path, value, line):
        """A number outside its documented range is one FleetError naming file, table, key, range and value."""
        data = small_fleet()
        if isinstance(value, tuple):  # a list of zones or stations and the resources they name
            resources, value = value
            data["resources"].update(resources)
        table = data
        for part in path[:-1]:
            table = table[part]
        table[path[-1]] = value
        assert problems_of(data) == ["fleet.toml: " + line]

    def test_desired_arrival_before_departure(self):
        """A vehicle may not wish to arrive before it departs."""
        data = small_fleet()
        data["agents"]["truck-01"].update(departure=50.0, desired_arrival=10.0, latest_arrival=400.0)
        assert problems_of(data) == [
            "fleet.toml: [agents.truck-01] key 'desired_arrival': expected a number >= departure = 50.0 (s), "
            "found 10.0"
        ]

    @pytest.mark.parametrize("table", ["coordinator", "agent"])
    def test_cli_check_refuses_without_traceback(self, tmp_path, capsys, table):
        """weight = 1e300 or tolerance = 1e300 in a file: negotiate check exits 1 with the located message."""
        from negotiate.cli import main

        text = (EXAMPLES / "charging_depot.toml").read_text(encoding="utf-8")
        if table == "coordinator":
            text = text.replace("[coordinator]", "[coordinator]\ntolerance = 1e300", 1)
            line = "[coordinator] key 'tolerance': expected a number within (0, 0.1), found 1e+300"
        else:
            text += "\n[agents.extra]\nmodel = \"capacity\"\nresource = \"grid\"\ntariff = 1.0\nweight = 1e300\n"
            line = "[agents.extra] key 'weight': expected a number within (0, 1e6], found 1e+300"
        path = tmp_path / "fleet.toml"
        path.write_text(text, encoding="utf-8")
        code = main(["check", str(path), "--no-build"])
        out = capsys.readouterr()
        assert code == 1
        assert f"{path}: {line}" in out.out + out.err and "Traceback" not in out.out + out.err


class TestDeepNesting:
    @pytest.mark.parametrize(
        "text",
        [
            "a = " + "[" * 400 + "]" * 400,
            "a = " + "{b = " * 400 + "1" + "}" * 400,
            "[coordinator]\noptions = " + "{b = " * 400 + "1" + "}" * 400,
            "[coordinator.options]\nb = " + "[" * 40 + "]" * 40,
        ],
        ids=["arrays", "inline-tables", "options", "options-40"],
    )
    def test_file_is_a_fleet_error(self, tmp_path, capsys, text):
        """Arrays or inline tables nested 400 levels deep: a FleetError naming the file, and exit 1 from check."""
        from negotiate.cli import main

        path = tmp_path / "deep.toml"
        path.write_text(text + "\n", encoding="utf-8")
        with pytest.raises(FleetError) as info:
            load_fleet(path)
        (problem,) = info.value.problems
        assert problem.file == str(path) and problem.expected == "tables and arrays nested at most 16 levels deep"
        assert main(["check", str(path), "--no-build"]) == 1
        out = capsys.readouterr()
        assert f"{path}" in out.out + out.err and "Traceback" not in out.out + out.err

    def test_deep_dictionary(self):
        """parse_fleet of a dictionary nested 100 000 levels deep (no TOML reader involved): a FleetError."""
        data = small_fleet()
        deep: dict = {}
        data["coordinator"]["options"] = {"b": deep}
        for _ in range(100_000):
            deep["b"] = deep = {}
        assert problems_of(data) == [
            "fleet.toml: [coordinator.options.b]: expected tables and arrays nested at most 16 levels deep, "
            "found a value nested more than 16 levels deep"
        ]


class TestLoadFleet:
    def test_invalid_toml(self, tmp_path):
        """A TOML syntax error is a FleetError naming the file and the line."""
        path = tmp_path / "broken.toml"
        path.write_text('[fleet]\nname = "x\n', encoding="utf-8")
        with pytest.raises(FleetError) as info:
            load_fleet(path)
        (problem,) = info.value.problems
        assert problem.file == str(path) and problem.expected == "valid TOML" and "line 2" in problem.found

    def test_table_defined_twice(self, tmp_path):
        """TOML refuses a table defined twice; that is a FleetError too."""
        path = tmp_path / "twice.toml"
        path.write_text('[agents.a]\nmodel = "vehicle"\n[agents.a]\nmodel = "machine"\n', encoding="utf-8")
        with pytest.raises(FleetError, match="expected valid TOML"):
            load_fleet(path)

    def test_missing_file(self, tmp_path):
        """A missing file is an OSError, not a FleetError (the CLI exits 2 for it)."""
        with pytest.raises(FileNotFoundError):
            load_fleet(tmp_path / "absent.toml")

    def test_file_named_as_given(self, tmp_path):
        """Messages name the path as the caller wrote it."""
        path = tmp_path / "fleet.toml"
        path.write_text(
            textwrap.dedent("""
            [resources.bridge]
            kind = "exclusive"
            [agents.truck-03]
            model = "vehicle"
            mass = -5
            [[agents.truck-03.zones]]
            resource = "bridge"
            entry = 900.0
            exit = 1100.0
        """),
            encoding="utf-8",
        )
        with pytest.raises(FleetError) as info:
            load_fleet(str(path))
        assert str(info.value) == (
            f"{path}: [agents.truck-03] key 'mass': expected a number within (0, 1e7] (kg), found -5"
        )


class TestFleetError:
    def test_is_value_error_listing_problems(self):
        """FleetError refines ValueError and prints one line per problem."""
        a = Problem("f.toml", "agents.a", "mass", "a number > 0 (kg)", "-5")
        b = Problem("f.toml", "", None, "valid TOML", "Invalid value (at line 3, column 8)")
        err = FleetError([a, b])
        assert isinstance(err, ValueError)
        assert str(err) == (
            "f.toml: [agents.a] key 'mass': expected a number > 0 (kg), found -5\n"
            "f.toml: expected valid TOML, found Invalid value (at line 3, column 8)"
        )
        assert pickle.loads(pickle.dumps(err)).problems == (a, b)

    def test_needs_a_problem(self):
        """An empty FleetError would say nothing; it is refused."""
        with pytest.raises(ValueError, match="at least one problem"):
            FleetError([])

    def test_table_path_and_describe(self):
        """Paths quote names that are not bare keys; values are shown as TOML writes them."""
        assert table_path("agents", "truck-03", "zones", 1) == "agents.truck-03.zones[1]"
        assert table_path("agents", "a.b") == 'agents."a.b"'
        assert [describe(v) for v in (-5, 2.5, "km", True, [1, 2])] == ["-5", "2.5", '"km"', "true", "[1, 2]"]


class TestBuildAgents:
    def test_small_fleet_builds(self):
        """Every agent of a valid fleet is built, in file order, with its weight and resources."""
        models = build_agents(parse_fleet(small_fleet()))
        assert [m.name for m in models] == ["truck-01", "mill", "tractor"]
        assert [m.model for m in models] == ["vehicle", "machine", "capacity"]
        assert models[1].weight == 2.0
        assert [q.resource for q in models[2].params] == ["grid"] * 3

    def test_deadline_too_early(self):
        """A deadline that passes the record's check but leaves no time for the trip names the agent.

        1200 m at the 20 m/s limit take 60 s, but from 10 m/s at 1 m/s^2 the trip needs about 65 s
        (constant-acceleration kinematics), so 62 s is infeasible.
        """
        data = small_fleet()
        data["agents"]["truck-01"]["latest_arrival"] = 62.0
        with pytest.raises(FleetError) as info:
            build_agents(parse_fleet(data, "fleet.toml"))
        (problem,) = info.value.problems
        assert (problem.file, problem.table, problem.key) == ("fleet.toml", "agents.truck-01", None)
        assert str(problem).startswith(
            "fleet.toml: [agents.truck-01]: expected an agent that can be built, with "
            "a non-empty reachable window (check the units:"
        )
        assert "RuntimeError: vehicle 'truck-01'" in problem.found

    def test_horizon_too_short(self):
        """A machine whose horizon leaves no room after the earliest hand-over reports an empty window."""
        data = small_fleet()
        # Earliest completion 100 kg / 0.2 kg/s + 600 s = 1100 s; the builder keeps a 2 % margin on the
        # 500 s of processing (agents.machine), so a horizon of 1105 s leaves no reachable slot.
        data["agents"]["mill"]["horizon"] = 1105.0
        with pytest.raises(FleetError) as info:
            build_agents(parse_fleet(data, "fleet.toml"))
        (problem,) = info.value.problems
        assert problem.table == "agents.mill" and problem.key is None
        assert "non-empty reachable window" in problem.expected

    def test_custom_model(self, tmp_path, monkeypatch):
        """A model named by import path is imported and called with the agent's keys."""
        (tmp_path / "fleet_test_heater.py").write_text(
            textwrap.dedent("""
            import casadi as ca
            from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam

            def build(name, weight=1.0, demand=1000.0, p_max=2000.0):
                P, share = ca.SX.sym("P"), ca.SX.sym("share")
                nlp = {"x": P, "p": share, "f": 1e-3 * (P - demand) ** 2, "g": share - P}
                prob = ParametricNLP(nlp, lbx=0.0, lbg=0.0)
                return AgentModel(name, prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),),
                                  ReachableSet([0.0], [p_max]), [min(demand * 1.05, p_max)], weight, model="heater")

            def broken(name, weight=1.0):
                raise ZeroDivisionError("demand / 0")
        """),
            encoding="utf-8",
        )
        monkeypatch.syspath_prepend(str(tmp_path))
        data = small_fleet()
        data["agents"] = {"heater": {"model": "fleet_test_heater:build", "demand": 1500.0, "weight": 0.5}}
        (model,) = build_agents(parse_fleet(data))
        assert model.model == "heater" and model.weight == 0.5 and model.free_optimum[0] == pytest.approx(1575.0)
        data["agents"] = {
            "a": {"model": "fleet_test_heater:broken"},
            "b": {"model": "fleet_test_heater:nothing"},
            "c": {"model": "no_such_module_here:build"},
        }
        with pytest.raises(FleetError) as info:
            build_agents(parse_fleet(data, "fleet.toml"))
        lines = str(info.value).splitlines()
        assert lines[0] == (
            "fleet.toml: [agents.a]: expected an agent that can be built, with a non-empty "
            "reachable window, found ZeroDivisionError: demand / 0"
        )
        assert lines[1] == (
            "fleet.toml: [agents.b] key 'model': expected a function 'nothing' in module "
            "'fleet_test_heater', found \"fleet_test_heater:nothing\""
        )
        assert lines[2].startswith(
            "fleet.toml: [agents.c] key 'model': expected an importable module in "
            "'package.module:function', found \"no_such_module_here:build\" "
            "(ModuleNotFoundError:"
        )
        assert lines[2].endswith("; install it or put its folder on PYTHONPATH)")

    def test_custom_model_on_wrong_resource(self, tmp_path, monkeypatch):
        """A custom model's parameters must name declared resources of the right kind."""
        (tmp_path / "fleet_test_heater2.py").write_text(
            textwrap.dedent("""
            import casadi as ca
            from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam

            def build(name, weight=1.0, resource="grid"):
                P, share = ca.SX.sym("P"), ca.SX.sym("share")
                prob = ParametricNLP({"x": P, "p": share, "f": (P - 1.0) ** 2, "g": share - P}, lbg=0.0)
                return AgentModel(name, prob, (SlotParam(resource + ".share[0]", resource, "share", "W", 0),),
                                  ReachableSet([0.0], [2.0]), [1.05], weight)
        """),
            encoding="utf-8",
        )
        monkeypatch.syspath_prepend(str(tmp_path))
        data = small_fleet()
        data["agents"] = {"h": {"model": "fleet_test_heater2:build", "resource": "oven"}}
        with pytest.raises(FleetError) as info:
            build_agents(parse_fleet(data, "fleet.toml"))
        assert str(info.value) == (
            "fleet.toml: [agents.h]: expected parameter 'oven.share[0]' to name a declared "
            'capacity resource, found "oven"'
        )


class TestSchemaDoc:
    def test_committed_doc_is_up_to_date(self):
        """docs/fleet.md holds exactly what schema_markdown() generates (run python -m negotiate.fleet)."""
        text = (ROOT / "docs" / "fleet.md").read_text(encoding="utf-8")
        generated = text.split(BEGIN_MARK, 1)[1].split(END_MARK, 1)[0]
        assert generated.strip() == schema_markdown().strip()

    def test_every_record_field_documented(self):
        """Each parameter of each family appears with its unit in the generated tables."""
        md = schema_markdown()
        for cls in (VehicleParams, MachineParams, CapacityParams):
            for f in cls.__dataclass_fields__.values():
                assert f"| `{f.name}` |" in md and f" {f.metadata['unit']} |" in md

    def test_example_keys_are_documented(self):
        """Every key used in the examples is a documented key (the docs describe the real schema)."""
        md = schema_markdown()
        for path in EXAMPLES.glob("*.toml"):
            data = tomllib.loads(path.read_text(encoding="utf-8"))
            for table in [*data["agents"].values(), *data["resources"].values(), data.get("coordinator", {})]:
                for key in table:
                    assert f"| `{key}` |" in md, (path.name, key)
