"""ParametricNLP and LocalResult: construction, input checks, statuses, warm start, Opti adapter, JSON."""

from __future__ import annotations

import json
from dataclasses import replace

import casadi as ca
import numpy as np
import pytest

from negotiate import LocalResult, ParametricNLP, Status
from negotiate.core.nlp import try_solve


def shifted_quadratic(sym=ca.SX):
    """min (x1 - p1)^2 + (x2 - 2)^2  s.t.  x1 + x2 <= p2, x1 >= p1 - 5: V = (p1 + 2 - p2)^2 / 2 when active."""
    x, p = sym.sym("x", 2), sym.sym("p", 2)
    nlp = {"x": x, "p": p, "f": (x[0] - p[0]) ** 2 + (x[1] - 2) ** 2, "g": ca.vertcat(x[0] + x[1] - p[1], x[0] - p[0])}
    return nlp, {"lbg": [-np.inf, -5.0], "ubg": [0.0, np.inf]}


class TestConstruction:
    def test_rejects_unknown_keys(self):
        """An 'nlp' dict with a misspelt key names the key."""
        x = ca.SX.sym("x")
        with pytest.raises(ValueError, match=r"unknown keys \['cost'\]"):
            ParametricNLP({"x": x, "p": x, "cost": x})

    def test_rejects_wrong_bound_shape(self):
        """A bound of the wrong length names the bound, the expected and the received shape."""
        nlp, _ = shifted_quadratic()
        with pytest.raises(ValueError, match=r"'ubg' must have shape \(2,\) or be a scalar, got shape \(3,\)"):
            ParametricNLP(nlp, ubg=[0, 0, 0])

    def test_rejects_crossed_bounds(self):
        """lbx above ubx is reported with the index and both values."""
        nlp, _ = shifted_quadratic()
        with pytest.raises(ValueError, match=r"lbx\[1\] = 3.0 exceeds ubx\[1\] = 1.0"):
            ParametricNLP(nlp, lbx=[0, 3], ubx=[1, 1])

    def test_rejects_mixed_symbol_types(self):
        """x and p must be both SX or both MX."""
        with pytest.raises(TypeError, match="same CasADi type"):
            ParametricNLP({"x": ca.SX.sym("x"), "p": ca.MX.sym("p"), "f": ca.SX.sym("x") ** 2})

    def test_sizes_and_repr(self):
        """Sizes are read off the symbols."""
        nlp, b = shifted_quadratic()
        prob = ParametricNLP(nlp, **b, name="demo")
        assert (prob.n_x, prob.n_p, prob.n_g) == (2, 2, 2)
        assert repr(prob) == "ParametricNLP(name='demo', n_x=2, n_p=2, n_g=2)"


