"""negotiate: coordinate shared slots and capacities among agents that keep their own parametric NLPs.

Public API
----------
ParametricNLP
    One agent's parametric NLP, built once and solved many times; ``solve(p)`` returns a
    :class:`LocalResult` with the value, the value gradient dV/dp = partial_p L and a KKT certificate.
LocalResult
    Result of one solve (value, gradient, x, multipliers, status, certificate, ``sensitivity()``).
Certificate, ConstraintRef, Tolerances
    The KKT certificate (LICQ, SOSC, active / weakly active sets, verdict) and its thresholds.
Sensitivity
    dx*/dp, multiplier derivatives and the value Hessian, where the certificate allows them.
Status, CoordinationStatus
    Outcome of a solve (``converged``, ``inaccurate``, ``infeasible``, ...), and why a coordination stopped
    (``converged``, ``max-rounds``, ``failed``) with whether its schedule is usable.
AgentModel, SlotParam, ReachableSet
    What a model builder hands to the coordinator.
load_fleet, build_agents, FleetError
    Read a fleet file (every mistake reported as one FleetError) and build its agents.
Method, register_method, option, Evaluation, AgentReport, Proposal, CoordinationResult
    What a coordination method of your own needs: the base class, its registration, declared options, what
    it receives each round and what it returns; the engine's result. The front over every method is
    :func:`negotiate.coordinate.coordinate` (not re-exported here: the name is its module's).
CoordinatorSettings, ExclusiveResource, CapacityResource
    The upper level's settings and the shared resources (slots with a gap; capacity per time block).
DeadlockError, InfeasibleOrdersError
    Orders on exclusive resources that no schedule can meet (a cycle; an empty coupling polyhedron).
run_fleet, write_outputs
    The main job as one call (orders, coordination, verification) and its files.

Executors (in process, worker processes, Dask) live in :mod:`negotiate.executor`; results, report, sweep
and comparison in :mod:`negotiate.results`, :mod:`negotiate.report`, :mod:`negotiate.sweep`,
:mod:`negotiate.compare`.

Sign convention: ``L = f + lam_g^T g + lam_x^T x`` (CasADi's); a positive multiplier marks an active
upper bound. See :mod:`negotiate.kkt`.
"""

from negotiate.agent import AgentModel, ReachableSet, SlotParam
from negotiate.coordinate import (
    AgentReport,
    CoordinationResult,
    Evaluation,
    Method,
    Proposal,
    option,
    register_method,
)
from negotiate.coupling import DeadlockError, InfeasibleOrdersError
from negotiate.errors import FleetError
from negotiate.fleet import build_agents, load_fleet
from negotiate.kkt import Certificate, ConstraintRef, Tolerances
from negotiate.nlp import LocalResult, ParametricNLP
from negotiate.run import run_fleet, write_outputs
from negotiate.sensitivity import Sensitivity
from negotiate.spec import CapacityResource, CoordinatorSettings, ExclusiveResource
from negotiate.status import CoordinationStatus, Status

__all__ = [
    "AgentModel",
    "AgentReport",
    "CapacityResource",
    "Certificate",
    "ConstraintRef",
    "CoordinationResult",
    "CoordinationStatus",
    "CoordinatorSettings",
    "DeadlockError",
    "Evaluation",
    "ExclusiveResource",
    "FleetError",
    "InfeasibleOrdersError",
    "LocalResult",
    "Method",
    "ParametricNLP",
    "Proposal",
    "ReachableSet",
    "Sensitivity",
    "SlotParam",
    "Status",
    "Tolerances",
    "build_agents",
    "load_fleet",
    "option",
    "register_method",
    "run_fleet",
    "write_outputs",
]
__version__ = "0.1.0"
