"""Value gradients and multipliers of ParametricNLP checked against references outside negotiate.

References: published optima and multipliers (Hock & Schittkowski 1981; the IPOPT documentation's HS071
example), closed forms derived by hand, central finite differences of V, CasADi's own sensitivities of an
``nlpsol`` call, and the duals HiGHS reports through ``scipy.optimize.linprog``. Sources are named beside
each check and in ``refproblems.py``; each tolerance says why it has its size.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest
import refproblems as ref
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

from negotiate import ParametricNLP

# Central differences (common practice): with h_i = 1e-5 max(1, |p_i|) the truncation error h^2 |V'''| / 6
# is below 1e-10 on these problems and the round-off error eps(V) / h is about 1e-15 * |V| / 1e-5 = 1e-10
# (V is accurate to round-off after negotiate's active-set polish). Measured errors are below 1e-10, so
# atol = 1e-8 leaves two decades of margin, while it still catches a wrong sign or a missing term in any
# entry larger than 1e-8 (the smallest nonzero reference entry, d f*/d b of the Rosenbrock problem, is 5.6e-7).
FD_REL = 1e-5
FD_ATOL = 1e-8
FD_RTOL = 1e-6

# After the polish, x and the multipliers solve the KKT equalities to round-off (about 1e-14); 1e-8 still
# passes a point that is only IPOPT-accurate (tol 1e-8), so it tests the formulas, not the polish.
EXACT_ATOL = 1e-8

PROBLEMS = ref.REFERENCE_PROBLEMS
IDS = [prob.name for prob in PROBLEMS]
WITH_GRADIENT = [prob for prob in PROBLEMS if prob.gradient_star is not None]
WITH_MULTIPLIERS = [prob for prob in PROBLEMS if prob.lam_g_star is not None or prob.lam_x_star is not None]

CASADI_REFERENCE = ref.CASADI_REFERENCE
PLUGIN_OPTIONS = ref.PLUGIN_OPTIONS

# The reference solver stops at its own tolerance: sqpmethod stops at tol_pr = tol_du = 1e-6 (defaults) but
# converges quadratically with the exact Hessian, so the iterate it stops at is far more accurate (measured
# 6e-11 on HS071); IPOPT's default tol = 1e-8 leaves its x and multipliers about 1e-8 from the exact KKT
# point (measured 9.5e-9). 1e-7 covers both with a decade of margin.
CASADI_ATOL = 1e-7


def _casadi(name: str, plugin: str) -> tuple[ref.RefProblem, list[np.ndarray]]:
    prob = ref.by_name(name)
    _, stats = prob.casadi_solver(plugin, PLUGIN_OPTIONS[plugin])
    assert stats["success"], f"reference solver {plugin} failed on {name}: {stats['return_status']}"
    outs = prob.casadi_derivatives(plugin, PLUGIN_OPTIONS[plugin])(list(prob.p0))
    return prob, [np.asarray(o, dtype=float) for o in outs]


def _random_qp(seed: int) -> tuple[ParametricNLP, np.ndarray]:
    """A strictly convex QP with parametric linear term and parametric right-hand sides, feasible at p0."""
    rng = np.random.default_rng(seed)
    n, m, k = 3, 3, 2
    M = rng.normal(size=(n, n))
    Q = M @ M.T + 0.5 * np.eye(n)  # eigenvalues >= 0.5: strictly convex, unique minimiser
    c = 3.0 * rng.normal(size=n)  # large enough that some rows are usually active
    C = rng.normal(size=(n, k))
    A = rng.normal(size=(m, n))
    B = rng.normal(size=(m, k))
    p0 = rng.uniform(-1.0, 1.0, size=k)
    b = rng.uniform(0.1, 1.0, size=m) - B @ p0  # x = 0 strictly feasible at p0
    x, p = ca.SX.sym("x", n), ca.SX.sym("p", k)
    f = 0.5 * ca.bilin(ca.DM(Q), x, x) + ca.dot(ca.DM(c) + ca.mtimes(ca.DM(C), p), x)
    g = ca.mtimes(ca.DM(A), x) - ca.mtimes(ca.DM(B), p) - ca.DM(b)
    return ParametricNLP({"x": x, "p": p, "f": f, "g": g}, ubg=0.0, name=f"qp{seed}"), p0


class TestSolve:
    """``ParametricNLP.solve``: value, primal point, multipliers and value gradient."""

    @pytest.mark.parametrize("prob", PROBLEMS, ids=IDS)
    def test_known_optimum(self, prob: ref.RefProblem) -> None:
        """The optimum and optimal value match the published or hand-derived ones."""
        res = ref.solved(prob.nlp, prob.p0)
        # HS071's x* is printed with 8 significant digits and the Rosenbrock optimum with 4 (both recalled
        # from memory): allow a few units in the last printed digit; the other answers are exact.
        atol = {"HS071": 5e-7, "ConstrainedRosenbrock": 5e-5}.get(prob.name, EXACT_ATOL)
        np.testing.assert_allclose(res.x, prob.x_star, rtol=0, atol=atol)
        np.testing.assert_allclose(res.value, prob.f_star, rtol=0, atol=atol)

    @pytest.mark.parametrize("prob", WITH_MULTIPLIERS, ids=[p.name for p in WITH_MULTIPLIERS])
    def test_known_multipliers(self, prob: ref.RefProblem) -> None:
        """The multipliers match the published or hand-derived ones in CasADi's sign convention."""
        res = ref.solved(prob.nlp, prob.p0)
        # HS071's multipliers come from the IPOPT documentation as recalled from memory, to 8 digits; z_L[0]
        # (1.0878710) differs from the computed 1.08787123 by 2.3e-7, so allow 5e-7 there (a memory slip in
        # the last digit or two is possible); the other multipliers are exact fractions.
        atol = 5e-7 if prob.name == "HS071" else EXACT_ATOL
        if prob.lam_g_star is not None:
            np.testing.assert_allclose(res.lam_g, prob.lam_g_star, rtol=0, atol=atol)
        if prob.lam_x_star is not None:
            np.testing.assert_allclose(res.lam_x, prob.lam_x_star, rtol=0, atol=atol)

    @pytest.mark.parametrize("prob", WITH_GRADIENT, ids=[p.name for p in WITH_GRADIENT])
    def test_gradient_matches_known(self, prob: ref.RefProblem) -> None:
        """The value gradient equals the one implied by the published or hand-derived multipliers."""
        res = ref.solved(prob.nlp, prob.p0)
        atol = 5e-7 if prob.name == "HS071" else EXACT_ATOL  # as in test_known_multipliers
        np.testing.assert_allclose(res.gradient, prob.gradient_star, rtol=0, atol=atol)

    @pytest.mark.parametrize("prob", PROBLEMS, ids=IDS)
    def test_gradient_matches_central_difference(self, prob: ref.RefProblem) -> None:
        """The value gradient equals a central finite difference of V (common practice)."""
        res = ref.solved(prob.nlp, prob.p0)
        fd = ref.central_difference(ref.value_of(prob.nlp), prob.p0, FD_REL)
        np.testing.assert_allclose(res.gradient, fd, rtol=FD_RTOL, atol=FD_ATOL)

    def test_lp_gradient_matches_central_difference(self) -> None:
        """At a non-degenerate LP vertex V is affine nearby, so a central difference is exact up to round-off."""
        lp = ref.ParametricLP()
        res = ref.solved(lp.nlp, lp.p0)
        fd = ref.central_difference(ref.value_of(lp.nlp), lp.p0, FD_REL)
        np.testing.assert_allclose(res.gradient, fd, rtol=FD_RTOL, atol=FD_ATOL)

    def test_lp_gradient_matches_highs_duals(self) -> None:
        """On a parametric LP the value gradient equals B^T times the HiGHS marginals d(objective)/d(b)."""
        lp = ref.ParametricLP()
        p = np.asarray(lp.p0)
        highs = linprog(
            lp.c, A_ub=lp.A_ub, b_ub=lp.b_ub(p), A_eq=lp.A_eq, b_eq=lp.b_eq(p), bounds=(0, None), method="highs"
        )
        assert highs.status == 0, highs.message
        res = ref.solved(lp.nlp, p)
        # HiGHS' marginals are the derivatives of the optimal objective with respect to b_ub and b_eq, so by
        # the chain rule dV/dp = B_ub^T m_ub + B_eq^T m_eq. Both sides are vertex quantities computed to
        # round-off (HiGHS by its simplex basis, negotiate by its polish); 1e-8 leaves a wide margin.
        expected = lp.B_ub.T @ highs.ineqlin.marginals + lp.B_eq.T @ highs.eqlin.marginals
        np.testing.assert_allclose(res.gradient, expected, rtol=0, atol=EXACT_ATOL)
        np.testing.assert_allclose(res.x, highs.x, rtol=0, atol=EXACT_ATOL)
        assert res.certificate.verdict == "smooth", res.certificate.summary()

    def test_lp_multipliers_match_highs_duals(self) -> None:
        """Our lam_g is minus the HiGHS marginals (dV/d(bound) = -lam in our convention, g = A x - b(p))."""
        lp = ref.ParametricLP()
        p = np.asarray(lp.p0)
        highs = linprog(
            lp.c, A_ub=lp.A_ub, b_ub=lp.b_ub(p), A_eq=lp.A_eq, b_eq=lp.b_eq(p), bounds=(0, None), method="highs"
        )
        res = ref.solved(lp.nlp, p)
        marginals = np.concatenate([highs.ineqlin.marginals, highs.eqlin.marginals])
        np.testing.assert_allclose(res.lam_g, -marginals, rtol=0, atol=EXACT_ATOL)
        # x >= 0 is inactive at this vertex (all three variables basic): HiGHS' lower marginals are zero.
        np.testing.assert_allclose(res.lam_x, -highs.lower.marginals, rtol=0, atol=EXACT_ATOL)

    @pytest.mark.parametrize(("name", "plugin"), CASADI_REFERENCE, ids=[f"{n}-{s}" for n, s in CASADI_REFERENCE])
    def test_gradient_matches_casadi_derivative(self, name: str, plugin: str) -> None:
        """The value gradient equals casadi.jacobian of the f output of an nlpsol call with respect to p."""
        prob, (f, x, lam_p, df_dp, _dx_dp) = _casadi(name, plugin)
        res = ref.solved(prob.nlp, prob.p0)
        np.testing.assert_allclose(res.value, f.item(), rtol=0, atol=CASADI_ATOL)
        np.testing.assert_allclose(res.x, x.ravel(), rtol=0, atol=CASADI_ATOL)
        np.testing.assert_allclose(res.gradient, df_dp.ravel(), rtol=0, atol=CASADI_ATOL)

    @pytest.mark.parametrize("name", ["HS071", "HS035", "ProjectionQP", "ConstrainedRosenbrock", "CircleEquality"])
    def test_ipopt_lam_p_is_minus_gradient(self, name: str) -> None:
        """Pin of CasADi 3.8.2 + IPOPT: the lam_p output of nlpsol equals minus our value gradient."""
        prob = ref.by_name(name)
        out, stats = prob.casadi_solver("ipopt", ref.IPOPT_QUIET)
        assert stats["success"], stats["return_status"]
        res = ref.solved(prob.nlp, prob.p0)
        # IPOPT stops within its tol = 1e-8 of the KKT point; negotiate's gradient is the polished one.
        np.testing.assert_allclose(out["lam_p"].ravel(), -res.gradient, rtol=0, atol=CASADI_ATOL)

    def test_objective_scaling_scales_gradient(self) -> None:
        """Scaling the objective of HalfPlaneNorm by 1e-7 scales V and its gradient by 1e-7 (by hand)."""
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        prob = ParametricNLP({"x": x, "p": p, "f": 1e-7 * ca.sumsqr(x), "g": x[0] + x[1] - p}, lbg=0.0)
        res = ref.solved(prob, [1.0])
        # V = 1e-7 p^2 / 2 and lam = -1e-7 p exactly after the polish; 1e-17 is round-off of 1e-7-sized numbers.
        np.testing.assert_allclose(res.gradient, [1e-7], rtol=1e-9, atol=1e-17)
        np.testing.assert_allclose(res.lam_g, [-1e-7], rtol=1e-9, atol=1e-17)

    def test_ipopt_lam_x_positive_at_active_upper_bound(self) -> None:
        """Pin of CasADi 3.8.2 + IPOPT: lam_x > 0 at an active upper bound (UpperBoundActive, lam_x = 2 by hand)."""
        prob = ref.UpperBoundActive()
        out, _stats = prob.casadi_solver("ipopt", ref.IPOPT_QUIET)
        res = ref.solved(prob.nlp, prob.p0)
        assert out["lam_x"].item() > 1.0 and res.lam_x[0] > 1.0
        np.testing.assert_allclose(res.lam_x[0], out["lam_x"].item(), rtol=0, atol=CASADI_ATOL)
        np.testing.assert_allclose(res.lam_x, prob.lam_x_star, rtol=0, atol=EXACT_ATOL)

    @pytest.mark.parametrize(("name", "index"), [("HS071", 0), ("ProjectionQP", 2)])
    def test_ipopt_lam_x_negative_at_active_lower_bound(self, name: str, index: int) -> None:
        """Pin of CasADi 3.8.2 + IPOPT: lam_x < 0 at an active lower bound, and ours agrees in sign and size."""
        prob = ref.by_name(name)
        out, _stats = prob.casadi_solver("ipopt", ref.IPOPT_QUIET)
        lam_ipopt = float(out["lam_x"].ravel()[index])
        res = ref.solved(prob.nlp, prob.p0)
        # Published: z_L[0] = 1.0878710 for HS071 (IPOPT documentation, recalled from memory) enters
        # IPOPT's Lagrangian with a minus sign; ProjectionQP: lam_x3 = -2 by hand.
        assert lam_ipopt < -1.0, lam_ipopt
        assert res.lam_x[index] < -1.0, res.lam_x
        np.testing.assert_allclose(res.lam_x[index], lam_ipopt, rtol=0, atol=CASADI_ATOL)
        np.testing.assert_allclose(res.lam_x[index], prob.lam_x_star[index], rtol=0, atol=5e-7)

    @settings(
        max_examples=25,
        deadline=None,
        derandomize=True,
        database=None,
        suppress_health_check=[HealthCheck.filter_too_much],
    )
    @given(seed=st.integers(min_value=0, max_value=2**32 - 1))
    def test_random_qp_gradient_matches_central_difference(self, seed: int) -> None:
        """On random strictly convex parametric QPs with a smooth verdict, the gradient equals a central FD of V."""
        prob, p0 = _random_qp(seed)
        res = prob.solve(p0)
        assume(res.success and res.certificate.verdict == "smooth")
        # With strict complementarity the active set is constant near p0, and V is quadratic there, so a
        # central difference has no truncation error; it is only valid if the step stays inside that
        # region, which the active sets at p0 +- h confirm (otherwise the example says nothing).
        steps = ref.fd_steps(p0, FD_REL)
        for i, h in enumerate(steps):
            for sign in (-1.0, 1.0):
                q = p0.copy()
                q[i] += sign * h
                other = prob.solve(q)
                assume(other.success and other.certificate.active == res.certificate.active)
        fd = ref.central_difference(ref.value_of(prob), p0, FD_REL)
        # Only round-off remains: eps(V) / h ~ 1e-15 * max(1, |V|) / 1e-5; V here is O(10).
        np.testing.assert_allclose(res.gradient, fd, rtol=FD_RTOL, atol=FD_ATOL)


