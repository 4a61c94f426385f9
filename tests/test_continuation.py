"""Continuation of a smooth warm start (``ParametricNLP(continuation=True)``, the default): Newton's method
on the warm point's active set at the new parameters, kept only when it certifies like a solver's answer.

Checked against CasADi's own solvers at the moved parameters (``nlpsol`` with sqpmethod + qrqp, or IPOPT
where the reference-problem table says so), on the published test problems of ``refproblems``; against a
cold IPOPT solve of the project's vehicle model; and on closed forms where it must refuse (an active-set
change, a kink within the activity tolerance).
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest
from refproblems import CASADI_REFERENCE, PLUGIN_OPTIONS, by_name

from negotiate import ParametricNLP

CONTINUED = "continued from the warm start"


@pytest.mark.parametrize(("name", "plugin"), [r for r in CASADI_REFERENCE if r[1] == "sqpmethod"])
def test_continued_point_matches_casadi_at_the_moved_parameters(name, plugin):
    prob = by_name(name)
    nlp = prob.nlp
    p0 = np.asarray(prob.p0, dtype=float)
    p1 = p0 + 1e-3 * np.maximum(1.0, np.abs(p0))
    warm = nlp.solve(p0)
    res = nlp.solve(p1, warm=warm)
    assert res.success, res.message
    f, x, lam_p, _dfdp, _dxdp = (
        np.asarray(v, dtype=float).ravel() for v in prob.casadi_derivatives(plugin, PLUGIN_OPTIONS[plugin])(p1)
    )
    np.testing.assert_allclose(res.value, f[0], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(res.x, x, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(res.gradient, -lam_p, rtol=1e-6, atol=1e-8)  # CasADi: lam_p = -dV/dp


def test_published_problems_mostly_continue():
    """Where the active set holds over a small step, no interior-point run is needed (HS071: Hock &
    Schittkowski 1981, problem 71, with its constraint levels as parameters)."""
    nlp = by_name("HS071").nlp
    warm = nlp.solve([25.0, 40.0])
    res = nlp.solve([25.02, 40.03], warm=warm)
    assert res.message.startswith(CONTINUED) and res.iterations == 0
    plain = ParametricNLP(by_name("HS071").symbols(), x0=[1, 5, 5, 1], continuation=False, **by_name("HS071").bounds())
    ref = plain.solve([25.02, 40.03], warm=warm)
    assert ref.iterations > 0
    np.testing.assert_allclose(res.x, ref.x, rtol=1e-7)
    np.testing.assert_allclose(res.gradient, ref.gradient, rtol=1e-7)


def kink_nlp() -> ParametricNLP:
    """V(p) = -min(p, 1): rows x <= p and x <= 1, kink at p = 1 (closed form)."""
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    return ParametricNLP({"x": x, "p": p, "f": -x, "g": ca.vertcat(x - p, x)}, ubg=[0, 1])


def test_same_active_set_continues_with_the_closed_form():
    nlp = kink_nlp()
    res = nlp.solve([0.7], warm=nlp.solve([0.5]))
    assert res.message.startswith(CONTINUED)
    np.testing.assert_allclose([res.value, *res.gradient], [-0.7, -1.0], atol=1e-12)


def test_active_set_change_falls_back_to_ipopt():
    """From p = 0.5 (x <= p active) to p = 1.5 (x <= 1 active): the continuation must refuse."""
    nlp = kink_nlp()
    res = nlp.solve([1.5], warm=nlp.solve([0.5]))
    assert res.success and not res.message.startswith(CONTINUED) and res.iterations > 0
    np.testing.assert_allclose([res.value, *res.gradient], [-1.0, 0.0], atol=1e-7)


def test_kink_within_the_activity_tolerance_is_left_to_ipopt():
    """At p = 1 - 9e-8 the row x <= 1 has a relative slack below Tolerances.active (1e-6): a solver's
    answer there is read as having both rows active, and the guard must get to see it."""
    nlp = kink_nlp()
    res = nlp.solve([1 - 9e-8], warm=nlp.solve([0.5]))
    assert not res.message.startswith(CONTINUED)
    assert len(res.certificate.active) == 2


def test_vehicle_model_continuation_matches_a_cold_solve():
    """The library's truck (invented data): a shifted slot continues and agrees with a cold IPOPT solve."""
    from pathlib import Path

    from negotiate.fleet.build import build_agents
    from negotiate.fleet.parse import load_fleet

    spec = load_fleet(Path(__file__).resolve().parent.parent / "examples" / "quarry_bridge.toml")
    agent = build_agents(spec)[0]
    nlp = agent.problem
    p0 = agent.free_optimum
    warm = nlp.solve(p0)
    p1 = p0 + 0.5  # half a second later, entry and exit
    res = nlp.solve(p1, warm=warm)
    assert res.message.startswith(CONTINUED)
    cold = nlp.solve(p1)
    assert cold.iterations > 0
    np.testing.assert_allclose(res.value, cold.value, rtol=1e-9)
    np.testing.assert_allclose(res.gradient, cold.gradient, rtol=1e-6, atol=1e-9 * np.max(np.abs(cold.gradient)))


def test_first_round_starts_from_the_build_time_solve():
    """build_agents keeps each agent's solve at its free optimum; the coordinator's first round starts from
    it and lands on the same KKT points as cold solves at the first point (machining cell, invented data)."""
    from dataclasses import replace
    from pathlib import Path

    from negotiate.coordination.engine import Oracle
    from negotiate.fleet.build import build_agents
    from negotiate.fleet.parse import load_fleet
    from negotiate.resources.coupling import build_feasible_set, fcfs_orders

    spec = load_fleet(Path(__file__).resolve().parent.parent / "examples" / "machining_cell.toml")
    agents = build_agents(spec)
    assert all(a.start is not None and a.start.success for a in agents)
    for a in agents:
        np.testing.assert_array_equal(a.start.p, a.free_optimum)
    feasible = build_feasible_set(agents, spec.resources, fcfs_orders(agents, spec.resources))
    P0 = feasible.project(feasible.layout.stack([a.free_optimum for a in agents]))
    warm = Oracle(agents, feasible)(P0)
    cold = Oracle([replace(a, start=None) for a in agents], feasible)(P0)
    assert any(r.result.message.startswith(CONTINUED) for r in warm.reports)
    assert all(r.result.iterations > 0 for r in cold.reports)
    for w, c in zip(warm.reports, cold.reports, strict=True):
        np.testing.assert_allclose(w.value, c.value, rtol=1e-9)
        np.testing.assert_allclose(w.gradient, c.gradient, rtol=1e-6, atol=1e-9 * np.max(np.abs(c.gradient)))
