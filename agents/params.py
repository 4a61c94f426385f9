"""Plain parameter records of the built-in agent models.

Every model family takes one frozen dataclass of numbers (no CasADi here), so that a fleet file can be
turned into models by keyword (``VehicleParams(**table)``) and so that documentation can be generated from
the field metadata: each field carries ``metadata={"unit": ..., "doc": ...}`` with its SI unit (``"-"`` for
dimensionless numbers) and a one-line meaning. All defaults are invented demonstration values, chosen to be
physically plausible, not measured.

Costs of all families are in a common unit, "J-equivalent": one joule of traction or grid energy at a price
of 1 costs 1. Prices and tariffs are therefore dimensionless multipliers, and every other weight is stated
as J-equivalent per unit of what it penalises, so that the coordinator can add the agents' values.

Invalid numbers (a negative mass, a zone outside the route, ...) raise :class:`ValueError` naming the field,
the expected range and the value received.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import Any

__all__ = [
    "STANDARD_GRAVITY",
    "CapacityParams",
    "MachineParams",
    "StationParams",
    "VehicleParams",
    "ZoneParams",
    "field_table",
]

#: Standard acceleration of gravity in m/s^2 (the conventional value 9.80665, a defined constant).
STANDARD_GRAVITY = 9.80665


def _f(default: Any, unit: str, doc: str) -> Any:
    """A dataclass field with its SI unit and meaning in the metadata."""
    return field(default=default, metadata={"unit": unit, "doc": doc})


def _check(owner: str, name: str, value: float, ok: bool, expected: str) -> None:
    if not ok or (isinstance(value, float) and math.isnan(value)):
        raise ValueError(f"{owner}: '{name}' must be {expected}, got {value!r}")


def _positive(owner: str, obj: Any, *names: str) -> None:
    for name in names:
        value = getattr(obj, name)
        _check(owner, name, value, value > 0, "> 0")


def _nonnegative(owner: str, obj: Any, *names: str) -> None:
    for name in names:
        value = getattr(obj, name)
        _check(owner, name, value, value >= 0, ">= 0")


def field_table(cls: type) -> list[tuple[str, str, Any, str]]:
    """Rows ``(name, unit, default, doc)`` of a parameter dataclass, for generated documentation."""
    return [(f.name, f.metadata.get("unit", ""), f.default, f.metadata.get("doc", "")) for f in fields(cls)]


# --------------------------------------------------------------------------------------------------------
# vehicle on a path
# --------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ZoneParams:
    """An exclusive zone on a vehicle's route (e.g. a single-lane bridge), as positions along the route."""

    resource: str = _f("bridge", "-", "name of the shared exclusive resource the zone belongs to")
    entry: float = _f(900.0, "m", "route position where the vehicle's front enters the zone")
    exit: float = _f(1100.0, "m", "route position where the zone ends; the vehicle has left it once its "
                     "rear passes here (front at exit + vehicle length)")
    speed_limit: float | None = _f(None, "m/s", "speed limit while on the zone; None keeps the route's limit")

    def __post_init__(self) -> None:
        owner = f"zone {self.resource!r}"
        _check(owner, "entry", self.entry, self.entry > 0, "> 0 (the route starts at 0 m)")
        _check(owner, "exit", self.exit, self.exit > self.entry, f"> entry = {self.entry}")
        if self.speed_limit is not None:
            _check(owner, "speed_limit", self.speed_limit, self.speed_limit > 0, "> 0 or None")


