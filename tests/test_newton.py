"""The projected Newton method on smooth fleets: rounds to the optimum, measures, steps across active-set changes.

References outside the project: SciPy's SLSQP on the closed-form value functions (derived by hand in
tests/fleets.py), and the pseudo-Huber function V(p) = sqrt(1 + (p - t)^2) whose Newton step from p - t = 2
(g = 2 / sqrt(5), V'' = 5^(-3/2): step -10) overshoots to p - t = -8 where V = sqrt(65) > V(t + 2) = sqrt(5).
"""

from __future__ import annotations

import math

import casadi as ca
import numpy as np
import scipy.optimize
from fleets import buffered_slot_agent

from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam
from negotiate.coordination.engine import coordinate
from negotiate.fleet.spec import CapacityResource, CoordinatorSettings, ExclusiveResource

WANTS = [10.0, 13.0, 16.7, 19.4]
STIFFNESS = [1.0, 3.0, 0.5, 2.0]
DURATION, GAP = 6.0, 2.0


def closed_form_value(e: float, leave: float, want: float, k: float) -> float:
    """V of :func:`fleets.buffered_slot_agent`: y = min((4 e + want) / 5, want + 2) minimises the inner cost."""
    y = min((4 * e + want) / 5, want + 2.0)
    return k * ((e - want) ** 2 + 4 * (y - e) ** 2 + (y - want) ** 2 + 0.1 * (leave - e - DURATION) ** 2)


def slsqp_optimum() -> float:
    """Minimum of the sum of closed-form values over the dock's first-come-first-served order (SciPy SLSQP)."""
    n = len(WANTS)

    def total(z: np.ndarray) -> float:
        return sum(closed_form_value(z[2 * i], z[2 * i + 1], WANTS[i], STIFFNESS[i]) for i in range(n))

    def grad(z: np.ndarray) -> np.ndarray:
        # envelope theorem: the inner y is at its optimum, so only the explicit dependence on (e, leave) counts
        out = np.zeros_like(z)
        for i in range(n):
            e, leave, w, k = z[2 * i], z[2 * i + 1], WANTS[i], STIFFNESS[i]
            y = min((4 * e + w) / 5, w + 2.0)
            out[2 * i] = k * (2 * (e - w) - 8 * (y - e) - 0.2 * (leave - e - DURATION))
            out[2 * i + 1] = k * 0.2 * (leave - e - DURATION)
        return out

    cons = [{"type": "ineq", "fun": lambda z, i=i: z[2 * i + 1] - z[2 * i] - DURATION} for i in range(n)]
    cons += [{"type": "ineq", "fun": lambda z, i=i: z[2 * i + 2] - z[2 * i + 1] - GAP} for i in range(n - 1)]
    z0 = np.ravel([[10.0 + 8.0 * i, 16.0 + 8.0 * i] for i in range(n)])
    opts = {"ftol": 1e-12, "maxiter": 500}
    res = scipy.optimize.minimize(total, z0, jac=grad, method="SLSQP", constraints=cons, options=opts)
    assert res.success, res.message
    return float(res.fun)


def dock_agents() -> list[AgentModel]:
    pairs = zip(WANTS, STIFFNESS, strict=True)
    return [buffered_slot_agent(f"b{k}", w, DURATION, s, "dock") for k, (w, s) in enumerate(pairs)]


