"""The registry of resource kinds (negotiate/resources/base.py): what every kind declares, and a kind that
registers after the package is loaded reaching the fleet parser."""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator

import pytest

from negotiate.errors import FleetError
from negotiate.fleet.parse import parse_fleet
from negotiate.resources import KINDS, ExclusiveResource, register_kind


@pytest.mark.parametrize("name", list(KINDS))
def test_every_key_is_a_field_of_the_record(name):
    """Each declared fleet-file key is an init field of the kind's record, so a parsed table builds it."""
    cls = KINDS[name]
    fields = {f.name for f in dataclasses.fields(cls) if f.init}
    assert {k.name for k in cls.keys} <= fields - {"name"}
    assert cls.params and cls.chart in ("slots", "shares")


def test_built_in_kinds_in_order():
    """The built-in kinds, in the order the docs and messages list them."""
    assert list(KINDS)[:3] == ["exclusive", "capacity", "dwell"]


def test_a_kind_needs_a_name_of_its_own():
    """A subclass that does not set its own ``kind`` would take its parent's name: refused."""

    @dataclasses.dataclass(frozen=True)
    class Unnamed(ExclusiveResource):
        pass

    with pytest.raises(TypeError, match="declares no 'kind' name of its own"):
        register_kind(Unnamed)


def test_a_taken_name_is_refused():
    """A second, different record under a registered name is refused, naming the first one."""

    @dataclasses.dataclass(frozen=True)
    class Other(ExclusiveResource):
        kind = "exclusive"

    with pytest.raises(ValueError, match="already registered by negotiate.resources.exclusive.ExclusiveResource"):
        register_kind(Other)


@pytest.fixture
def crossing() -> Iterator[type]:
    """A kind registered for one test (an exclusive crossing whose table takes no key but kind), removed after it."""

    @register_kind
    @dataclasses.dataclass(frozen=True)
    class Crossing(ExclusiveResource):
        kind = "crossing"
        keys = ()

    yield Crossing
    del KINDS["crossing"]


def test_a_late_kind_reaches_the_fleet_file(crossing):
    """A kind registered after the parser was imported is a valid ``kind`` value and is listed in messages."""
    data = {"resources": {"x": {"kind": "crossing"}, "y": {"kind": "tunnel"}},
            "agents": {"a": {"model": "machine", "stations": [{"resource": "x", "duration": 60.0}]}}}  # fmt: skip
    with pytest.raises(FleetError) as info:
        parse_fleet(data, "f.toml")
    assert str(info.value) == (
        'f.toml: [resources.y] key \'kind\': expected one of "exclusive", "capacity", "dwell", "crossing", '
        'found "tunnel"'
    )
    del data["resources"]["y"]
    assert parse_fleet(data, "f.toml").resources == (crossing("x"),)
