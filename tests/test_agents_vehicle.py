"""Tests of the vehicle model (agents.vehicle): physics against hand formulas, certificates, reachability."""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest

from agents._common import joint_optimum as real_joint
from agents._common import solve_aux
from agents.checks import central_difference, reachable_samples, reachable_vertices
from agents.params import STANDARD_GRAVITY, VehicleParams, ZoneParams
from agents.vehicle import VehicleModel, build_vehicle, vehicle_grid


@pytest.fixture(scope="module")
def truck():
    """The demo vehicle (invented numbers) with one zone."""
    return build_vehicle("truck")


@pytest.fixture(scope="module")
def two_zone_truck():
    """A vehicle crossing a speed-limited bridge and then a tunnel (invented numbers)."""
    prm = VehicleParams(
        zones=(ZoneParams("bridge", 500.0, 600.0, speed_limit=12.0), ZoneParams("tunnel", 1200.0, 1400.0))
    )
    return build_vehicle("truck2", prm)


class TestGrid:
    def test_nodes_at_zone_marks(self):
        """Nodes sit exactly at zone entry and at zone exit plus vehicle length."""
        prm = VehicleParams(zones=(ZoneParams("a", 333.3, 500.0), ZoneParams("b", 1201.7, 1500.0)), length=10.0)
        s, idx = vehicle_grid(prm)
        for z, (i_en, i_ex) in zip(prm.zones, idx, strict=True):
            assert s[i_en] == z.entry
            assert s[i_ex] == z.exit + prm.length
        assert s[0] == 0.0 and s[-1] == prm.route_length
        assert np.all(np.diff(s) > 0)


