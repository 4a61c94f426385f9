"""Plain parameter records of the built-in agent models.

Every model family takes one frozen dataclass of numbers (no CasADi here), so that a fleet file can be
turned into models by keyword (``VehicleParams(**table)``) and so that documentation can be generated from
the field metadata: each field carries ``metadata={"unit": ..., "doc": ...}`` with its SI unit (``"-"`` for
dimensionless numbers) and a one-line meaning. All defaults are invented demonstration values, chosen to be
physically plausible, not measured.

Costs of all families are in a common unit, "J-equivalent": one joule of traction or grid energy at a price
of 1 costs 1. Prices and tariffs are therefore dimensionless multipliers, and every other weight is stated
as J-equivalent per unit of what it penalises, so that the coordinator can add the agents' values.

Every number has a documented range (field metadata ``"range"``, a :class:`Range`; list lengths under
``"count"``): physical quantities are positive or non-negative and bounded far beyond any real vehicle,
machine or battery, times are ``>= 0`` s, counts have maxima that keep building an agent within seconds to
minutes on a 2-core machine. Invalid numbers (a negative mass, a zone outside the route, ...) raise
:class:`negotiate.errors.FieldError` (a :class:`ValueError`) carrying the record, the field, what was
expected and what was received.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import Any

from negotiate.core.ranges import (  # noqa: F401  (part of this module's vocabulary)
    ACCELERATION,
    COST_WEIGHT,
    DURATION,
    EFFICIENCY,
    FRACTION,
    LENGTH,
    MASS,
    MAX_BLOCKS,
    PRICE,
    SPEED,
    TIME,
    Range,
    short_bound,
)
from negotiate.errors import FieldError, check_field

__all__ = [
    "STANDARD_GRAVITY",
    "Range",
    "CapacityParams",
    "MachineParams",
    "StationParams",
    "VehicleParams",
    "ZoneParams",
    "field_table",
]

#: Standard acceleration of gravity in m/s^2 (the conventional value 9.80665, a defined constant).
STANDARD_GRAVITY = 9.80665


MAX_ZONES = 8
"""Most zones per vehicle. Zones cost no solves to build (the window is kinematic)."""
MAX_STATIONS = 20
"""Most stations per machine."""
MAX_STAGES = 500
"""Most distance stages of a vehicle (building grows about linearly with the stages: one zone at 120 / 240 /
500 stages builds in 0.14 / 0.27 / 0.55 s on the 2-core machine; solves take longer in proportion)."""
MAX_MACHINE_BLOCKS = 1000
"""Most time blocks of a machine's rate."""


def _f(default: Any, unit: str, doc: str, rng: Range | None = None, count: Range | None = None) -> Any:
    """A dataclass field with its SI unit, meaning, allowed range (numbers) or count (lists) in the metadata."""
    meta: dict[str, Any] = {"unit": unit, "doc": doc}
    if rng is not None:
        meta["range"] = rng
    if count is not None:
        meta["count"] = count
    return field(default=default, metadata=meta)



def _check_ranges(owner: str, obj: Any) -> None:
    """Every field against its metadata: ``range`` (a number, each entry of a list, ``None`` allowed where it
    is the default) and ``count`` (the length of a list); integers must be integers."""
    for f in fields(obj):
        value = getattr(obj, f.name)
        count = f.metadata.get("count")
        if count is not None and len(value) not in count:
            raise FieldError(owner, f.name, f"a list of {short_bound(count.lo)} to {short_bound(count.hi)} entries",
                             f"{len(value)} entries")  # fmt: skip
        rng = f.metadata.get("range")
        if rng is None or (value is None and f.default is None):
            continue
        if isinstance(value, tuple):
            for v in value:
                check_field(owner, f.name, v, v in rng, f"made of numbers {rng}")
        elif isinstance(f.default, int) and not isinstance(f.default, bool):
            check_field(owner, f.name, value, isinstance(value, int) and value in rng, f"an integer {rng}")
        else:
            check_field(owner, f.name, value, value in rng, str(rng))


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
    entry: float = _f(900.0, "m", "route position where the vehicle's front enters the zone", LENGTH)
    exit: float = _f(1100.0, "m", "route position where the zone ends; the vehicle has left it once its "
                     "rear passes here (front at exit + vehicle length)", LENGTH)
    speed_limit: float | None = _f(None, "m/s", "speed limit while on the zone; None keeps the route's limit",
                                   SPEED)

    def __post_init__(self) -> None:
        owner = f"zone {self.resource!r}"
        _check_ranges(owner, self)
        check_field(owner, "exit", self.exit, self.exit > self.entry, f"> entry = {self.entry}")


