"""Model families described by themselves: what a fleet file may say about an agent of each family.

A :class:`Family` names its parameter record (a frozen dataclass of numbers whose fields carry
``metadata={"unit", "doc", "range", "count"}``, see :mod:`agents.params`), its builder (a
``"module:function"`` path imported on first use, so that reading a fleet never loads CasADi), the keys a
fleet file must write, the keys taken from the agent's resource, and its nested lists of records (a
vehicle's zones, a machine's stations) with the kind of resource each entry names. The fleet reader, the
defaults, the generated key tables of ``docs/fleet.md`` and the messages about mistakes all follow from
these records; a new family is one :func:`register_family` call beside its builder.

Conventions the fleet reader relies on: a record field called ``resource`` holds the name of a shared
resource; a record refuses a bad field with :class:`negotiate.errors.FieldError`, whose ``owner`` is the
family's :attr:`Family.owner` or, for an entry of a nested list, ``"<noun> '<resource>'"``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from importlib import import_module
from typing import Any

from agents.params import CapacityParams, MachineParams, StationParams, VehicleParams, ZoneParams

__all__ = ["FAMILIES", "Family", "Nested", "family_records", "register_family"]

RESOURCE_KEY = "resource"
"""The record field that names a shared resource (in a family's own record or in a nested entry)."""


@dataclass(frozen=True)
class Nested:
    """A list of records inside a family's parameters, written as an array of tables in a fleet file.

    Attributes
    ----------
    key : str
        The field of the family's record holding the tuple of entries (``"zones"``).
    record : type
        The record of one entry (a frozen dataclass with a ``resource`` field).
    noun : str
        What one entry is called (``"zone"``); the record names itself ``"<noun> '<resource>'"`` in its errors.
    resource_kind : str
        The kind of resource each entry's ``resource`` must name (``"exclusive"``).
    required : frozenset of str
        Keys each entry must write in a fleet file (the record's demo defaults would invent them).
    """

    key: str
    record: type
    noun: str
    resource_kind: str
    required: frozenset[str] = frozenset()


@dataclass(frozen=True)
class Family:
    """A model family: parameter record, builder and the fleet-file rules of its keys.

    Attributes
    ----------
    name : str
        The family's name, the value of ``model`` in a fleet file.
    params : type
        Its parameter record (frozen dataclass, no CasADi).
    builder : str or callable
        ``"package.module:function"`` imported on first use (builders import CasADi), or the function
        itself. It is called as ``builder(name, prm, weight=..., solver_options=...)`` and returns an
        :class:`negotiate.core.agent.AgentModel`.
    summary : str
        One line on what the family models (for listings).
    owner : str
        How the record names itself in its :class:`~negotiate.errors.FieldError` s (``"vehicle"``).
    required : frozenset of str
        Keys an agent must write in a fleet file (directly or in ``[defaults.<family>]``).
    nested : tuple of Nested
        Its nested lists of records.
    resource_kind : str or None
        The kind of resource its own ``resource`` field names (None if it has no such field).
    inherited : tuple of str
        Keys that are attributes of that resource too: taken from it when omitted, refused when they differ.
    per_block : mapping of str to str
        Keys holding one entry per block of that resource (``{"tariff": "price"}``: what one entry is); a
        single number stands for that entry in every block.
    resource_unit : str or None
        The unit that resource must be declared in (``"W"``), and ``shares`` what the family takes of it.
    shares : str
        What the family takes of its resource, named when the resource's unit is not ``resource_unit``.
    build_hint : str
        Advice added to the message when an agent of this family cannot be built (units, deadlines).
    """

    name: str
    params: type
    builder: str | Callable[..., Any]
    summary: str = ""
    owner: str = ""
    required: frozenset[str] = frozenset()
    nested: tuple[Nested, ...] = ()
    resource_kind: str | None = None
    inherited: tuple[str, ...] = ()
    per_block: Mapping[str, str] = field(default_factory=dict)
    resource_unit: str | None = None
    shares: str = ""
    build_hint: str = ""

    def __post_init__(self) -> None:
        names = {f.name for f in fields(self.params)}
        declared = {*self.required, *self.inherited, *self.per_block, *(n.key for n in self.nested)}
        if not declared <= names:
            raise ValueError(f"family {self.name!r}: {sorted(declared - names)} are not fields of "
                             f"{self.params.__name__}")  # fmt: skip
        if (self.inherited or self.per_block or self.resource_unit) and (
            self.resource_kind is None or RESOURCE_KEY not in names
        ):
            raise ValueError(f"family {self.name!r}: inherited and per-block keys need a resource_kind and a "
                             f"{RESOURCE_KEY!r} field")  # fmt: skip
        if not self.owner:
            object.__setattr__(self, "owner", self.name)

    def build(self) -> Callable[..., Any]:
        """The builder function (its module is imported now, which may load CasADi)."""
        if callable(self.builder):
            return self.builder
        module, _, attr = self.builder.partition(":")
        fn: Callable[..., Any] = getattr(import_module(module), attr)
        return fn

    def nested_of(self, key: str) -> Nested | None:
        """The nested list declared for ``key`` (None if ``key`` is not one)."""
        return next((n for n in self.nested if n.key == key), None)


FAMILIES: dict[str, Family] = {}
"""Registered families by name, in registration order (the built-ins first)."""


def register_family(family: Family) -> Family:
    """Add ``family`` to :data:`FAMILIES` (replacing one of the same name) and return it."""
    if not family.name or ":" in family.name:
        raise ValueError(f"a family name must be a non-empty word without ':', got {family.name!r}")
    FAMILIES[family.name] = family
    return family


def family_records() -> tuple[type, ...]:
    """Every parameter record of the registered families, nested records included (for saved run states)."""
    out: list[type] = []
    for fam in FAMILIES.values():
        for cls in (fam.params, *(n.record for n in fam.nested)):
            if cls not in out:
                out.append(cls)
    return tuple(out)


register_family(Family(
    name="vehicle",
    params=VehicleParams,
    builder="agents.vehicle:build_vehicle",
    summary="a road vehicle on a fixed route; shares the entry and exit times (s) of exclusive zones",
    required=frozenset({"zones"}),
    nested=(Nested("zones", ZoneParams, "zone", "exclusive", frozenset({"resource", "entry", "exit"})),),
    build_hint=" (check the units: positions and lengths in m, times in s, speeds in m/s; and that "
    "latest_arrival leaves time for the trip)",
))  # fmt: skip
register_family(Family(
    name="machine",
    params=MachineParams,
    builder="agents.machine:build_machine",
    summary="a machine processing one batch, then shared stations in sequence; shares the station slot times (s)",
    required=frozenset({"stations"}),
    nested=(Nested("stations", StationParams, "station", "exclusive", frozenset({"resource", "duration"})),),
    build_hint=" (check the units: work in kg, rates in kg/s, times in s; and that the horizon leaves time "
    "for processing and every station)",
))  # fmt: skip
register_family(Family(
    name="capacity",
    params=CapacityParams,
    builder="agents.capacity:build_capacity",
    summary="a battery vehicle charging from a shared grid connection; shares its power (W) in each time block",
    owner="capacity user",
    required=frozenset({"resource", "tariff"}),
    resource_kind="capacity",
    inherited=("start", "block_length"),
    per_block={"tariff": "price"},
    resource_unit="W",
    shares="power",
    build_hint=" (check the units: energy in J, power in W, times in s)",
))  # fmt: skip