class TestPhysics:
    def test_fastest_traversal_closed_form(self):
        """Fastest trip without resistance = accelerate at a_max to v_max, then cruise (kinematics)."""
        prm = VehicleParams(
            route_length=600.0,
            zones=(ZoneParams("z", 300.0, 400.0),),
            rolling_coeff=0.0,
            drag_area=0.0,
            initial_speed=2.0,
            speed_limit=15.0,
            max_accel=1.0,
            desired_arrival=60.0,
            latest_arrival=200.0,
            stages=40,
        )
        model = VehicleModel(prm)
        v0, vmax, a = prm.initial_speed, prm.speed_limit, prm.max_accel
        # Constant-acceleration kinematics (any mechanics textbook): t = (v1 - v0)/a, s = (v1^2 - v0^2)/(2a).
        s_acc = (vmax**2 - v0**2) / (2 * a)
        t_exact = (vmax - v0) / a + (prm.route_length - s_acc) / vmax
        t_model = model.fastest_arrival()
        # The stage time 2 ds / (v_i + v_{i+1}) is exact under constant acceleration, so the only error is
        # the stage in which the exact profile switches from accelerating to cruising: the model must
        # reach v_max at a node, losing at most ds * (1/v_lo - 1/v_max) with v_lo the slowest speed
        # the exact profile has on that stage.
        ds = np.diff(model.s).max()
        v_lo = np.sqrt(vmax**2 - 2 * a * ds)
        bound = ds * (1 / v_lo - 1 / vmax)
        assert t_exact - 1e-4 <= t_model <= t_exact + bound  # 1e-4 s: the solve's force regulariser

    def test_resistance_forces_hand_values(self):
        """Steady-speed drive force = C_rr m g + rho C_dA v^2 / 2 (rolling and aerodynamic resistance)."""
        # Typical truck tyre on paved road C_rr ~ 0.006-0.01 (recalled from vehicle handbooks); we use 0.007.
        prm = VehicleParams(
            rolling_coeff=0.007, mass=18000.0, payload=2000.0, drag_area=6.0, air_density=1.2, initial_speed=10.0
        )
        model = VehicleModel(prm)
        m, v = prm.total_mass, 10.0
        # Hand values: C_rr m g with g = 9.81 m/s^2 (handbook value), drag 0.5 rho C_dA v^2.
        rolling = 0.007 * m * 9.81
        aero = 0.5 * 1.2 * 6.0 * v**2
        dyn = ca.Function("dyn", [model.x], [model.g_base[: model.n_stages]])
        N = model.n_stages
        x = np.r_[np.full(N, 0.5 * v**2), np.zeros(N), np.zeros(N)]  # constant speed, no drive force (clock unused)
        residual = np.asarray(dyn(x)).ravel()
        # With a = 0 the residual of stage i is ds_i * (C_rr g + rho C_dA e / m): resistance force per mass.
        force = m * residual / model.ds
        # Tolerance: g = 9.80665 in the model vs 9.81 in the hand value, 3.4e-4 relative on the rolling part.
        np.testing.assert_allclose(force, rolling + aero, rtol=4e-4)
        assert m * model.roll == pytest.approx(prm.rolling_coeff * m * STANDARD_GRAVITY, rel=1e-12)

    def test_kinetic_energy_state(self, truck):
        """The state e is kinetic energy per mass: m e = m v^2 / 2 for the speeds reported."""
        res = truck.problem.solve(truck.free_optimum)
        tr = truck.trajectory(res)
        N = tr["time_s"].size - 1  # stages; x = (e[1..N], a[0..N-1], t[1..N], slot slacks)
        m = VehicleParams().total_mass
        ke_state = m * np.r_[0.5 * VehicleParams().initial_speed ** 2, res.x[:N]]
        np.testing.assert_allclose(ke_state, 0.5 * m * tr["speed_m_per_s"] ** 2, rtol=1e-12)

    def test_energy_balance(self):
        """Work of the applied force = change in kinetic energy + rolling + aerodynamic losses (work-energy)."""
        prm = VehicleParams()
        model = VehicleModel(prm)
        res = model.solve_free()
        assert res.success
        N, m, k, r = model.n_stages, prm.total_mass, model.aero, model.roll
        e = np.r_[0.5 * prm.initial_speed**2, res.x[:N]]
        a = res.x[N: 2 * N]
        ds = model.ds
        work = np.sum(m * a * ds)  # traction (a > 0) plus braking (a < 0) work, J
        # Exact solution of the linear ODE de/ds = a - r - k e on each stage from the model's e_i
        # (first-order linear ODE, closed form): e(s) = e_inf + (e_i - e_inf) exp(-k s), e_inf = (a - r)/k.
        e_inf = (a - r) / k
        decay = np.exp(-k * ds)
        aero_exact = np.sum(m * k * (e_inf * ds + (e[:-1] - e_inf) * (1 - decay) / k))
        rolling = r * m * prm.route_length
        delta_ke = m * (e[-1] - e[0])
        # The model integrates the drag by the trapezoidal rule; its error per stage is
        # ds^3 |e''| / 12 with e'' = -k e' (trapezoidal-rule error term), summed over stages.
        e_second = k * np.abs(np.diff(e) / ds)
        bound = np.sum(m * k * ds**3 * e_second / 12)
        assert abs(work - (delta_ke + rolling + aero_exact)) <= 2 * bound + 1e-6 * work


class TestCertificate:
    @pytest.mark.parametrize("which", ["truck", "two_zone_truck"])
    def test_free_optimum_is_smooth(self, which, request):
        """At the free optimum the NLP solves with a smooth verdict and strict SOSC."""
        agent = request.getfixturevalue(which)
        assert agent.reachable.contains(agent.free_optimum)
        res = agent.problem.solve(agent.free_optimum)
        assert res.success, res.message
        assert res.certificate.verdict == "smooth", res.certificate.reason
        assert res.certificate.sosc == "strict"
        assert res.certificate.licq

    def test_free_optimum_matches_unconstrained(self, truck):
        """With p at the free optimum the value equals the unconstrained trip's cost, gradient ~ 0."""
        model = VehicleModel(VehicleParams())
        free = model.solve_free()
        res = truck.problem.solve(truck.free_optimum)
        assert res.value == pytest.approx(free.f, rel=1e-9)  # same problem: solver tolerance
        # Gradient = coupling multipliers, zero at the free optimum (stationarity of V there); scale
        # against the gradient 3 s away, which is ~1e5 J/s.
        assert np.abs(res.gradient).max() < 1e-3

    def test_gradient_matches_finite_differences(self, truck):
        """dV/dp = partial_p L agrees with central differences of V at an interior slot (common practice)."""
        p = truck.free_optimum + np.array([3.0, 6.0])
        assert truck.reachable.contains(p)
        res = truck.problem.solve(p)
        assert res.success and res.certificate.verdict == "smooth"
        fd = central_difference(truck.problem, p, 1e-2)
        # Step 1e-2 s: truncation h^2 V'''/6 is negligible; the value is accurate to ~1e-9 relative
        # (|V| ~ 5e6 J), i.e. FD noise ~ 5e-3 / 1e-2 ~ 1 J/s against gradients of ~1e5 J/s.
        np.testing.assert_allclose(res.gradient, fd, rtol=1e-4, atol=10.0)