@dataclass(frozen=True)
class VehicleParams:
    """A road vehicle driving a fixed route once, with exclusive zones on it (invented demo defaults)."""

    route_length: float = _f(2000.0, "m", "length of the route from departure to arrival", LENGTH)
    zones: tuple[ZoneParams, ...] = _f((ZoneParams(),), "-", "exclusive zones along the route, in route order",
                                       count=Range(1, MAX_ZONES))
    stages: int = _f(40, "-", "number of distance stages of the discretisation (nodes are also put at every "
                     "zone entry and exit)", Range(4, MAX_STAGES))
    mass: float = _f(18000.0, "kg", "vehicle mass without payload", MASS)
    payload: float = _f(0.0, "kg", "payload mass carried on this trip", Range(0.0, MASS.hi))
    length: float = _f(12.0, "m", "vehicle length (a zone is occupied until the rear has left it)", Range(0.0, 1e4))
    max_accel: float = _f(1.0, "m/s^2", "largest drive force per total mass", ACCELERATION)
    max_brake: float = _f(2.0, "m/s^2", "largest braking force per total mass", ACCELERATION)
    speed_limit: float = _f(20.0, "m/s", "speed limit on the route", SPEED)
    min_speed: float = _f(1.0, "m/s", "smallest speed allowed anywhere (> 0 so that the time per stage, "
                          "ds / speed, stays finite; the vehicle never stops on the route)", SPEED)
    initial_speed: float = _f(10.0, "m/s", "speed at departure", SPEED)
    rolling_coeff: float = _f(0.007, "-", "rolling resistance coefficient C_rr (force = C_rr * m * g)", FRACTION)
    drag_area: float = _f(6.0, "m^2", "aerodynamic drag area C_d * A", Range(0.0, 1e3))
    air_density: float = _f(1.2, "kg/m^3", "density of air", Range(0.0, 100.0))
    efficiency: float = _f(0.9, "-", "drivetrain efficiency from stored energy to traction work", EFFICIENCY)
    traction_smoothing: float = _f(0.05, "m/s^2", "smoothing width of the positive part of the drive force "
                                   "per mass in the energy cost (its error is at most half of it)", ACCELERATION)
    departure: float = _f(0.0, "s", "departure time at route position 0", TIME)
    desired_arrival: float = _f(130.0, "s", "arrival time the vehicle would like (not before departure)", TIME)
    latest_arrival: float = _f(400.0, "s", "arrival deadline (hard constraint; also bounds the reachable slots)",
                               TIME)
    arrival_weight: float = _f(2000.0, "J/s^2", "cost weight of the squared deviation from the desired arrival",
                               Range(0.0, COST_WEIGHT.hi, lo_open=True))
    comfort_weight: float = _f(20000.0, "kg*s", "cost weight of the time integral of the squared acceleration",
                               COST_WEIGHT)

    def __post_init__(self) -> None:
        owner = "vehicle"
        object.__setattr__(self, "zones", tuple(self.zones))
        _check_ranges(owner, self)
        check_field(owner, "min_speed", self.min_speed, self.min_speed < self.speed_limit,
               f"< speed_limit = {self.speed_limit}")
        check_field(owner, "initial_speed", self.initial_speed,
               self.min_speed <= self.initial_speed <= self.speed_limit,
               f"within [min_speed, speed_limit] = [{self.min_speed}, {self.speed_limit}]")
        check_field(owner, "desired_arrival", self.desired_arrival, self.desired_arrival >= self.departure,
               f">= departure = {self.departure}")
        check_field(owner, "latest_arrival", self.latest_arrival,
               self.latest_arrival > self.departure + self.route_length / self.speed_limit,
               "later than departure + route_length / speed_limit")
        previous_exit = 0.0
        for zone in self.zones:
            if not isinstance(zone, ZoneParams):
                raise FieldError(owner, "zones", "a list of ZoneParams", f"a {type(zone).__name__} in it")
            check_field(f"zone {zone.resource!r}", "entry", zone.entry, zone.entry >= previous_exit,
                   f">= the previous zone's exit ({previous_exit} m); zones must be in route order")
            check_field(f"zone {zone.resource!r}", "exit", zone.exit, zone.exit + self.length <= self.route_length,
                   f"<= route_length - length = {self.route_length - self.length}")
            if zone.speed_limit is not None:
                check_field(f"zone {zone.resource!r}", "speed_limit", zone.speed_limit,
                       zone.speed_limit > self.min_speed, f"> min_speed = {self.min_speed}")
            previous_exit = zone.exit
        names = [z.resource for z in self.zones]
        if len(set(names)) != len(names):
            raise FieldError(owner, "zones", "zones of distinct resources", f"resources {names}")

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
    duration: float = _f(1800.0, "s", "processing time of the batch at the station (shortest slot length)",
                         DURATION)
    transfer: float = _f(0.0, "s", "shortest time between leaving the previous step and entering this station",
                         Range(0.0, DURATION.hi))
    holding_cost: float = _f(5.0, "J/s", "cost per second the batch waits before entering this station "
                             "(after the previous step ended)", COST_WEIGHT)

    def __post_init__(self) -> None:
        _check_ranges(f"station {self.resource!r}", self)


