"""The keys of a fleet file: what each table may hold, the type, unit and default of each key, and the
checks that turn a decoded TOML value into a typed one (reporting a :class:`~negotiate.errors.Problem`
when it does not fit).

The keys of an agent come from its model family (:mod:`agents.families`): the fields of the family's
parameter record with their ``unit``, ``doc``, ``range`` and ``count`` metadata, the keys the family
requires in a file, those it takes from its resource and its nested lists of records. Nothing here knows a
family by name. :mod:`negotiate.fleet.parse` reads a file with these keys, :mod:`negotiate.fleet.docs`
writes them as the tables of ``docs/fleet.md``.
"""

from __future__ import annotations

import difflib
import functools
import math
import re
import typing
from collections.abc import Mapping
from dataclasses import MISSING, dataclass, fields
from typing import Any

from agents.families import FAMILIES, RESOURCE_KEY, Family, Nested
from negotiate.core.ranges import Range
from negotiate.errors import Problem, describe
from negotiate.fleet.spec import (
    MAX_ROUNDS,
    METHODS,
    ORDER_RULES,
    TOLERANCE,
    WEIGHT,
    CoordinatorSettings,
)

__all__ = ["FROM_RESOURCE", "REQUIRED", "family_keys", "nested_keys"]

_NAME = re.compile(r"^[A-Za-z0-9_-]+$")
_IMPORT_PATH = re.compile(r"^[A-Za-z_]\w*(\.[A-Za-z_]\w*)*:[A-Za-z_]\w*$")
_NAME_RULE = "a name of letters, digits, '-' and '_'"


class _Required:
    """Marker of a key without a default."""

    def __repr__(self) -> str:
        return "required"


REQUIRED: Any = _Required()


class _FromResource:
    """Marker of a key whose default is taken from the agent's resource."""

    def __repr__(self) -> str:
        return "the resource's"


FROM_RESOURCE: Any = _FromResource()


@dataclass(frozen=True)
class _Key:
    """One key of a table: its kind of value, SI unit, default and meaning (source of parser and docs)."""

    name: str
    kind: str  # number | integer | string | bool | numbers | price-list | table | tables | choice | name
    unit: str
    default: Any
    doc: str
    choices: tuple[str, ...] = ()
    record: type | None = None  # for kind "tables": the record of each entry
    allowed: str = ""  # the allowed values (range of a number, entries of a list), for the docs


def _spec_default(cls: type, name: str) -> Any:
    for f in fields(cls):
        if f.name == name:
            if f.default is not MISSING:
                return f.default
            if f.default_factory is not MISSING:
                return f.default_factory()
    return REQUIRED


_FLEET_KEYS = (
    _Key("name", "string", "-", "the file name without extension", "name of the fleet (for reports)"),
    _Key("description", "string", "-", "", "free text describing the scenario"),
)
_COORDINATOR_KEYS = (
    _Key(
        "method",
        "choice",
        "-",
        _spec_default(CoordinatorSettings, "method"),
        "coordination method (or a user method registered with negotiate.coordination.engine.register_method before "
        "the file is parsed)",
        choices=METHODS,
    ),
    _Key(
        "max_rounds",
        "integer",
        "-",
        _spec_default(CoordinatorSettings, "max_rounds"),
        "largest number of coordination rounds (one round = one solve of every agent)",
        allowed=MAX_ROUNDS.interval,
    ),
    _Key(
        "tolerance",
        "number",
        "-",
        _spec_default(CoordinatorSettings, "tolerance"),
        "stopping tolerance, relative to max(1, |total cost|)",
        allowed=TOLERANCE.interval,
    ),
    _Key(
        "order",
        "choice",
        "-",
        _spec_default(CoordinatorSettings, "order"),
        "how the order of the users of each exclusive resource is chosen",
        choices=ORDER_RULES,
    ),
    _Key(
        "guard",
        "bool",
        "-",
        _spec_default(CoordinatorSettings, "guard"),
        "nonsmooth guard on (one-sided gradients where weakly active constraints are reported)",
    ),
    _Key("options", "table", "-", {},
         "the method's own options (docs/methods.md); a key it does not declare, or a mistyped value, is refused"),
    _Key("order_options", "table", "-", {},
         "the order rule's options, e.g. the order master's budgets (docs/methods.md); a key the rule does not "
         "declare, or a mistyped or out-of-range value, is refused"),
)
_AGENT_KEYS = (
    _Key(
        "model",
        "string",
        "-",
        REQUIRED,
        "model family ({families}) or \"package.module:function\" of a user-written builder (imported and run "
        "by build_agents)",
    ),
    _Key("weight", "number", "-", 1.0, "weight of the agent's cost in the fleet total", allowed=WEIGHT.interval),
)
"""The keys of every agent (``{families}`` in the doc of ``model`` stands for the registered families)."""


