"""The coordinator: agreement with closed forms and with the centralized IPOPT solve, the nonsmooth guard,
orders and deadlocks, failed agents, user methods."""

from __future__ import annotations

from dataclasses import replace

import casadi as ca
import numpy as np
import pytest
from fleets import quadratic_share_agent, slot_agent

from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam
from negotiate.coordination.centralized import solve_centralized
from negotiate.coordination.engine import coordinate
from negotiate.coordination.methods import Evaluation, Method, Proposal, register_method
from negotiate.coordination.orders import search_orders
from negotiate.core.status import CoordinationStatus
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.fleet.spec import CapacityResource, CoordinatorSettings, ExclusiveResource
from negotiate.resources.coupling import build_feasible_set, check_orders

METHODS = ["bundle", "gradient", "newton"]


def settings(method: str, **kw) -> CoordinatorSettings:
    return CoordinatorSettings(
        method=method, max_rounds=kw.pop("max_rounds", 80), tolerance=kw.pop("tolerance", 1e-9), **kw
    )


class TestClosedForm:
    """Quadratic agents sharing one capacity: equal marginal values (KKT by hand, common practice)."""

    targets = np.array([4.0, 3.0, 5.0])
    curvatures = np.array([1.0, 2.0, 0.5])
    capacity = 9.0

    def expected(self) -> np.ndarray:
        # s_i = t_i - lam / (2 c_i), sum s_i = C  =>  lam = 2 (sum t - C) / sum(1 / c)
        lam = 2 * (self.targets.sum() - self.capacity) / np.sum(1 / self.curvatures)
        return self.targets - lam / (2 * self.curvatures)

    @pytest.mark.parametrize("method", METHODS)
    def test_shares_match_closed_form(self, method):
        """Every method finds the equal-marginal-value shares of the closed form."""
        agents = [
            quadratic_share_agent(f"a{i}", t, c)
            for i, (t, c) in enumerate(zip(self.targets, self.curvatures, strict=True))
        ]
        res = coordinate(agents, [CapacityResource("grid", (self.capacity,))], settings(method, max_rounds=200))
        assert res.success, res.message
        # 1e-5: the stopping tolerance 1e-9 on the relative predicted decrease bounds the distance to ~sqrt(1e-9)
        np.testing.assert_allclose(res.P, self.expected(), atol=1e-4)


    @pytest.mark.parametrize("method", METHODS)
    def test_a_start_with_zero_gradient_stays(self, method):
        """An agent above its target (V = 0 there, dV/dp = 0 exactly: the draw constraint is inactive, by hand)
        under a limit that does not bind: every method stops at the start with no step (a zero gradient once
        made the first step 1 / 1e-300 and overflowed)."""
        # A window of 200 kW as a charger's: the scaled step used to overflow only where s^2 / 1e-300 does.
        agent = quadratic_share_agent("alone", 4e4, 1e-3, upper=2e5)  # starts at its free optimum 40 000.5 W
        res = coordinate([agent], [CapacityResource("grid", (1.5e5,))], settings(method))
        assert res.success, res.message
        assert res.evaluation.reports[0].gradient.tolist() == [0.0]
        assert res.P.tolist() == [4e4 + 0.5]


def three_trucks():
    from agents import VehicleParams, ZoneParams, build_vehicle

    zone = ZoneParams("bridge", entry=400.0, exit=460.0, speed_limit=6.0)
    return [
        build_vehicle(
            f"truck-{k}",
            VehicleParams(
                route_length=1000.0,
                zones=(zone,),
                stages=16,
                departure=8.0 * k,
                desired_arrival=95.0 + 8 * k,
                latest_arrival=400.0,
                initial_speed=8.0,
            ),
        )  # fmt: skip
        for k in range(3)
    ]


@pytest.fixture(scope="module")
def trucks():
    return three_trucks()


