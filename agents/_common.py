"""Shared pieces of the model builders: the NLP record, smooth helpers and reachable-set geometry.

The builders first write each agent's problem as an :class:`NLPSpec` (CasADi expressions plus numeric
bounds and names). The spec becomes the agent's :class:`~negotiate.core.nlp.ParametricNLP`; the builders also
solve auxiliary problems on it (fastest traversal, support points of the reachable set, free optimum) with a
plain IPOPT call, which needs no sensitivity information.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any

import casadi as ca
import numpy as np
from scipy.optimize import linprog
from scipy.spatial import ConvexHull, HalfspaceIntersection

from negotiate.core.nlp import ParametricNLP

__all__ = ["NLPSpec", "PlainResult", "smooth_pos"]

# Quiet IPOPT for the builders' auxiliary solves; tolerances a little tighter than IPOPT's defaults so that
# support points and free optima are accurate to well below the margins used on them.
_AUX_OPTIONS: dict[str, Any] = {
    "ipopt.print_level": 0,
    "ipopt.sb": "yes",
    "print_time": False,
    "ipopt.tol": 1e-10,
    "ipopt.max_iter": 500,
}


def smooth_pos(x: Any, width: float) -> Any:
    """Smooth positive part ``(x + sqrt(x^2 + width^2)) / 2``: above ``max(x, 0)`` by at most ``width / 2``.

    Infinitely differentiable and convex; ``width`` has the unit of ``x``.
    """
    return 0.5 * (x + ca.sqrt(x * x + width * width))


@dataclass(frozen=True)
class PlainResult:
    """Outcome of a plain IPOPT solve used while building a model (not the coordinator's result)."""

    success: bool
    status: str
    x: np.ndarray
    f: float
    lam_g: np.ndarray


@dataclass
class NLPSpec:
    """A parametric NLP ``min f(x, p) s.t. lbg <= g(x, p) <= ubg, lbx <= x <= ubx`` with names.

    ``x``, ``p``, ``f``, ``g`` are CasADi SX expressions; the bounds are numeric arrays.
    """

    x: ca.SX
    p: ca.SX
    f: ca.SX
    g: ca.SX
    lbx: np.ndarray
    ubx: np.ndarray
    lbg: np.ndarray
    ubg: np.ndarray
    x0: np.ndarray
    x_names: list[str]
    g_names: list[str]
    p_names: list[str]
    _solvers: dict[str, Any] = field(default_factory=dict, repr=False)

    def to_problem(self, solver_options: dict[str, Any] | None = None) -> ParametricNLP:
        """The agent's :class:`~negotiate.core.nlp.ParametricNLP` built from this spec."""
        return ParametricNLP(
            {"x": self.x, "p": self.p, "f": self.f, "g": self.g},
            lbx=self.lbx, ubx=self.ubx, lbg=self.lbg, ubg=self.ubg, x0=self.x0,
            x_names=self.x_names, g_names=self.g_names, p_names=self.p_names,
            solver_options=solver_options,
        )

    def solve_plain(self, p: np.ndarray, x0: np.ndarray | None = None) -> PlainResult:
        """Solve at parameter ``p`` with plain IPOPT (no certificate)."""
        if "main" not in self._solvers:
            nlp = {"x": self.x, "p": self.p, "f": self.f, "g": self.g}
            self._solvers["main"] = ca.nlpsol("agent", "ipopt", nlp, _AUX_OPTIONS)
        return _run(self._solvers["main"], self.x0 if x0 is None else x0, self.lbx, self.ubx,
                    self.lbg, self.ubg, p)


def solve_aux(key: str, cache: dict[str, Any], x: ca.SX, f: ca.SX, g: ca.SX, lbx: np.ndarray,
              ubx: np.ndarray, lbg: np.ndarray, ubg: np.ndarray, x0: np.ndarray,
              p: ca.SX | None = None, p_val: np.ndarray | None = None) -> PlainResult:
    """Solve an auxiliary NLP with plain IPOPT, caching the solver object under ``key``."""
    if key not in cache:
        nlp: dict[str, Any] = {"x": x, "f": f, "g": g}
        if p is not None:
            nlp["p"] = p
        cache[key] = ca.nlpsol(key, "ipopt", nlp, _AUX_OPTIONS)
    return _run(cache[key], x0, lbx, ubx, lbg, ubg, p_val)


def _run(solver: Any, x0: np.ndarray, lbx: np.ndarray, ubx: np.ndarray, lbg: np.ndarray, ubg: np.ndarray,
         p: np.ndarray | None) -> PlainResult:
    args: dict[str, Any] = {"x0": x0, "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}
    if p is not None:
        args["p"] = p
    sol = solver(**args)
    stats = solver.stats()
    return PlainResult(
        success=bool(stats["success"]),
        status=str(stats["return_status"]),
        x=np.asarray(sol["x"]).ravel(),
        f=float(sol["f"]),
        lam_g=np.asarray(sol["lam_g"]).ravel(),
    )


# --------------------------------------------------------------------------------------------------------
# polytope helpers for reachable sets
# --------------------------------------------------------------------------------------------------------


def hull_rows(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``A q <= b`` of the convex hull of ``points`` (shape ``(m, d)``), with unit-norm rows."""
    hull = ConvexHull(np.asarray(points, dtype=float))
    A = hull.equations[:, :-1]
    b = -hull.equations[:, -1]
    norms = np.linalg.norm(A, axis=1)
    A, b = A / norms[:, None], b / norms
    # Coplanar facets (several hull simplices on one face) give repeated rows; keep one of each.
    keep: list[int] = []
    for i in range(A.shape[0]):
        if all(np.abs(A[i] - A[j]).max() > 1e-9 or abs(b[i] - b[j]) > 1e-9 * (1 + abs(b[j])) for j in keep):
            keep.append(i)
    return A[keep], b[keep]


def shrink_rows(A: np.ndarray, b: np.ndarray, center: np.ndarray, factor: float) -> np.ndarray:
    """Right-hand sides of the polytope ``A q <= b`` scaled by ``factor`` about ``center``."""
    slack = b - A @ center
    return A @ center + factor * slack


def polytope_vertices(A: np.ndarray, b: np.ndarray, interior: np.ndarray) -> np.ndarray:
    """Vertices of the bounded polytope ``A q <= b`` that has ``interior`` strictly inside it."""
    if A.shape[1] == 1:
        lo = max((bi / ai for ai, bi in zip(A[:, 0], b, strict=True) if ai < 0), default=-np.inf)
        hi = min((bi / ai for ai, bi in zip(A[:, 0], b, strict=True) if ai > 0), default=np.inf)
        return np.array([[lo], [hi]])
    hs = HalfspaceIntersection(np.hstack([A, -b[:, None]]), np.asarray(interior, dtype=float))
    verts = hs.intersections
    # The same vertex appears once per active facet combination; keep distinct ones.
    unique: list[np.ndarray] = []
    for v in verts:
        if all(np.linalg.norm(v - u) > 1e-7 * (1 + np.linalg.norm(v)) for u in unique):
            unique.append(v)
    return np.array(unique)


def chebyshev_center(A: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, float]:
    """Centre and radius of the largest ball inside ``A q <= b`` (rows of unit norm), by linear programming."""
    n = A.shape[1]
    norms = np.linalg.norm(A, axis=1)
    c = np.zeros(n + 1)
    c[-1] = -1.0
    res = linprog(c, A_ub=np.hstack([A, norms[:, None]]), b_ub=b, bounds=[(None, None)] * n + [(0, None)],
                  method="highs")
    return res.x[:n], float(res.x[-1])


def box_corners(lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """All ``2^n`` corners of a box."""
    return np.array(list(itertools.product(*zip(lower, upper, strict=True))), dtype=float)


def joint_optimum(spec: NLPSpec, A: np.ndarray, b: np.ndarray, p_start: np.ndarray,
                  x_start: np.ndarray | None = None) -> PlainResult:
    """Minimise the agent's cost jointly over ``x`` and ``p`` subject to ``A p <= b`` (plain IPOPT).

    The minimiser's ``p`` part is the minimiser of the agent's value function over the polytope. The
    returned ``x`` holds ``x`` followed by ``p``.
    """
    n_x = spec.x.numel()
    n_p = spec.p.numel()
    z = ca.SX.sym("z", n_x + n_p)
    xp = ca.vertcat(spec.x, spec.p)
    fz = ca.substitute(spec.f, xp, z)
    gz = ca.vertcat(ca.substitute(spec.g, xp, z), ca.mtimes(ca.DM(A), z[n_x:]))
    x0 = spec.x0 if x_start is None else x_start
    return solve_aux("joint", {}, z, fz, gz, np.r_[spec.lbx, np.full(n_p, -np.inf)],
                     np.r_[spec.ubx, np.full(n_p, np.inf)], np.r_[spec.lbg, np.full(A.shape[0], -np.inf)],
                     np.r_[spec.ubg, b], np.r_[x0, p_start])
