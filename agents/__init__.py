"""Built-in agent models: each family is a builder returning a :class:`negotiate.agent.AgentModel`.

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

from agents.capacity import build_capacity
from agents.machine import build_machine
from agents.params import CapacityParams, MachineParams, StationParams, VehicleParams, ZoneParams
from agents.vehicle import build_vehicle

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

MODELS = {"vehicle": build_vehicle, "machine": build_machine, "capacity": build_capacity}
PARAMETERS = {"vehicle": VehicleParams, "machine": MachineParams, "capacity": CapacityParams}