class TestAgainstCentralized:
    """The coordinated schedule has the cost of the monolithic IPOPT solve for the same orders."""

    @pytest.mark.parametrize("method", ["bundle", "newton"])
    def test_trucks_on_a_bridge(self, trucks, method):
        """Three trucks on one bridge: coordinated total within 1e-6 of the centralized optimum."""
        bridge = [ExclusiveResource("bridge", gap=5.0)]
        res = coordinate(trucks, bridge, settings(method, tolerance=1e-8))
        assert res.evaluation.ok, res.message
        ref = solve_centralized(trucks, res.evaluation.feasible)
        assert ref.success, ref.message
        # 1e-6 relative: both stop on tolerances of about 1e-8 on the relative decrease
        assert abs(res.total - ref.total) <= 1e-6 * abs(ref.total), (res.total, ref.total)

    def test_gradient_method_reaches_the_optimum(self, trucks):
        """Projected gradient gets within 1e-4 of the centralized optimum (it is the slow one)."""
        bridge = [ExclusiveResource("bridge", gap=5.0)]
        res = coordinate(trucks, bridge, settings("gradient", max_rounds=150, tolerance=1e-8))
        ref = solve_centralized(trucks, res.evaluation.feasible)
        assert res.total - ref.total <= 1e-4 * abs(ref.total)

    def test_newton_needs_fewer_rounds_than_gradient(self):
        """With every certificate smooth, value Hessians save rounds over the gradient method (charging depot)."""
        from pathlib import Path

        from negotiate.fleet.build import build_agents
        from negotiate.fleet.parse import load_fleet

        spec = load_fleet(Path(__file__).parents[1] / "examples" / "charging_depot.toml")
        agents = build_agents(spec)
        newton = coordinate(agents, spec.resources, settings("newton", tolerance=1e-8))
        grad = coordinate(agents, spec.resources, settings("gradient", tolerance=1e-8, max_rounds=150))
        assert newton.success, newton.message
        assert newton.rounds < grad.rounds, (newton.rounds, grad.rounds)
        ref = solve_centralized(agents, newton.evaluation.feasible)
        assert abs(newton.total - ref.total) <= 1e-6 * abs(ref.total)

    def test_schedule_respects_the_gap(self, trucks):
        """Consecutive users of the bridge are at least the gap apart."""
        bridge = [ExclusiveResource("bridge", gap=5.0)]
        res = coordinate(trucks, bridge, settings("bundle", tolerance=1e-8))
        params = res.params()
        order = res.orders["bridge"]
        for a, b in zip(order, order[1:], strict=False):
            assert params[b][0] - params[a][1] >= 5.0 - 1e-6


def kink_agent(name: str = "kinked") -> AgentModel:
    """V(p) = 0.75 p - min(p, 1): slopes -0.25 and 0.75, minimum exactly at the kink p = 1 (LICQ fails there)."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    prob = ParametricNLP(
        {"x": x, "p": p, "f": 0.75 * p - x, "g": ca.vertcat(x - p, x)}, ubg=[0, 1], g_names=["x <= share", "x <= 1"]
    )
    return AgentModel(name, prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),), ReachableSet([0], [2]), [1.0])


def min_agent(name: str = "kinked") -> AgentModel:
    """V(p) = -min(p, 1): the capacity is worth 1 per unit up to 1, nothing beyond."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    prob = ParametricNLP(
        {"x": x, "p": p, "f": -x, "g": ca.vertcat(x - p, x)}, ubg=[0, 1], g_names=["x <= share", "x <= 1"]
    )
    return AgentModel(name, prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),), ReachableSet([0], [2]), [1.5])


