"""Built-in agent models: each family is a builder returning a :class:`negotiate.core.agent.AgentModel`.

Families
--------
``vehicle`` -- :func:`build_vehicle` (:mod:`agents.vehicle`)
    A road vehicle on a fixed route, space-discretised longitudinal dynamics; shared parameters are the
    entry and exit time (s) of each exclusive zone on the route (e.g. a single-lane bridge).
``machine`` -- :func:`build_machine` (:mod:`agents.machine`)
    A machine processing one batch at a controlled rate over time blocks, then handing it to shared
    stations in sequence (e.g. a furnace, then inspection); shared parameters are the station slot times (s).
``capacity`` -- :func:`build_capacity` (:mod:`agents.capacity`)
    A battery vehicle charging from a shared grid connection; shared parameters are its power share (W) in
    each time block.

Parameter records (frozen dataclasses, no CasADi, SI units in the field metadata) are in
:mod:`agents.params`: :class:`VehicleParams`, :class:`ZoneParams`, :class:`MachineParams`,
:class:`StationParams`, :class:`CapacityParams`.

Each family describes itself in :mod:`agents.families` (a :class:`~agents.families.Family` record: its
parameter record, builder, required and inherited keys, nested lists, units of advice), registered in
``FAMILIES``; the fleet reader, its defaults, docs and messages follow from these records, so a new family
is one module and one :func:`~agents.families.register_family` call. ``MODELS`` maps each registered
family's name to its builder (importing it), ``PARAMETERS`` to its parameter record; every builder is
called as ``builder(name, prm=None, weight=1.0, solver_options=None)`` with ``prm`` an instance of the
family's record (its invented demo defaults when omitted).

:mod:`agents.checks` holds checks for any model, built-in or user-written: central finite differences of
the value and vertices / random points of a reachable set.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from agents.families import FAMILIES, Family, Nested, register_family
from agents.params import CapacityParams, MachineParams, StationParams, VehicleParams, ZoneParams

__all__ = [
    "FAMILIES",
    "MODELS",
    "PARAMETERS",
    "CapacityParams",
    "Family",
    "MachineParams",
    "Nested",
    "StationParams",
    "VehicleParams",
    "ZoneParams",
    "build_capacity",
    "build_machine",
    "build_vehicle",
    "register_family",
]

# The builders import CasADi; they are loaded on first use so that the parameter records and the family
# registry (and the fleet parser that reads them) stay free of it. MODELS and PARAMETERS are read from the
# registry when asked for, so that they include families registered later.
_BUILDERS = {"build_vehicle": "agents.vehicle", "build_machine": "agents.machine", "build_capacity": "agents.capacity"}


def __getattr__(name: str) -> Any:
    if name in _BUILDERS:
        return getattr(import_module(_BUILDERS[name]), name)
    if name == "MODELS":
        return {n: fam.build() for n, fam in FAMILIES.items()}
    if name == "PARAMETERS":
        return {n: fam.params for n, fam in FAMILIES.items()}
    raise AttributeError(f"module 'agents' has no attribute {name!r}")
