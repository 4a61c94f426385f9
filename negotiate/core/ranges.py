"""The values a number may take, and the ranges shared by fleet records and model parameters.

Physical bounds are generous (far beyond real equipment) but finite, so that costs stay far from overflow;
a time may be a clock time in s (a Unix time stamp is about 1.7e9 s).
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import cast

__all__ = ["Range", "short_bound"]


def short_bound(value: float) -> str:
    """A bound as it is written in a message or a table: ``0``, ``0.1``, ``200``, ``1e6``, ``1e-6``."""
    text = f"{value:g}"
    return text.replace("e+0", "e").replace("e+", "e").replace("e-0", "e-")


@dataclass(frozen=True)
class Range:
    """The values a number may take: from ``lo`` to ``hi``, each end included unless it is marked open.

    ``str(Range(0, 1e6, lo_open=True))`` is ``"within (0, 1e6]"``, the phrase of messages and docs.
    """

    lo: float
    hi: float
    lo_open: bool = False
    hi_open: bool = False

    def __contains__(self, value: object) -> bool:
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            return False
        # Every Real compares with a float (an int of any size exactly); the stubs of ``numbers`` declare no
        # comparison, so the checker is told what the runtime does.
        v = cast(float, value)
        above = v > self.lo if self.lo_open else v >= self.lo
        below = v < self.hi if self.hi_open else v <= self.hi
        return bool(above and below)  # False for NaN

    @property
    def interval(self) -> str:
        """``"(0, 1e6]"``: the interval in the usual notation."""
        lo, hi = "(" if self.lo_open else "[", ")" if self.hi_open else "]"
        return f"{lo}{short_bound(self.lo)}, {short_bound(self.hi)}{hi}"

    def __str__(self) -> str:
        return f"within {self.interval}"


# Ranges shared by many fields. Physical bounds are generous (far beyond real equipment) but finite, so that
# costs stay far from overflow; a time may be a clock time in s (a Unix time stamp is about 1.7e9 s).
TIME = Range(0.0, 1e10)
"""A point in time, s."""
DURATION = Range(0.0, 1e10, lo_open=True)
"""A length of time that must be positive, s."""
COST_WEIGHT = Range(0.0, 1e12)
"""A weight of a cost term, J-equivalent per unit of what it penalises."""
PRICE = Range(0.0, 1e6)
"""A price or tariff multiplier (dimensionless)."""
FRACTION = Range(0.0, 1.0)
EFFICIENCY = Range(0.0, 1.0, lo_open=True)
LENGTH = Range(0.0, 1e7, lo_open=True)
"""A position or length along a route, m (up to 10 000 km)."""
MASS = Range(0.0, 1e7, lo_open=True)
"""A mass, kg (up to 10 000 t)."""
SPEED = Range(0.0, 1e3, lo_open=True)
"""A speed, m/s."""
ACCELERATION = Range(0.0, 100.0, lo_open=True)
"""An acceleration, m/s^2 (about 10 g)."""
MAX_BLOCKS = 500
"""Most time blocks of a capacity resource (and of a capacity user's tariff)."""
