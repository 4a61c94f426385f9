"""Checks for agent models, built-in or user-written: finite-difference gradients and reachable points.

These helpers let the author of a model confirm the two promises an :class:`~negotiate.core.agent.AgentModel`
makes to the coordinator: the value gradient reported by a solve matches the value's own finite
differences, and points of the reachable set really solve.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from agents._common import chebyshev_center, polytope_vertices

__all__ = ["central_difference", "reachable_samples", "reachable_vertices"]


def central_difference(problem: Any, p: np.ndarray, step: float | np.ndarray) -> np.ndarray:
    """Central finite differences ``(V(p + h e_i) - V(p - h e_i)) / (2 h)`` of the value, per parameter.

    ``step`` is in the parameters' units (scalar or one per parameter). Every one of the ``2 n_p`` solves
    must converge; otherwise a :class:`RuntimeError` names the parameter.
    """
    p = np.asarray(p, dtype=float).ravel()
    steps = np.broadcast_to(np.asarray(step, dtype=float), p.shape)
    grad = np.empty(p.size)
    for i in range(p.size):
        d = np.zeros(p.size)
        d[i] = steps[i]
        plus, minus = problem.solve(p + d), problem.solve(p - d)
        if not (plus.success and minus.success):
            raise RuntimeError(f"finite difference in parameter {i}: solves gave {plus.status} / {minus.status}")
        grad[i] = (plus.value - minus.value) / (2 * steps[i])
    return grad


def reachable_vertices(reachable: Any) -> np.ndarray:
    """Vertices of a :class:`~negotiate.core.agent.ReachableSet` (its box intersected with ``A p <= b``)."""
    n = reachable.lower.size
    A = np.vstack([reachable.A, np.eye(n), -np.eye(n)])
    b = np.r_[reachable.b, reachable.upper, -reachable.lower]
    norms = np.linalg.norm(A, axis=1)
    A, b = A / norms[:, None], b / norms
    center, radius = chebyshev_center(A, b)
    if radius <= 0:
        raise ValueError("the reachable set has an empty interior")
    return polytope_vertices(A, b, center)


def reachable_samples(reachable: Any, count: int, seed: int = 0, max_draws: int = 100_000) -> np.ndarray:
    """``count`` points drawn uniformly from a reachable set by rejection from its box (seeded)."""
    rng = np.random.default_rng(seed)
    out: list[np.ndarray] = []
    for _ in range(max_draws):
        q = rng.uniform(reachable.lower, reachable.upper)
        if reachable.contains(q):
            out.append(q)
            if len(out) == count:
                return np.array(out)
    raise RuntimeError(f"only {len(out)} of {count} points found in {max_draws} draws")
