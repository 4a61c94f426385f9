"""The order master (negotiate.coordination.master) against enumeration of every order combination.

Reference: for the slot agents of tests/fleets.py every value function is the closed-form convex quadratic
V(p) = s * sum_j [(enter_j - want_j)^2 + 0.1 (leave_j - enter_j - duration)^2] on a polyhedron written out
here by hand (the reachable box, the stays, the route sequence, the gap rows of the order), so the best
schedule of each fixed order is a convex QP that SciPy's SLSQP solves on its own; the best over all orders
is the least of those. The generalized Benders loop (Geoffrion 1972) must end at that order with a bound
within its tolerance of it, the bound below the total since every cut of a convex function lies below it.
"""

from __future__ import annotations

import functools
import itertools
import json

import numpy as np
import pytest
from fleets import slot_agent
from scipy.optimize import minimize

import negotiate.run
from negotiate.coordination.engine import coordinate
from negotiate.coordination.master import GAP_TOLERANCE, OrderMaster, search_master
from negotiate.coordination.orders import order_key, search_orders
from negotiate.errors import DeadlockError, InfeasibleOrdersError
from negotiate.fleet.spec import CoordinatorSettings, FleetSpec
from negotiate.resources import ExclusiveResource
from negotiate.resources.coupling import check_orders
from negotiate.run import run_fleet

TIGHT = CoordinatorSettings(method="bundle", tolerance=1e-10, max_rounds=300)


def runner(agents, resources, settings=TIGHT):
    """``run`` for the searches, keeping every evaluation of every coordination (the master's cuts)."""
    seen = []

    def run(orders, start):
        keep = seen.append
        r = coordinate(agents, resources, settings, orders=orders, start=start, checkpoint=lambda s: keep(s.latest))
        return (r.total if r.evaluation.ok else float("inf")), r.P, r

    return run, seen


SPECS: dict[str, tuple[float, float, float, list[str]]] = {}
"""Wish (s), stay (s), stiffness and route of each agent of the last random fleet, for the QP below."""


def random_fleet(seed):
    """Three slot agents on three exclusive resources, random wishes, stays, stiffness and routes (invented)."""
    rng = np.random.default_rng(seed)
    names = ["r1", "r2", "r3"]
    agents = []
    for k in range(3):
        route = list(rng.permutation(names)[: rng.integers(2, 4)])
        want, dur, stiff = float(rng.uniform(0, 20)), float(rng.uniform(4, 10)), float(rng.uniform(0.1, 5))
        agents.append(slot_agent(f"a{k}", want, dur, stiff, route))
        SPECS[f"a{k}"] = (want, dur, stiff, route)
    return agents, [ExclusiveResource(n, gap=2.0) for n in names]


def fixed_order_qp(agents, gap, orders):
    """Best total for fixed orders: the convex QP written out by hand (a weighted least-squares cost
    ||W (R x - t)||^2 under rows G x >= h), solved by SciPy's SLSQP with exact derivatives."""
    index, x0, bounds = {}, [], []
    for a in agents:
        want, dur, _stiff, route = SPECS[a.name]
        for j, r in enumerate(route):
            index[(a.name, r)] = len(x0)
            x0 += [want + j * dur, want + (j + 1) * dur]
            bounds += [(want - 100.0, want + 200.0)] * 2
    n = len(x0)
    R, t, w, G, h = [], [], [], [], []

    def term(coef, target, weight):
        row = np.zeros(n)
        for k, c in coef.items():
            row[k] = c
        R.append(row), t.append(target), w.append(weight)

    def ge(coef, rhs):  # sum coef x >= rhs
        row = np.zeros(n)
        for k, c in coef.items():
            row[k] = c
        G.append(row), h.append(rhs)

    for a in agents:
        want, dur, stiff, route = SPECS[a.name]
        for j, r in enumerate(route):
            k = index[(a.name, r)]
            term({k: 1.0}, want + j * dur, stiff)  # stiffness (enter - wanted)^2
            term({k + 1: 1.0, k: -1.0}, dur, 0.1 * stiff)  # 0.1 stiffness (leave - enter - duration)^2
            ge({k + 1: 1.0, k: -1.0}, dur)  # stay at least the duration
            if j + 1 < len(route):
                ge({index[(a.name, route[j + 1])]: 1.0, k + 1: -1.0}, 0.0)  # the next slot after this one
    for r, users in orders.items():
        for u, v in zip(users, users[1:], strict=False):
            ge({index[(v, r)]: 1.0, index[(u, r)] + 1: -1.0}, gap)  # u leaves + gap <= v enters
    R, t, w, G, h = np.array(R), np.array(t), np.array(w), np.array(G), np.array(h)
    x = np.array(x0)
    for ftol in (1e-6, 1e-12):  # a rough solve gives the cost's size, then SLSQP's absolute ftol is relative
        scale = 1.0 / max(1.0, float(w @ (R @ x - t) ** 2)) if ftol < 1e-6 else 1e-3
        ws = w * scale
        res = minimize(
            lambda x, ws=ws: float(ws @ (R @ x - t) ** 2), x, jac=lambda x, ws=ws: 2.0 * R.T @ (ws * (R @ x - t)),
            method="SLSQP", bounds=bounds,
            constraints=[{"type": "ineq", "fun": lambda x: G @ x - h, "jac": lambda x: G}],
            options={"ftol": ftol, "maxiter": 2000},
        )  # fmt: skip
        assert res.success, res.message
        x = res.x
    return float(res.fun) / scale


