"""Tests of the machine-job model (agents.machine): power law, hand-derived optima, certificates, reachability."""

from __future__ import annotations

import numpy as np
import pytest

from agents.checks import central_difference, reachable_samples, reachable_vertices
from agents.machine import MachineModel, build_machine
from agents.params import MachineParams, StationParams


@pytest.fixture(scope="module")
def press():
    """The demo machine (invented numbers): furnace, then inspection."""
    return build_machine("press")


@pytest.fixture(scope="module")
def flat():
    """A machine with a flat tariff and one station, no holding cost: a case with a closed-form value."""
    prm = MachineParams(
        peak_price=1.0, stations=(StationParams("furnace", duration=1800.0, transfer=120.0, holding_cost=0.0),)
    )
    return prm, build_machine("flat", prm)


class TestPhysics:
    def test_constant_rate_under_flat_tariff(self, flat):
        """With a flat price, convex power spreads work evenly: constant rate W / T (Jensen's inequality)."""
        prm, agent = flat
        p = agent.free_optimum + np.array([200.0, 300.0])
        res = agent.problem.solve(p)
        assert res.success
        tr = agent.trajectory(res)
        T = p[0] - prm.stations[0].transfer - prm.release  # hand-over strictly active: T_f = enter - transfer
        # IPOPT's tolerance on a problem whose cost is ~1e7 J: 1e-6 relative on the rates.
        np.testing.assert_allclose(tr["rate_kg_per_s"], prm.work / T, rtol=1e-6)
        assert tr["progress_kg"][-1] == pytest.approx(prm.work, rel=1e-9)

    def test_value_closed_form(self, flat):
        """Energy at constant rate r over T is c r^2 T = c W^2 / T; dV/d enter = -c W^2 / T^2 + lateness'."""
        prm, agent = flat
        p = agent.free_optimum + np.array([200.0, 300.0])
        res = agent.problem.solve(p)
        T = p[0] - prm.stations[0].transfer - prm.release
        c, W = prm.power_coeff, prm.work
        x = p[1] - prm.due
        eps = prm.tardiness_smoothing
        lateness = prm.tardiness_weight * 0.5 * (x + np.sqrt(x * x + eps * eps))
        # Hand formulas (calculus on the model's equations); tolerance: solver accuracy ~1e-8 relative.
        assert res.value == pytest.approx(c * W**2 / T + lateness, rel=1e-8)
        d_late = prm.tardiness_weight * 0.5 * (1 + x / np.sqrt(x * x + eps * eps))
        np.testing.assert_allclose(res.gradient, [-c * W**2 / T**2, d_late], rtol=1e-6)

    def test_power_law(self, press):
        """Block energy = power_coeff * rate^2 * block length (the documented power law)."""
        res = press.problem.solve(press.free_optimum)
        model = MachineModel(MachineParams())
        tr = press.trajectory(res)
        h = np.diff(tr["time_s"])
        expected = MachineParams().power_coeff * tr["rate_kg_per_s"][:-1] ** 2 * h
        np.testing.assert_allclose(np.asarray(model.block_energy(res.x)).ravel(), expected, rtol=1e-12)

    def test_peak_shifts_work(self, press):
        """Under a price peak the rate is lower in the peak than outside it (cost-minimising response)."""
        res = press.problem.solve(press.free_optimum)
        tr = press.trajectory(res)
        prm = MachineParams()
        mids = 0.5 * (tr["time_s"][:-1] + tr["time_s"][1:])
        rate = tr["rate_kg_per_s"][:-1]
        in_peak = (mids > prm.peak_start + 2 * prm.price_ramp) & (mids < prm.peak_end - 2 * prm.price_ramp)
        assert in_peak.any() and (~in_peak).any()
        assert rate[in_peak].max() < rate[~in_peak].min()


class TestCertificate:
    @pytest.mark.parametrize("which", ["press", "flat"])
    def test_free_optimum_is_smooth(self, which, request):
        """At the free optimum the NLP solves with a smooth verdict and strict SOSC."""
        agent = request.getfixturevalue(which)
        agent = agent[1] if isinstance(agent, tuple) else agent
        assert agent.reachable.contains(agent.free_optimum)
        res = agent.problem.solve(agent.free_optimum)
        assert res.success, res.message
        assert res.certificate.verdict == "smooth", res.certificate.reason
        assert res.certificate.sosc == "strict"

    def test_free_optimum_slots_are_tight(self, press):
        """Alone, the machine books each station for exactly its duration, right after the previous step."""
        p = press.free_optimum
        st = MachineParams().stations
        np.testing.assert_allclose(p[1] - p[0], st[0].duration, atol=1e-5)
        np.testing.assert_allclose(p[2] - p[1], st[1].transfer, atol=1e-5)
        np.testing.assert_allclose(p[3] - p[2], st[1].duration, atol=1e-5)

    def test_gradient_matches_finite_differences(self, press):
        """dV/dp agrees with central differences of V at an interior slot (common practice)."""
        p = press.free_optimum + np.array([300.0, 400.0, 500.0, 700.0])
        assert press.reachable.contains(p)
        res = press.problem.solve(p)
        assert res.success and res.certificate.verdict == "smooth"
        fd = central_difference(press.problem, p, 1e-2)
        # Step 1e-2 s; |V| ~ 4e7 J accurate to ~1e-9 relative gives FD noise ~ 4 J/s, against gradients
        # of 5 to 2e4 J/s; truncation h^2 V'''/6 is negligible at this step.
        np.testing.assert_allclose(res.gradient, fd, rtol=1e-4, atol=5.0)


class TestReachable:
    def test_vertices_and_samples_solve(self, press):
        """Every vertex and random points of the reachable set give converged solves."""
        points = np.vstack([reachable_vertices(press.reachable), reachable_samples(press.reachable, 6, seed=2)])
        for q in points:
            res = press.problem.solve(q)
            assert res.success, (q, res.message)

    def test_earliest_handover(self, press):
        """Earliest hand-over = release + work / max_rate (+2 % margin) + transfer (full-rate processing)."""
        prm = MachineParams()
        earliest = prm.release + 1.02 * prm.work / prm.max_rate + prm.stations[0].transfer
        assert press.reachable.lower[0] == pytest.approx(earliest, rel=1e-12)
        too_early = press.free_optimum.copy()
        too_early[0] = prm.release + 0.9 * prm.work / prm.max_rate
        assert not press.problem.solve(too_early).success


class TestParams:
    def test_horizon_message(self):
        """A horizon before the earliest completion is rejected with the numbers involved."""
        with pytest.raises(ValueError, match=r"machine: 'horizon' must be > earliest possible completion 3460.0 s"):
            MachineParams(horizon=3000.0)