class TestNonsmoothGuard:
    def test_plain_gradient_stalls_at_a_kink_guarded_converges(self):
        """At a kink that is the optimum, the plain line search fails; the guard's one-sided gradients prove it."""
        grid = [CapacityResource("grid", (2.0,))]
        plain = coordinate([kink_agent()], grid, settings("gradient", guard=False, max_rounds=60))
        guarded = coordinate([kink_agent()], grid, settings("gradient", guard=True, max_rounds=60))
        assert not plain.success  # line search fails: no descent along the split multiplier's gradient
        assert guarded.success and guarded.rounds == 0
        np.testing.assert_allclose(guarded.P, [1.0], atol=1e-9)
        # The one-sided gradients of V at 1 are 0.75 (x <= 1 binds) and -0.25 (x <= share binds), by hand.
        grads = sorted(float(g[0]) for g in guarded.evaluation.reports[0].gradients)
        np.testing.assert_allclose([grads[0], grads[-1]], [-0.25, 0.75], atol=1e-9)

    def test_plain_gradient_oscillates_across_a_kink_guarded_converges(self):
        """Two agents share 2 units; the optimum p = q = 1 sits on a kink of one agent's value function."""
        grid = [CapacityResource("grid", (2.0,))]
        agents = [min_agent(), quadratic_share_agent("smooth", 2.0, 0.25, upper=2.0)]
        plain = coordinate(agents, grid, settings("gradient", guard=False, max_rounds=60, tolerance=1e-8))
        guarded = coordinate(agents, grid, settings("gradient", guard=True, max_rounds=60, tolerance=1e-8))
        assert plain.status in ("max-rounds", "failed"), plain.message  # oscillates, or its line search gives up
        assert guarded.success
        # optimum by hand: marginal value 1 for the first agent up to p = 1, 2 * 0.25 * (2 - q) = 0.5 at q = 1
        np.testing.assert_allclose(guarded.P, [1.0, 1.0], atol=1e-5)
        np.testing.assert_allclose(guarded.total, -0.75, atol=1e-6)

    def test_active_set_change_at_a_smooth_point_flags_without_probes(self):
        """V(p) = 0.75 p - min(p, 1) at p = 0.5 then p = 1.5: the row x <= share gave way to x <= 1 (a kink at
        p = 1 lies between). At p = 1.5 the point is smooth: holding x <= 1 returns the same solution and
        releasing it another one (V = 0.75 * 1.5 - 1.5), so neither probe gives a second gradient (checked
        here by doing them) and the guard flags without spending solves."""
        from negotiate.core.guard import guard

        prob = kink_agent().problem
        before, after = prob.solve([0.5]), prob.solve([1.5], warm=prob.solve([0.5]))
        assert after.certificate.verdict == "smooth"
        rep = guard(prob, after, before)
        assert rep is not None and "active set changed" in rep.reason
        assert rep.solves == 0 and rep.gradients == ()
        (row,) = [r for r in after.certificate.strictly_active if str(r) == "x <= 1 (upper)"]
        held, released = prob.solve([1.5], warm=after, hold=[row]), prob.solve([1.5], warm=after, release=[row])
        np.testing.assert_allclose(held.gradient, after.gradient, atol=1e-9)
        np.testing.assert_allclose(released.value, 0.75 * 1.5 - 1.5, atol=1e-7)
        assert released.value < after.value - 0.1  # another point: its gradient belongs to no piece here

    def test_bundle_takes_one_sided_gradients_as_cuts(self):
        """The bundle method settles the kink at once with the guard's cuts."""
        grid = [CapacityResource("grid", (2.0,))]
        res = coordinate([kink_agent()], grid, settings("bundle"))
        assert res.success and res.rounds == 0
        np.testing.assert_allclose(res.P, [1.0], atol=1e-9)


    @pytest.mark.parametrize("seed", [0, 1])
    def test_bundle_converges_on_generated_depots(self, seed):
        """Four generated tractors on one grid connection: the bundle method stops on its tolerance (it used to
        repeat the same trial, a slight decrease short of the serious-step test, until max-rounds) at the cost
        of the centralized IPOPT solve for the same feasible set."""
        import tomllib

        from negotiate.fleet.build import build_agents
        from negotiate.fleet.parse import parse_fleet
        from negotiate.tools.generate import generate_fleet

        spec = parse_fleet(tomllib.loads(generate_fleet("depot", 4, seed)))
        agents = build_agents(spec)
        res = coordinate(agents, spec.resources, replace(spec.coordinator, method="bundle"))
        assert res.success, (res.status, res.rounds, res.message)
        ref = solve_centralized(agents, res.evaluation.feasible)
        assert ref.success, ref.message
        # 1e-6 relative: the fleet's own stopping tolerance on the relative predicted decrease
        assert abs(res.total - ref.total) <= 1e-6 * abs(ref.total), (res.total, ref.total)


