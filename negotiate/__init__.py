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

Sign convention: ``L = f + lam_g^T g + lam_x^T x`` (CasADi's); a positive multiplier marks an active
upper bound. See :mod:`negotiate.kkt`.
"""

from negotiate.agent import AgentModel, ReachableSet, SlotParam
from negotiate.kkt import Certificate, ConstraintRef, Tolerances
from negotiate.nlp import LocalResult, ParametricNLP
from negotiate.sensitivity import Sensitivity
from negotiate.status import Status

__all__ = [
    "AgentModel",
    "Certificate",
    "ConstraintRef",
    "LocalResult",
    "ParametricNLP",
    "ReachableSet",
    "Sensitivity",
    "SlotParam",
    "Status",
    "Tolerances",
]
__version__ = "0.1.0"
