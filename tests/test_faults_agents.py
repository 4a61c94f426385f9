"""Agents that misbehave on purpose, for the fault tests (imported by worker processes by import path).

Each builder builds a machine of the shipped machining cell (invented data) and swaps its problem's class
for one whose ``solve`` misbehaves while a marker file exists: :func:`dying_machine` kills its own process
once (the first solve that finds the marker removes it), :func:`hanging_machine` sleeps far past any time
limit. Without the marker they solve exactly as the plain machine does. No tests live here.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

from agents import build_machine
from negotiate.fleet import load_fleet
from negotiate.nlp import ParametricNLP

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
