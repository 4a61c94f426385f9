"""What a model builder hands to the coordinator.

An agent is its own parametric NLP (a :class:`~negotiate.core.nlp.ParametricNLP`) plus the few facts the
coordinator needs to talk to it without looking inside: what each shared parameter means (which resource,
entry or exit time or capacity share, its unit), a polyhedral set of parameter values the coordinator may
propose (its reachable set: values the agent can surely meet, or, for an agent with elastic parameters, a
window containing every value it can meet), the parameter values it would pick if
it were alone (its free optimum), a weight, and a way to turn a solve into named trajectories for plots and
CSV files. Built-in models live in the top-level ``agents`` package; a user-written model only has to return
an :class:`AgentModel`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from negotiate.core.nlp import LocalResult, ParametricNLP

ParamKind = Literal["enter", "leave", "share"]

__all__ = ["AgentModel", "ParamKind", "ReachableSet", "SlotParam"]


@dataclass(frozen=True)
class SlotParam:
    """Meaning of one shared parameter of an agent.

    Attributes
    ----------
    name : str
        Parameter name, unique within the agent, e.g. ``"bridge.enter"``.
    resource : str
        Name of the shared resource this parameter belongs to.
    kind : {"enter", "leave", "share"}
        ``"enter"`` / ``"leave"``: entry or exit time of the agent's slot on an exclusive resource, in s.
        ``"share"``: the agent's capacity share of a capacity resource in one time block, in W (or the
        resource's own unit).
    unit : str
        SI unit of the parameter, ``"s"`` for times, ``"W"`` for power shares.
    block : int or None
        For ``"share"`` parameters the index of the time block; ``None`` otherwise.
    """

    name: str
    resource: str
    kind: ParamKind
    unit: str = "s"
    block: int | None = None


@dataclass(frozen=True)
class ReachableSet:
    """Parameter values the coordinator may propose to the agent: ``lower <= p <= upper`` and ``A @ p <= b``.

    For an agent whose NLP holds its parameters exactly it is an inner approximation of the set of ``p``
    where the NLP is feasible (every point solves), found by the model builder (e.g. from auxiliary solves).
    For an elastic agent (one with :attr:`AgentModel.slack`, whose NLP solves everywhere and prices a miss)
    it may be an outer bound instead: a window that contains every value the agent can meet (e.g. earliest
    and latest times from its kinematics).
    Times in s, shares in the resource's unit; ``A`` has one row per extra linear rule (``(0, n_p)`` when
    there is none).
    """

    lower: np.ndarray
    upper: np.ndarray
    A: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    b: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        lower = np.asarray(self.lower, dtype=float).ravel()
        upper = np.asarray(self.upper, dtype=float).ravel()
        if lower.shape != upper.shape:
            raise ValueError(f"'lower' and 'upper' must have the same shape, got {lower.shape} and {upper.shape}")
        n = lower.size
        A = np.asarray(self.A, dtype=float)
        if A.size == 0:
            A = np.zeros((0, n))
        b = np.asarray(self.b, dtype=float).ravel()
        if A.ndim != 2 or A.shape[1] != n or A.shape[0] != b.size:
            raise ValueError(f"'A' must have shape (m, {n}) and 'b' shape (m,), got {A.shape} and {b.shape}")
        object.__setattr__(self, "lower", lower)
        object.__setattr__(self, "upper", upper)
        object.__setattr__(self, "A", A)
        object.__setattr__(self, "b", b)

    def contains(self, p: np.ndarray, tol: float = 1e-9) -> bool:
        """Whether ``p`` lies in the set, up to ``tol`` (in the parameters' units)."""
        p = np.asarray(p, dtype=float).ravel()
        return bool(
            np.all(p >= self.lower - tol) and np.all(p <= self.upper + tol) and np.all(self.A @ p <= self.b + tol)
        )


@dataclass
class AgentModel:
    """One agent as the coordinator sees it.

    Attributes
    ----------
    name : str
        Agent identifier, unique in the fleet.
    problem : ParametricNLP
        The agent's local problem; its parameter vector is ordered as ``params``.
    params : tuple of SlotParam
        Meaning of each entry of the parameter vector.
    reachable : ReachableSet
        Parameter values the agent can surely meet.
    free_optimum : numpy.ndarray
        The parameter vector the agent would choose alone (minimiser of its value function over
        ``reachable``), in the parameters' units.
    weight : float
        Weight of the agent's cost in the fleet total (dimensionless, > 0).
    trajectory : callable, optional
        ``trajectory(result) -> {column: array}`` turning a converged solve into named time series whose
        names carry their unit (``"time_s"``, ``"speed_m_per_s"``, ...).
    model : str
        Name of the model family that built the agent (for tables and reports).
    start : LocalResult, optional
        A converged solve at ``free_optimum``; the coordinator's first round starts the agent's solver from
        it (``build_agents`` sets it). Without it the first round solves cold.
    draw : callable, optional
        ``draw(result) -> array`` with one entry per parameter: for a ``"share"`` parameter, how much of the
        resource the agent plans to use in that block at this solve (in the share's unit, W for power; at
        most the share); entries of slot times are ignored. A share is a right to draw, not a plan: an agent
        may leave part of it unused. Without it the files and the report show the shares only.
    slack : callable, optional
        ``slack(result) -> array`` with one entry per parameter: by how much the solve's own values miss the
        parameters (in their units; zero where the agent meets them). Only for elastic agents, whose NLP
        relaxes its coupling rows with penalised slacks (an exact penalty) so that it solves at every point
        of the window; the coordinator reports a schedule where a slack is not zero as unreachable. Without
        it the agent meets its parameters exactly at every converged solve.
    """

    name: str
    problem: ParametricNLP
    params: tuple[SlotParam, ...]
    reachable: ReachableSet
    free_optimum: np.ndarray
    weight: float = 1.0
    trajectory: Callable[[LocalResult], Mapping[str, np.ndarray]] | None = None
    model: str = "custom"
    start: LocalResult | None = None
    draw: Callable[[LocalResult], np.ndarray] | None = None
    slack: Callable[[LocalResult], np.ndarray] | None = None

    def __post_init__(self) -> None:
        self.params = tuple(self.params)
        n_p = self.problem.n_p
        if len(self.params) != n_p:
            raise ValueError(
                f"agent {self.name!r}: 'params' must describe {n_p} parameters (the NLP's p), got {len(self.params)}"
            )
        if self.reachable.lower.size != n_p:
            raise ValueError(
                f"agent {self.name!r}: 'reachable' must have {n_p} parameters, got {self.reachable.lower.size}"
            )
        self.free_optimum = np.asarray(self.free_optimum, dtype=float).ravel()
        if self.free_optimum.shape != (n_p,):
            raise ValueError(
                f"agent {self.name!r}: 'free_optimum' must have shape ({n_p},), got {self.free_optimum.shape}"
            )
        if not self.weight > 0:
            raise ValueError(f"agent {self.name!r}: 'weight' must be > 0, got {self.weight}")

    @property
    def param_names(self) -> list[str]:
        """Names of the parameters, in the order of the parameter vector."""
        return [q.name for q in self.params]
