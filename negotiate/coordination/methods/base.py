"""The method protocol: what a coordination method receives each round, what it returns, its declared options
and the registry of methods by name (see :mod:`negotiate.coordination.engine` for how the engine drives it)."""

from __future__ import annotations

import math
import warnings
from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import MISSING, dataclass, field, fields
from typing import Any, ClassVar

import numpy as np

from negotiate.core.guard import GuardReport
from negotiate.core.kkt import Certificate
from negotiate.core.nlp import LocalResult
from negotiate.core.ranges import Range
from negotiate.core.status import Status
from negotiate.fleet.spec import CoordinatorSettings
from negotiate.resources.coupling import FeasibleSet

__all__ = [
    "AgentReport",
    "Evaluation",
    "Method",
    "Proposal",
    "declared_problems",
    "declared_table",
    "declared_values",
    "method_options",
    "option",
    "option_problems",
    "options_table",
    "register_method",
]


@dataclass(frozen=True)
class AgentReport:
    """What one agent said at its parameters ``p`` (value in the agent's cost unit, gradient per unit p)."""

    name: str
    p: np.ndarray
    value: float
    gradient: np.ndarray | None
    status: Status
    certificate: Certificate | None
    guard: GuardReport | None
    result: LocalResult = field(repr=False)
    hessian: np.ndarray | None = None

    @property
    def ok(self) -> bool:
        return self.gradient is not None

    @property
    def flagged(self) -> bool:
        return self.guard is not None

    @property
    def gradients(self) -> list[np.ndarray]:
        """The plain gradient followed by the guard's one-sided gradients (empty when the solve failed)."""
        if self.gradient is None:
            return []
        extra = list(self.guard.gradients) if self.guard else []
        return [self.gradient, *extra]


@dataclass(frozen=True)
class Evaluation:
    """All agents' reports at one stacked point ``P``."""

    P: np.ndarray
    reports: tuple[AgentReport, ...]
    weights: np.ndarray
    feasible: FeasibleSet = field(repr=False)
    solves: int = 0

    @property
    def ok(self) -> bool:
        """Whether every agent converged (only then are ``total`` and ``gradient`` meaningful)."""
        return all(r.ok for r in self.reports)

    @property
    def values(self) -> np.ndarray:
        return np.array([r.value for r in self.reports])

    @property
    def total(self) -> float:
        """Weighted total cost (``inf`` when an agent failed)."""
        return float(self.weights @ self.values) if self.ok else float("inf")

    @property
    def gradient(self) -> np.ndarray:
        """Stacked weighted value gradient (only when ``ok``)."""
        if not self.ok:
            raise ValueError("the gradient of a failed evaluation must not be used")
        return self.feasible.layout.stack([w * r.gradient for w, r in zip(self.weights, self.reports, strict=True)])

    @property
    def flagged(self) -> list[str]:
        return [r.name for r in self.reports if r.flagged]

    @property
    def failed(self) -> list[str]:
        return [r.name for r in self.reports if not r.ok]


@dataclass(frozen=True)
class Proposal:
    """A method's answer to one evaluation."""

    point: np.ndarray | None
    measure: float
    converged: bool = False
    note: str = ""


class Method(ABC):
    """Base class of coordination methods (see the module docstring for the protocol)."""

    name: ClassVar[str] = "method"
    wants_hessian: ClassVar[bool] = False
    """Set to True to receive each smooth agent's value Hessian in ``AgentReport.hessian``."""
    Options: ClassVar[type | None] = None
    """A dataclass declaring the method's options (see the module docstring); ``None``: unchecked."""

    def __init__(self, feasible: FeasibleSet, settings: CoordinatorSettings) -> None:
        self.feasible = feasible
        self.settings = settings
        self.options = method_options(type(self), settings.options)
        self.incumbent: Evaluation | None = None

    @abstractmethod
    def start(self, first: Evaluation) -> None:
        """Receive the evaluation at the starting point."""

    @abstractmethod
    def propose(self, latest: Evaluation) -> Proposal:
        """Receive the evaluation of the previous proposal; return the next one."""

    def tolerance_reached(self, measure: float) -> bool:
        return measure <= self.settings.tolerance


def option(default: Any, doc: str, allowed: Range | None = None) -> Any:
    """A field of an ``Options`` dataclass (a method's or an order rule's): its default, one line saying what
    it does and, for a number, the values it may take (a :class:`~negotiate.core.ranges.Range`)."""
    meta: dict[str, Any] = {"doc": doc}
    if allowed is not None:
        meta["range"] = allowed
    return field(default=default, metadata=meta)


_TYPE_NAMES = {bool: "true or false", int: "an integer", float: "a finite number", str: "a string"}


def _option_type(f: Any) -> type:
    # ``from __future__ import annotations`` leaves the annotation as a string.
    t = f.type if isinstance(f.type, type) else {"bool": bool, "int": int, "float": float, "str": str}.get(f.type)
    if t is None:
        raise TypeError(f"option {f.name!r}: type {f.type!r} is not one of bool, int, float, str")
    return t


