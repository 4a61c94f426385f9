"""Exclusive resources: used by one agent at a time, with a gap between users (headway, changeover)."""

from __future__ import annotations

from dataclasses import dataclass

from negotiate.core.ranges import DURATION, Range
from negotiate.errors import check_field

__all__ = ["GAP", "ExclusiveResource"]


GAP = Range(0.0, DURATION.hi)
"""Allowed gap (headway, changeover) of an exclusive resource, s."""

_check = check_field


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
        _check(f"resource {self.name!r}", "gap", self.gap, self.gap in GAP, str(GAP))
