"""The upper-level methods on a capacity share with a closed-form optimum: agents of very different curvature.

Each agent ``i`` draws the share ``p_i`` (W) of one grid block and has the value
``V_i(p_i) = a_i / 2 (p_i - c_i)^2`` (its NLP: ``min_x a_i / 2 (x - c_i)^2`` s.t. ``x = p_i``). The shares
must satisfy ``sum_i p_i <= C`` with ``C < sum_i c_i``, so the limit binds. The KKT conditions of
``min sum_i V_i(p_i)  s.t.  sum_i p_i <= C`` (Nocedal & Wright 2006, *Numerical Optimization*, 2nd ed.,
Theorem 12.1) give, with one multiplier ``lambda >= 0`` for the limit and every share inside its window,

    a_i (p_i - c_i) + lambda = 0   =>   p_i = c_i - lambda / a_i,     lambda = (sum_i c_i - C) / sum_i (1 / a_i).

The curvatures ``a_i`` span seven orders of magnitude and the windows two, so one step length shared by all
agents suits at most one of them; the limit moves the least stiff agent by a tenth of its window and the
stiffest by a millionth of its own.
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest

from negotiate import AgentModel, ParametricNLP, ReachableSet, SlotParam
from negotiate.coordination.engine import coordinate
from negotiate.fleet.spec import CapacityResource, CoordinatorSettings

# curvature a_i (cost per W^2), wanted draw c_i (W), window width (W): invented numbers of very different scale
AGENTS = [
    (1e-6, 4.0e4, 1.0e5), (2e-1, 3.0e2, 1.0e3), (5e-5, 9.0e3, 2.0e4),
    (3e-3, 2.0e3, 5.0e3), (1e-8, 7.0e4, 2.0e5), (4e-2, 6.0e2, 2.0e3),
]  # fmt: skip
LIMIT = 1.0e5  # W; the draws add up to 121 900 W


def quadratic_agent(name: str, a: float, c: float, width: float) -> AgentModel:
    x, p = ca.SX.sym("x"), ca.SX.sym("p")
    prob = ParametricNLP({"x": x, "p": p, "f": 0.5 * a * (x - c) ** 2, "g": x - p}, lbg=0, ubg=0)
    param = SlotParam("grid.share[0]", "grid", "share", "W", 0)
    return AgentModel(name, prob, (param,), ReachableSet([0.0], [width]), [c])


def closed_form() -> tuple[np.ndarray, float]:
    """Shares and total from the KKT conditions in the module docstring."""
    a = np.array([r[0] for r in AGENTS])
    c = np.array([r[1] for r in AGENTS])
    lam = (c.sum() - LIMIT) / np.sum(1.0 / a)
    p = c - lam / a
    assert np.all(p > 0) and np.all(p < [r[2] for r in AGENTS])  # every share inside its window: the formula holds
    return p, float(np.sum(0.5 * a * (p - c) ** 2))


@pytest.fixture(scope="module")
def agents() -> list[AgentModel]:
    return [quadratic_agent(f"q{k}", *row) for k, row in enumerate(AGENTS)]


class TestCurvatureSpread:
    @pytest.mark.parametrize("method", ["gradient", "bundle", "newton"])
    def test_reaches_the_closed_form(self, agents, method):
        """Every method converges (no round limit) to the KKT shares: each share within 1e-6 of its window
        (below every agent's move but the stiffest one's), the total to 1e-7 (tolerance 1e-9 on a total of about 2)."""
        p_star, total = closed_form()
        widths = np.array([r[2] for r in AGENTS])
        settings = CoordinatorSettings(method=method, max_rounds=60, tolerance=1e-9)
        res = coordinate(agents, [CapacityResource("grid", (LIMIT,))], settings)
        assert res.success, (res.status, res.message)
        assert np.all(np.abs(res.P - p_star) <= 1e-6 * widths), (res.P - p_star) / widths
        assert res.total == pytest.approx(total, rel=1e-7)
        # generous: one step length shared by every agent ran into the limit of 60 rounds
        assert res.rounds <= 20


@pytest.fixture(scope="module")
def depot16():
    """The generated depot fleet of 16 tractors, seed 1 (``negotiate generate --kind depot --agents 16 --seed 1``;
    every number invented): eight 900 s blocks of one grid connection whose limits bind in some blocks."""
    import tomllib

    from negotiate.fleet.build import build_agents
    from negotiate.fleet.parse import parse_fleet
    from negotiate.tools.generate import generate_fleet

    spec = parse_fleet(tomllib.loads(generate_fleet("depot", 16, 1)))
    return spec, build_agents(spec)


class TestGeneratedDepot:
    def test_newton_reaches_the_centralized_optimum(self, depot16):
        """Newton converges on the depot fleet to the centralized IPOPT solve of the same problem (started from
        the coordinated schedule, so it can only confirm or improve it): the total within 1e-6 relative, the
        coordinator's own tolerance, in at most 8 rounds."""
        from dataclasses import replace

        from negotiate.coordination.centralized import solve_centralized

        spec, agents = depot16
        res = coordinate(agents, spec.resources, replace(spec.coordinator, method="newton"))
        assert res.success, (res.status, res.message)
        ref = solve_centralized(agents, res.evaluation.feasible, start_P=res.P)
        assert ref.success, ref.message
        assert res.total <= ref.total + 1e-6 * abs(ref.total)
        assert res.rounds <= 8
