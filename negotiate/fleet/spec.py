"""Typed description of a fleet: shared resources, agents and coordinator settings (no CasADi here).

These plain frozen records are what the fleet-file parser (:mod:`negotiate.fleet`) produces and what the
coupling layer and the coordinator consume. They hold numbers in SI units and names; building the agents'
NLPs from them is the model library's job.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

from negotiate.core.ranges import Range
from negotiate.errors import FieldError, check_field
from negotiate.resources import Resource
from negotiate.resources.capacity import BLOCK_LIMIT, CapacityResource
from negotiate.resources.exclusive import GAP, ExclusiveResource

__all__ = [
    "BLOCK_LIMIT",
    "GAP",
    "MAX_ROUNDS",
    "TOLERANCE",
    "WEIGHT",
    "AgentSpec",
    "CapacityResource",
    "CoordinatorSettings",
    "ExclusiveResource",
    "FleetSpec",
    "METHODS",
    "ORDER_RULES",
    "Resource",
]

METHODS = ("bundle", "gradient", "newton")
"""Names of the built-in coordination methods."""

ORDER_RULES = ("fcfs", "swap", "exhaustive", "master")
"""How the order of users on an exclusive resource is chosen: first-come-first-served by free optimum,
that followed by improving neighbour swaps, exhaustive search (small resources only), or the order master
(a mixed-integer program over the agents' value cuts, with a bound on the best order's total)."""


MAX_ROUNDS = Range(1, 10_000)
"""Allowed ``max_rounds`` of the coordinator."""
TOLERANCE = Range(0.0, 0.1, lo_open=True, hi_open=True)
"""Allowed stopping tolerance (relative): a tolerance of 0.1 or more would stop before any real progress."""
WEIGHT = Range(0.0, 1e6, lo_open=True)
"""Allowed weight of an agent's cost in the fleet total (dimensionless)."""



@dataclass(frozen=True)
class CoordinatorSettings:
    """How the upper level is run.

    Attributes
    ----------
    method : {"bundle", "gradient", "newton"}
        Coordination method (or the name of a registered user method).
    max_rounds : int
        Largest number of coordination rounds (one round = one solve of every agent).
    tolerance : float
        Stopping tolerance on the method's stopping measure, relative to ``max(1, |total cost|)``.
    order : {"fcfs", "swap", "exhaustive", "master"}
        How the order of users of each exclusive resource is chosen.
    guard : bool
        Whether the nonsmooth guard is on (one-sided gradients where weakly active constraints are reported).
    options : dict
        Method-specific options (documented with each method).
    order_options : dict
        Options of the order rule (``[coordinator.order_options]``: budgets of the order search, documented
        with each rule in docs/methods.md).
    """

    method: str = "bundle"
    max_rounds: int = 60
    tolerance: float = 1e-6
    order: Literal["fcfs", "swap", "exhaustive", "master"] = "fcfs"
    guard: bool = True
    options: dict[str, Any] = field(default_factory=dict)
    order_options: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        rounds_ok = isinstance(self.max_rounds, int) and self.max_rounds in MAX_ROUNDS
        check_field("coordinator", "max_rounds", self.max_rounds, rounds_ok, f"an integer {MAX_ROUNDS}")
        check_field("coordinator", "tolerance", self.tolerance, self.tolerance in TOLERANCE, str(TOLERANCE))
        if self.order not in ORDER_RULES:
            raise FieldError("coordinator", "order", f"one of {list(ORDER_RULES)}", repr(self.order))


@dataclass(frozen=True)
class AgentSpec:
    """One agent as the fleet file describes it.

    Attributes
    ----------
    name : str
        Agent name, unique in the fleet.
    model : str
        Model family name (``"vehicle"``, ``"machine"``, ``"capacity"``) or ``"module:function"`` import
        path of a user-written builder.
    params : object
        The family's parameter record (e.g. :class:`agents.params.VehicleParams`), or a dict of keyword
        arguments for a user-written builder.
    weight : float
        Weight of the agent's cost in the fleet total (dimensionless, > 0).
    """

    name: str
    model: str
    params: Any
    weight: float = 1.0


@dataclass(frozen=True)
class FleetSpec:
    """A whole fleet: resources, agents and coordinator settings, plus where it was read from and what it
    describes."""

    name: str
    resources: tuple[Resource, ...]
    agents: tuple[AgentSpec, ...]
    coordinator: CoordinatorSettings = field(default_factory=CoordinatorSettings)
    source: str = "<memory>"
    description: str = ""

    def resource(self, name: str) -> Resource:
        """The resource called ``name`` (KeyError if there is none)."""
        for r in self.resources:
            if r.name == name:
                return r
        raise KeyError(name)
