"""Tests of the parameter records and the model registry (agents.params, agents.MODELS)."""

from __future__ import annotations

import dataclasses
import inspect

import pytest

import agents
from agents.params import (
    CapacityParams,
    MachineParams,
    StationParams,
    VehicleParams,
    ZoneParams,
    field_table,
)

RECORDS = [VehicleParams, ZoneParams, MachineParams, StationParams, CapacityParams]


class TestRecords:
    @pytest.mark.parametrize("cls", RECORDS)
    def test_every_field_has_unit_and_doc(self, cls):
        """Each field documents its SI unit and meaning (used to generate documentation)."""
        for name, unit, _default, doc in field_table(cls):
            assert unit, f"{cls.__name__}.{name} has no unit"
            assert doc, f"{cls.__name__}.{name} has no doc"

    @pytest.mark.parametrize("cls", RECORDS)
    def test_frozen_and_defaults_valid(self, cls):
        """Records are frozen and their defaults pass validation."""
        obj = cls()
        first = dataclasses.fields(cls)[0].name
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(obj, first, getattr(obj, first))

    def test_keyword_construction(self):
        """A record is built from plain keyword data, nested zones included (as a fleet file would)."""
        table = {
            "route_length": 1500.0,
            "mass": 12000.0,
            "zones": [{"resource": "gate", "entry": 400.0, "exit": 420.0}],
        }
        prm = VehicleParams(**{**table, "zones": tuple(ZoneParams(**z) for z in table["zones"])})
        assert prm.zones[0].resource == "gate" and prm.total_mass == 12000.0

    def test_negative_mass_message(self):
        """Messages name the field, the expected range and the value received."""
        with pytest.raises(ValueError, match=r"vehicle: 'mass' must be within \(0, 1e7\], got -1.0"):
            VehicleParams(mass=-1.0)


class TestRegistry:
    def test_models_and_parameters_agree(self):
        """Every family has a builder and a record; builders share one signature."""
        assert set(agents.MODELS) == set(agents.PARAMETERS) == {"vehicle", "machine", "capacity"}
        for builder in agents.MODELS.values():
            assert list(inspect.signature(builder).parameters) == ["name", "prm", "weight", "solver_options"]

    @pytest.mark.parametrize("family", ["machine", "capacity"])
    def test_builder_names_the_model(self, family):
        """A built agent carries its name, family and weight."""
        agent = agents.MODELS[family]("a1", agents.PARAMETERS[family](), weight=2.0)
        assert (agent.name, agent.model, agent.weight) == ("a1", family, 2.0)
        assert tuple(agent.param_names) == tuple(agent.problem.p_names)