def _fits(t: type, value: Any) -> bool:
    if t is bool:
        return isinstance(value, bool)
    if t is int:
        return isinstance(value, int) and not isinstance(value, bool)
    if t is float:
        return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)
    return isinstance(value, t)


def _expected(f: Any) -> str:
    rng = f.metadata.get("range")
    return _TYPE_NAMES[_option_type(f)] + (f" {rng}" if rng is not None else "")


def declared_problems(options: type | None, owner: str, given: Mapping[str, Any]) -> list[tuple[str, str, Any]]:
    """The keys of ``given`` that the ``options`` dataclass does not accept, as ``(key, expected, found
    value)``: unknown keys, values of the wrong type (``true``/``false`` for a switch, an integer for a count,
    a finite number for a real) and numbers outside the option's range. ``owner`` names whose options they
    are in the message ("the bundle method's"). Empty when ``options`` is ``None``."""
    if options is None:
        return []
    declared = {f.name: f for f in fields(options)}
    out: list[tuple[str, str, Any]] = []
    for key, value in given.items():
        f = declared.get(key)
        if f is None:
            names = ", ".join(declared) or "none"
            out.append((key, f"one of {owner} options ({names})", value))
        elif not _fits(_option_type(f), value) or (f.metadata.get("range") is not None
                                                    and value not in f.metadata["range"]):  # fmt: skip
            out.append((key, _expected(f), value))
    return out


def declared_values(options: type | None, owner: str, given: Mapping[str, Any], stacklevel: int = 4) -> dict[str, Any]:
    """Every option of the ``options`` dataclass (defaults filled in) as a plain dict; what
    :func:`declared_problems` refuses is dropped with a warning naming ``owner``. Without ``options``,
    ``given`` unchanged."""
    if options is None:
        return dict(given)
    bad = declared_problems(options, f"the {owner}'s", given)
    for key, expected, value in bad:
        warnings.warn(f"{owner}: option {key!r} expected {expected}, got {value!r}; ignored", UserWarning,
                      stacklevel=stacklevel)  # fmt: skip
    refused = {key for key, _, _ in bad}
    out = {}
    for f in fields(options):
        if f.name in given and f.name not in refused:
            value = given[f.name]
            out[f.name] = float(value) if _option_type(f) is float else value
        elif f.default is not MISSING:
            out[f.name] = f.default
        elif f.default_factory is not MISSING:
            out[f.name] = f.default_factory()
        else:
            raise TypeError(f"option {f.name!r} of {options.__name__} has no default: give it one")
    return out


def declared_table(options: type | None, owner: str) -> str:
    """The Markdown table of an ``Options`` dataclass (key, type, default, meaning; and the allowed values
    when an option declares a range)."""
    if options is None or not fields(options):
        return f"The {owner} declares no options."
    ranged = any(f.metadata.get("range") is not None for f in fields(options))  # an "allowed" column
    rows = ["| key | type | default | allowed | meaning |", "|---|---|---|---|---|"] if ranged else [
        "| key | type | default | meaning |", "|---|---|---|---|"]  # fmt: skip
    for f in fields(options):
        t = _option_type(f)
        default = ("true" if f.default else "false") if t is bool else repr(f.default)
        rng = f.metadata.get("range")
        allowed = f" {rng.interval if rng is not None else ''} |" if ranged else ""
        rows.append(f"| `{f.name}` | {t.__name__} | {default} |{allowed} {f.metadata.get('doc', '')} |")
    return "\n".join(rows)


def option_problems(cls: type[Method], given: Mapping[str, Any]) -> list[tuple[str, str, Any]]:
    """The keys of ``given`` that ``cls`` does not accept, as ``(key, expected, found value)``
    (:func:`declared_problems` of ``cls.Options``). Empty when ``cls.Options`` is ``None``."""
    return declared_problems(cls.Options, f"the {cls.name} method's", given)


def method_options(cls: type[Method], given: Mapping[str, Any]) -> dict[str, Any]:
    """Every option of ``cls`` (defaults filled in) as a plain dict; what :func:`option_problems` refuses
    is dropped with a warning. A method without ``Options`` gets ``given`` unchanged."""
    return declared_values(cls.Options, f"coordination method {cls.name!r}", given, stacklevel=5)


def options_table(cls: type[Method]) -> str:
    """The Markdown table of a method's options (key, type, default, allowed values, meaning), as
    docs/methods.md shows it."""
    if cls.Options is None:
        return f"The {cls.name} method declares no options."
    return declared_table(cls.Options, f"{cls.name} method")


_METHODS: dict[str, type[Method]] = {}


def register_method(cls: type[Method]) -> type[Method]:
    """Register a :class:`Method` subclass under ``cls.name`` (usable as a decorator)."""
    if not (isinstance(cls, type) and issubclass(cls, Method)):
        raise TypeError(f"a coordination method must subclass negotiate.coordination.engine.Method, got {cls!r}")
    _METHODS[cls.name] = cls
    return cls
