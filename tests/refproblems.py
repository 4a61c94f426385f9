"""Reference problems with answers known from outside negotiate, and the finite-difference helpers that use them.

Each problem is a small class carrying its symbols, bounds, start point, parameter value, the known optimum
and, where known, its multipliers, value gradient and second derivatives, together with the source of every
number. Multipliers are given in negotiate's (and CasADi's) sign convention ``L = f + lam_g^T g + lam_x^T x``:
negative at an active lower bound, positive at an active upper bound. The tests in
``test_reference_gradients.py`` and ``test_reference_sensitivity.py`` compare ``ParametricNLP`` with these
numbers, with central finite differences, with CasADi's own ``nlpsol`` sensitivities and with HiGHS duals.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any

import casadi as ca
import numpy as np

from negotiate import ParametricNLP

INF = np.inf

# Options that keep CasADi's SQP method (with its own active-set QP solver) silent.
SQP_QUIET: dict[str, Any] = {
    "qpsol": "qrqp",
    "qpsol_options": {"print_iter": False, "print_header": False, "print_info": False, "error_on_fail": False},
    "print_iteration": False,
    "print_header": False,
    "print_status": False,
    "print_time": False,
}
IPOPT_QUIET: dict[str, Any] = {"ipopt.print_level": 0, "ipopt.sb": "yes", "print_time": False}


class RefProblem:
    """A parametric NLP with known answers; subclasses set the data and ``symbols``.

    Attributes set by subclasses (``None`` where not known): ``source`` (where the problem and numbers come
    from), ``p0`` (parameter value the answers refer to), ``x0`` (start point), ``lbx, ubx, lbg, ubg``,
    ``x_star``, ``f_star``, ``lam_g_star``, ``lam_x_star``, ``gradient_star`` (dV/dp at ``p0``),
    ``dx_dp_star``, ``dlam_g_dp_star``, ``dlam_x_dp_star``, ``hessian_star`` (d2V/dp2 at ``p0``).
    """

    source: str = ""
    p0: tuple[float, ...] = ()
    x0: tuple[float, ...] = ()
    lbx: Any = None
    ubx: Any = None
    lbg: Any = None
    ubg: Any = None
    x_star: tuple[float, ...] | None = None
    f_star: float | None = None
    lam_g_star: tuple[float, ...] | None = None
    lam_x_star: tuple[float, ...] | None = None
    gradient_star: tuple[float, ...] | None = None
    dx_dp_star: tuple[tuple[float, ...], ...] | None = None
    dlam_g_dp_star: tuple[tuple[float, ...], ...] | None = None
    dlam_x_dp_star: tuple[tuple[float, ...], ...] | None = None
    hessian_star: tuple[tuple[float, ...], ...] | None = None

    def symbols(self) -> dict[str, Any]:
        """``{"x", "p", "f", "g"}`` as CasADi SX expressions."""
        raise NotImplementedError

    @property
    def name(self) -> str:
        return type(self).__name__

    def bounds(self) -> dict[str, Any]:
        """The bounds as keyword arguments for ``ParametricNLP`` or an ``nlpsol`` call (omitted ones dropped)."""
        kw = {"lbx": self.lbx, "ubx": self.ubx, "lbg": self.lbg, "ubg": self.ubg}
        return {k: v for k, v in kw.items() if v is not None}

    @functools.cached_property
    def nlp(self) -> ParametricNLP:
        """The problem as a ``ParametricNLP`` (built once per process and reused)."""
        return ParametricNLP(self.symbols(), x0=list(self.x0), name=self.name, **self.bounds())

    def casadi_derivatives(self, plugin: str, options: dict[str, Any]) -> ca.Function:
        """CasADi's own sensitivities: p -> (f, x, lam_p, df/dp, dx/dp) of an ``nlpsol(plugin)`` call."""
        solver = ca.nlpsol(f"{self.name}_{plugin}", plugin, self.symbols(), options)
        P = ca.MX.sym("p", len(self.p0))
        out = solver(p=P, x0=list(self.x0), **self.bounds())
        return ca.Function(
            f"{self.name}_{plugin}_sens",
            [P],
            [out["f"], out["x"], out["lam_p"], ca.jacobian(out["f"], P), ca.jacobian(out["x"], P)],
        )

    def casadi_solver(self, plugin: str, options: dict[str, Any]) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Solve with a plain ``nlpsol(plugin)`` call at ``p0``; return its outputs and stats."""
        solver = ca.nlpsol(f"{self.name}_{plugin}_plain", plugin, self.symbols(), options)
        out = solver(p=list(self.p0), x0=list(self.x0), **self.bounds())
        return {k: np.asarray(v, dtype=float) for k, v in out.items()}, solver.stats()


# --------------------------------------------------------------------------------------------------------
# Published test problems.


class HS071(RefProblem):
    """Hock & Schittkowski problem 71 with the constraint levels 25 and 40 made parameters.

    ``min x1 x4 (x1 + x2 + x3) + x3`` s.t. ``x1 x2 x3 x4 - p1 >= 0``, ``sum x_i^2 - p2 = 0``, ``1 <= x <= 5``.
    """

    source = (
        "Hock & Schittkowski 1981, problem 71 (start point, x*, f* = 17.0140173); multipliers as printed by "
        "the IPOPT documentation's HS071 example (lambda = (-0.55229366, 0.16146856), z_L[0] = 1.0878710), "
        "recalled from memory"
    )
    p0 = (25.0, 40.0)
    x0 = (1.0, 5.0, 5.0, 1.0)
    lbx, ubx = 1.0, 5.0
    lbg, ubg = (0.0, 0.0), (INF, 0.0)
    x_star = (1.0, 4.7429996, 3.8211499, 1.3794082)
    f_star = 17.0140173
    # IPOPT's Lagrangian f + g^T lambda - z_L^T (x - x_L) + z_U^T (x - x_U) has CasADi's sign for lambda;
    # its bound multiplier z_L >= 0 enters with a minus, so lam_x = -z_L at an active lower bound.
    lam_g_star = (-0.55229366, 0.16146856)
    lam_x_star = (-1.0878710, 0.0, 0.0, 0.0)
    # g = (prod x - p1, sum x^2 - p2), so partial_p L = -lam_g.
    gradient_star = (0.55229366, -0.16146856)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 4), ca.SX.sym("p", 2)
        f = x[0] * x[3] * (x[0] + x[1] + x[2]) + x[2]
        g = ca.vertcat(x[0] * x[1] * x[2] * x[3] - p[0], ca.sumsqr(x) - p[1])
        return {"x": x, "p": p, "f": f, "g": g}


class HS035(RefProblem):
    """Hock & Schittkowski problem 35 (a convex QP) with the constraint level 3 made a parameter.

    ``min 9 - 8x1 - 6x2 - 4x3 + 2x1^2 + 2x2^2 + x3^2 + 2x1x2 + 2x1x3`` s.t. ``x1 + x2 + 2x3 - p <= 0``, x >= 0.
    """

    source = (
        "Hock & Schittkowski 1981, problem 35: x* = (4/3, 7/9, 4/9), f* = 1/9 (values recalled from memory); "
        "multiplier 2/9 checked by hand from grad f(x*) = (-2/9, -2/9, -4/9) = -(2/9) (1, 1, 2)"
    )
    p0 = (3.0,)
    x0 = (0.5, 0.5, 0.5)
    lbx = 0.0
    ubg = 0.0
    x_star = (4 / 3, 7 / 9, 4 / 9)
    f_star = 1 / 9
    lam_g_star = (2 / 9,)
    lam_x_star = (0.0, 0.0, 0.0)
    gradient_star = (-2 / 9,)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 3), ca.SX.sym("p")
        f = 9 - 8 * x[0] - 6 * x[1] - 4 * x[2] + 2 * x[0] ** 2 + 2 * x[1] ** 2 + x[2] ** 2
        f += 2 * x[0] * x[1] + 2 * x[0] * x[2]
        g = x[0] + x[1] + 2 * x[2] - p
        return {"x": x, "p": p, "f": f, "g": g}


class ConstrainedRosenbrock(RefProblem):
    """Rosenbrock's function with parameters in the objective and the disc radius: p = (a, b, r^2).

    ``min (a - x1)^2 + b (x2 - x1^2)^2`` s.t. ``x1^2 + x2^2 - r^2 <= 0``; at (1, 100, 1) the disc is active.
    """

    source = (
        "Rosenbrock 1960 function on the unit disc, the constrained example of MATLAB's fmincon documentation: "
        "x* = (0.7864, 0.6177), f* = 0.0457 (4 digits, recalled from memory)"
    )
    p0 = (1.0, 100.0, 1.0)
    x0 = (0.0, 0.0)
    ubg = 0.0
    x_star = (0.7864, 0.6177)
    f_star = 0.0457

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p", 3)
        f = (p[0] - x[0]) ** 2 + p[1] * (x[1] - x[0] ** 2) ** 2
        g = ca.sumsqr(x) - p[2]
        return {"x": x, "p": p, "f": f, "g": g}


class CircleEquality(RefProblem):
    """A linear cost on a circle of parametric squared radius: ``min x1 + x2`` s.t. ``x1^2 + x2^2 - p = 0``.

    By hand: x*(p) = -sqrt(p/2) (1, 1), V(p) = -sqrt(2p), lam(p) = 1 / (2 sqrt(p/2)); at p = 2 this gives
    x* = (-1, -1), lam = 1/2, dV/dp = -1/sqrt(2p) = -1/2, dx/dp = -1/(4 sqrt(p/2)) = -1/4,
    dlam/dp = -1/8, d2V/dp2 = (2p)^(-3/2) = 1/8.
    """

    source = (
        "Nocedal & Wright 2006, Example 12.1 (at p = 2; x* = (-1, -1), recalled from memory), "
        "parametric radius and all derivatives derived by hand"
    )
    p0 = (2.0,)
    x0 = (-1.2, -0.8)
    lbg = ubg = 0.0
    x_star = (-1.0, -1.0)
    f_star = -2.0
    lam_g_star = (0.5,)
    gradient_star = (-0.5,)
    dx_dp_star = ((-0.25,), (-0.25,))
    dlam_g_dp_star = ((-0.125,),)
    hessian_star = ((0.125,),)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        return {"x": x, "p": p, "f": x[0] + x[1], "g": ca.sumsqr(x) - p}


# --------------------------------------------------------------------------------------------------------
# Problems with closed-form answers derived by hand (common practice).


class ProjectionQP(RefProblem):
    """A convex QP with an active parametric row, an inactive parametric row and an active simple bound.

    ``min (x1 - 3)^2 + (x2 - 2)^2 + (x3 + 1)^2`` s.t. ``x1 + x2 - p1 <= 0``, ``x1 - p2 <= 0``, ``x3 >= 0``.
    By hand (projection of (3, 2) on the line x1 + x2 = p1): x* = ((p1 + 1)/2, (p1 - 1)/2, 0),
    V = (5 - p1)^2 / 2 + 1, lam_g = (5 - p1, 0), lam_x3 = -2; at p = (2, 5): x* = (1.5, 0.5, 0), V = 5.5,
    dV/dp = (-3, 0), d2V/dp2 = diag(1, 0), dx/dp1 = (1/2, 1/2, 0), dlam_g1/dp1 = -1.
    """

    source = "derived by hand (projection onto a half-plane), common practice"
    p0 = (2.0, 5.0)
    x0 = (0.0, 0.0, 1.0)
    lbx = (-INF, -INF, 0.0)
    ubg = (0.0, 0.0)
    x_star = (1.5, 0.5, 0.0)
    f_star = 5.5
    lam_g_star = (3.0, 0.0)
    lam_x_star = (0.0, 0.0, -2.0)
    gradient_star = (-3.0, 0.0)
    dx_dp_star = ((0.5, 0.0), (0.5, 0.0), (0.0, 0.0))
    dlam_g_dp_star = ((-1.0, 0.0), (0.0, 0.0))
    hessian_star = ((1.0, 0.0), (0.0, 0.0))

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 3), ca.SX.sym("p", 2)
        f = (x[0] - 3) ** 2 + (x[1] - 2) ** 2 + (x[2] + 1) ** 2
        g = ca.vertcat(x[0] + x[1] - p[0], x[0] - p[1])
        return {"x": x, "p": p, "f": f, "g": g}


class HalfPlaneNorm(RefProblem):
    """``min x1^2 + x2^2`` s.t. ``x1 + x2 - p >= 0``; by hand x* = (p/2, p/2), V = p^2/2, lam = -p.

    At p = 1: dV/dp = 1, dx/dp = (1/2, 1/2), dlam/dp = -1, d2V/dp2 = 1.
    """

    source = "derived by hand (projection of the origin on a half-plane), common practice"
    p0 = (1.0,)
    x0 = (0.0, 0.0)
    lbg = 0.0
    x_star = (0.5, 0.5)
    f_star = 0.5
    lam_g_star = (-1.0,)
    gradient_star = (1.0,)
    dx_dp_star = ((0.5,), (0.5,))
    dlam_g_dp_star = ((-1.0,),)
    hessian_star = ((1.0,),)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        return {"x": x, "p": p, "f": ca.sumsqr(x), "g": x[0] + x[1] - p}


class BoxInterior(RefProblem):
    """``min (x - p)^2`` s.t. ``-10 <= x <= 10`` at p = 3: x*(p) = p inside the box, so dx/dp = 1 exactly.

    V = 0 near p, so dV/dp = 0 and d2V/dp2 = 0; no bound is active and both bound multipliers are zero.
    """

    source = "derived by hand, common practice"
    p0 = (3.0,)
    x0 = (0.0,)
    lbx, ubx = -10.0, 10.0
    x_star = (3.0,)
    f_star = 0.0
    lam_x_star = (0.0,)
    gradient_star = (0.0,)
    dx_dp_star = ((1.0,),)
    hessian_star = ((0.0,),)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        return {"x": x, "p": p, "f": (x - p) ** 2, "g": ca.SX(0, 1)}


class ExpHalfPlane(RefProblem):
    """``min x1^2 + x2^2`` s.t. ``x1 + x2 - exp(p) >= 0``: the parameter enters g nonlinearly (L_pp != 0).

    By hand: x* = exp(p)/2 (1, 1), V = exp(2p)/2, lam = -exp(p); at p = 0: dV/dp = 1, dx/dp = (1/2, 1/2),
    dlam/dp = -1 and d2V/dp2 = 2 (of which L_pp = -lam exp(p) = 1 and (dg/dp)^T dlam/dp = 1).
    """

    source = "derived by hand, common practice"
    p0 = (0.0,)
    x0 = (0.0, 0.0)
    lbg = 0.0
    x_star = (0.5, 0.5)
    f_star = 0.5
    lam_g_star = (-1.0,)
    gradient_star = (1.0,)
    dx_dp_star = ((0.5,), (0.5,))
    dlam_g_dp_star = ((-1.0,),)
    hessian_star = ((2.0,),)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        return {"x": x, "p": p, "f": ca.sumsqr(x), "g": x[0] + x[1] - ca.exp(p)}


class UpperBoundActive(RefProblem):
    """``min (x - p)^2`` s.t. ``x <= 1`` at p = 2: the simple upper bound is active, so lam_x > 0.

    By hand: x* = 1, V = (p - 1)^2, lam_x = 2 (p - 1) (from 2 (x - p) + lam_x = 0); at p = 2: V = 1,
    dV/dp = 2, dx/dp = 0, dlam_x/dp = 2, d2V/dp2 = 2.
    """

    source = "derived by hand, common practice"
    p0 = (2.0,)
    x0 = (0.0,)
    ubx = 1.0
    x_star = (1.0,)
    f_star = 1.0
    lam_x_star = (2.0,)
    gradient_star = (2.0,)
    dx_dp_star = ((0.0,),)
    dlam_x_dp_star = ((2.0,),)
    hessian_star = ((2.0,),)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        return {"x": x, "p": p, "f": (x - p) ** 2, "g": ca.SX(0, 1)}


class FixedVariable(RefProblem):
    """``min (x1 - p)^2 + (x2 - 1)^2 + p x1 x2`` with x2 fixed at 0 by ``lbx = ubx``: an equality bound row.

    By hand: x* = (p, 0), V = 1, lam_x2 = 2 - p x1 = 2 - p^2 (from 2 (x2 - 1) + p x1 + lam_x2 = 0); at
    p = 1/2: lam_x = (0, 7/4), dV/dp = 0, dx/dp = (1, 0), dlam_x/dp = (0, -2p) = (0, -1), d2V/dp2 = 0.
    """

    source = "derived by hand, common practice"
    p0 = (0.5,)
    x0 = (0.0, 0.0)
    lbx = (-INF, 0.0)
    ubx = (INF, 0.0)
    x_star = (0.5, 0.0)
    f_star = 1.0
    lam_x_star = (0.0, 1.75)
    gradient_star = (0.0,)
    dx_dp_star = ((1.0,), (0.0,))
    dlam_x_dp_star = ((0.0,), (-1.0,))
    hessian_star = ((0.0,),)

    def symbols(self) -> dict[str, Any]:
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        f = (x[0] - p) ** 2 + (x[1] - 1) ** 2 + p * x[0] * x[1]
        return {"x": x, "p": p, "f": f, "g": ca.SX(0, 1)}


class ParametricLP:
    """A small LP ``min c^T x`` s.t. ``A_ub x <= b_ub(p)``, ``A_eq x = b_eq(p)``, ``x >= 0``, b affine in p.

    Derived from the Wyndor Glass product-mix LP (Hillier & Lieberman, *Introduction to Operations Research*,
    section 3.1, recalled from memory: max 3x1 + 5x2 s.t. x1 <= 4, 2x2 <= 12, 3x1 + 2x2 <= 18, optimum
    (2, 6)) with a third, costed variable tied in by an equality ``x1 + x2 + x3 = 10``. At p = 0 the vertex
    (2, 6, 2) is non-degenerate: x1, x2, x3 and the slack of ``x1 <= 4`` are basic and positive, and by
    hand dV/d(b_ub, b_eq) = (0, -5/3, -4/3, 1). The reference duals come from HiGHS, not from this comment.
    """

    source = "Hillier & Lieberman, Wyndor Glass example (recalled from memory), extended by hand; duals by HiGHS"
    c = np.array([-3.0, -5.0, 1.0])
    A_ub = np.array([[1.0, 0.0, 0.0], [0.0, 2.0, 0.0], [3.0, 2.0, 0.0]])
    b_ub0 = np.array([4.0, 12.0, 18.0])
    B_ub = np.array([[1.0, 0.0], [0.5, -1.0], [0.0, 2.0]])  # b_ub(p) = b_ub0 + B_ub p
    A_eq = np.array([[1.0, 1.0, 1.0]])
    b_eq0 = np.array([10.0])
    B_eq = np.array([[0.3, 0.7]])
    p0 = (0.1, -0.2)

    def b_ub(self, p: np.ndarray) -> np.ndarray:
        return self.b_ub0 + self.B_ub @ np.asarray(p, dtype=float)

    def b_eq(self, p: np.ndarray) -> np.ndarray:
        return self.b_eq0 + self.B_eq @ np.asarray(p, dtype=float)

    @functools.cached_property
    def nlp(self) -> ParametricNLP:
        x, p = ca.SX.sym("x", 3), ca.SX.sym("p", 2)
        f = ca.dot(ca.DM(self.c), x)
        g_ub = ca.mtimes(ca.DM(self.A_ub), x) - (ca.DM(self.b_ub0) + ca.mtimes(ca.DM(self.B_ub), p))
        g_eq = ca.mtimes(ca.DM(self.A_eq), x) - (ca.DM(self.b_eq0) + ca.mtimes(ca.DM(self.B_eq), p))
        return ParametricNLP(
            {"x": x, "p": p, "f": f, "g": ca.vertcat(g_ub, g_eq)},
            lbx=0.0,
            lbg=[-INF, -INF, -INF, 0.0],
            ubg=0.0,
            name="ParametricLP",
        )


# --------------------------------------------------------------------------------------------------------
# Finite differences (common practice).


def fd_steps(p: np.ndarray, rel: float) -> np.ndarray:
    """Per-entry steps ``rel * max(1, |p_i|)``, so that the step scales with the parameter."""
    return rel * np.maximum(1.0, np.abs(np.asarray(p, dtype=float)))


def central_difference(fun: Callable[[np.ndarray], np.ndarray], p: Any, rel: float) -> np.ndarray:
    """Central-difference Jacobian of ``fun`` at ``p``, shape ``fun(p).shape + (n_p,)``.

    The error is ``h^2 |fun'''| / 6`` (truncation) plus ``eps_fun / h`` (the accuracy of ``fun`` amplified).
    """
    p = np.asarray(p, dtype=float)
    steps = fd_steps(p, rel)
    cols = []
    for i, h in enumerate(steps):
        e = np.zeros_like(p)
        e[i] = h
        cols.append((np.asarray(fun(p + e), dtype=float) - np.asarray(fun(p - e), dtype=float)) / (2 * h))
    return np.stack(cols, axis=-1)


def solved(prob: ParametricNLP, p: Any):  # noqa: ANN201 - LocalResult
    """Solve cold at ``p`` and fail loudly (status and message) unless the solve converged."""
    res = prob.solve(p)
    assert res.success, f"{prob.name} at p={list(np.atleast_1d(p))}: {res.status} ({res.message})"
    return res


def value_of(prob: ParametricNLP) -> Callable[[np.ndarray], float]:
    """``p -> V(p)`` from cold solves that must converge."""
    return lambda p: solved(prob, p).value


# CasADi 3.8.2 derivative of an nlpsol call, per problem, from the solver that is reliable there:
# - sqpmethod + qrqp (an active-set method: its multipliers are exact zeros off the active set) works on
#   all problems except CircleEquality, where from (-1.2, -0.8) with zero multipliers its first QP has a
#   zero Hessian and it stops with Search_Direction_Becomes_Too_Small; there IPOPT is used.
# - IPOPT's own derivatives are not reliable: for HS071 and HS035 the derivative evaluation raises
#   ("Evaluation failed"), and where an inactive bound or row keeps a tiny interior-point multiplier it
#   treats that row as active: ProjectionQP (lam_g2 = 7e-10) gives dx/dp = [[0, 1], [1, -1], [0, 0]]
#   instead of [[1/2, 0], [1/2, 0], [0, 0]], BoxInterior (lam_x = 1.7e-10) gives dx/dp = 0 instead of 1.
CASADI_REFERENCE: list[tuple[str, str]] = [
    ("ProjectionQP", "sqpmethod"),
    ("HS071", "sqpmethod"),
    ("HS035", "sqpmethod"),
    ("CircleEquality", "ipopt"),
    ("ConstrainedRosenbrock", "sqpmethod"),
    ("ConstrainedRosenbrock", "ipopt"),
    ("HalfPlaneNorm", "sqpmethod"),
    ("HalfPlaneNorm", "ipopt"),
    ("ExpHalfPlane", "sqpmethod"),
    ("BoxInterior", "sqpmethod"),
    ("UpperBoundActive", "sqpmethod"),
    ("FixedVariable", "sqpmethod"),
    ("FixedVariable", "ipopt"),
]
PLUGIN_OPTIONS: dict[str, dict[str, Any]] = {"sqpmethod": SQP_QUIET, "ipopt": IPOPT_QUIET}

REFERENCE_PROBLEMS: tuple[RefProblem, ...] = (
    ProjectionQP(),
    HS071(),
    HS035(),
    CircleEquality(),
    ConstrainedRosenbrock(),
    HalfPlaneNorm(),
    ExpHalfPlane(),
    BoxInterior(),
    UpperBoundActive(),
    FixedVariable(),
)
"""All nonlinear reference problems, one instance each (their ``nlp`` is built once and shared)."""


def by_name(name: str) -> RefProblem:
    """The shared instance of a reference problem."""
    return next(prob for prob in REFERENCE_PROBLEMS if prob.name == name)
