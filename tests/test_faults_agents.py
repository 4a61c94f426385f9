"""Agents that misbehave on purpose, for the fault tests (imported by worker processes by import path).

Machines: each builder builds a machine of the shipped machining cell (invented data) and swaps its
problem's class for one whose ``solve`` misbehaves while a marker file exists: :func:`dying_machine` kills
its own process once (the first solve that finds the marker removes it), :func:`hanging_machine` sleeps far
past any time limit. Without the marker they solve exactly as the plain machine does.

Heaters (user-written capacity models on a resource ``grid``, block 0, invented numbers):
:func:`sqrt_heater` pays a fee concave in its share, ``k * sqrt(share)``, so that at a share of 0 W its
value gradient is ``+inf`` although IPOPT converges; :func:`raising_heater` raises from its solve.
No tests live here.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import casadi as ca

from agents import build_machine
from negotiate import AgentModel, ReachableSet, SlotParam
from negotiate.core.nlp import ParametricNLP
from negotiate.fleet.parse import load_fleet

CELL = Path(__file__).resolve().parent.parent / "examples" / "machining_cell.toml"


class _DyingNLP(ParametricNLP):
    marker: str

    def solve(self, p, warm=None, **kw):  # type: ignore[no-untyped-def]
        try:
            os.remove(self.marker)
        except FileNotFoundError:
            pass
        else:
            os.kill(os.getpid(), signal.SIGKILL)
        return super().solve(p, warm, **kw)


class _HangingNLP(ParametricNLP):
    marker: str

    def solve(self, p, warm=None, **kw):  # type: ignore[no-untyped-def]
        if os.path.exists(self.marker):
            time.sleep(120.0)
        return super().solve(p, warm, **kw)


def _machine(name: str, template: str, weight: float):  # type: ignore[no-untyped-def]
    spec = load_fleet(CELL)
    agent = next(a for a in spec.agents if a.name == template)
    return build_machine(name, agent.params, weight=weight)


def dying_machine(name: str, weight: float = 1.0, *, template: str, marker: str):  # type: ignore[no-untyped-def]
    model = _machine(name, template, weight)
    model.problem.__class__ = _DyingNLP
    model.problem.marker = marker
    return model


def hanging_machine(name: str, weight: float = 1.0, *, template: str, marker: str):  # type: ignore[no-untyped-def]
    model = _machine(name, template, weight)
    model.problem.__class__ = _HangingNLP
    model.problem.marker = marker
    return model


def heater_nlp(k: float = 100.0, demand: float = 1000.0) -> ParametricNLP:
    """Power drawn P <= share (W); cost k sqrt(share) + 1e-3 (P - demand)^2, so dV/dshare = +inf at 0 W."""
    P, share = ca.SX.sym("P"), ca.SX.sym("share")
    nlp = {"x": P, "p": share, "f": k * ca.sqrt(share) + 1e-3 * (P - demand) ** 2, "g": share - P}
    return ParametricNLP(nlp, lbx=0.0, lbg=0.0, x_names=["P"], p_names=["share"], name="heater")


def sqrt_heater(name: str, weight: float = 1.0, k: float = 100.0, demand: float = 1000.0) -> AgentModel:
    # With k = 100 the value is least at share 0 (V = 1000 there, above 3000 at share = demand), a
    # minimiser where its slope is +inf: the free optimum is 0 W.
    return AgentModel(name, heater_nlp(k, demand), (SlotParam("grid.share[0]", "grid", "share", "W", 0),),
                      ReachableSet([0.0], [2.0 * demand]), [0.0], weight, model="sqrt-heater")  # fmt: skip


class _RaisingNLP(ParametricNLP):
    def solve(self, p, warm=None, **kw):  # type: ignore[no-untyped-def]
        raise ZeroDivisionError("share / 0")


def raising_heater(name: str, weight: float = 1.0) -> AgentModel:
    model = sqrt_heater(name, weight, k=1.0)
    model.problem.__class__ = _RaisingNLP
    return model