class TestSolve:
    def test_value_gradient_by_hand(self):
        """With x1 + x2 <= p2 active, V = (p1 + 2 - p2)^2 / 2 and dV/dp = (s, -s), s = p1 + 2 - p2 (by hand)."""
        nlp, b = shifted_quadratic()
        res = ParametricNLP(nlp, **b).solve([1.0, 2.0])
        assert res.success and res.status is Status.CONVERGED
        np.testing.assert_allclose(res.value, 0.5, rtol=1e-12)  # polished: to round-off
        np.testing.assert_allclose(res.gradient, [1.0, -1.0], atol=1e-12)
        np.testing.assert_allclose(res.x, [0.5, 1.5], atol=1e-12)
        np.testing.assert_allclose(res.lam_g, [1.0, 0.0], atol=1e-12)

    @pytest.mark.parametrize("bad", [[1.0], [1.0, 2.0, 3.0], [[1.0, 2.0]]])
    def test_wrong_sized_p(self, bad):
        """A wrong-sized p raises ValueError naming the expected shape."""
        nlp, b = shifted_quadratic()
        with pytest.raises(ValueError, match=r"'p' must have shape \(2,\), got"):
            ParametricNLP(nlp, **b).solve(bad)

    def test_non_finite_p(self):
        """A non-finite p raises ValueError naming the entries."""
        nlp, b = shifted_quadratic()
        with pytest.raises(ValueError, match=r"non-finite entries \['slot.leave'\]"):
            ParametricNLP(nlp, **b, p_names=["slot.enter", "slot.leave"]).solve([1.0, np.nan])

    def test_infeasible_gives_no_gradient(self):
        """An infeasible problem returns status infeasible, the raw message, and no gradient."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        prob = ParametricNLP({"x": x, "p": p, "f": x**2, "g": x - p}, lbg=0, ubx=0)
        res = prob.solve([1.0])
        assert res.status is Status.INFEASIBLE and not res.success
        assert res.gradient is None and res.certificate is None
        assert res.message == "Infeasible_Problem_Detected"
        assert not res.sensitivity().available

    def test_iteration_limit_gives_no_gradient(self):
        """A solve stopped by the iteration limit is not converged and carries no gradient."""
        x, p = ca.SX.sym("x", 3), ca.SX.sym("p")
        f = 100 * (x[1] - x[0] ** 2) ** 2 + (1 - x[0]) ** 2 + (x[2] - p) ** 2  # Rosenbrock (1960) + a term
        prob = ParametricNLP({"x": x, "p": p, "f": f}, x0=[-1.2, 1, 0], solver_options={"ipopt.max_iter": 3})
        res = prob.solve([1.0])
        assert res.status is Status.ITERATION_LIMIT and res.gradient is None
        assert res.message == "Maximum_Iterations_Exceeded"

    def test_warm_start_same_answer_fewer_iterations(self):
        """A warm start from a nearby solution gives the same answer in no more iterations."""
        x, p = ca.SX.sym("x", 3), ca.SX.sym("p")
        f = 100 * (x[1] - x[0] ** 2) ** 2 + (1 - x[0]) ** 2 + (x[2] - p) ** 2
        prob = ParametricNLP({"x": x, "p": p, "f": f, "g": x[0] + x[2]}, ubg=1.5, x0=[-1.2, 1, 0])
        first = prob.solve([1.0])
        cold = prob.solve([1.1])
        warm = prob.solve([1.1], warm=first)
        assert cold.success and warm.success
        np.testing.assert_allclose(warm.x, cold.x, atol=1e-9)  # both polished to the same KKT point
        np.testing.assert_allclose(warm.gradient, cold.gradient, atol=1e-8)
        assert warm.iterations <= cold.iterations

    def test_sx_and_mx_agree(self):
        """The same problem written with SX and with MX gives the same result."""
        results = []
        for sym in (ca.SX, ca.MX):
            nlp, b = shifted_quadratic(sym)
            results.append(ParametricNLP(nlp, **b).solve([0.3, 1.7]))
        np.testing.assert_allclose(results[0].gradient, results[1].gradient, atol=1e-12)
        np.testing.assert_allclose(results[0].x, results[1].x, atol=1e-12)

    def test_result_is_frozen_and_json_ready(self):
        """LocalResult is immutable and to_dict() goes through json.dumps."""
        nlp, b = shifted_quadratic()
        res = ParametricNLP(nlp, **b).solve([1.0, 2.0])
        assert isinstance(res, LocalResult)
        with pytest.raises(AttributeError):
            res.value = 0.0  # type: ignore[misc]
        data = json.loads(json.dumps(res.to_dict()))
        assert data["status"] == "converged" and data["certificate"]["verdict"] == "smooth"


def sqrt_fee():
    """min (x - 1)^2 + sqrt(p): x* = 1, V = sqrt(p), dV/dp = 1 / (2 sqrt(p)) -- +inf at p = 0 (calculus)."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    return ParametricNLP({"x": x, "p": p, "f": (x - 1) ** 2 + ca.sqrt(p)}, p_names=["share"])