class TestWindow:
    @pytest.mark.parametrize("which", ["truck", "two_zone_truck"])
    def test_vertices_and_samples_solve(self, which, request):
        """Every vertex and random points of the window give converged solves (elastic slots)."""
        agent = request.getfixturevalue(which)
        points = np.vstack([reachable_vertices(agent.reachable), reachable_samples(agent.reachable, 5, seed=1)])
        for q in points:
            res = agent.problem.solve(q)
            assert res.success, (q, res.message)

    def test_dwell_rows(self, truck):
        """The window excludes dwells shorter than crossing at the speed limit (zone + length at 20 m/s)."""
        prm = VehicleParams()
        z = prm.zones[0]
        shortest = (z.exit + prm.length - z.entry) / prm.speed_limit  # kinematics: distance / top speed
        verts = reachable_vertices(truck.reachable)
        assert np.all(verts[:, 1] - verts[:, 0] >= shortest - 1e-6)
        outside = truck.free_optimum + np.array([0.0, -(truck.free_optimum[1] - truck.free_optimum[0])])
        assert not truck.reachable.contains(outside)

    @pytest.mark.parametrize("mark", [0, 1])
    def test_earliest_times_without_resistance(self, mark):
        """Without drag and rolling resistance the window's earliest entry and exit are the model's own
        earliest times (an IPOPT solve minimising that time), to solver accuracy: the energy bound of the
        forward pass is then attained by driving at full force up to the speed limit."""
        prm = VehicleParams(rolling_coeff=0.0, drag_area=0.0, initial_speed=2.0, max_accel=0.8)
        model = VehicleModel(prm)
        lower = model.window()[0]
        i = vehicle_grid(prm)[1][0][mark]
        obj = model.t_nodes[i] + 1e-8 * ca.sumsqr(model.x[model.n_stages: 2 * model.n_stages])
        res = solve_aux("earliest", {}, model.x, obj, model.g_base, model.lbx, model.ubx, model.lbg_base,
                        model.ubg_base, model.x0)
        assert res.success, res.status
        assert float(model.times(res.x)[i]) == pytest.approx(lower[mark], rel=1e-6)

    def test_window_contains_reachable_extremes(self, two_zone_truck):
        """Every zone time of the quickest and the slowest trip (IPOPT solves with drag and resistance) lies in
        the window without its margin: an outer bound, which the elastic slots make safe."""
        prm = VehicleParams(
            zones=(ZoneParams("bridge", 500.0, 600.0, speed_limit=12.0), ZoneParams("tunnel", 1200.0, 1400.0))
        )
        model = VehicleModel(prm)
        lower, upper, A, b = model.window(margin=0.0)
        for sign in (1.0, -1.0):
            obj = sign * model.arrival + 1e-6 * ca.sumsqr(model.x[model.n_stages: 2 * model.n_stages])
            res = solve_aux("extreme", {}, model.x, obj, model.g_base, model.lbx, model.ubx, model.lbg_base,
                            model.ubg_base, model.x0)
            assert res.success, res.status
            q = np.asarray(model.zone_times(res.x)).ravel()
            assert np.all(q >= lower - 1e-6) and np.all(q <= upper + 1e-6)
            assert np.all(A @ q <= b + 1e-6)

    def test_unreachable_point_is_priced(self, truck):
        """Entering 10 s before the earliest time solves; the miss is the model's own entry time minus the
        proposed one, and the gradient is the slot penalty (exact L1 penalty: Nocedal & Wright, 2nd ed.,
        sec. 17.2, from memory)."""
        model = VehicleModel(VehicleParams())
        p = np.array([truck.reachable.lower[0] - 10.0, truck.free_optimum[1]])
        res = truck.problem.solve(p)
        assert res.success, res.message
        i_en = vehicle_grid(VehicleParams())[1][0][0]
        t_entry = float(model.times(res.x[: 3 * model.n_stages])[i_en])
        miss = truck.slack(res)
        assert miss[0] == pytest.approx(t_entry - p[0], abs=1e-7)
        assert miss[0] > 10.0 - 1e-6
        assert res.gradient[0] == pytest.approx(-model.slot_penalty, rel=1e-6)

    def test_interior_value_is_the_plain_equality_problem(self, truck):
        """Inside the reachable times the elastic NLP has the value of the plain problem with hard equality
        rows t(entry) = enter, t(exit + length) = leave, solved here directly with CasADi's IPOPT."""
        model = VehicleModel(VehicleParams())
        p = truck.free_optimum + np.array([3.0, 6.0])
        res = truck.problem.solve(p)
        assert res.success
        nlp = {"x": model.x, "f": model.cost, "g": ca.vertcat(model.g_base, model.zone_times_expr - p)}
        solver = ca.nlpsol("plain", "ipopt", nlp, {"ipopt.print_level": 0, "print_time": False, "ipopt.tol": 1e-10})
        sol = solver(x0=model.x0, lbx=model.lbx, ubx=model.ubx, lbg=np.r_[model.lbg_base, 0, 0],
                     ubg=np.r_[model.ubg_base, 0, 0])
        assert solver.stats()["success"]
        assert res.value == pytest.approx(float(sol["f"]), rel=1e-8)
        np.testing.assert_allclose(truck.slack(res), 0.0, atol=1e-8)
        # the gradient is the multiplier of the coupling rows, the same in both problems (sign: dV/dp = -lam)
        np.testing.assert_allclose(res.gradient, -np.asarray(sol["lam_g"]).ravel()[-2:], rtol=1e-5)

    def test_build_makes_at_most_two_solves(self, monkeypatch):
        """Building a three-zone vehicle costs at most two IPOPT solves (free trip, free optimum over the
        window), whatever its zone count: no vertex or support solves."""
        import agents.vehicle as vehicle

        calls = []
        real = vehicle.solve_aux

        def counting(*args, **kwargs):
            calls.append(args[0])
            return real(*args, **kwargs)

        monkeypatch.setattr(vehicle, "solve_aux", counting)
        monkeypatch.setattr(vehicle, "joint_optimum", lambda *a, **k: calls.append("joint") or real_joint(*a, **k))
        prm = VehicleParams(zones=(ZoneParams("a", 500.0, 506.0), ZoneParams("b", 506.0, 512.0),
                                   ZoneParams("c", 560.0, 570.0, speed_limit=8.0)))
        agent = vehicle.build_vehicle("three", prm)
        assert len(calls) <= 2, calls
        assert agent.reachable.contains(agent.free_optimum)