class TestFromOpti:
    """``ParametricNLP.from_opti``: parameters in constraint bounds still carry their price into dV/dp."""

    def test_hs071_gradient_matches_documented_multipliers(self) -> None:
        """HS071 written with Opti (parametric constraint levels) gives dV/dp = -lambda of IPOPT's example."""
        opti = ca.Opti()
        x = opti.variable(4)
        p = opti.parameter(2)
        opti.minimize(x[0] * x[3] * (x[0] + x[1] + x[2]) + x[2])
        opti.subject_to(x[0] * x[1] * x[2] * x[3] >= p[0])
        opti.subject_to(ca.sumsqr(x) == p[1])
        opti.subject_to(opti.bounded(1, x, 5))
        opti.set_initial(x, [1, 5, 5, 1])
        opti.set_value(p, [25, 40])
        prob = ParametricNLP.from_opti(opti)
        hs = ref.HS071()
        res = ref.solved(prob, hs.p0)
        # Published multipliers (IPOPT documentation, recalled from memory) to 8 digits: allow 5e-7.
        np.testing.assert_allclose(res.gradient, hs.gradient_star, rtol=0, atol=5e-7)
        np.testing.assert_allclose(res.value, hs.f_star, rtol=0, atol=5e-7)
        fd = ref.central_difference(ref.value_of(prob), hs.p0, FD_REL)
        np.testing.assert_allclose(res.gradient, fd, rtol=FD_RTOL, atol=FD_ATOL)