class TestOrders:
    def two_way_agents(self):
        return [slot_agent("A", 0.0, 10.0, 1.0, ["r1", "r2"]), slot_agent("B", 5.0, 10.0, 1.0, ["r2", "r1"])]

    def test_cycle_is_a_deadlock_naming_agents_and_resources(self):
        """Opposite orders on two resources crossed in opposite sequences form a cycle: rejected, named."""
        agents = self.two_way_agents()
        res = [ExclusiveResource("r1"), ExclusiveResource("r2")]
        with pytest.raises(DeadlockError) as err:
            build_feasible_set(agents, res, {"r1": ["B", "A"], "r2": ["A", "B"]})
        msg = str(err.value)
        assert "deadlock" in msg
        for token in ("A on r1", "A on r2", "B on r1", "B on r2"):
            assert token in msg

    def test_consistent_orders_pass(self):
        """The same agents with compatible orders give a feasible set."""
        agents = self.two_way_agents()
        res = [ExclusiveResource("r1"), ExclusiveResource("r2")]
        fs = build_feasible_set(agents, res, {"r1": ["A", "B"], "r2": ["A", "B"]})
        assert fs.A.shape[1] == 8

    def test_swap_improves_on_first_come_first_served(self):
        """A stiff late agent and a soft early one: swapping them lowers the total; exhaustive agrees."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r"], earliest=2.0),
        ]
        res = [ExclusiveResource("r", gap=1.0)]
        st = settings("bundle", tolerance=1e-10)

        def run(orders, start):
            r = coordinate(agents, res, st, orders=orders, start=start)
            return r.total, r.P, r

        fcfs, o1, _ = search_orders(agents, res, "fcfs", run)
        swap, o2, trials = search_orders(agents, res, "swap", run)
        exh, o3, _ = search_orders(agents, res, "exhaustive", run)
        assert o1 == {"r": ["soft", "stiff"]} and o2 == {"r": ["stiff", "soft"]} == o3
        assert swap.total < fcfs.total
        # by hand: stiff enters at 2 (its wish and earliest), soft waits until 13 => soft pays 0.01 * 13^2
        np.testing.assert_allclose(swap.total, 0.01 * 13.0**2, rtol=1e-6)
        assert any(t.kept for t in trials[1:])

    # Emptiness by hand: A wants to enter at 0 (earliest 0), B at 5 (earliest 5); both stay at least 10 s,
    # and every slot time lies at most 200 s after the wish (slot_agent's box). A first needs
    # A.leave + gap <= B.enter with A.leave >= 10 and B.enter <= B.leave - 10 <= 195: feasible iff
    # gap <= 185. B first: B.leave >= 15 and A.enter <= 190: feasible iff gap <= 175.
    def gap_agents(self):
        return [
            slot_agent("A", 0.0, 10.0, 1.0, ["r"], earliest=0.0),
            slot_agent("B", 5.0, 10.0, 1.0, ["r"], earliest=5.0),
        ]

    @pytest.mark.parametrize(
        "first, gap, feasible", [("B", 175.0, True), ("B", 175.01, False), ("A", 185.0, True), ("A", 185.01, False)]
    )
    def test_emptiness_matches_the_hand_bound(self, first, gap, feasible):
        """The phase-one LP finds the polyhedron empty exactly past the gap derived by hand."""
        agents, res = self.gap_agents(), [ExclusiveResource("r", gap=gap)]
        order = {"r": ["B", "A"]} if first == "B" else {"r": ["A", "B"]}
        if feasible:
            assert check_orders(agents, res, order).conflict() is None
        else:
            with pytest.raises(InfeasibleOrdersError) as err:
                check_orders(agents, res, order)
            first, second = order["r"]
            # The certificate: the gap row, both users' shortest stays, the second user's latest exit.
            assert f"r: {first} leaves + gap <= {second} enters" in err.value.rows
            stays = {f"{u}: r.enter - r.leave <= -10 (reachable set)" for u in (first, second)}  # slot_agent's rows
            assert stays <= set(err.value.rows)
            assert f"{second}: r.leave <= {205.0 if second == 'B' else 200.0:.6g} (reachable window)" in err.value.rows
            assert "no schedule meets the orders r: " + " > ".join(order["r"]) in str(err.value)

    def test_search_skips_an_infeasible_candidate(self):
        """Gap 180: the first-come-first-served order (A, B) is feasible, its swap is not; the swap is recorded
        as an infeasible trial with its reason and never coordinated."""
        agents, res = self.gap_agents(), [ExclusiveResource("r", gap=180.0)]
        calls = []

        def run(orders, start):
            calls.append(orders)
            r = coordinate(agents, res, settings("bundle"), orders=orders, start=start)
            return r.total, r.P, r

        for rule in ("swap", "exhaustive"):
            calls.clear()
            best, orders, trials = search_orders(agents, res, rule, run)
            assert orders == {"r": ["A", "B"]} and calls == [{"r": ["A", "B"]}]
            assert [t.kept for t in trials] == [True, False]
            assert trials[1].orders == {"r": ["B", "A"]} and trials[1].total == float("inf")
            assert "no schedule meets the orders r: B > A" in trials[1].infeasible
            assert best.success

    def test_infeasible_first_order_names_resource_and_agents(self):
        """Gap 186: no order admits a schedule; the search stops at the first one with a message."""
        agents, res = self.gap_agents(), [ExclusiveResource("r", gap=186.0)]
        with pytest.raises(InfeasibleOrdersError, match=r"no schedule meets the orders r: A > B"):
            search_orders(agents, res, "swap", lambda orders, start: pytest.fail("must not coordinate"))

    def test_exhaustive_refuses_large_resources(self):
        """Exhaustive search is limited to 7 users per resource."""
        agents = [slot_agent(f"a{k}", 10.0 * k, 5.0, 1.0, ["r"]) for k in range(8)]
        res = [ExclusiveResource("r")]

        def run(orders, start):
            return 0.0, np.zeros(16), None

        with pytest.raises(ValueError, match="limited to 7 users"):
            search_orders(agents, res, "exhaustive", run)


def fragile_agent() -> AgentModel:
    """Its NLP is infeasible for share > 1.5 although its (wrong) reachable set claims up to 2."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    prob = ParametricNLP({"x": x, "p": p, "f": (x - 3) ** 2, "g": ca.vertcat(x - p, p - 1.5)}, ubg=[0, 0])
    return AgentModel(
        "fragile", prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),), ReachableSet([0], [2]), [1.0]
    )


