"""Fuzz test of the fleet parser: any mutation of a valid fleet gives a FleetSpec or a FleetError, nothing else.

Parsing only (no NLP is built in the loop), with a bounded number of examples so the test stays fast.
"""

from __future__ import annotations

import copy
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_fleet import small_fleet

from negotiate.errors import FleetError
from negotiate.fleet.parse import parse_fleet
from negotiate.fleet.spec import FleetSpec

BAD_VALUES = [
    -1,
    -1.0,
    0,
    0.0,
    -1e308,
    1e308,
    10**400,
    -(10**400),
    float("nan"),
    float("inf"),
    float("-inf"),
    "",
    "km",
    "bridge",
    True,
    False,
    None,
    [],
    [1.0, "a"],
    [{}],
    {},
    {"x": 1},
    [[1.0]],
    2**63,
    1e-320,
]


def _paths(obj: Any, prefix: tuple = ()) -> list[tuple]:
    """Every path to a value inside nested dicts and lists (the root excluded)."""
    out = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.append(prefix + (k,))
            out.extend(_paths(v, prefix + (k,)))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            out.append(prefix + (i,))
            out.extend(_paths(v, prefix + (i,)))
    return out


def _parent(data: Any, path: tuple) -> Any:
    for p in path[:-1]:
        data = data[p]
    return data


def _mutate(data: dict, choice: int, op: str, value: Any, name: str) -> None:
    paths = _paths(data)
    if not paths:
        return
    path = paths[choice % len(paths)]
    value = copy.deepcopy(value)  # the pool's lists and tables must not be shared between examples
    parent, last = _parent(data, path), path[-1]
    if op == "delete":
        del parent[last]
    elif op == "replace":
        parent[last] = value
    elif op == "add-key":
        target = parent[last] if isinstance(parent[last], dict) else parent
        if isinstance(target, dict):
            target[name] = value
    elif op == "rename" and isinstance(parent, dict):
        parent[name] = parent.pop(last)
    elif op == "rename-resource" and data.get("resources") and isinstance(data["resources"], dict):
        keys = list(data["resources"])
        data["resources"][name] = data["resources"].pop(keys[choice % len(keys)])


mutation = st.tuples(
    st.integers(min_value=0, max_value=10_000),
    st.sampled_from(["delete", "replace", "replace", "add-key", "rename", "rename-resource"]),
    st.one_of(st.sampled_from(BAD_VALUES), st.floats(allow_nan=True), st.integers(), st.text(max_size=5)),
    st.sampled_from(["bridge", "grid", "oven", "model", "kind", "zones", "unknown", "truck-01", "a b", "x"]),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(mutation, min_size=1, max_size=4))
def test_parse_only_raises_fleet_error(mutations):
    """Deleting keys, adding unknown ones, wrong types, negative / huge / NaN values, renamed resources:
    parse_fleet returns a spec or raises FleetError, never any other exception."""
    data = copy.deepcopy(small_fleet())
    for m in mutations:
        _mutate(data, *m)
    try:
        spec = parse_fleet(data, "fuzz.toml")
    except FleetError as exc:
        assert exc.problems and all(p.file == "fuzz.toml" for p in exc.problems)
        assert str(exc).count("\n") == len(exc.problems) - 1
    else:
        assert isinstance(spec, FleetSpec)
