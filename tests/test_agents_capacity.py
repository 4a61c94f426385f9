"""Tests of the capacity-user model (agents.capacity): SOC dynamics by hand, KKT by hand, certificates."""

from __future__ import annotations

import numpy as np
import pytest

from agents.capacity import CapacityModel, build_capacity
from agents.checks import central_difference, reachable_samples
from agents.params import CapacityParams


@pytest.fixture(scope="module")
def tractor():
    """The demo charging vehicle (invented numbers)."""
    return build_capacity("tractor")


class TestDynamics:
    def test_soc_hand_computation(self):
        """soc_{k+1} = soc_k + eta P h / E_cap: 100 kW for 900 s at 92 % into 200 kWh adds 0.115."""
        prm = CapacityParams()
        model = CapacityModel(prm)
        P = np.array([1e5, 0, 5e4, 0, 0, 0, 0, 0])
        soc = np.asarray(model.soc(np.r_[P / prm.charger_power, 0.0])).ravel()
        # Hand computation: 1e5 W * 900 s * 0.92 / 7.2e8 J = 0.115; half of that for 50 kW.
        expected = 0.3 + np.cumsum(np.r_[0.0, [0.115, 0.0, 0.0575, 0, 0, 0, 0, 0]])
        np.testing.assert_allclose(soc, expected, rtol=1e-12)

    def test_ample_shares_meet_target(self, tractor):
        """With every share at charger power the target is met up to the shortfall KKT predicts."""
        prm = CapacityParams()
        res = tractor.problem.solve(tractor.reachable.upper)
        assert res.success
        tr = tractor.trajectory(res)
        P = tr["power_W"][:-1]
        # KKT by hand: in a block with 0 < P_k < share_k, tariff_k h + 2 wear P_k h = mu eta h, where mu
        # (per J stored) is also the price of the soft target: 2 w u = mu (stationarity in u).
        k = int(np.argmax((P > 1e3) & (P < prm.charger_power - 1e3)))
        mu = (prm.tariff[k] + 2 * prm.wear_coeff * P[k]) / prm.efficiency
        u = mu / (2 * prm.shortfall_weight)
        missing = (prm.target_soc - tr["soc"][-1]) * prm.battery_capacity
        # Solver accuracy on the stationarity (~1e-8 relative): 1e-5 relative on u is ample.
        assert missing == pytest.approx(u, rel=1e-5)
        assert tr["soc"][-1] >= prm.target_soc - 1e-3  # the target is met to 0.1 % of capacity
        for j in np.flatnonzero((P > 1e3) & (P < prm.charger_power - 1e3)):
            assert (prm.tariff[j] + 2 * prm.wear_coeff * P[j]) / prm.efficiency == pytest.approx(mu, rel=1e-6)

    def test_no_share_stays_feasible(self, tractor):
        """With zero shares nothing is drawn and the whole target becomes shortfall (still a converged solve)."""
        prm = CapacityParams()
        res = tractor.problem.solve(np.zeros(prm.blocks))
        assert res.success
        missing = (prm.target_soc - prm.initial_soc) * prm.battery_capacity
        assert res.value == pytest.approx(prm.shortfall_weight * missing**2, rel=1e-6)


class TestCertificate:
    def test_free_optimum_is_smooth(self, tractor):
        """At the free optimum the NLP solves with a smooth verdict and strict SOSC, gradient zero."""
        assert tractor.reachable.contains(tractor.free_optimum)
        res = tractor.problem.solve(tractor.free_optimum)
        assert res.success, res.message
        assert res.certificate.verdict == "smooth", res.certificate.reason
        assert res.certificate.sosc == "strict"
        np.testing.assert_allclose(res.gradient, 0.0, atol=1e-6)  # no share row binds: flat value

    def test_gradient_matches_finite_differences(self, tractor):
        """dV/dshare agrees with central differences of V where the shares bind (common practice)."""
        p = 0.4 * tractor.reachable.upper
        res = tractor.problem.solve(p)
        assert res.success and res.certificate.verdict == "smooth"
        fd = central_difference(tractor.problem, p, 1.0)
        # Step 1 W on shares of 6e4 W: V is quadratic in p here (linear-quadratic program with fixed active
        # set), so the central difference is exact up to the value's accuracy; 1e-3 J/W absolute covers a
        # value error of 1e-3 J (1e-12 of |V| ~ 1e9 J) on the unbinding blocks, whose gradient is 0.
        np.testing.assert_allclose(res.gradient, fd, rtol=1e-5, atol=1e-3)


class TestReachable:
    def test_box_points_solve(self, tractor):
        """Extreme and random share vectors of the box all give converged solves."""
        K = CapacityParams().blocks
        up = tractor.reachable.upper
        patterns = [np.zeros(K), up, up * (np.arange(K) % 2), up * (1 - np.arange(K) % 2)]
        for q in patterns + list(reachable_samples(tractor.reachable, 6, seed=3)):
            res = tractor.problem.solve(q)
            assert res.success, (q, res.message)


class TestParams:
    def test_soc_range_message(self):
        """A target SOC above 1 is rejected with the field name and value."""
        with pytest.raises(ValueError, match=r"capacity user: 'target_soc' must be within \[0, 1\], got 1.2"):
            CapacityParams(target_soc=1.2)