def enumerate_orders(agents, resources):
    """(best total, orders) of every order combination that admits a schedule, best first."""
    users = {r.name: r.users(agents) for r in resources}
    out = []
    for combo in itertools.product(*(itertools.permutations(users[r.name]) for r in resources)):
        orders = {r.name: list(c) for r, c in zip(resources, combo, strict=True)}
        try:
            check_orders(agents, resources, orders)
        except (DeadlockError, InfeasibleOrdersError):
            continue
        out.append((fixed_order_qp(agents, resources[0].gap, orders), orders))
    return sorted(out, key=lambda t: t[0])


class TestSearchMaster:
    @pytest.mark.parametrize("seed", [0, 2])
    def test_equals_the_enumerated_best(self, seed):
        """On two random fleets the master's orders and total are the best of every order combination, and its
        certified gap lies in [0, tolerance]."""
        agents, resources = random_fleet(seed)
        ranked = enumerate_orders(agents, resources)
        (best_total, best_orders), (second, _) = ranked[0], ranked[1]
        # the best order is unique by a wide margin, so comparing orders is meaningful
        assert second > best_total * (1 + 1e-3)
        run, seen = runner(agents, resources)
        best, orders, trials = search_master(agents, resources, run, evaluations=seen)
        assert orders == best_orders
        # coordination (tolerance 1e-10) and SLSQP (ftol 1e-13) each reach the QP's optimum to ~1e-8
        np.testing.assert_allclose(best.total, best_total, rtol=1e-6)
        last = trials[-1]
        assert last.gap_kind == "certified", last.gap_reason
        assert 0.0 <= last.gap <= GAP_TOLERANCE * max(1.0, abs(best.total))
        assert last.bound <= best_total * (1 + 1e-9)  # a lower bound of the enumerated best
        assert len(trials) < len(ranked)  # fewer coordinations than enumeration

    def test_finds_a_better_order_than_first_come(self):
        """A soft early agent and a stiff late one on two bridges: first come first served puts the soft one
        first; the master finds the stiff one first. By hand: the stiff one keeps its wishes (2 s, 12 s), the soft
        one waits until 13 s and 23 s, paying 0.01 * (13^2 + 13^2)."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r", "s"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r", "s"], earliest=2.0),
        ]
        resources = [ExclusiveResource("r", gap=1.0), ExclusiveResource("s", gap=1.0)]
        run, seen = runner(agents, resources)
        fcfs, first, _ = search_orders(agents, resources, "fcfs", run)
        best, orders, trials = search_master(agents, resources, run, evaluations=seen)
        assert first == {"r": ["soft", "stiff"], "s": ["soft", "stiff"]}
        assert orders == {"r": ["stiff", "soft"], "s": ["stiff", "soft"]}
        np.testing.assert_allclose(best.total, 0.01 * 2 * 13.0**2, rtol=1e-6)
        assert best.total < fcfs.total
        assert trials[0].orders == first and trials[-1].gap_kind == "certified"

    def test_failed_coordination_gives_a_no_good_cut(self):
        """When the coordination of the best order fails (a stand-in that reports an infinite total), that
        order is excluded and never proposed again; the search ends at the best of the others, which a plain
        enumeration of the four combinations (each coordinated) confirms."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r", "s"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r", "s"], earliest=2.0),
        ]
        resources = [ExclusiveResource("r", gap=1.0), ExclusiveResource("s", gap=1.0)]
        run, seen = runner(agents, resources)
        refused = {"r": ["stiff", "soft"], "s": ["stiff", "soft"]}

        def failing(orders, start):
            if orders == refused:
                return float("inf"), np.zeros(8), None
            return run(orders, start)

        best, orders, trials = search_master(agents, resources, failing, evaluations=seen)
        assert sum(t.orders == refused for t in trials) == 1
        others = []
        for o1, o2 in itertools.product(["soft", "stiff"], repeat=2):
            cand = {r: [o, ({"soft", "stiff"} - {o}).pop()] for r, o in (("r", o1), ("s", o2))}
            if cand != refused:
                try:
                    check_orders(agents, resources, cand)
                except (DeadlockError, InfeasibleOrdersError):
                    continue
                others.append((run(cand, None)[0], cand))
        total, want = min(others, key=lambda t: t[0])
        assert orders == want
        np.testing.assert_allclose(best.total, total, rtol=1e-6)
        assert trials[-1].gap_kind == "heuristic" and "a coordination failed" in trials[-1].gap_reason

    def test_other_rules_keep_their_trial_keys(self):
        """The swap search's trials carry exactly the keys they had before the master came (no bound)."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r"], earliest=2.0),
        ]
        resources = [ExclusiveResource("r", gap=1.0)]
        run, _seen = runner(agents, resources)
        _best, _orders, trials = search_orders(agents, resources, "swap", run)
        assert all(set(t.to_dict()) == {"orders", "total_cost", "kept", "infeasible"} for t in trials)

    def test_nonconvex_agent_makes_the_gap_heuristic(self):
        """An agent whose cost is a concave quadratic (negative stiffness): its cuts over-estimate its values
        elsewhere, so the gap is reported as heuristic, naming the agent."""
        agents = [
            slot_agent("bump", 0.0, 10.0, -0.01, ["r"], earliest=0.0),
            slot_agent("plain", 2.0, 10.0, 1.0, ["r"], earliest=2.0),
        ]
        resources = [ExclusiveResource("r", gap=1.0)]
        run, seen = runner(agents, resources, CoordinatorSettings(method="bundle", max_rounds=60))
        _best, _orders, trials = search_master(agents, resources, run, evaluations=seen)
        last = trials[-1]
        assert last.gap_kind == "heuristic"
        assert "'bump'" in last.gap_reason and "not convex" in last.gap_reason


def crossing():
    """A goes r1 then r2, B goes r2 then r1 (a crossing of two routes)."""
    agents = [
        slot_agent("A", 0.0, 5.0, 1.0, ["r1", "r2"]),
        slot_agent("B", 3.0, 5.0, 1.0, ["r2", "r1"]),
    ]
    return agents, [ExclusiveResource("r1", gap=1.0), ExclusiveResource("r2", gap=1.0)]


class TestOrderMaster:
    def test_deadlock_is_infeasible_in_the_master(self):
        """r1: B before A and r2: A before B close the cycle A.r1 -> A.r2 -> B.r2 -> B.r1 -> A.r1 (the
        precedence graph's cycle, which check_orders names); with the other three combinations excluded the
        master has no solution, so its rows alone exclude the deadlock."""
        agents, resources = crossing()
        dead = {"r1": ["B", "A"], "r2": ["A", "B"]}
        with pytest.raises(DeadlockError):
            check_orders(agents, resources, dead)
        master = OrderMaster(agents, resources)
        for i in range(len(agents)):
            master.add_floor(i, 0.0)
        for o1, o2 in itertools.product(["AB", "BA"], repeat=2):
            orders = {"r1": list(o1), "r2": list(o2)}
            if orders != dead:
                master.exclude(master.binaries(orders))
        assert master.solve(np.ones(2)).status == "infeasible"

    def test_master_with_one_combination_left_proposes_it(self):
        """With every combination but one excluded the master proposes that one (the binaries spell it)."""
        agents, resources = crossing()
        master = OrderMaster(agents, resources)
        for i in range(2):
            master.add_floor(i, 0.0)
        keep = {"r1": ["B", "A"], "r2": ["B", "A"]}
        for o1, o2 in itertools.product(["AB", "BA"], repeat=2):
            orders = {"r1": list(o1), "r2": list(o2)}
            if orders != keep:
                master.exclude(master.binaries(orders))
        sol = master.solve(np.ones(2))
        assert sol.status == "optimal" and sol.orders == keep

    def test_big_m_is_the_largest_violation_over_the_boxes(self):
        """leave_A + 1 <= enter_B: A's leave reaches at most 200 s (its box: wish 0 + 200 s), B's enter at least
        3 - 100 = -97 s (slot_agent's box), so the largest violation is 200 + 1 + 97 = 298 s (by hand)."""
        agents, resources = crossing()
        master = OrderMaster(agents, resources)
        res, u, v, first, _second = master.pairs[0]
        assert (res, u, v) == ("r1", "A", "B") and len(first) == 1
        assert master.big_m(first[0]) == pytest.approx(298.0, abs=1e-12)


class TestRunFleet:
    def test_run_json_shows_the_order_gap(self, tmp_path):
        """order = "master" through run_fleet: run.json gets the bound, the gap and its kind; the other keys
        are those of any run."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r"], earliest=2.0),
        ]
        resources = (ExclusiveResource("r", gap=1.0),)
        spec = FleetSpec("two", resources, (), CoordinatorSettings(order="master", tolerance=1e-10))
        result = run_fleet(spec, agents, out=tmp_path / "run")
        data = json.loads((tmp_path / "run" / "run.json").read_text())
        assert data["orders"] == {"r": ["stiff", "soft"]}
        assert data["order_gap_kind"] == "certified"
        assert data["order_bound"] <= data["total_cost"] and data["order_gap"] >= 0
        np.testing.assert_allclose(result.total, 0.01 * 13.0**2, rtol=1e-6)  # by hand (see above)
        keys = {"orders", "total_cost", "kept", "infeasible", "bound", "gap", "gap_kind"}
        assert keys <= set(data["order_search"][0])


class TestSwapRefinement:
    @pytest.mark.parametrize("seed", [8, 20])
    def test_swaps_after_a_short_master_reach_the_enumerated_best(self, seed):
        """With a budget of two coordinations (first come first served and one proposal of the master) the loop
        stops short; adjacent swaps of its best order, each a warm fixed-order coordination, then reach the best
        of every order combination (enumerated by the hand-written QP), with fewer coordinations than that
        enumeration. The bound stays the master's, the gap shrinks to the new total minus it."""
        agents, resources = random_fleet(seed)
        ranked = enumerate_orders(agents, resources)
        (best_total, best_orders), (second, _) = ranked[0], ranked[1]
        assert second > best_total * (1 + 1e-3)  # a unique best order, so comparing orders is meaningful
        run, seen = runner(agents, resources)
        best, orders, trials = search_master(agents, resources, run, evaluations=seen, budget=2)
        stages = [t.stage for t in trials]
        assert stages[:2] == ["master", "master"] and set(stages[2:]) == {"swap"}
        master_best = min(t.total for t in trials if t.stage == "master")
        assert master_best > best_total * (1 + 1e-3)  # the master alone stopped short of the best order
        assert any(t.kept for t in trials if t.stage == "swap")  # a swap improved on it
        assert orders == best_orders
        np.testing.assert_allclose(best.total, best_total, rtol=1e-6)  # both solves reach the QP's optimum to ~1e-8
        coordinated = [order_key(t.orders) for t in trials if not t.infeasible]
        assert len(set(coordinated)) == len(coordinated)  # no order coordinated twice
        assert len(coordinated) < len(ranked)  # fewer coordinations than enumeration
        bound = trials[1].bound  # the master's bound after its last coordination
        assert bound <= best_total * (1 + 1e-9)  # a lower bound of the enumerated best
        last = trials[-1]
        assert last.bound == bound and last.gap_kind == "certified", last.gap_reason
        np.testing.assert_allclose(last.gap, best.total - bound, rtol=1e-12)
        assert last.gap < trials[1].gap
        assert last.to_dict()["stage"] == "swap"

    def test_no_swaps_after_a_certified_master(self):
        """When the loop ends with a certified gap within its tolerance no swap is tried (it could gain less
        than the tolerance); swap_passes = 0 turns the refinement off after a loop that stopped short."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r", "s"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r", "s"], earliest=2.0),
        ]
        resources = [ExclusiveResource("r", gap=1.0), ExclusiveResource("s", gap=1.0)]
        run, seen = runner(agents, resources)
        _best, _orders, trials = search_master(agents, resources, run, evaluations=seen)
        assert trials[-1].gap_kind == "certified" and all(t.stage == "master" for t in trials)
        agents, resources = random_fleet(8)
        run, seen = runner(agents, resources)
        _best, _orders, trials = search_master(agents, resources, run, evaluations=seen, budget=2, swap_passes=0)
        assert [t.stage for t in trials] == ["master", "master"]

    def test_run_json_lists_the_swaps(self, tmp_path, monkeypatch):
        """Through run_fleet (the master's budget cut to two coordinations) run.json's order_search lists the
        swap trials with their stage, and the reported gap is the last trial's: total minus the master's bound."""
        agents, resources = random_fleet(8)
        best_total = enumerate_orders(agents, resources)[0][0]
        monkeypatch.setattr(negotiate.run, "search_master", functools.partial(search_master, budget=2))
        spec = FleetSpec("eight", tuple(resources), (), CoordinatorSettings(order="master", tolerance=1e-10))
        result = run_fleet(spec, agents, out=tmp_path / "run")
        data = json.loads((tmp_path / "run" / "run.json").read_text())
        stages = [t["stage"] for t in data["order_search"]]
        assert stages[:2] == ["master", "master"] and set(stages[2:]) == {"swap"}
        np.testing.assert_allclose(result.total, best_total, rtol=1e-6)  # the enumerated best (see above)
        last = data["order_search"][-1]
        assert data["order_gap"] == last["gap"] and data["order_bound"] == data["order_search"][1]["bound"]
        np.testing.assert_allclose(data["order_gap"], data["total_cost"] - data["order_bound"], rtol=1e-12)


# ---------------------------------------------------------------------------------------------------------
# generated fleets (invented data) against full enumeration by the centralized solve


def enumerate_central(spec, agents):
    """Every combination of the orders of all exclusive resources jointly, each admitted one solved by the
    centralized IPOPT solve (the monolithic NLP, negotiate.coordination.centralized): sorted totals."""
    from negotiate.coordination.centralized import solve_centralized
    from negotiate.resources.coupling import build_feasible_set

    ordered = [r for r in spec.resources if r.needs_order]
    users = {r.name: r.users(agents) for r in ordered}
    totals = []
    for combo in itertools.product(*(itertools.permutations(users[r.name]) for r in ordered)):
        orders = {r.name: list(c) for r, c in zip(ordered, combo, strict=True)}
        try:
            check_orders(agents, spec.resources, orders)
        except (DeadlockError, InfeasibleOrdersError):
            continue
        c = solve_centralized(agents, build_feasible_set(agents, spec.resources, orders))
        assert c.success, (orders, c.message)  # every reference solve must converge
        totals.append(c.total)
    return sorted(totals)


def convexity_violated(evaluations, rtol=1e-6):
    """Whether the evaluations show a nonconvex value function, checked here on their own: a cut (value and
    gradient at one point, the guard's one-sided gradients included) above the value at another point of the
    same agent by more than rtol of the values' size, or a value Hessian with an eigenvalue below -rtol of its
    largest magnitude (a convex function has neither: the first-order and second-order characterizations,
    Boyd and Vandenberghe 2004, sections 3.1.3 and 3.1.4)."""
    points: dict[int, list[tuple[np.ndarray, float, list[np.ndarray]]]] = {}
    for ev in evaluations:
        for i, rep in enumerate(ev.reports):
            if not rep.gradients:
                continue
            points.setdefault(i, []).append((np.asarray(rep.p, float), float(rep.value), rep.gradients))
            if rep.hessian is not None and np.size(rep.hessian):
                eig = np.linalg.eigvalsh(0.5 * (rep.hessian + rep.hessian.T))
                if eig[0] < -rtol * max(1.0, float(np.max(np.abs(eig)))):
                    return True
    for pts in points.values():
        for p, v, grads in pts:
            for q, w, _ in pts:
                for g in grads:
                    over = v + g @ (q - p) - w
                    if over > rtol * max(1.0, abs(v), abs(w), float(np.abs(g) @ np.abs(q - p))):
                        return True
    return False


class TestGeneratedFleets:
    @pytest.mark.parametrize(("kind", "agents", "seed"), [("bridge", 4, 3), ("furnace", 4, 2)])
    def test_master_equals_the_enumerated_best(self, kind, agents, seed):
        """A generated bridge (one resource, 4! = 24 orders) and furnace (two resources, 4! * 4! = 576 order
        combinations): the master's schedule total equals the best of every combination, each solved by the
        centralized NLP, within 0.1 %; its bound lies below its total, and it is certified only when the
        evaluations it saw show no sign of a nonconvex value function (checked here independently)."""
        import dataclasses
        import tomllib

        from negotiate.fleet.build import build_agents
        from negotiate.fleet.parse import parse_fleet
        from negotiate.tools.generate import generate_fleet

        spec = parse_fleet(tomllib.loads(generate_fleet(kind, agents, seed)), f"generated {kind}")
        built = build_agents(spec)
        best = enumerate_central(spec, built)[0]
        # the fleet's own coordinator settings (bundle, tolerance 1e-6), with the order master
        run, seen = runner(built, spec.resources, dataclasses.replace(spec.coordinator, order="master"))
        result, _orders, trials = search_master(built, spec.resources, run, evaluations=seen)
        # 0.1 %: the target; both solves reach their fixed-order optimum to ~1e-6 relative
        assert abs(result.total - best) <= 1e-3 * abs(best), (result.total, best)
        last = [t for t in trials if t.gap_kind][-1]
        assert last.bound <= result.total + 1e-9 * abs(result.total)  # a bound never above the incumbent
        np.testing.assert_allclose(last.gap, result.total - last.bound, rtol=1e-12, atol=1e-9 * abs(best))
        if convexity_violated(seen):
            assert last.gap_kind == "heuristic" and "not convex" in last.gap_reason
        if last.gap_kind == "certified":
            assert not convexity_violated(seen)
            assert last.bound <= best * (1 + 1e-6)  # a certified bound lies below the best of all orders
        else:
            assert last.gap_reason  # a heuristic gap always says why


class TestOrderOptions:
    """The order rules' budgets are declared options: typed, ranged, documented, refused by name when wrong."""

    def test_fleet_file_refuses_unknown_mistyped_and_out_of_range_keys(self, tmp_path):
        """[coordinator.order_options] with a misspelt key, a string for a number and a negative budget: one
        FleetError naming the file, the table and each key, raised before any agent is built."""
        from negotiate.errors import FleetError
        from negotiate.run import check_method_options, load_fleet

        path = tmp_path / "fleet.toml"
        path.write_text(
            '[resources.r]\nkind = "exclusive"\ngap = 1.0\n[coordinator]\norder = "master"\n'
            '[coordinator.order_options]\nmax_coordinationz = 3\ngap_tolerance = "small"\ntime_budget = -1.0\n'
            '[agents.a]\nmodel = "vehicle"\nroute_length = 1000.0\ndeparture = 0.0\ndesired_arrival = 100.0\n'
            'latest_arrival = 300.0\n[[agents.a.zones]]\nresource = "r"\nentry = 400.0\nexit = 450.0\n'
        )  # fmt: skip
        spec = load_fleet(path)
        with pytest.raises(FleetError) as err:
            check_method_options(spec)
        text = str(err.value)
        assert text.count(f"{path}: [coordinator.order_options] key ") == 3
        assert "key 'max_coordinationz': expected one of the 'master' order rule's options (max_coordinations" in text
        assert "key 'gap_tolerance': expected a finite number within (0, 0.1), found \"small\"" in text
        assert "key 'time_budget': expected a finite number within [0, 1e7], found -1.0" in text

    def test_rules_without_options_refuse_any(self):
        """fcfs takes no options: a key there is named as not expected."""
        from negotiate.coordination.orders import order_option_problems

        assert order_option_problems("fcfs", {"max_passes": 2}) == [
            ("max_passes", "no key: order = 'fcfs' takes no options", 2)
        ]
        assert order_option_problems("swap", {"max_passes": 2, "time_budget": 5}) == []  # an integer is a number

    def test_python_settings_warn_and_keep_the_default(self):
        """From Python a wrong option warns, naming it, and the default is used."""
        from negotiate.coordination.orders import order_options

        with pytest.warns(UserWarning, match="'swap_passes' expected an integer within"):
            opts = order_options("master", {"swap_passes": -1})
        assert opts["swap_passes"] == 3

    @pytest.mark.parametrize("rule", ["swap", "master"])
    def test_docs_show_the_declared_options(self, rule):
        """docs/methods.md holds the table generated from each rule's declaration."""
        from pathlib import Path

        from negotiate.coordination.orders import order_options_table

        docs = (Path(__file__).parents[1] / "docs" / "methods.md").read_text()
        assert order_options_table(rule) in docs


class TestTimeBudget:
    """A spent wall-time budget stops the search between coordinations; finished work is kept."""

    def test_master_keeps_the_first_order_and_its_bound(self):
        """With a budget that is spent once the first coordination is done (1e-9 s) no other order is tried;
        the first order's result is returned as it is, with the master's bound if one was computed, and the
        reason names the budget. A search without a budget goes on to the better order (test above)."""
        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r", "s"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r", "s"], earliest=2.0),
        ]
        resources = [ExclusiveResource("r", gap=1.0), ExclusiveResource("s", gap=1.0)]
        run, seen = runner(agents, resources)
        fcfs, first, _ = search_orders(agents, resources, "fcfs", run)
        run, seen = runner(agents, resources)
        best, orders, trials = search_master(agents, resources, run, evaluations=seen, options={"time_budget": 1e-9})
        assert orders == first and len(trials) == 1
        np.testing.assert_array_equal(best.P, fcfs.P)  # the same coordination, kept as it finished
        assert "time budget of 1e-09 s is spent" in trials[-1].gap_reason
        assert not trials[-1].bound > best.total  # no bound at all (-inf) or one below the total

    def test_swap_stops_and_run_writes_the_best_so_far(self, tmp_path):
        """order = "swap" with a spent budget coordinates only the first order; run_fleet writes that schedule
        (the first-come-first-served one, read back from schedule.csv)."""
        import csv

        agents = [
            slot_agent("soft", 0.0, 10.0, 0.01, ["r"], earliest=0.0),
            slot_agent("stiff", 2.0, 10.0, 10.0, ["r"], earliest=2.0),
        ]
        resources = (ExclusiveResource("r", gap=1.0),)
        settings = CoordinatorSettings(order="swap", tolerance=1e-10, order_options={"time_budget": 1e-9})
        result = run_fleet(FleetSpec("two", resources, (), settings), agents, out=tmp_path / "run")
        assert len(result.order_trials) == 1 and result.coordination.orders == {"r": ["soft", "stiff"]}
        with open(tmp_path / "run" / "schedule.csv", newline="") as fh:
            rows = {r["agent"]: float(r["enter"]) for r in csv.DictReader(fh)}
        P = result.coordination.params()
        assert rows == {a: pytest.approx(float(P[a][0]), abs=1e-6) for a in rows}  # 6 decimals in the file
