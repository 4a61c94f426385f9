"""Typed description of a fleet: shared resources, agents and coordinator settings (no CasADi here).

These plain frozen records are what the fleet-file parser (:mod:`negotiate.fleet`) produces and what the
coupling layer and the coordinator consume. They hold numbers in SI units and names; building the agents'
NLPs from them is the model library's job.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

__all__ = [
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

ORDER_RULES = ("fcfs", "swap", "exhaustive")
"""How the order of users on an exclusive resource is chosen: first-come-first-served by free optimum,
that followed by improving neighbour swaps, or exhaustive search (small resources only)."""


@dataclass(frozen=True)
class ExclusiveResource:
    """A resource used by one agent at a time (a single-lane bridge, a furnace, a crossing).

    Attributes
    ----------
    name : str
        Resource name, unique in the fleet.
    gap : float
        Smallest time between one user's exit and the next user's entry, s (headway or changeover).
    """

    name: str
    gap: float = 0.0

    def __post_init__(self) -> None:
        if not (isinstance(self.gap, int | float) and math.isfinite(self.gap) and self.gap >= 0):
            raise ValueError(f"resource {self.name!r}: 'gap' must be a finite number >= 0 s, got {self.gap!r}")


@dataclass(frozen=True)
class CapacityResource:
    """A resource shared by amount in time blocks (a grid connection's power).

    Attributes
    ----------
    name : str
        Resource name, unique in the fleet.
    limits : tuple of float
        Limit of the summed shares in each block, in ``unit`` (W for power); its length is the number of
        blocks.
    start : float
        Start of the first block, s.
    block_length : float
        Length of each block, s.
    unit : str
        Unit of the shares and limits.
    """

    name: str
    limits: tuple[float, ...]
    start: float = 0.0
    block_length: float = 900.0
    unit: str = "W"

    def __post_init__(self) -> None:
        object.__setattr__(self, "limits", tuple(float(v) for v in self.limits))
        if not self.limits or any(not math.isfinite(v) or v < 0 for v in self.limits):
            raise ValueError(
                f"resource {self.name!r}: 'limits' must be a non-empty list of finite numbers >= 0, "
                f"got {list(self.limits)!r}"
            )
        if not (math.isfinite(self.block_length) and self.block_length > 0):
            raise ValueError(f"resource {self.name!r}: 'block_length' must be > 0 s, got {self.block_length!r}")

    @property
    def blocks(self) -> int:
        """Number of time blocks."""
        return len(self.limits)


Resource = ExclusiveResource | CapacityResource


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
    order : {"fcfs", "swap", "exhaustive"}
        How the order of users of each exclusive resource is chosen.
    guard : bool
        Whether the nonsmooth guard is on (one-sided gradients where weakly active constraints are reported).
    options : dict
        Method-specific options (documented with each method).
    """

    method: str = "bundle"
    max_rounds: int = 60
    tolerance: float = 1e-6
    order: Literal["fcfs", "swap", "exhaustive"] = "fcfs"
    guard: bool = True
    options: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not (isinstance(self.max_rounds, int) and self.max_rounds >= 1):
            raise ValueError(f"coordinator: 'max_rounds' must be an integer >= 1, got {self.max_rounds!r}")
        if not (isinstance(self.tolerance, int | float) and self.tolerance > 0):
            raise ValueError(f"coordinator: 'tolerance' must be a number > 0, got {self.tolerance!r}")
        if self.order not in ORDER_RULES:
            raise ValueError(f"coordinator: 'order' must be one of {list(ORDER_RULES)}, got {self.order!r}")


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
