"""Shared resources and the coupling rules they impose on the agents' parameters.

:mod:`.base` says what a kind of resource declares (its fleet-file keys and record, the parameters it owns,
its rows of the coupling polyhedron, whether its users take turns in an order, its schedule and table rows,
how the report draws it) and keeps the registry of kinds. :mod:`.coupling` stacks the agents' parameters
and builds the coupling polyhedron for fixed orders from every kind's rows and every agent's reachable set,
the precedence graph and its deadlocks, and decides emptiness. Uses the agent core only.

Kinds, one module each: :mod:`.exclusive` (one user at a time, a gap between users), :mod:`.capacity` (an
amount per time block) and :mod:`.dwell` (exclusive, each user staying at least a minimum time).
"""

# Kinds register in this order, the order of the docs and of messages that list them.
# isort: off
from negotiate.resources.base import KINDS, ResourceKind, kind_named, register_kind
from negotiate.resources.exclusive import ExclusiveResource
from negotiate.resources.capacity import CapacityResource
from negotiate.resources.dwell import DwellResource

# isort: on

Resource = ResourceKind
"""Any shared resource (a record of a registered kind)."""

__all__ = [
    "KINDS",
    "CapacityResource",
    "DwellResource",
    "ExclusiveResource",
    "Resource",
    "ResourceKind",
    "kind_named",
    "register_kind",
]
