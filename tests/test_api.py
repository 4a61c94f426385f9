"""The package index: what a user needs to write a method or read a result is importable from ``negotiate``."""

from __future__ import annotations

import dataclasses

import numpy as np
from fleets import quadratic_share_agent

import negotiate
from negotiate import (
    CapacityResource,
    CoordinationStatus,
    CoordinatorSettings,
    Evaluation,
    Method,
    Proposal,
    option,
    register_method,
)
from negotiate.coordination.engine import coordinate


def test_every_public_name_exists():
    """``__all__`` names only what the package really exports, and no export hides a subpackage."""
    import pkgutil

    assert [n for n in negotiate.__all__ if not hasattr(negotiate, n)] == []
    subpackages = {m.name for m in pkgutil.iter_modules(negotiate.__path__)}
    assert subpackages >= {"core", "resources", "fleet", "execution", "coordination", "output", "tools", "run"}
    assert set(negotiate.__all__) & subpackages == set()


def test_the_index_loads_nothing_ahead_of_time():
    """Importing ``negotiate`` (or one low module) loads no layer: names are loaded on first use."""
    import subprocess
    import sys

    code = (
        "import sys, negotiate.core.ranges; "
        "print(sorted(m for m in sys.modules if m.startswith(('negotiate.', 'agents', 'casadi'))))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "['negotiate.core', 'negotiate.core.ranges']"


@dataclasses.dataclass(frozen=True)
class _HalfStepOptions:
    step: float = option(0.5, "fraction of the projected gradient step")


@register_method
class _HalfStep(Method):
    """Projected gradient steps of a fixed fraction, written with the package index alone."""

    name = "test-api-half-step"
    Options = _HalfStepOptions

    def start(self, first: Evaluation) -> None:
        self.incumbent = first

    def propose(self, latest: Evaluation) -> Proposal:
        if latest.ok and latest.total <= self.incumbent.total:
            self.incumbent = latest
        x = self.incumbent
        s = self.feasible.scale
        nxt = self.feasible.project(x.P - self.options["step"] * s * s * x.gradient)
        measure = float(x.gradient @ (x.P - nxt)) / max(1.0, abs(x.total))
        return Proposal(nxt, measure, converged=measure <= self.settings.tolerance)


def test_a_method_from_the_index_alone_reaches_the_closed_form():
    """Two agents ``V_i = c_i (p_i - t_i)^2`` below their targets share 5 W: by hand (equal marginal values,
    common practice) p = (t1 - l/(2 c1), t2 - l/(2 c2)) with p1 + p2 = 5: c = (1, 1), t = (4, 3) gives (3, 2)."""
    agents = [quadratic_share_agent("a", 4.0, 1.0), quadratic_share_agent("b", 3.0, 1.0)]
    res = coordinate(
        agents, [CapacityResource("grid", (5.0,))],
        CoordinatorSettings(method="test-api-half-step", max_rounds=200, tolerance=1e-12),
    )  # fmt: skip
    assert res.status is CoordinationStatus.CONVERGED
    np.testing.assert_allclose(res.P, [3.0, 2.0], atol=1e-5)  # 1e-5 W: the measure is 1e-12 of the total
