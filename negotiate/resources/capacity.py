"""Capacity resources: shared by amount in time blocks, the summed shares of each block under its limit."""

from __future__ import annotations

from dataclasses import dataclass

from negotiate.core.ranges import DURATION, MAX_BLOCKS, TIME, Range
from negotiate.errors import FieldError, check_field

__all__ = ["BLOCK_LIMIT", "CapacityResource"]


BLOCK_LIMIT = Range(0.0, 1e12)
"""Allowed limit of a capacity block, in the resource's unit (W for power: up to 1 TW)."""

_check = check_field


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
        owner = f"resource {self.name!r}"
        if not 1 <= len(self.limits) <= MAX_BLOCKS:
            raise FieldError(owner, "limits", f"a list of 1 to {MAX_BLOCKS} entries", f"{len(self.limits)} entries")
        bad = [v for v in self.limits if v not in BLOCK_LIMIT]
        _check(owner, "limits", bad[0] if bad else None, not bad, f"made of numbers {BLOCK_LIMIT}")
        _check(owner, "start", self.start, self.start in TIME, str(TIME))
        _check(owner, "block_length", self.block_length, self.block_length in DURATION, str(DURATION))

    @property
    def blocks(self) -> int:
        """Number of time blocks."""
        return len(self.limits)
