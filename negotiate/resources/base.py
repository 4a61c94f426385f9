"""What a kind of shared resource declares, and the registry of kinds.

A kind is a frozen dataclass record (the resource as written in a fleet file) that subclasses
:class:`ResourceKind` and is registered with :func:`register_kind`. The record owns everything that differs
from one kind to another, so that no other module tells kinds apart:

* ``kind`` (the fleet file's ``kind = "..."``), ``about`` (one line for the docs) and ``keys`` (its other
  fleet-file keys, with unit and meaning; defaults are the record's field defaults). A record refuses a bad
  field with :class:`~negotiate.errors.FieldError`.
* ``params``: the :class:`~negotiate.core.agent.SlotParam` kinds of the agents' parameters on it, and
  ``needs_order``: whether its users take turns in an order that the coordinator chooses (then
  :meth:`ResourceKind.first_come_order` gives the first-come-first-served one).
* :meth:`ResourceKind.coupling_rows`: its rows ``sum coef * p <= rhs`` of the coupling polyhedron for a
  fixed order.
* :meth:`ResourceKind.schedule_rows`: an agent's rows of the schedule on it; :meth:`ResourceKind.table_rows`:
  its rows of the run's resource table; :meth:`ResourceKind.describe`: one line for the fleet check.
* ``chart`` (``"slots"``: a timeline of entries and exits, ``"shares"``: amounts per time block) and
  :meth:`ResourceKind.report_title`: how the report draws and names it. The drawing itself lives with the
  report, which looks kinds up here by name.

Adding a kind is one module that defines such a record, decorates it with :func:`register_kind` and is
imported before a fleet is read (``docs/extend.md`` walks through :mod:`negotiate.resources.dwell`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar, TypeVar

import numpy as np

if TYPE_CHECKING:  # (the agent core imports CasADi; reading a fleet must not)
    from negotiate.core.agent import AgentModel


__all__ = [
    "KINDS",
    "CouplingRow",
    "Key",
    "ResourceKind",
    "SlotRow",
    "kind_named",
    "param_index",
    "register_kind",
]


@dataclass(frozen=True)
class Key:
    """One fleet-file key of a kind (besides ``kind``): its value type, SI unit and meaning.

    ``type`` is ``"number"``, ``"numbers"`` (a list of numbers) or ``"string"``; ``required`` keys have no
    default; ``allowed`` says the allowed values for the docs. The default is the record field's default.
    """

    name: str
    type: str
    unit: str
    doc: str
    allowed: str = ""
    required: bool = False


@dataclass(frozen=True)
class CouplingRow:
    """One row ``sum(coef[i, k] * p_ik) <= rhs`` of the coupling polyhedron.

    ``coef`` maps ``(agent index, parameter index)`` (indices into the agents as given and into each
    agent's ``params``) to a coefficient; ``rhs`` is in the parameters' unit; ``label`` names the rule for
    messages (``"bridge: truck-01 leaves + gap <= truck-02 enters"``).
    """

    coef: Mapping[tuple[int, int], float]
    rhs: float
    label: str


@dataclass(frozen=True)
class SlotRow:
    """One row of an agent's schedule on a resource: ``enter``/``leave`` in s (for a share: its block's start
    and end), ``share`` and ``draw`` in the resource's unit, ``d_*`` the agent's value gradient w.r.t. each
    (cost per unit); ``nan`` where a field does not apply. ``first`` is the index of the agent's first
    parameter in the row (rows are listed in that order)."""

    first: int
    enter: float
    leave: float
    share: float = math.nan
    d_enter: float = math.nan
    d_leave: float = math.nan
    d_share: float = math.nan
    draw: float = math.nan


def param_index(agent: AgentModel, resource: str, kind: str) -> int:
    """Index of the agent's parameter of ``kind`` (``"enter"``, ``"leave"``) on ``resource``."""
    for k, q in enumerate(agent.params):
        if q.resource == resource and q.kind == kind:
            return k
    raise ValueError(f"agent {agent.name!r} has no '{kind}' parameter for resource {resource!r}")


class ResourceKind:
    """Base of every resource record; see the module docstring for what a kind declares.

    Subclasses are frozen dataclasses with a ``name`` field first (the resource name, unique in a fleet).
    """

    kind: ClassVar[str]
    about: ClassVar[str]
    keys: ClassVar[tuple[Key, ...]] = ()
    params: ClassVar[frozenset[str]]
    needs_order: ClassVar[bool] = False
    chart: ClassVar[str] = "slots"

    name: str

    def users(self, agents: Sequence[AgentModel]) -> list[str]:
        """Names of the agents with a parameter on this resource, in the order given."""
        return [a.name for a in agents if any(q.resource == self.name and q.kind in self.params for q in a.params)]

    def first_come_order(self, agents: Sequence[AgentModel]) -> list[str]:
        """Users sorted by the entry time of their free optimum (first come, first served)."""
        users = set(self.users(agents))
        keyed = [(a.free_optimum[param_index(a, self.name, "enter")], a.name) for a in agents if a.name in users]
        return [name for _t, name in sorted(keyed)]

    def coupling_rows(self, agents: Sequence[AgentModel], order: Sequence[str]) -> list[CouplingRow]:
        """Rows of the coupling polyhedron; ``order`` lists the users in turn (empty unless ``needs_order``)."""
        raise NotImplementedError

    def schedule_rows(self, agent: AgentModel, p: np.ndarray, grad: np.ndarray, draw: np.ndarray) -> list[SlotRow]:
        """The agent's schedule rows on this resource, from its parameters ``p``, value gradient ``grad`` and
        planned draw (``nan`` where its model does not say), each indexed like ``agent.params``."""
        raise NotImplementedError

    def table_rows(self) -> list[dict[str, Any]]:
        """Rows of the run's resource table, by column (``gap_s``, ``block``, ``start_s``, ``end_s``,
        ``limit``, ``unit``); a column left out is empty."""
        raise NotImplementedError

    def describe(self, num: Callable[[float], str] = "{:g}".format) -> str:
        """One line for the fleet check, numbers written with ``num``, e.g. ``"exclusive, gap 5 s"``."""
        raise NotImplementedError

    @classmethod
    def report_title(cls, rows: Sequence[Any]) -> str:
        """Heading words of the report's chart of one resource, from its table rows read back (objects with
        the columns of :meth:`table_rows` as attributes), e.g. ``"exclusive, gap 5 s"``."""
        raise NotImplementedError


K = TypeVar("K", bound=type[ResourceKind])

KINDS: dict[str, type[ResourceKind]] = {}
"""Registered kinds by their fleet-file name, in the order they were registered."""


def register_kind(cls: K) -> K:
    """Class decorator: make a :class:`ResourceKind` record available under its ``kind`` name."""
    if not (isinstance(cls, type) and issubclass(cls, ResourceKind)):
        raise TypeError(f"{cls!r} is not a subclass of ResourceKind")
    name = cls.__dict__.get("kind")
    if not isinstance(name, str) or not name:
        raise TypeError(f"{cls.__name__} declares no 'kind' name of its own")
    known = KINDS.get(name)
    if known is not None and known is not cls and known.__qualname__ != cls.__qualname__:
        raise ValueError(f"resource kind {name!r} is already registered by {known.__module__}.{known.__qualname__}")
    KINDS[name] = cls
    return cls


def kind_named(name: str) -> type[ResourceKind]:
    """The registered kind called ``name``; a :class:`KeyError` naming the known ones otherwise."""
    try:
        return KINDS[name]
    except KeyError:
        raise KeyError(f"no resource kind {name!r}; known kinds: {', '.join(KINDS)}") from None