class TestFailedAgents:
    @pytest.mark.parametrize("method", METHODS)
    def test_failed_solves_are_reported_not_used(self, method):
        """An agent that fails inside its claimed window never crashes the run or lends a gradient."""
        grid = [CapacityResource("grid", (5.0,))]
        res = coordinate([fragile_agent()], grid, settings(method, max_rounds=40, tolerance=1e-8))
        assert res.evaluation.ok  # the incumbent is a converged point
        assert any(h.failed for h in res.history)  # the failures were seen and reported
        # the agent's own solve accepts p - 1.5 <= 0 up to the re-check's feasibility tolerance (1e-6 relative)
        assert res.P[0] <= 1.5 + 2e-6
        # The optimum sits on the edge where solves start to fail: a method learns of that edge only through
        # failed trials and halved steps, so its distance to it is limited by the halvings it had time for.
        np.testing.assert_allclose(res.P, [1.5], atol=1e-2)


@register_method
class HalvingGradient(Method):
    """A deliberately simple user method: projected gradient steps whose length halves after a rise."""

    name = "test-halving"

    def start(self, first: Evaluation) -> None:
        self.incumbent = first
        self.step = 1.0 / max(1e-12, float(np.max(np.abs(first.gradient * self.feasible.scale))))

    def propose(self, latest: Evaluation) -> Proposal:
        if latest.ok and latest.total < self.incumbent.total:
            self.incumbent = latest
        elif latest is not self.incumbent:
            self.step *= 0.5
        x = self.incumbent
        nxt = self.feasible.project(x.P - self.step * self.feasible.scale**2 * x.gradient)
        measure = float(x.gradient @ (x.P - nxt)) / max(1.0, abs(x.total))
        return Proposal(nxt, measure, converged=measure < self.settings.tolerance)