def _allowed(meta: Mapping[str, Any]) -> str:
    """The allowed values of a record field, from its ``range`` and ``count`` metadata (for the docs)."""
    rng: Range | None = meta.get("range")
    count: Range | None = meta.get("count")
    parts = []
    if rng is not None:
        parts.append(("each " if count is not None else "") + rng.interval)
    if count is not None:
        parts.append(f"1 to {count.hi:g} entries" if count.lo == 1 else f"{count.lo:g} to {count.hi:g} entries")
    return "; ".join(parts)


@functools.cache
def _record_keys(
    cls: type,
    required: frozenset[str] = frozenset(),
    inherited: frozenset[str] = frozenset(),
    per_block: tuple[tuple[str, str], ...] = (),
) -> tuple[_Key, ...]:
    """Keys of a parameter record, from its field types and ``{"unit", "doc", "range", "count"}`` metadata.

    ``required`` keys have no default in a file, ``inherited`` ones default to the resource's value and
    ``per_block`` ones (``(key, what one entry is)``) take one number per block of the resource or one for all.
    """
    hints = typing.get_type_hints(cls)
    blockwise = dict(per_block)
    keys = []
    for f in fields(cls):
        hint = hints[f.name]
        record = None
        if hint is float or hint == (float | None):
            kind = "number"
        elif hint is int:
            kind = "integer"
        elif hint is str:
            kind = "name" if f.name == RESOURCE_KEY else "string"
        elif hint is bool:
            kind = "bool"
        elif typing.get_origin(hint) is tuple:
            item = typing.get_args(hint)[0]
            if item is float:
                kind = "price-list" if f.name in blockwise else "numbers"
            else:
                kind, record = "tables", item
        else:  # pragma: no cover - a new field type needs a rule here
            raise TypeError(f"{cls.__name__}.{f.name}: no fleet-file rule for type {hint}")
        if f.name in required:
            default = REQUIRED
        elif f.name in inherited:
            default = FROM_RESOURCE
        else:
            default = f.default
        doc = f.metadata.get("doc", "")
        if f.name in blockwise:
            doc += (f" and must equal the resource's; one number means that {blockwise[f.name]} in every block of "
                    "the resource")  # fmt: skip
        keys.append(_Key(f.name, kind, f.metadata.get("unit", "-"), default, doc, record=record,
                         allowed=_allowed(f.metadata)))  # fmt: skip
    return tuple(keys)


def family_keys(family: Family) -> tuple[_Key, ...]:
    """The keys of an agent of ``family`` (besides ``model`` and ``weight``), in the record's field order."""
    return _record_keys(family.params, family.required, frozenset(family.inherited), tuple(family.per_block.items()))


def nested_keys(nested: Nested) -> tuple[_Key, ...]:
    """The keys of one entry of a family's nested list (``[[agents.<name>.zones]]``)."""
    return _record_keys(nested.record, nested.required)


def model_keys(model: str) -> tuple[_Key, ...] | None:
    """Parameter keys of a registered family (None for a user-written model, whose keys are free)."""
    family = FAMILIES.get(model)
    return family_keys(family) if family is not None else None


# --------------------------------------------------------------------------------------------------------
# problem collection and value checks
# --------------------------------------------------------------------------------------------------------


class _Collector:
    def __init__(self, source: str) -> None:
        self.source = source
        self.problems: list[Problem] = []

    def add(self, table: str, key: str | None, expected: str, found: str) -> None:
        problem = Problem(self.source, table, key, expected, found)
        if problem not in self.problems:
            self.problems.append(problem)