@dataclass(frozen=True)
class VehicleParams:
    """A road vehicle driving a fixed route once, with exclusive zones on it (invented demo defaults)."""

    route_length: float = _f(2000.0, "m", "length of the route from departure to arrival")
    zones: tuple[ZoneParams, ...] = _f((ZoneParams(),), "-", "exclusive zones along the route, in route order")
    stages: int = _f(40, "-", "number of distance stages of the discretisation (nodes are also put at every "
                     "zone entry and exit)")
    mass: float = _f(18000.0, "kg", "vehicle mass without payload")
    payload: float = _f(0.0, "kg", "payload mass carried on this trip")
    length: float = _f(12.0, "m", "vehicle length (a zone is occupied until the rear has left it)")
    max_accel: float = _f(1.0, "m/s^2", "largest drive force per total mass")
    max_brake: float = _f(2.0, "m/s^2", "largest braking force per total mass")
    speed_limit: float = _f(20.0, "m/s", "speed limit on the route")
    min_speed: float = _f(1.0, "m/s", "smallest speed allowed anywhere (> 0 so that the time per stage, "
                          "ds / speed, stays finite; the vehicle never stops on the route)")
    initial_speed: float = _f(10.0, "m/s", "speed at departure")
    rolling_coeff: float = _f(0.007, "-", "rolling resistance coefficient C_rr (force = C_rr * m * g)")
    drag_area: float = _f(6.0, "m^2", "aerodynamic drag area C_d * A")
    air_density: float = _f(1.2, "kg/m^3", "density of air")
    efficiency: float = _f(0.9, "-", "drivetrain efficiency from stored energy to traction work")
    traction_smoothing: float = _f(0.05, "m/s^2", "smoothing width of the positive part of the drive force "
                                   "per mass in the energy cost (its error is at most half of it)")
    departure: float = _f(0.0, "s", "departure time at route position 0")
    desired_arrival: float = _f(130.0, "s", "arrival time the vehicle would like")
    latest_arrival: float = _f(400.0, "s", "arrival deadline (hard constraint; also bounds the reachable slots)")
    arrival_weight: float = _f(2000.0, "J/s^2", "cost weight of the squared deviation from the desired arrival")
    comfort_weight: float = _f(20000.0, "kg*s", "cost weight of the time integral of the squared acceleration")

    def __post_init__(self) -> None:
        owner = "vehicle"
        object.__setattr__(self, "zones", tuple(self.zones))
        _positive(owner, self, "route_length", "mass", "max_accel", "max_brake", "speed_limit", "min_speed",
                  "efficiency", "traction_smoothing", "arrival_weight")
        _nonnegative(owner, self, "payload", "length", "rolling_coeff", "drag_area", "air_density",
                     "comfort_weight")
        _check(owner, "stages", self.stages, isinstance(self.stages, int) and self.stages >= 4,
               "an integer >= 4")
        _check(owner, "efficiency", self.efficiency, self.efficiency <= 1, "<= 1")
        _check(owner, "min_speed", self.min_speed, self.min_speed < self.speed_limit,
               f"< speed_limit = {self.speed_limit}")
        _check(owner, "initial_speed", self.initial_speed,
               self.min_speed <= self.initial_speed <= self.speed_limit,
               f"within [min_speed, speed_limit] = [{self.min_speed}, {self.speed_limit}]")
        _check(owner, "latest_arrival", self.latest_arrival,
               self.latest_arrival > self.departure + self.route_length / self.speed_limit,
               "later than departure + route_length / speed_limit")
        _check(owner, "zones", len(self.zones), len(self.zones) >= 1, "at least one zone")
        previous_exit = 0.0
        for zone in self.zones:
            if not isinstance(zone, ZoneParams):
                raise ValueError(f"vehicle: 'zones' must hold ZoneParams, got {type(zone).__name__}")
            _check(f"zone {zone.resource!r}", "entry", zone.entry, zone.entry >= previous_exit,
                   f">= the previous zone's exit ({previous_exit} m); zones must be in route order")
            _check(f"zone {zone.resource!r}", "exit", zone.exit, zone.exit + self.length <= self.route_length,
                   f"<= route_length - length = {self.route_length - self.length}")
            if zone.speed_limit is not None:
                _check(f"zone {zone.resource!r}", "speed_limit", zone.speed_limit,
                       zone.speed_limit > self.min_speed, f"> min_speed = {self.min_speed}")
            previous_exit = zone.exit
        names = [z.resource for z in self.zones]
        if len(set(names)) != len(names):
            raise ValueError(f"vehicle: zone resources must be distinct, got {names}")

    @property
    def total_mass(self) -> float:
        """Mass of vehicle plus payload, in kg."""
        return self.mass + self.payload


# --------------------------------------------------------------------------------------------------------
# machine job
# --------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class StationParams:
    """A shared station the finished batch must pass through (e.g. a heat-treatment furnace)."""

    resource: str = _f("furnace", "-", "name of the shared exclusive resource")
    duration: float = _f(1800.0, "s", "processing time of the batch at the station (shortest slot length)")
    transfer: float = _f(0.0, "s", "shortest time between leaving the previous step and entering this station")
    holding_cost: float = _f(5.0, "J/s", "cost per second the batch waits before entering this station "
                             "(after the previous step ended)")

    def __post_init__(self) -> None:
        owner = f"station {self.resource!r}"
        _positive(owner, self, "duration")
        _nonnegative(owner, self, "transfer", "holding_cost")