class TestTrajectory:
    def test_columns(self, truck):
        """The trajectory has unit-carrying column names, equal lengths, and starts at departure."""
        res = truck.problem.solve(truck.free_optimum)
        tr = truck.trajectory(res)
        assert set(tr) == {"time_s", "position_m", "speed_m_per_s", "force_N"}
        assert len({v.size for v in tr.values()}) == 1
        assert tr["time_s"][0] == VehicleParams().departure
        i_en, i_ex = vehicle_grid(VehicleParams())[1][0]
        np.testing.assert_allclose(tr["time_s"][[i_en, i_ex]], truck.free_optimum, atol=1e-6)


class TestParams:
    def test_bad_zone_message(self):
        """A zone beyond the route is rejected with the field, expected range and value."""
        with pytest.raises(
            ValueError,
            match=r"zone 'bridge': 'exit' must be <= route_length - length = 988.0, "
            r"got 1500.0",
        ):
            VehicleParams(route_length=1000.0, zones=(ZoneParams("bridge", 900.0, 1500.0),))

    def test_min_speed_positive(self):
        """min_speed must be > 0 (stage times ds / v stay finite)."""
        with pytest.raises(ValueError, match=r"'min_speed' must be within \(0, 1000\], got 0.0"):
            VehicleParams(min_speed=0.0)