class TestActiveSetChanges:
    def test_newton_converges_in_few_rounds_to_the_optimum(self):
        """Four agents queue at one dock; delays past 2.5 s make an agent's inner bound bind (its strictly
        active set changes: the guard flags it, its certificate stays smooth). The value Hessians hold on
        either side, so Newton reaches the SLSQP optimum of the closed forms in a few rounds and never falls
        back to gradient steps (it took 5 rounds, 4 of them gradient steps, when a flag or a QP posed in the
        new point instead of the step sent it to the gradient method)."""
        agents = dock_agents()
        res = coordinate(
            agents, [ExclusiveResource("dock", gap=GAP)],
            CoordinatorSettings(method="newton", max_rounds=50, tolerance=1e-10),
        )  # fmt: skip
        assert res.success, res.message
        assert res.rounds <= 3, [(h.round, h.note, h.flagged) for h in res.history]
        assert not any("gradient" in h.note for h in res.history), [h.note for h in res.history]
        ref = slsqp_optimum()
        # 1e-9 relative: the stopping test is 1e-10 on the relative predicted decrease
        assert abs(res.total - ref) <= 1e-9 * abs(ref), (res.total, ref)

    def test_an_agent_crossing_its_inner_bound_is_flagged_and_smooth(self):
        """The case above does exercise the change: some agent binds y <= want + 2 at the end (not at its free
        optimum), where every certificate is smooth."""
        agents = dock_agents()
        res = coordinate(
            agents, [ExclusiveResource("dock", gap=GAP)],
            CoordinatorSettings(method="newton", max_rounds=50, tolerance=1e-10),
        )  # fmt: skip
        delays = [p[0] - w for p, w in zip(res.params().values(), WANTS, strict=True)]
        assert max(delays) > 2.5 + 1e-3  # past the bound's threshold (closed form in fleets.buffered_slot_agent)
        assert all(r.certificate.verdict == "smooth" for r in res.evaluation.reports)


def pseudo_huber_agent(target: float) -> AgentModel:
    """V(p) = sqrt(1 + (p - target)^2) (x = p by an equality): smooth, convex, curvature falling off far away."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    prob = ParametricNLP({"x": x, "p": p, "f": ca.sqrt(1 + (x - target) ** 2), "g": x - p}, lbg=0, ubg=0, name="huber")
    return AgentModel(
        "huber", prob, (SlotParam("grid.share[0]", "grid", "share", "W", 0),), ReachableSet([0.0], [40.0]), [target]
    )


class TestBacktracking:
    def test_backtracking_rounds_report_a_finite_measure(self):
        """From p - t = 2 the full Newton step overshoots (V(t - 8) = sqrt(65) > sqrt(5)): the method backtracks;
        every round's measure is a number (backtracking rounds once reported NaN), and the method still ends at
        the minimiser p = t."""
        res = coordinate(
            [pseudo_huber_agent(20.0)], [CapacityResource("grid", (100.0,))],
            CoordinatorSettings(method="newton", max_rounds=50, tolerance=1e-12), start=np.array([22.0]),
        )  # fmt: skip
        assert res.success, res.message
        assert any(h.note == "Newton backtracking" for h in res.history), [h.note for h in res.history]
        assert all(math.isfinite(h.measure) for h in res.history), [(h.note, h.measure) for h in res.history]

    def test_newton_finishes_without_gradient_steps(self):
        """Past the overshoot, Newton on V = sqrt(1 + x^2) maps x to -x^3 (by hand: x - V'/V'' = -x^3): a few
        rounds reach |x| < 1e-12. Near the minimiser the Newton decrement x^2 / 2 falls below the tolerance
        while the first-order measure |x| * window does not; the Newton step must still be taken there (a
        gradient step from there backtracked for 27 rounds, 35 rounds in all)."""
        res = coordinate(
            [pseudo_huber_agent(20.0)], [CapacityResource("grid", (100.0,))],
            CoordinatorSettings(method="newton", max_rounds=50, tolerance=1e-12), start=np.array([22.0]),
        )  # fmt: skip
        assert res.success, res.message
        assert res.rounds <= 8, [h.note for h in res.history]
        assert not any("gradient fallback" in h.note or h.note == "backtracking" for h in res.history)
        np.testing.assert_allclose(res.P, [20.0], atol=1e-9)
        np.testing.assert_allclose(res.P, [20.0], atol=1e-5)  # V(t + 1e-5) - V(t) = 5e-11 < 1e-12 * |V| tolerance
