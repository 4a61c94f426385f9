"""Capacity resources: shared by amount in time blocks, the summed shares of each block under its limit."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from negotiate.core.ranges import DURATION, MAX_BLOCKS, TIME, Range
from negotiate.errors import FieldError, check_field
from negotiate.resources.base import CouplingRow, Key, ResourceKind, SlotRow, register_kind

if TYPE_CHECKING:  # (the agent core imports CasADi; reading a fleet must not)
    from negotiate.core.agent import AgentModel

__all__ = ["BLOCK_LIMIT", "CapacityResource"]


BLOCK_LIMIT = Range(0.0, 1e12)
"""Allowed limit of a capacity block, in the resource's unit (W for power: up to 1 TW)."""


@register_kind
@dataclass(frozen=True)
class CapacityResource(ResourceKind):
    """A resource shared by amount in time blocks (a grid connection's power).

    Its users' parameters are shares, one per block (``SlotParam`` kind ``"share"`` with its ``block``); the
    coupling rows are ``sum_i share_ij <= limit_j`` for every block ``j`` with a user.

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

    kind = "capacity"
    about = "A resource shared by amount in time blocks."
    keys: ClassVar[tuple[Key, ...]] = (
        Key("limits", "numbers", "W", "limit of the summed shares in each time block; its length is the number "
            "of blocks", allowed=f"each {BLOCK_LIMIT.interval}; 1 to {MAX_BLOCKS} entries", required=True),
        Key("start", "number", "s", "start of the first block", allowed=TIME.interval),
        Key("block_length", "number", "s", "length of each block", allowed=DURATION.interval),
        Key("unit", "string", "-", "unit of the limits and shares (the built-in capacity model shares power, W)"),
    )  # fmt: skip
    params = frozenset({"share"})
    needs_order = False
    chart = "shares"

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
        check_field(owner, "limits", bad[0] if bad else None, not bad, f"made of numbers {BLOCK_LIMIT}")
        check_field(owner, "start", self.start, self.start in TIME, str(TIME))
        check_field(owner, "block_length", self.block_length, self.block_length in DURATION, str(DURATION))

    @property
    def blocks(self) -> int:
        """Number of time blocks."""
        return len(self.limits)

    def coupling_rows(self, agents: Sequence[AgentModel], order: Sequence[str]) -> list[CouplingRow]:
        rows = []
        for j, limit in enumerate(self.limits):
            coef = {(i, k): 1.0 for i, a in enumerate(agents) for k, q in enumerate(a.params)
                    if q.resource == self.name and q.kind == "share" and q.block == j}  # fmt: skip
            if coef:
                rows.append(CouplingRow(coef, float(limit), f"{self.name}: shares in block {j} <= limit"))
        return rows

    def schedule_rows(self, agent: AgentModel, p: np.ndarray, grad: np.ndarray, draw: np.ndarray) -> list[SlotRow]:
        rows = []
        for k, q in enumerate(agent.params):
            if q.resource == self.name and q.kind == "share" and q.block is not None:
                t0 = self.start + q.block * self.block_length
                rows.append(SlotRow(k, t0, t0 + self.block_length, float(p[k]), d_share=float(grad[k]),
                                    draw=float(draw[k])))  # fmt: skip
        return rows

    def table_rows(self) -> list[dict[str, Any]]:
        return [
            {"block": k, "start_s": self.start + k * self.block_length,
             "end_s": self.start + k * self.block_length + self.block_length, "limit": lim, "unit": self.unit}
            for k, lim in enumerate(self.limits)
        ]  # fmt: skip

    def describe(self, num: Callable[[float], str] = "{:g}".format) -> str:
        return (f"capacity, {self.blocks} blocks of {num(self.block_length)} s from {num(self.start)} s, limits in "
                f"{self.unit}")  # fmt: skip

    @classmethod
    def report_title(cls, rows: Sequence[Any]) -> str:
        return f"capacity, {len(rows)} blocks"
