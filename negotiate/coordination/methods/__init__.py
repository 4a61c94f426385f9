"""Coordination methods: the protocol (:mod:`.base`) and the built-ins, one module each -- projected gradient
(:mod:`.gradient`), proximal bundle (:mod:`.bundle`) and projected Newton (:mod:`.newton`). Importing this
package registers the built-ins; :func:`method_class` and :func:`method_names` look methods up by name."""

from __future__ import annotations

from negotiate.coordination.methods import bundle, gradient, newton  # noqa: F401  (registers the built-ins)
from negotiate.coordination.methods.base import (
    _METHODS,
    AgentReport,
    Evaluation,
    Method,
    Proposal,
    method_options,
    option,
    option_problems,
    options_table,
    register_method,
)

__all__ = [
    "AgentReport",
    "Evaluation",
    "Method",
    "Proposal",
    "method_class",
    "method_names",
    "method_options",
    "option",
    "option_problems",
    "options_table",
    "register_method",
]


def method_class(name: str) -> type[Method]:
    """The method registered under ``name``; a ``ValueError`` naming the registered ones when there is none."""
    if name not in _METHODS:
        raise ValueError(f"unknown coordination method {name!r}; expected one of {sorted(_METHODS)}")
    return _METHODS[name]


def method_names() -> list[str]:
    return sorted(_METHODS)
