"""Exclusive resources: used by one agent at a time, with a gap between users (headway, changeover)."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from negotiate.core.ranges import DURATION, Range
from negotiate.errors import check_field
from negotiate.resources.base import CouplingRow, Key, ResourceKind, SlotRow, param_index, register_kind

if TYPE_CHECKING:  # (the agent core imports CasADi; reading a fleet must not)
    from negotiate.core.agent import AgentModel

__all__ = ["GAP", "ExclusiveResource"]


GAP = Range(0.0, DURATION.hi)
"""Allowed gap (headway, changeover) of an exclusive resource, s."""


@register_kind
@dataclass(frozen=True)
class ExclusiveResource(ResourceKind):
    """A resource used by one agent at a time (a single-lane bridge, a furnace, a crossing).

    Its users take turns in an order; for the order ``a_1, a_2, ...`` the coupling rows are
    ``leave(a_k) + gap <= enter(a_{k+1})``.

    Attributes
    ----------
    name : str
        Resource name, unique in the fleet.
    gap : float
        Smallest time between one user's exit and the next user's entry, s (headway or changeover).
    """

    kind = "exclusive"
    about = "A resource used by one agent at a time."
    keys: ClassVar[tuple[Key, ...]] = (
        Key("gap", "number", "s", "smallest time between one user's exit and the next user's entry (headway or "
            "changeover)", allowed=GAP.interval),
    )  # fmt: skip
    params = frozenset({"enter", "leave"})
    needs_order = True
    chart = "slots"

    name: str
    gap: float = 0.0

    def __post_init__(self) -> None:
        check_field(f"resource {self.name!r}", "gap", self.gap, self.gap in GAP, str(GAP))

    def coupling_rows(self, agents: Sequence[AgentModel], order: Sequence[str]) -> list[CouplingRow]:
        by_name = {a.name: i for i, a in enumerate(agents)}
        rows = []
        for u0, u1 in zip(order, order[1:], strict=False):
            i0, i1 = by_name[u0], by_name[u1]
            coef = {(i0, param_index(agents[i0], self.name, "leave")): 1.0,
                    (i1, param_index(agents[i1], self.name, "enter")): -1.0}  # fmt: skip
            rows.append(CouplingRow(coef, -float(self.gap), f"{self.name}: {u0} leaves + gap <= {u1} enters"))
        return rows

    def schedule_rows(self, agent: AgentModel, p: np.ndarray, grad: np.ndarray, draw: np.ndarray) -> list[SlotRow]:
        ke, kl = param_index(agent, self.name, "enter"), param_index(agent, self.name, "leave")
        first = min(ke, kl)
        return [SlotRow(first, float(p[ke]), float(p[kl]), d_enter=float(grad[ke]), d_leave=float(grad[kl]))]

    def table_rows(self) -> list[dict[str, Any]]:
        return [{"gap_s": self.gap, "unit": "s"}]

    def describe(self, num: Callable[[float], str] = "{:g}".format) -> str:
        return f"exclusive, gap {num(self.gap)} s"

    @classmethod
    def report_title(cls, rows: Sequence[Any]) -> str:
        return f"exclusive, gap {rows[0].gap_s:g} s"
