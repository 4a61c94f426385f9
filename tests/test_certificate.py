"""Classification tests for the KKT certificate: textbook facts about second-order conditions and LICQ.

Each fact below is standard NLP theory (Nocedal & Wright, *Numerical Optimization*, 2nd ed., 2006,
Section 12.4-12.5 for second-order conditions and Definition 12.4 for LICQ; Fiacco, 1983, for the
sensitivity consequences). Where a fact has no single source it is marked as common practice.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest

from negotiate import ParametricNLP
from negotiate.core.kkt import Bounds, Point, Tolerances, certify


def solve(nlp, p, **kw):
    res = ParametricNLP(nlp, **kw).solve(p)
    assert res.success, f"{res.status}: {res.message}"
    return res


class TestSecondOrder:
    def test_lp_vertex_pushed_by_cost_is_strict(self):
        """An LP vertex whose cost pushes against both constraints has an empty reduced space: strict SOSC."""
        # min -x1 - x2  s.t. x1 + 2 x2 <= p1, 2 x1 + x2 <= p2; vertex (1, 1) for p = (3, 3), multipliers 1/3.
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p", 2)
        g = ca.vertcat(x[0] + 2 * x[1] - p[0], 2 * x[0] + x[1] - p[1])
        res = solve({"x": x, "p": p, "f": -x[0] - x[1], "g": g}, [3.0, 3.0], ubg=0, lbx=0)
        cert = res.certificate
        np.testing.assert_allclose(res.x, [1.0, 1.0], atol=1e-9)  # polished vertex: to round-off
        assert cert.sosc == "strict" and cert.reduced_dim == 0 and cert.sosc_eigenvalue is None
        assert cert.licq and not cert.weakly_active and cert.verdict == "smooth"
        # Multipliers by hand: -grad f = lam^T A => lam = (1/3, 1/3); dV/dp = -lam.
        np.testing.assert_allclose(res.gradient, [-1 / 3, -1 / 3], atol=1e-9)

    def test_lp_cost_not_pushing_is_weakly_active(self):
        """An LP vertex where the cost does not push on an active constraint is weakly active, not strict."""
        # min x1 s.t. x1 >= 0, x2 >= 0, read at the vertex (0, 0) as an active-set LP solver returns it: the
        # cost pushes on x1 >= 0 (multiplier -1) but not on x2 >= 0 (multiplier 0), and the reduced space
        # (the x2 axis) carries zero curvature.
        pt = Point(
            x=np.zeros(2), lam_g=np.zeros(0), lam_x=np.array([-1.0, 0.0]), f=0.0, g=np.zeros(0),
            grad_f=np.array([1.0, 0.0]), J=np.zeros((0, 2)), H=np.zeros((2, 2)), grad_p=np.zeros(1),
        )  # fmt: skip
        bnd = Bounds(np.zeros(2), np.full(2, np.inf), ("x1", "x2"), 0)
        cert = certify(
            pt, bnd, Tolerances(), polished=True, hessian_at=lambda x: np.zeros((2, 2)),
            cross_derivative=lambda: np.zeros((1, 2)),
        )  # fmt: skip
        assert [str(r) for r in cert.weakly_active] == ["x2 (lower)"]
        assert [str(r) for r in cert.strictly_active] == ["x1 (lower)"]
        assert cert.licq and cert.sosc == "weak" and cert.verdict == "nonsmooth"

    def test_lp_with_optimal_edge_is_not_strict(self):
        """The same LP solved by IPOPT lands inside the optimal edge: flat direction, SOSC weak, not smooth."""
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        res = solve({"x": x, "p": p, "f": x[0] + 0 * p, "g": x[1] - p}, [1.0], ubg=0, lbx=0)
        cert = res.certificate
        assert 0.0 < res.x[1] < 1.0  # interior of the edge {x1 = 0, 0 <= x2 <= 1}
        assert cert.sosc == "weak" and cert.verdict != "smooth"
        assert not res.sensitivity().available

    def test_quartic_is_weak(self):
        """min x^4 has a zero Hessian at its minimiser: second-order sufficiency holds only weakly."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        res = solve({"x": x, "p": p, "f": x**4 + 0 * p}, [0.0], x0=1.0)
        cert = res.certificate
        assert cert.sosc == "weak", cert.summary()
        assert cert.verdict == "value-differentiable"  # V(p) = 0 for all p: the gradient is still unique

    def test_quadratic_is_strict(self):
        """min (x - p)^2 has Hessian 2 > 0: strict SOSC, smooth, dx/dp = 1."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        res = solve({"x": x, "p": p, "f": (x - p) ** 2}, [0.3], x0=1.0, lbx=-10, ubx=10)
        assert res.certificate.sosc == "strict" and res.certificate.verdict == "smooth"
        np.testing.assert_allclose(res.certificate.sosc_eigenvalue, 2.0, rtol=1e-9)
        np.testing.assert_allclose(res.sensitivity().dx_dp, [[1.0]], atol=1e-12)

    def test_curved_equality_makes_nonconvex_cost_strict(self):
        """A curved equality constraint can make a nonconvex cost strictly second-order sufficient."""
        # min -x1^2 + x2^2/2 + p x1 on the unit circle. At (1, 0) with p = 0.1: lam = (2 - p)/2 = 0.95,
        # Hessian of L = diag(-2 + 2 lam, 1 + 2 lam) = diag(-0.1, 2.9); tangent direction (0, 1): 2.9 > 0,
        # although the cost's Hessian diag(-2, 1) is indefinite.
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        nlp = {"x": x, "p": p, "f": -(x[0] ** 2) + 0.5 * x[1] ** 2 + p * x[0], "g": x[0] ** 2 + x[1] ** 2}
        res = solve(nlp, [0.1], lbg=1, ubg=1, x0=[0.9, 0.1])
        cert = res.certificate
        np.testing.assert_allclose(res.x, [1.0, 0.0], atol=1e-9)
        np.testing.assert_allclose(res.lam_g, [0.95], rtol=1e-9)
        np.testing.assert_allclose(cert.sosc_eigenvalue, 2.9, rtol=1e-9)
        assert cert.sosc == "strict" and cert.verdict == "smooth"

    def test_saddle_point_fails(self):
        """A KKT point with negative curvature on the reduced space fails the second-order test."""
        # Built directly: f = -x1^2 + x2^2 at the stationary point 0 (a saddle), no constraints.
        pt = Point(
            x=np.zeros(2), lam_g=np.zeros(0), lam_x=np.zeros(2), f=0.0, g=np.zeros(0), grad_f=np.zeros(2),
            J=np.zeros((0, 2)), H=np.diag([-2.0, 2.0]), grad_p=np.zeros(1),
        )  # fmt: skip
        bnd = Bounds(np.full(2, -np.inf), np.full(2, np.inf), ("x[0]", "x[1]"), 0)
        cert = certify(
            pt, bnd, Tolerances(), polished=True, hessian_at=lambda x: np.diag([-2.0, 2.0]),
            cross_derivative=lambda: np.zeros((1, 2)),
        )  # fmt: skip
        assert cert.sosc == "fails" and cert.verdict == "nonsmooth"
        np.testing.assert_allclose(cert.sosc_eigenvalue, -2.0)


class TestLICQ:
    def test_duplicated_active_constraints_fail_licq(self):
        """Two identical active constraints have linearly dependent gradients: LICQ fails."""
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        row = x[0] + x[1] - p
        res = solve({"x": x, "p": p, "f": (x[0] - 2) ** 2 + (x[1] - 2) ** 2, "g": ca.vertcat(row, row)}, [1.0], ubg=0)
        cert = res.certificate
        assert not cert.licq and cert.licq_rank == 1
        assert cert.verdict == "nonsmooth"
        assert {str(r) for r in cert.dependent} == {"g[0] (upper)", "g[1] (upper)"}
        # The multiplier is not unique, but every split gives the same gradient here (both rows move with p).
        np.testing.assert_allclose(res.gradient, [-3.0], atol=1e-7)  # V = (p - 4)^2 / 2 by hand, V'(1) = -3

    def test_independent_active_constraints_pass_licq(self):
        """Two active constraints with independent gradients satisfy LICQ; sigma_min is reported."""
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p", 2)
        g = ca.vertcat(x[0] - p[0], x[1] - p[1])
        res = solve({"x": x, "p": p, "f": (x[0] - 2) ** 2 + (x[1] - 2) ** 2, "g": g}, [1.0, 1.0], ubg=0)
        cert = res.certificate
        assert cert.licq and cert.licq_rank == 2
        np.testing.assert_allclose(cert.licq_sigma_min, 1.0, rtol=1e-12)  # orthonormal rows


class TestWeakActivity:
    def test_kink_of_solution_map_is_value_differentiable(self):
        """min (x-1)^2 s.t. x <= p at p = 1: the constraint is weakly active, V is C^1, x*(p) has a kink."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        prob = ParametricNLP({"x": x, "p": p, "f": (x - 1) ** 2, "g": x - p}, ubg=0, g_names=["x <= p"])
        res = prob.solve([1.0])
        cert = res.certificate
        assert [str(r) for r in cert.weakly_active] == ["x <= p (upper)"]
        assert cert.verdict == "value-differentiable"
        assert "x <= p" in cert.reason
        sens = res.sensitivity()
        assert not sens.available and sens.dx_dp is None and "value-differentiable" in sens.reason
        # Either side is smooth, with V'(p) = 2 (p - 1) for p < 1 and 0 for p > 1.
        for pv, grad in ((0.5, -1.0), (1.5, 0.0)):
            r = prob.solve([pv])
            assert r.certificate.verdict == "smooth"
            np.testing.assert_allclose(r.gradient, [grad], atol=1e-10)

    def test_degenerate_vertex_is_nonsmooth(self):
        """min -x s.t. x <= p, x <= 1 at p = 1: V = -min(p, 1) has a kink, both rows active, LICQ fails."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        prob = ParametricNLP({"x": x, "p": p, "f": -x, "g": ca.vertcat(x - p, x)}, ubg=[0, 1])
        res = prob.solve([1.0])
        assert res.certificate.verdict == "nonsmooth"
        # The reported gradient lies in the generalised gradient [-1, 0] of V at p = 1.
        assert -1.0 - 1e-9 <= res.gradient[0] <= 1e-9
        np.testing.assert_allclose(prob.solve([0.5]).gradient, [-1.0], atol=1e-10)
        np.testing.assert_allclose(prob.solve([1.5]).gradient, [0.0], atol=1e-10)

    def test_flat_solution_set_with_moving_gradient_is_nonsmooth(self):
        """An LP whose parametric cost is parallel to an edge has a solution set along which dV/dp varies."""
        # min p x1 + x2 ... with p = 0 the cost is x2 only; x1 free in [0, 1]: V(p) = min(0, p), kink at 0.
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        res = solve({"x": x, "p": p, "f": p * x[0] + x[1]}, [0.0], lbx=0, ubx=1)
        assert res.certificate.sosc == "weak"
        assert res.certificate.verdict == "nonsmooth"


@pytest.mark.parametrize("pv", [0.5, 2.0])
def test_gradient_of_duplicated_rows_example(pv):
    """With duplicated rows x1 + x2 <= p, V(p) = (p - 4)^2 / 2 for p < 4, so dV/dp = p - 4 (by hand)."""
    x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
    row = x[0] + x[1] - p
    res = solve({"x": x, "p": p, "f": (x[0] - 2) ** 2 + (x[1] - 2) ** 2, "g": ca.vertcat(row, row)}, [pv], ubg=0)
    np.testing.assert_allclose(res.value, (pv - 4) ** 2 / 2, rtol=1e-9)
    np.testing.assert_allclose(res.gradient, [pv - 4], atol=1e-7)  # 1e-7: IPOPT's split, then polished


class TestScaleAwareness:
    def test_small_objective_keeps_strict_activity(self):
        """Scaling the cost by 1e-7 scales the multipliers too; strict complementarity is unchanged."""
        # min 1e-7 (x1^2 + x2^2) s.t. x1 + x2 >= p: lam = -1e-7 p (by hand), strictly active for p > 0.
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        res = solve({"x": x, "p": p, "f": 1e-7 * ca.sumsqr(x), "g": x[0] + x[1] - p}, [1.0], lbg=0)
        assert res.certificate.verdict == "smooth", res.certificate.summary()

    def test_large_bound_with_clear_slack_is_inactive(self):
        """A bound at 1e6 with a slack of 0.5 is inactive once the point is polished."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        res = solve({"x": x, "p": p, "f": (x - 1e6 + 0.5 - p) ** 2}, [0.0], ubx=1e6)
        assert res.certificate.polished and not res.certificate.active
        assert res.certificate.verdict == "smooth"

    def test_large_cost_does_not_excuse_an_active_row(self):
        """With a cost of 1e9 an active row is still polished onto its bound in its own units."""
        # min 1e9 ((x1 - 400)^2 + (x2 - 300)^2) s.t. x1^2 + x2^2 <= 62500: the projection of (400, 300) onto
        # the circle of radius 250 is (200, 150) (closed form), and the multiplier follows from
        # grad f + 2 lam x = 0: lam = 1e9 (400/200 - 1) = 1e9, so dV/dr^2 = -1e9 with r^2 = p * 62500.
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        f = 1e9 * ((x[0] - 400) ** 2 + (x[1] - 300) ** 2)
        res = solve({"x": x, "p": p, "f": f, "g": x[0] ** 2 + x[1] ** 2 - 62500 * p}, [1.0], ubg=0)
        assert res.certificate.polished
        np.testing.assert_allclose(res.x[0] ** 2 + res.x[1] ** 2, 62500, rtol=1e-13)  # on the row, to round-off
        np.testing.assert_allclose(res.x, [200, 150], rtol=1e-12)
        np.testing.assert_allclose(res.gradient, [-1e9 * 62500], rtol=1e-9)
