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
Status
    Outcome of a solve (``converged``, ``inaccurate``, ``infeasible``, ...).
AgentModel, SlotParam, ReachableSet
    What a model builder hands to the coordinator.
load_fleet, build_agents, FleetError
    Read a fleet file (every mistake reported as one FleetError) and build its agents.
Method, register_method, CoordinatorSettings
    The interface for a coordination method of your own, and the upper level's settings; the front over
    all methods is :func:`negotiate.coordinate.coordinate`.
run_fleet, write_outputs
    The main job as one call (orders, coordination, verification) and its files.

Executors (in process, worker processes, Dask) live in :mod:`negotiate.executor`; results, report, sweep
and comparison in :mod:`negotiate.results`, :mod:`negotiate.report`, :mod:`negotiate.sweep`,
:mod:`negotiate.compare`.

Sign convention: ``L = f + lam_g^T g + lam_x^T x`` (CasADi's); a positive multiplier marks an active
upper bound. See :mod:`negotiate.kkt`.
"""

from negotiate.agent import AgentModel, ReachableSet, SlotParam
from negotiate.coordinate import Method, register_method
from negotiate.errors import FleetError
from negotiate.fleet import build_agents, load_fleet
from negotiate.kkt import Certificate, ConstraintRef, Tolerances
from negotiate.nlp import LocalResult, ParametricNLP
from negotiate.run import run_fleet, write_outputs
from negotiate.sensitivity import Sensitivity
from negotiate.spec import CoordinatorSettings
from negotiate.status import Status

__all__ = [
    "AgentModel",
    "Certificate",
    "ConstraintRef",
    "CoordinatorSettings",
    "FleetError",
    "LocalResult",
    "Method",
    "ParametricNLP",
    "ReachableSet",
    "Sensitivity",
    "SlotParam",
    "Status",
    "Tolerances",
    "build_agents",
    "load_fleet",
    "register_method",
    "run_fleet",
    "write_outputs",
]
__version__ = "0.1.0"
