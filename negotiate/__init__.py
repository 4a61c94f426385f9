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
    (``converged``, ``max-rounds``, ``stalled``, ``failed``, ``unreachable``) with whether its schedule is usable.
AgentModel, SlotParam, ReachableSet
    What a model builder hands to the coordinator.
load_fleet, build_agents
    Read a fleet file (every mistake reported as one FleetError) and build its agents.
Method, register_method, option, Evaluation, AgentReport, Proposal, CoordinationResult
    What a coordination method of your own needs: the base class, its registration, declared options, what
    it receives each round and what it returns; the engine's result. The front over every method is
    :func:`negotiate.coordination.engine.coordinate` (not re-exported here: the name is its module's).
CoordinatorSettings, ExclusiveResource, CapacityResource, DwellResource
    The upper level's settings and the shared resources (slots with a gap; capacity per time block; slots
    with a gap and a minimum stay).
ResourceKind, register_kind
    What a resource kind of your own needs: the base of its record and its registration (docs/extend.md).
FleetError, FieldError, DeadlockError, InfeasibleOrdersError, RunFolderError, CheckpointError
    The exceptions for user mistakes and refusals, all in :mod:`negotiate.errors` (each a ``ValueError``):
    a fleet file's mistakes; a record's refused field; orders that no schedule can meet (a cycle; an
    empty coupling polyhedron); a run folder that cannot be used; a checkpoint that cannot be used.
run_fleet, write_outputs
    The main job as one call, as ``negotiate run`` does it (run folder, executor, time limit, orders,
    coordination, verification, resume, outputs), and the files of a result.

Executors (in process, worker processes, Dask) live in :mod:`negotiate.execution`; results, report, sweep
and comparison in :mod:`negotiate.output.results`, :mod:`negotiate.output.report`, :mod:`negotiate.tools.sweep`,
:mod:`negotiate.tools.compare`.

Sign convention: ``L = f + lam_g^T g + lam_x^T x`` (CasADi's); a positive multiplier marks an active
upper bound. See :mod:`negotiate.core.kkt`.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

# Every public name is loaded on first use (PEP 562), so that importing one low module of the package
# (``negotiate.core.ranges``, say) does not import the whole package, and the index imports no layer
# ahead of time.
_WHERE = {
    "AgentModel": "negotiate.core.agent",
    "AgentReport": "negotiate.coordination.methods",
    "CapacityResource": "negotiate.fleet.spec",
    "Certificate": "negotiate.core.kkt",
    "ConstraintRef": "negotiate.core.kkt",
    "CoordinationResult": "negotiate.coordination.engine",
    "CoordinationStatus": "negotiate.core.status",
    "CoordinatorSettings": "negotiate.fleet.spec",
    "CheckpointError": "negotiate.errors",
    "DeadlockError": "negotiate.errors",
    "DwellResource": "negotiate.resources",
    "Evaluation": "negotiate.coordination.methods",
    "ExclusiveResource": "negotiate.fleet.spec",
    "FleetError": "negotiate.errors",
    "FieldError": "negotiate.errors",
    "InfeasibleOrdersError": "negotiate.errors",
    "LocalResult": "negotiate.core.nlp",
    "Method": "negotiate.coordination.methods",
    "ParametricNLP": "negotiate.core.nlp",
    "Proposal": "negotiate.coordination.methods",
    "RunFolderError": "negotiate.errors",
    "ReachableSet": "negotiate.core.agent",
    "ResourceKind": "negotiate.resources",
    "Sensitivity": "negotiate.core.sensitivity",
    "SlotParam": "negotiate.core.agent",
    "Status": "negotiate.core.status",
    "Tolerances": "negotiate.core.kkt",
    "build_agents": "negotiate.fleet.build",
    "load_fleet": "negotiate.run",
    "option": "negotiate.coordination.methods",
    "register_kind": "negotiate.resources",
    "register_method": "negotiate.coordination.methods",
    "run_fleet": "negotiate.run",
    "write_outputs": "negotiate.run",
}


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        value = getattr(import_module(_WHERE[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'negotiate' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_WHERE))


__all__ = [
    "AgentModel",
    "AgentReport",
    "CapacityResource",
    "Certificate",
    "ConstraintRef",
    "CoordinationResult",
    "CoordinationStatus",
    "CoordinatorSettings",
    "CheckpointError",
    "DeadlockError",
    "DwellResource",
    "Evaluation",
    "ExclusiveResource",
    "FieldError",
    "FleetError",
    "InfeasibleOrdersError",
    "LocalResult",
    "Method",
    "ParametricNLP",
    "Proposal",
    "RunFolderError",
    "ReachableSet",
    "ResourceKind",
    "Sensitivity",
    "SlotParam",
    "Status",
    "Tolerances",
    "build_agents",
    "load_fleet",
    "option",
    "register_kind",
    "register_method",
    "run_fleet",
    "write_outputs",
]
__version__ = "0.1.0"
