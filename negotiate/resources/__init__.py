"""Shared resources and the coupling rules they impose on the agents' parameters.

:mod:`.coupling` stacks the agents' parameters and builds the coupling polyhedron for fixed orders (gaps on
exclusive resources, limits on capacity blocks, every agent's reachable set), the precedence graph and its
deadlocks, and decides emptiness. Uses the agent core only.

Kinds, one module each: :mod:`.exclusive` (one user at a time, a gap between users) and :mod:`.capacity`
(an amount per time block).
"""

from negotiate.resources.capacity import CapacityResource
from negotiate.resources.exclusive import ExclusiveResource

Resource = ExclusiveResource | CapacityResource
"""Any shared resource."""

__all__ = ["CapacityResource", "ExclusiveResource", "Resource"]
