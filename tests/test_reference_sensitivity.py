"""Solution sensitivities of ParametricNLP (dx*/dp, multiplier derivatives, value Hessian) against references.

References: closed forms derived by hand, central finite differences of x*(p), of the multipliers and of
the value gradient, and CasADi's own derivative of an ``nlpsol`` call. Problems and sources live in
``refproblems.py``; each tolerance says why it has its size.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest
import refproblems as ref

from negotiate import ParametricNLP

# Central differences (common practice) with h_i = 1e-5 max(1, |p_i|): truncation h^2 |third derivative| / 6
# is below 1e-10 here, and x*, the multipliers and the gradient are accurate to round-off (about 1e-15)
# after the active-set polish, so round-off costs about 1e-15 / 1e-5 = 1e-10. Measured errors are below
# 1e-10; atol = 1e-8 keeps two decades of margin. The smallest nonzero entries (Rosenbrock, d/db, 1e-8 to
# 6e-6) are only checked to that absolute level; every other entry is zero or above 1e-3.
FD_REL = 1e-5
FD_ATOL = 1e-8
FD_RTOL = 1e-6

# Closed forms are exact; the KKT solve on the polished point is accurate to round-off (1e-14), so 1e-10
# is far above what a correct implementation can miss by and far below any formula error.
EXACT_ATOL = 1e-10

# sqpmethod (exact Hessian, qrqp) ends with a full Newton step, so its x and multipliers are accurate to
# about 1e-10 and so is its dx/dp (measured 3e-12 on HS071); IPOPT (tol 1e-8) leaves x about 1e-8 off,
# and dx/dp inherits that. 1e-7 covers both.
CASADI_ATOL = 1e-7

SMOOTH = ref.REFERENCE_PROBLEMS  # all of them are smooth at p0 (checked in test_certificate_is_smooth)
IDS = [prob.name for prob in SMOOTH]
CLOSED_FORM = [prob for prob in SMOOTH if prob.dx_dp_star is not None]


def _sensitivity(prob: ref.RefProblem):  # noqa: ANN202 - (LocalResult, Sensitivity)
    res = ref.solved(prob.nlp, prob.p0)
    sens = res.sensitivity()
    assert sens.available, f"{prob.name}: {sens.reason} ({res.certificate.summary()})"
    return res, sens


class TestSensitivity:
    """``LocalResult.sensitivity``: dx*/dp, dlam/dp and d2V/dp2."""

    @pytest.mark.parametrize("prob", SMOOTH, ids=IDS)
    def test_certificate_is_smooth(self, prob: ref.RefProblem) -> None:
        """Every reference problem satisfies LICQ, strict SOSC and strict complementarity at p0 (by hand)."""
        res = ref.solved(prob.nlp, prob.p0)
        assert res.certificate.verdict == "smooth", res.certificate.summary()
        assert res.certificate.licq and res.certificate.sosc == "strict" and not res.certificate.weakly_active

    @pytest.mark.parametrize("prob", SMOOTH, ids=IDS)
    def test_dx_dp_matches_central_difference(self, prob: ref.RefProblem) -> None:
        """dx*/dp equals a central finite difference of the solution map x*(p) (common practice)."""
        _res, sens = _sensitivity(prob)
        fd = ref.central_difference(lambda p: ref.solved(prob.nlp, p).x, prob.p0, FD_REL)
        assert sens.dx_dp.shape == fd.shape == (prob.nlp.n_x, prob.nlp.n_p)
        np.testing.assert_allclose(sens.dx_dp, fd, rtol=FD_RTOL, atol=FD_ATOL)

    @pytest.mark.parametrize("prob", SMOOTH, ids=IDS)
    def test_dlam_g_dp_matches_central_difference(self, prob: ref.RefProblem) -> None:
        """dlam_g/dp equals a central finite difference of the row multipliers (common practice)."""
        _res, sens = _sensitivity(prob)
        fd = ref.central_difference(lambda p: ref.solved(prob.nlp, p).lam_g, prob.p0, FD_REL)
        assert sens.dlam_g_dp.shape == (prob.nlp.n_g, prob.nlp.n_p)
        np.testing.assert_allclose(sens.dlam_g_dp, fd.reshape(sens.dlam_g_dp.shape), rtol=FD_RTOL, atol=FD_ATOL)

    @pytest.mark.parametrize("prob", SMOOTH, ids=IDS)
    def test_dlam_x_dp_matches_central_difference(self, prob: ref.RefProblem) -> None:
        """dlam_x/dp equals a central finite difference of the bound multipliers (common practice)."""
        _res, sens = _sensitivity(prob)
        fd = ref.central_difference(lambda p: ref.solved(prob.nlp, p).lam_x, prob.p0, FD_REL)
        np.testing.assert_allclose(sens.dlam_x_dp, fd, rtol=FD_RTOL, atol=FD_ATOL)

    @pytest.mark.parametrize("prob", SMOOTH, ids=IDS)
    def test_value_hessian_matches_central_difference_of_gradient(self, prob: ref.RefProblem) -> None:
        """d2V/dp2 equals a central finite difference of the value gradient (common practice)."""
        _res, sens = _sensitivity(prob)
        fd = ref.central_difference(lambda p: ref.solved(prob.nlp, p).gradient, prob.p0, FD_REL)
        np.testing.assert_allclose(sens.value_hessian, fd, rtol=FD_RTOL, atol=FD_ATOL)
        np.testing.assert_array_equal(sens.value_hessian, sens.value_hessian.T)

    def test_lp_vertex_value_hessian_is_zero(self) -> None:
        """At a non-degenerate LP vertex V is affine in b(p), so x* is affine and d2V/dp2 = 0 (by hand)."""
        lp = ref.ParametricLP()
        res = ref.solved(lp.nlp, lp.p0)
        sens = res.sensitivity()
        assert sens.available, sens.reason
        np.testing.assert_allclose(sens.value_hessian, 0.0, rtol=0, atol=EXACT_ATOL)
        np.testing.assert_allclose(sens.dlam_g_dp, 0.0, rtol=0, atol=EXACT_ATOL)
        fd = ref.central_difference(lambda p: ref.solved(lp.nlp, p).x, lp.p0, FD_REL)
        np.testing.assert_allclose(sens.dx_dp, fd, rtol=FD_RTOL, atol=FD_ATOL)

    @pytest.mark.parametrize("prob", CLOSED_FORM, ids=[p.name for p in CLOSED_FORM])
    def test_closed_form(self, prob: ref.RefProblem) -> None:
        """dx/dp, dlam_g/dp and d2V/dp2 equal the closed forms derived by hand (see refproblems.py)."""
        _res, sens = _sensitivity(prob)
        np.testing.assert_allclose(sens.dx_dp, prob.dx_dp_star, rtol=0, atol=EXACT_ATOL)
        np.testing.assert_allclose(sens.value_hessian, prob.hessian_star, rtol=0, atol=EXACT_ATOL)
        if prob.dlam_g_dp_star is not None:
            np.testing.assert_allclose(sens.dlam_g_dp, prob.dlam_g_dp_star, rtol=0, atol=EXACT_ATOL)
        if prob.dlam_x_dp_star is not None:
            np.testing.assert_allclose(sens.dlam_x_dp, prob.dlam_x_dp_star, rtol=0, atol=EXACT_ATOL)

    def test_box_interior_dx_dp_is_exactly_one(self) -> None:
        """For min (x - p)^2 on -10 <= x <= 10 at p = 3 the solution is x* = p, so dx/dp = 1 exactly."""
        # CasADi 3.8.2's derivative of an IPOPT nlpsol call returns dx/dp = 0 here (IPOPT leaves bound
        # multipliers of about 1e-10 and the derivative treats the bounds as active); sqpmethod gives 1.
        # Ours must not inherit that: the bounds are 7 units away from x*.
        _res, sens = _sensitivity(ref.BoxInterior())
        assert sens.dx_dp.shape == (1, 1)
        np.testing.assert_allclose(sens.dx_dp, [[1.0]], rtol=0, atol=1e-12)
        np.testing.assert_allclose(sens.dlam_x_dp, [[0.0]], rtol=0, atol=1e-12)

    @pytest.mark.parametrize(
        ("name", "plugin"), ref.CASADI_REFERENCE, ids=[f"{n}-{p}" for n, p in ref.CASADI_REFERENCE]
    )
    def test_dx_dp_matches_casadi_derivative(self, name: str, plugin: str) -> None:
        """dx*/dp equals casadi.jacobian of the x output of an nlpsol call with respect to p."""
        # Which nlpsol plugin is the reference where, and why: see refproblems.CASADI_REFERENCE.
        prob = ref.by_name(name)
        options = ref.PLUGIN_OPTIONS[plugin]
        _out, stats = prob.casadi_solver(plugin, options)
        assert stats["success"], stats["return_status"]
        _f, _x, _lam_p, _df_dp, dx_dp = (
            np.asarray(v, dtype=float) for v in prob.casadi_derivatives(plugin, options)(list(prob.p0))
        )
        _res, sens = _sensitivity(prob)
        np.testing.assert_allclose(sens.dx_dp, dx_dp, rtol=0, atol=CASADI_ATOL)

    def test_hs071_value_hessian_matches_casadi_second_derivative_of_lam_p(self) -> None:
        """On HS071 d2V/dp2 equals minus casadi.jacobian of sqpmethod's lam_p output (lam_p = -dV/dp)."""
        hs = ref.HS071()
        solver = ca.nlpsol("hs071_lam_p", "sqpmethod", hs.symbols(), ref.SQP_QUIET)
        P = ca.MX.sym("p", 2)
        out = solver(p=P, x0=list(hs.x0), **hs.bounds())
        jac = ca.Function("hs071_dlam_p", [P], [ca.jacobian(out["lam_p"], P)])
        expected = -np.asarray(jac(list(hs.p0)), dtype=float)
        _res, sens = _sensitivity(hs)
        np.testing.assert_allclose(sens.value_hessian, expected, rtol=0, atol=CASADI_ATOL)

    def test_objective_scaling_keeps_sensitivities(self) -> None:
        """Scaling the objective of HalfPlaneNorm by 1e-7 leaves dx/dp = (1/2, 1/2) and scales d2V/dp2 to 1e-7."""
        x, p = ca.SX.sym("x", 2), ca.SX.sym("p")
        prob = ParametricNLP({"x": x, "p": p, "f": 1e-7 * ca.sumsqr(x), "g": x[0] + x[1] - p}, lbg=0.0)
        res = ref.solved(prob, [1.0])
        # Strict complementarity holds for every p > 0 (lam = -1e-7 p), so the certificate must be smooth.
        assert res.certificate.verdict == "smooth", res.certificate.summary()
        sens = res.sensitivity()
        assert sens.available, sens.reason
        np.testing.assert_allclose(sens.dx_dp, [[0.5], [0.5]], rtol=0, atol=EXACT_ATOL)
        np.testing.assert_allclose(sens.value_hessian, [[1e-7]], rtol=1e-9, atol=1e-17)