def _unit(unit: str) -> str:
    return f" ({unit})" if unit and unit != "-" else ""


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _as_float(value: Any) -> float | None:
    """``value`` as a finite float, or None (not a number, NaN, infinite, too large for a float)."""
    if not _is_number(value):
        return None
    try:
        out = float(value)
    except OverflowError:
        return None
    return out if math.isfinite(out) else None


def _convert(col: _Collector, table: str, key: _Key, value: Any) -> tuple[bool, Any]:
    """Check the type of one value; returns ``(ok, converted value)`` and reports a problem if not ok."""
    u = _unit(key.unit)
    if key.kind == "number":
        out = _as_float(value)
        if out is None:
            col.add(table, key.name, f"a finite number{u}" if _is_number(value) else f"a number{u}", describe(value))
            return False, None
        return True, out
    if key.kind == "integer":
        if isinstance(value, int) and not isinstance(value, bool):
            return True, value
        col.add(table, key.name, "an integer", describe(value))
        return False, None
    if key.kind == "string":
        if isinstance(value, str):
            return True, value
        col.add(table, key.name, "a string", describe(value))
        return False, None
    if key.kind == "name":
        if isinstance(value, str) and _NAME.match(value):
            return True, value
        col.add(table, key.name, f"a resource name ({_NAME_RULE})", describe(value))
        return False, None
    if key.kind == "bool":
        if isinstance(value, bool):
            return True, value
        col.add(table, key.name, "true or false", describe(value))
        return False, None
    if key.kind == "choice":
        if isinstance(value, str) and value in key.choices:
            return True, value
        col.add(table, key.name, "one of " + ", ".join(f'"{c}"' for c in key.choices), describe(value))
        return False, None
    if key.kind in ("numbers", "price-list"):
        if key.kind == "price-list" and _is_number(value):
            out = _as_float(value)
            if out is not None:
                return True, out
        if isinstance(value, list | tuple) and all(_as_float(v) is not None for v in value):
            return True, tuple(float(v) for v in value)
        what = "a number or a list of finite numbers" if key.kind == "price-list" else "a list of finite numbers"
        col.add(table, key.name, what + u, describe(value))
        return False, None
    if key.kind == "table":
        if isinstance(value, dict):
            return True, dict(value)
        col.add(table, key.name, "a table", describe(value))
        return False, None
    if key.kind == "tables":
        if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            return True, value
        col.add(table, key.name, f"a non-empty array of tables ([[{table}.{key.name}]])", describe(value))
        return False, None
    raise AssertionError(key.kind)  # pragma: no cover


def _unknown_keys(col: _Collector, table: str, data: Mapping[str, Any], valid: list[str], what: str = "key") -> None:
    for name in data:
        if name not in valid:
            close = difflib.get_close_matches(str(name), valid, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            col.add(table, str(name), f"one of the {what}s " + ", ".join(valid), f"an unknown {what}{hint}")


def _check_table(
    col: _Collector, table: str, data: Mapping[str, Any], keys: tuple[_Key, ...], skip: frozenset[str] = frozenset()
) -> dict[str, Any]:
    """Unknown keys, missing required keys and value types of one table; returns the converted values."""
    _unknown_keys(col, table, data, [k.name for k in keys])
    out: dict[str, Any] = {}
    for key in keys:
        if key.name in skip:
            continue
        if key.name not in data:
            if key.default is REQUIRED:
                col.add(table, key.name, _expected_of(key), "nothing")
            continue
        ok, value = _convert(col, table, key, data[key.name])
        if ok:
            out[key.name] = value
    return out


def _expected_of(key: _Key) -> str:
    u = _unit(key.unit)
    return {
        "number": f"a number{u}",
        "integer": "an integer",
        "string": "a string",
        "bool": "true or false",
        "name": f"a resource name ({_NAME_RULE})",
        "numbers": f"a list of numbers{u}",
        "price-list": f"a number or a list of numbers{u}",
        "table": "a table",
        "tables": f"an array of tables ([[...{key.name}]])",
        "choice": "one of " + ", ".join(f'"{c}"' for c in key.choices),
    }[key.kind]


def _table(col: _Collector, data: Mapping[str, Any], name: str, path: str) -> dict[str, Any] | None:
    """``data[name]`` when it is a table; reports and returns None when it is something else."""
    if name not in data:
        return None
    value = data[name]
    if isinstance(value, dict):
        return value
    col.add(path, name, "a table", describe(value))
    return None