@dataclass(frozen=True)
class MachineParams:
    """A machine processing one batch, then handing it to shared stations in sequence (invented defaults)."""

    work: float = _f(500.0, "kg", "amount of material in the batch")
    release: float = _f(0.0, "s", "time from which the machine may work on the batch")
    max_rate: float = _f(0.5, "kg/s", "largest processing rate")
    power_coeff: float = _f(3.2e5, "W*s^2/kg^2", "power drawn at rate r is power_coeff * r^2")
    blocks: int = _f(12, "-", "number of equal time blocks between release and finishing (the rate is "
                     "constant within a block)")
    stations: tuple[StationParams, ...] = _f(
        (StationParams(), StationParams("inspection", duration=600.0, transfer=60.0, holding_cost=5.0)),
        "-", "shared stations the batch visits after processing, in order")
    base_price: float = _f(1.0, "-", "energy price multiplier outside the peak period")
    peak_price: float = _f(1.8, "-", "energy price multiplier during the peak period")
    peak_start: float = _f(1200.0, "s", "start of the peak-price period")
    peak_end: float = _f(2400.0, "s", "end of the peak-price period")
    price_ramp: float = _f(120.0, "s", "time scale of the smooth (logistic) change between price levels")
    due: float = _f(5400.0, "s", "due time for leaving the last station")
    tardiness_weight: float = _f(2.0e4, "J/s", "cost per second of lateness against the due time")
    tardiness_smoothing: float = _f(120.0, "s", "smoothing width of the lateness (positive part)")
    horizon: float = _f(14400.0, "s", "latest time the last station may be left (bounds the reachable slots)")

    def __post_init__(self) -> None:
        owner = "machine"
        object.__setattr__(self, "stations", tuple(self.stations))
        _positive(owner, self, "work", "max_rate", "power_coeff", "base_price", "peak_price", "price_ramp",
                  "tardiness_smoothing")
        _nonnegative(owner, self, "tardiness_weight")
        _check(owner, "blocks", self.blocks, isinstance(self.blocks, int) and self.blocks >= 1, "an integer >= 1")
        _check(owner, "stations", len(self.stations), len(self.stations) >= 1, "at least one station")
        for st in self.stations:
            if not isinstance(st, StationParams):
                raise ValueError(f"machine: 'stations' must hold StationParams, got {type(st).__name__}")
        names = [s.resource for s in self.stations]
        if len(set(names)) != len(names):
            raise ValueError(f"machine: station resources must be distinct, got {names}")
        earliest = self.release + self.work / self.max_rate + sum(s.transfer + s.duration for s in self.stations)
        _check(owner, "horizon", self.horizon, self.horizon > earliest,
               f"> earliest possible completion {earliest} s")


# --------------------------------------------------------------------------------------------------------
# capacity user
# --------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CapacityParams:
    """A battery vehicle charging from a shared grid connection over K time blocks (invented defaults)."""

    resource: str = _f("grid", "-", "name of the shared capacity resource")
    start: float = _f(0.0, "s", "start of the first time block")
    block_length: float = _f(900.0, "s", "length of each time block")
    tariff: tuple[float, ...] = _f((1.0, 1.0, 1.4, 1.6, 1.2, 0.9, 0.8, 0.8), "-",
                                   "energy price multiplier of each block; its length is the number of blocks")
    battery_capacity: float = _f(7.2e8, "J", "usable battery energy (7.2e8 J = 200 kWh)")
    initial_soc: float = _f(0.3, "-", "state of charge at the start, as a fraction of battery_capacity")
    target_soc: float = _f(0.8, "-", "state of charge wanted at the end of the last block (the deadline)")
    charger_power: float = _f(1.5e5, "W", "largest power the charger can draw from the grid")
    efficiency: float = _f(0.92, "-", "charging efficiency from grid energy to stored energy")
    wear_coeff: float = _f(1.0e-6, "1/W", "battery wear cost per block is wear_coeff * power^2 * block_length")
    shortfall_weight: float = _f(1.0e-6, "1/J", "cost of missing energy u at the deadline is weight * u^2")

    def __post_init__(self) -> None:
        owner = "capacity user"
        object.__setattr__(self, "tariff", tuple(float(c) for c in self.tariff))
        _positive(owner, self, "block_length", "battery_capacity", "charger_power", "efficiency",
                  "shortfall_weight")
        _nonnegative(owner, self, "wear_coeff")
        _check(owner, "tariff", len(self.tariff), len(self.tariff) >= 1, "at least one block")
        for c in self.tariff:
            _check(owner, "tariff", c, c >= 0, "made of prices >= 0")
        _check(owner, "efficiency", self.efficiency, self.efficiency <= 1, "<= 1")
        _check(owner, "initial_soc", self.initial_soc, 0 <= self.initial_soc <= 1, "within [0, 1]")
        _check(owner, "target_soc", self.target_soc, 0 <= self.target_soc <= 1, "within [0, 1]")

    @property
    def blocks(self) -> int:
        """Number of time blocks (the length of ``tariff``)."""
        return len(self.tariff)