@register_method
class GivingUp(HalvingGradient):
    """The same steps, but the method gives up (no point) after its fifth proposal, as a line search can."""

    name = "test-giving-up"

    def propose(self, latest: Evaluation) -> Proposal:
        self.calls = getattr(self, "calls", 0) + 1
        if self.calls > 5:
            return Proposal(None, 1.0, False, "line search failed: step too small")
        return super().propose(latest)


class TestUserMethods:
    def test_registered_method_runs_through_the_same_engine(self):
        """A Method subclass registered by name coordinates like a built-in one."""
        agents = [quadratic_share_agent(f"a{i}", t, c) for i, (t, c) in enumerate([(4, 1), (3, 2), (5, 0.5)])]
        res = coordinate(
            agents, [CapacityResource("grid", (9.0,))], settings("test-halving", max_rounds=300, tolerance=1e-10)
        )
        np.testing.assert_allclose(res.P, TestClosedForm().expected(), atol=1e-3)
        assert res.method == "test-halving"

    def test_giving_up_with_a_usable_incumbent_is_stalled_not_failed(self):
        """A method that stops without a point keeps a usable schedule when every agent converged there."""
        agents = [quadratic_share_agent(f"a{i}", t, c) for i, (t, c) in enumerate([(4, 1), (3, 2), (5, 0.5)])]
        res = coordinate(agents, [CapacityResource("grid", (9.0,))], settings("test-giving-up", max_rounds=50))
        assert res.status is CoordinationStatus.STALLED and res.status.usable
        assert res.message == "line search failed: step too small" and res.evaluation.ok
        assert res.rounds == 5 and np.isfinite(res.total)

    def test_unknown_method_is_named(self):
        """An unknown method name lists the known ones."""
        with pytest.raises(ValueError, match="unknown coordination method 'nope'"):
            coordinate(
                [quadratic_share_agent("a", 1, 1)],
                [CapacityResource("grid", (1.0,))],
                replace(settings("bundle"), method="nope"),
            )


class TestMethodOptions:
    """Methods declare their options; unknown keys and mistyped values never pass silently."""

    def test_problems_name_unknown_and_mistyped_keys(self):
        """An unknown key lists the declared ones; each type is checked as TOML gives it."""
        from negotiate.coordination.methods import method_class, option_problems

        bundle = method_class("bundle")
        given = {"first_stepp": 1, "hessian_metric": "no", "serious": True, "downshift": float("nan"),
                 "max_cuts": 25.0, "first_step": 1, "keep_cuts": 8}  # fmt: skip
        problems = {key: expected for key, expected, _ in option_problems(bundle, given)}
        assert problems == {
            "first_stepp": "one of the bundle method's options "
            "(serious, downshift, max_cuts, keep_cuts, first_step, hessian_metric)",
            "hessian_metric": "true or false",
            "serious": "a finite number",  # a switch is not a number
            "downshift": "a finite number",
            "max_cuts": "an integer",
        }  # an integer is a fine number (first_step = 1), a count must be an integer (max_cuts = 25.0)

    def test_python_settings_warn_and_keep_the_default(self):
        """From Python an unknown or mistyped option warns (naming it) and the method runs on its default."""
        agents = [quadratic_share_agent(f"a{i}", t, c) for i, (t, c) in enumerate([(4, 1), (3, 2), (5, 0.5)])]
        st = settings("bundle", tolerance=1e-10, options={"first_stepp": 1.0, "hessian_metric": "no"})
        with pytest.warns(UserWarning) as record:
            res = coordinate(agents, [CapacityResource("grid", (9.0,))], st)
        text = " ".join(str(w.message) for w in record)
        assert "'first_stepp'" in text and "'hessian_metric' expected true or false, got 'no'" in text
        np.testing.assert_allclose(res.P, TestClosedForm().expected(), atol=1e-6)  # same closed form as above

    @pytest.mark.parametrize("name", ["bundle", "gradient"])
    def test_docs_show_the_declared_options(self, name):
        """docs/methods.md holds the table generated from the method's declaration."""
        from pathlib import Path

        from negotiate.coordination.methods import method_class, options_table

        docs = (Path(__file__).parents[1] / "docs" / "methods.md").read_text()
        assert options_table(method_class(name)) in docs