@dataclass(frozen=True)
class MachineParams:
    """A machine processing one batch, then handing it to shared stations in sequence (invented defaults)."""

    work: float = _f(500.0, "kg", "amount of material in the batch", Range(0.0, 1e9, lo_open=True))
    release: float = _f(0.0, "s", "time from which the machine may work on the batch", TIME)
    max_rate: float = _f(0.5, "kg/s", "largest processing rate", Range(0.0, 1e6, lo_open=True))
    power_coeff: float = _f(3.2e5, "W*s^2/kg^2", "power drawn at rate r is power_coeff * r^2",
                            Range(0.0, 1e12, lo_open=True))
    blocks: int = _f(12, "-", "number of equal time blocks between release and finishing (the rate is "
                     "constant within a block)", Range(1, MAX_MACHINE_BLOCKS))
    stations: tuple[StationParams, ...] = _f(
        (StationParams(), StationParams("inspection", duration=600.0, transfer=60.0, holding_cost=5.0)),
        "-", "shared stations the batch visits after processing, in order", count=Range(1, MAX_STATIONS))
    base_price: float = _f(1.0, "-", "energy price multiplier outside the peak period",
                           Range(0.0, PRICE.hi, lo_open=True))
    peak_price: float = _f(1.8, "-", "energy price multiplier during the peak period",
                           Range(0.0, PRICE.hi, lo_open=True))
    peak_start: float = _f(1200.0, "s", "start of the peak-price period", TIME)
    peak_end: float = _f(2400.0, "s", "end of the peak-price period (not before its start)", TIME)
    price_ramp: float = _f(120.0, "s", "time scale of the smooth (logistic) change between price levels", DURATION)
    due: float = _f(5400.0, "s", "due time for leaving the last station", TIME)
    tardiness_weight: float = _f(2.0e4, "J/s", "cost per second of lateness against the due time", COST_WEIGHT)
    tardiness_smoothing: float = _f(120.0, "s", "smoothing width of the lateness (positive part)", DURATION)
    horizon: float = _f(14400.0, "s", "latest time the last station may be left (bounds the reachable slots)",
                        TIME)

    def __post_init__(self) -> None:
        owner = "machine"
        object.__setattr__(self, "stations", tuple(self.stations))
        _check_ranges(owner, self)
        check_field(owner, "peak_end", self.peak_end, self.peak_end >= self.peak_start,
               f">= peak_start = {self.peak_start}")
        for st in self.stations:
            if not isinstance(st, StationParams):
                raise FieldError(owner, "stations", "a list of StationParams", f"a {type(st).__name__} in it")
        names = [s.resource for s in self.stations]
        if len(set(names)) != len(names):
            raise FieldError(owner, "stations", "stations of distinct resources", f"resources {names}")
        earliest = self.release + self.work / self.max_rate + sum(s.transfer + s.duration for s in self.stations)
        check_field(owner, "horizon", self.horizon, self.horizon > earliest,
               f"> earliest possible completion {earliest} s")


# --------------------------------------------------------------------------------------------------------
# capacity user
# --------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CapacityParams:
    """A battery vehicle charging from a shared grid connection over K time blocks (invented defaults)."""

    resource: str = _f("grid", "-", "name of the shared capacity resource")
    start: float = _f(0.0, "s", "start of the first time block", TIME)
    block_length: float = _f(900.0, "s", "length of each time block", DURATION)
    tariff: tuple[float, ...] = _f((1.0, 1.0, 1.4, 1.6, 1.2, 0.9, 0.8, 0.8), "-",
                                   "energy price multiplier of each block; its length is the number of blocks",
                                   PRICE, count=Range(1, MAX_BLOCKS))
    battery_capacity: float = _f(7.2e8, "J", "usable battery energy (7.2e8 J = 200 kWh)",
                                 Range(0.0, 1e13, lo_open=True))
    initial_soc: float = _f(0.3, "-", "state of charge at the start, as a fraction of battery_capacity", FRACTION)
    target_soc: float = _f(0.8, "-", "state of charge wanted at the end of the last block (the deadline)",
                           FRACTION)
    charger_power: float = _f(1.5e5, "W", "largest power the charger can draw from the grid",
                              Range(0.0, 1e10, lo_open=True))
    efficiency: float = _f(0.92, "-", "charging efficiency from grid energy to stored energy", EFFICIENCY)
    wear_coeff: float = _f(1.0e-6, "1/W", "battery wear cost per block is wear_coeff * power^2 * block_length",
                           COST_WEIGHT)
    shortfall_weight: float = _f(1.0e-6, "1/J", "cost of missing energy u at the deadline is weight * u^2",
                                 Range(0.0, COST_WEIGHT.hi, lo_open=True))

    def __post_init__(self) -> None:
        object.__setattr__(self, "tariff", tuple(float(c) for c in self.tariff))
        _check_ranges("capacity user", self)

    @property
    def blocks(self) -> int:
        """Number of time blocks (the length of ``tariff``)."""
        return len(self.tariff)