class TestNonFinite:
    def test_infinite_gradient_is_a_failed_solve(self):
        """IPOPT converges at p = 0 but dV/dp = +inf there: a failed solve, no gradient, the quantity named."""
        prob = sqrt_fee()
        ok = prob.solve([0.25])
        assert ok.success
        np.testing.assert_allclose(ok.gradient, [1.0], rtol=1e-12)  # 1 / (2 sqrt(0.25)), calculus
        res = prob.solve([0.0])
        assert res.status is Status.FAILED and not res.success
        assert res.gradient is None and res.certificate is None
        assert res.message == "Solve_Succeeded; re-check failed: gradient not finite: dV/d(share) = inf"
        assert res.value == 0.0 and res.x == pytest.approx([1.0])  # the point itself is kept, for the record

    def test_infinite_gradient_after_a_warm_start(self):
        """Continuing from a smooth warm start to p = 0 gives the same failed solve (never a converged inf)."""
        prob = sqrt_fee()
        res = prob.solve([0.0], warm=prob.solve([0.25]))
        assert res.status is Status.FAILED and res.gradient is None
        assert res.message.endswith("gradient not finite: dV/d(share) = inf")

    def test_user_solve_with_infinite_value(self):
        """A user-written solve that reports convergence with V = inf is failed by try_solve."""

        class InfiniteValue(ParametricNLP):
            def solve(self, p, warm=None, **kw):
                return replace(super().solve(p, warm, **kw), value=np.inf)

        prob = sqrt_fee()
        prob.__class__ = InfiniteValue
        res = try_solve(prob, [0.25])
        assert res.status is Status.FAILED and res.gradient is None
        assert res.message == "Solve_Succeeded; re-check failed: value not finite: V = inf"

    def test_user_solve_with_nan_gradient(self):
        """A user-written solve that reports convergence with a NaN gradient is failed by try_solve."""

        class NanGradient(ParametricNLP):
            def solve(self, p, warm=None, **kw):
                return replace(super().solve(p, warm, **kw), gradient=np.array([np.nan]))

        prob = sqrt_fee()
        prob.__class__ = NanGradient
        res = try_solve(prob, [0.25])
        assert res.status is Status.FAILED and res.gradient is None
        assert res.message == "Solve_Succeeded; re-check failed: gradient not finite: dV/d(share) = nan"

    def test_exception_in_solve_is_a_failed_solve(self):
        """An exception raised by a user-written solve becomes a failed result naming its type and text."""

        class Raising(ParametricNLP):
            def solve(self, p, warm=None, **kw):
                raise ZeroDivisionError("share / 0")

        prob = sqrt_fee()
        prob.__class__ = Raising
        res = try_solve(prob, [0.25])
        assert res.status is Status.FAILED and res.gradient is None and np.isnan(res.value)
        assert res.message == "the solve raised ZeroDivisionError: share / 0"
        assert res.p.tolist() == [0.25] and res.x.shape == (1,)


class TestOpti:
    def test_parametric_bounds_move_into_g(self):
        """Opti constraints with parameters in their bounds become g rows whose prices reach dV/dp."""
        opti = ca.Opti()
        y, q = opti.variable(2), opti.parameter(2)
        opti.minimize((y[0] - q[0]) ** 2 + (y[1] - 2) ** 2)
        opti.subject_to(y[0] + y[1] <= q[1])
        opti.subject_to(opti.bounded(q[0] - 5, y[0], 10))  # two-sided, one side parametric: two rows
        prob = ParametricNLP.from_opti(opti)
        assert prob.n_g == 3
        res = prob.solve([1.0, 2.0])
        nlp, b = shifted_quadratic()
        ref = ParametricNLP(nlp, **b).solve([1.0, 2.0])
        np.testing.assert_allclose(res.value, ref.value, rtol=1e-12)
        np.testing.assert_allclose(res.gradient, ref.gradient, atol=1e-12)

    def test_parametric_equality(self):
        """An Opti equality y == q becomes y - q = 0; its multiplier is the value gradient (by hand: 2(q - 3))."""
        opti = ca.Opti()
        y, q = opti.variable(), opti.parameter()
        opti.minimize((y - 3) ** 2)
        opti.subject_to(y == q)
        res = ParametricNLP.from_opti(opti).solve([1.0])
        np.testing.assert_allclose(res.gradient, [-4.0], atol=1e-10)


class TestCasadiConventions:
    """Pins what CasADi 3.8.2 with IPOPT reports, which our sign convention relies on (observed behaviour)."""

    def test_lam_p_is_minus_value_gradient(self):
        """nlpsol's lam_p output equals minus our dV/dp."""
        nlp, b = shifted_quadratic()
        solver = ca.nlpsol("s", "ipopt", nlp, {"ipopt.print_level": 0, "print_time": False, "ipopt.sb": "yes"})
        out = solver(p=[1.0, 2.0], **b)
        ours = ParametricNLP(nlp, **b).solve([1.0, 2.0])
        np.testing.assert_allclose(-np.asarray(out["lam_p"]).ravel(), ours.gradient, atol=1e-7)  # IPOPT tol 1e-8

    def test_lam_x_negative_at_active_lower_bound(self):
        """lam_x < 0 marks an active lower bound (and ours agrees)."""
        x, p = ca.SX.sym("x"), ca.SX.sym("p")
        nlp = {"x": x, "p": p, "f": (x + p) ** 2}
        solver = ca.nlpsol("s", "ipopt", nlp, {"ipopt.print_level": 0, "print_time": False, "ipopt.sb": "yes"})
        out = solver(p=1.0, lbx=0.0)
        assert float(out["lam_x"]) < 0
        res = ParametricNLP(nlp, lbx=0.0).solve([1.0])
        np.testing.assert_allclose(res.lam_x, [-2.0], atol=1e-10)  # -f'(0) = -2(0 + 1)