class TestCoordinationStatus:
    """One status enum says why a coordination stopped and whether its schedule is usable."""

    def test_round_limit_is_usable_not_converged(self):
        """Stopped by max_rounds = 1 on the closed-form fleet: a usable schedule, not a converged one."""
        from negotiate.core.status import CoordinationStatus

        agents = [quadratic_share_agent(f"a{i}", t, c) for i, (t, c) in enumerate([(4, 1), (3, 2), (5, 0.5)])]
        res = coordinate(agents, [CapacityResource("grid", (9.0,))], settings("gradient", max_rounds=1))
        assert res.status is CoordinationStatus.MAX_ROUNDS and res.status == "max-rounds"
        assert res.status.usable and not res.success
        full = coordinate(agents, [CapacityResource("grid", (9.0,))], settings("bundle", tolerance=1e-10))
        assert full.status is CoordinationStatus.CONVERGED and full.success and full.status.usable

    def test_failed_and_error_are_not_usable(self):
        """``failed`` (no point where every agent converged) and ``error`` mark schedules not to use."""
        from negotiate.core.status import CoordinationStatus

        assert not CoordinationStatus.FAILED.usable and not CoordinationStatus.ERROR.usable
        assert {str(s) for s in CoordinationStatus} == {
            "converged", "max-rounds", "stalled", "failed", "unreachable", "error"
        }
        assert not CoordinationStatus.UNREACHABLE.usable and CoordinationStatus.STALLED.usable


def _elastic_agent(name: str, penalty: float, window: tuple[float, float] = (0.0, 10.0)) -> AgentModel:
    """One elastic agent, solved by hand: it can only draw ``x`` in [0, 1] W, is charged ``(share - 5)^2`` on
    the share it is granted and ``penalty * |x - share|`` for missing it (plus ``1e-3 x^2``, which moves the
    figures below by less than 1e-3); the coordinator may propose shares in ``window``.

    The priced value ``(share - 5)^2 + penalty * max(share - 1, 0)`` has, with ``penalty = 2``, its minimiser at
    ``share = 4`` (``2 (4 - 5) + 2 = 0``), 3 W past what the agent can meet; the best share it can meet is 1.
    """
    x, late, early = ca.SX.sym("x"), ca.SX.sym("late"), ca.SX.sym("early")
    p = ca.SX.sym("p")
    nlp = {"x": ca.vertcat(x, late, early), "p": p, "f": (p - 5) ** 2 + penalty * (late + early) + 1e-3 * x**2,
           "g": x - p - late + early}
    problem = ParametricNLP(nlp, lbx=[0.0, 0.0, 0.0], ubx=[1.0, np.inf, np.inf], lbg=[0.0], ubg=[0.0])
    return AgentModel(
        name=name, problem=problem, params=(SlotParam("grid.share[0]", "grid", "share", "W", 0),),
        reachable=ReachableSet([window[0]], [window[1]]), free_optimum=[max(window[0], 1.0)],
        slack=lambda res: np.array([res.x[1] - res.x[2]]),
    )


