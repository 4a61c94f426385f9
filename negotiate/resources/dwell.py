"""Dwell zones: exclusive resources where every user stays at least a minimum time (a weighbridge, a
wash bay, an inspection stand).

The rule is the exclusive one (users take turns, a gap between them) plus, for every user ``a``, the row
``enter(a) - leave(a) <= -min_dwell``: a slot shorter than the minimum dwell is not a use of the zone.
A worked example of adding a resource kind (``docs/extend.md``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

from negotiate.errors import check_field
from negotiate.resources.base import CouplingRow, Key, param_index, register_kind
from negotiate.resources.exclusive import GAP, ExclusiveResource

if TYPE_CHECKING:  # (the agent core imports CasADi; reading a fleet must not)
    from negotiate.core.agent import AgentModel

__all__ = ["DwellResource"]


@register_kind
@dataclass(frozen=True)
class DwellResource(ExclusiveResource):
    """An exclusive resource where each user stays at least ``min_dwell`` seconds.

    Attributes
    ----------
    name : str
        Resource name, unique in the fleet.
    gap : float
        Smallest time between one user's exit and the next user's entry, s.
    min_dwell : float
        Smallest time between a user's entry and its exit, s.
    """

    kind = "dwell"
    about = "An exclusive resource where each user stays at least a minimum time."
    keys: ClassVar[tuple[Key, ...]] = (
        *ExclusiveResource.keys,
        Key("min_dwell", "number", "s", "smallest time between a user's entry and its exit",
            allowed=GAP.interval, required=True),
    )  # fmt: skip

    min_dwell: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        check_field(f"resource {self.name!r}", "min_dwell", self.min_dwell, self.min_dwell in GAP, str(GAP))

    def coupling_rows(self, agents: Sequence[AgentModel], order: Sequence[str]) -> list[CouplingRow]:
        rows = super().coupling_rows(agents, order)
        for i, a in enumerate(agents):
            if a.name in order:
                coef = {(i, param_index(a, self.name, "enter")): 1.0, (i, param_index(a, self.name, "leave")): -1.0}
                rows.append(CouplingRow(coef, -float(self.min_dwell), f"{self.name}: {a.name} stays >= min_dwell"))
        return rows

    def table_rows(self) -> list[dict[str, Any]]:
        return [{"gap_s": self.gap, "limit": self.min_dwell, "unit": "s"}]

    def describe(self, num: Callable[[float], str] = "{:g}".format) -> str:
        return f"dwell, gap {num(self.gap)} s, each user stays >= {num(self.min_dwell)} s"

    @classmethod
    def report_title(cls, rows: Sequence[Any]) -> str:
        return f"dwell, gap {rows[0].gap_s:g} s, each user stays ≥ {rows[0].limit:g} s"
