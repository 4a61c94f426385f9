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

``MODELS`` maps a family name to its builder, ``PARAMETERS`` to its parameter record; every builder is
called as ``builder(name, prm=None, weight=1.0, solver_options=None)`` with ``prm`` an instance of the
family's record (its invented demo defaults when omitted).

:mod:`agents.checks` holds checks for any model, built-in or user-written: central finite differences of
the value and vertices / random points of a reachable set.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from agents.params import CapacityParams, MachineParams, StationParams, VehicleParams, ZoneParams

__all__ = [
    "MODELS",
    "PARAMETERS",
    "CapacityParams",
    "MachineParams",
    "StationParams",
    "VehicleParams",
    "ZoneParams",
    "build_capacity",
    "build_machine",
    "build_vehicle",
]

PARAMETERS = {"vehicle": VehicleParams, "machine": MachineParams, "capacity": CapacityParams}

# The builders import CasADi; they are loaded on first use so that the parameter records (and the fleet
# parser that reads them) stay free of it.
_BUILDERS = {"build_vehicle": "agents.vehicle", "build_machine": "agents.machine", "build_capacity": "agents.capacity"}


def __getattr__(name: str) -> Any:
    if name in _BUILDERS:
        return getattr(import_module(_BUILDERS[name]), name)
    if name == "MODELS":
        return {"vehicle": __getattr__("build_vehicle"), "machine": __getattr__("build_machine"),
                "capacity": __getattr__("build_capacity")}  # fmt: skip
    raise AttributeError(f"module 'agents' has no attribute {name!r}")