class TestElasticSlots:
    def test_a_priced_miss_is_never_the_answer(self):
        """Penalty 2 is too small to be exact (the priced value is least at 4 W, which the agent misses by 3 W);
        the coordinator treats a miss as a point where the agent failed, so it ends at the best share the
        agent can meet, 1 W (the hand solution), with nothing missed."""
        from negotiate.coordination.engine import missed_slots

        res = coordinate([_elastic_agent("a", 2.0)], [], settings("bundle", tolerance=1e-9))
        assert res.P[0] == pytest.approx(1.0, abs=1e-4)
        assert res.P[0] <= 1.0 + 1e-5
        assert res.status.usable and not missed_slots([_elastic_agent("a", 2.0)], res.evaluation)

    def test_a_window_with_nothing_reachable_ends_unreachable_and_names_it(self):
        """Every share the coordinator may propose (2-10 W) is one the agent cannot meet: the restoration finds
        no reachable start, and the status says which parameter is missed and by how much (achieved 1 W)."""
        from negotiate.core.status import CoordinationStatus

        res = coordinate([_elastic_agent("a", 100.0, (2.0, 10.0))], [], settings("bundle", tolerance=1e-9))
        assert res.status is CoordinationStatus.UNREACHABLE and not res.status.usable
        assert "a misses grid.share[0] by -1 W" in res.message


def _same_lane_pair():
    """A heavy vehicle and a car on one approach lane of a crossing (invented numbers from the crossing
    generator): the car, 3.3 s behind, would reach the second quadrant first if it were alone."""
    import tomllib

    from negotiate.fleet.build import build_agents
    from negotiate.fleet.parse import parse_fleet
    from negotiate.tools.generate import crossing_header, crossing_vehicle

    text = "\n".join(["[fleet]", 'name = "same-lane"', ""] + crossing_header(60, "fcfs")
                     + crossing_vehicle("lorry", "south", False, True, 0.0)
                     + crossing_vehicle("car", "south", False, False, 3.3))  # fmt: skip
    spec = parse_fleet(tomllib.loads(text))
    return spec, build_agents(spec)


class TestFirstOrders:
    def test_per_resource_orders_that_overtake_give_way_to_one_ranking(self):
        """First come, first served per quadrant lets the car overtake the lorry between two adjacent
        quadrants, which no schedule meets (the gap rows and the lorry's overlap of both quadrants); the
        search starts instead from one ranking of both vehicles (the lorry first everywhere)."""
        from negotiate.resources.coupling import fcfs_orders, first_orders, ranked_orders

        spec, agents = _same_lane_pair()
        fcfs = fcfs_orders(agents, spec.resources)
        assert fcfs["ne"] == ["car", "lorry"] and fcfs["se"] == ["lorry", "car"]
        with pytest.raises(InfeasibleOrdersError):
            check_orders(agents, spec.resources, fcfs)
        ranked = ranked_orders(agents, spec.resources)
        assert ranked["ne"] == ranked["se"] == ["lorry", "car"]
        assert first_orders(agents, spec.resources) == ranked

    @pytest.mark.parametrize("method", ["bundle", "newton"])
    def test_elastic_vehicles_reach_the_centralized_optimum(self, method):
        """From the ranked orders, the coordination of the two elastic vehicles (restored start, points they
        cannot meet stepped back from) ends where the centralized IPOPT solve of the same fleet does."""
        from negotiate.resources.coupling import first_orders

        spec, agents = _same_lane_pair()
        orders = first_orders(agents, spec.resources)
        res = coordinate(agents, spec.resources, settings(method, tolerance=1e-8), orders=orders)
        ref = solve_centralized(agents, build_feasible_set(agents, spec.resources, orders))
        assert ref.success, ref.message
        assert res.success, res.message
        # the slots agree to 1e-5 s; the totals to 1e-5 relative: the centralized solve meets its dynamics
        # rows to IPOPT's constraint tolerance, and at its own slots its total is ~1.2e-6 relative below the
        # agents' values there (measured), so it is no closer reference than that
        np.testing.assert_allclose(res.P, ref.P, atol=1e-5)
        assert res.total == pytest.approx(ref.total, rel=1e-5)
