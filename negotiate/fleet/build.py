"""Building a fleet's agents: each agent's model from its family's builder (:mod:`agents.families`) or from
a user-written ``"package.module:function"``, checked against the fleet's resources.

Building a user-written model IMPORTS ITS MODULE AND RUNS ITS CODE, so only build fleets you trust. Every
agent that cannot be built is a :class:`~negotiate.errors.Problem` naming it (:func:`build_report`), or one
:class:`~negotiate.errors.FleetError` listing them all (:func:`build_agents`).
"""

from __future__ import annotations

import importlib
import time
import typing
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from agents.families import FAMILIES
from negotiate.errors import FleetError, Problem, describe, table_path
from negotiate.fleet.spec import AgentSpec, CapacityResource, ExclusiveResource, FleetSpec, Resource

if TYPE_CHECKING:
    from negotiate.core.agent import AgentModel

__all__ = ["BuiltAgent", "build_agents", "build_report"]


@dataclass(frozen=True)
class BuiltAgent:
    """Outcome of building one agent: the model (None if it failed) and the build time in s."""

    spec: AgentSpec
    model: Any
    seconds: float


def build_report(
    spec: FleetSpec, solver_options: dict[str, Any] | None = None
) -> tuple[list[BuiltAgent], list[Problem]]:
    """Build every agent and check it against the fleet, without raising for user mistakes.

    Returns the outcome per agent (in file order) and the problems found: a builder that raised (an empty
    reachable window, a failed auxiliary solve, a custom model that cannot be imported), a reachable set that
    is empty or does not hold the free optimum, a parameter naming an undeclared resource or one of the wrong
    kind, a capacity share outside the resource's blocks. Custom models are imported and run here.
    """
    from negotiate.core.agent import AgentModel
    from negotiate.core.nlp import try_solve

    resources = {r.name: r for r in spec.resources}
    built: list[BuiltAgent] = []
    problems: list[Problem] = []
    for agent in spec.agents:
        path = table_path("agents", agent.name)

        def fail(expected: str, found: str, key: str | None = None, _path: str = path) -> None:
            problems.append(Problem(spec.source, _path, key, expected, found))

        t0 = time.perf_counter()
        model = None
        builder: Callable[..., Any] | None = None
        family = FAMILIES.get(agent.model)
        if family is not None:
            try:
                builder = family.build()  # a family's builder needs CasADi; parsing does not
            except Exception as exc:  # noqa: BLE001 - a registered builder that cannot be imported
                fail(f"an importable builder of model {agent.model!r}", f"{type(exc).__name__}: {exc}", key="model")
        else:
            builder = _import_builder(agent.model, fail)
        if builder is not None:
            try:
                if family is not None:
                    model = builder(agent.name, agent.params, weight=agent.weight, solver_options=solver_options)
                else:
                    model = builder(agent.name, weight=agent.weight, **dict(agent.params))
            except Exception as exc:  # noqa: BLE001 - any failure of a builder is reported, never a traceback
                fail(
                    "an agent that can be built, with a non-empty reachable window" + _hint(agent.model),
                    f"{type(exc).__name__}: {exc}",
                )
                model = None
        if model is not None and not isinstance(model, AgentModel):
            fail(f"the builder {agent.model!r} to return an AgentModel", f"a {type(model).__name__}", key="model")
            model = None
        if model is not None:
            _check_model(model, resources, fail)
        if model is not None and model.start is None:
            # The solve at the free optimum warm-starts the first round (a failed one is simply not kept).
            first = try_solve(model.problem, model.free_optimum)
            model.start = first if first.success else None
        built.append(BuiltAgent(agent, model, time.perf_counter() - t0))
    return built, problems


def _hint(model: str) -> str:
    """The family's advice for an agent that cannot be built (none for a user-written model)."""
    family = FAMILIES.get(model)
    return family.build_hint if family is not None else ""


def _import_builder(target: str, fail: Callable[..., None]) -> Callable[..., Any] | None:
    """Import ``package.module:function`` (this runs the module's code)."""
    module_name, _, attr = target.partition(":")
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # noqa: BLE001 - user code: any failure is a fleet problem
        where = "; install it or put its folder on PYTHONPATH" if isinstance(exc, ModuleNotFoundError) else ""
        fail(
            "an importable module in 'package.module:function'",
            f"{describe(target)} ({type(exc).__name__}: {exc}{where})",
            key="model",
        )
        return None
    fn = getattr(module, attr, None)
    if not callable(fn):
        fail(f"a function {attr!r} in module {module_name!r}", describe(target), key="model")
        return None
    return typing.cast(Callable[..., Any], fn)


def _check_model(model: Any, resources: Mapping[str, Resource], fail: Callable[..., None]) -> None:
    """Reachable window non-empty and holding the free optimum; parameters naming declared resources."""
    import numpy as np

    r = model.reachable
    empty = [model.params[i].name for i in np.flatnonzero(r.lower > r.upper)]
    if empty:
        fail(
            "a non-empty reachable window for every parameter",
            "lower > upper for " + ", ".join(empty) + _hint(model.model),
        )
    elif not r.contains(model.free_optimum, tol=1e-6 * (1 + float(np.max(np.abs(model.free_optimum), initial=0)))):
        fail("a free optimum inside the reachable set", "a free optimum outside it (a faulty builder)")
    for q in model.params:
        res = resources.get(q.resource)
        want = CapacityResource if q.kind == "share" else ExclusiveResource
        if not isinstance(res, want):
            kind = "capacity" if q.kind == "share" else "exclusive"
            fail(f"parameter {q.name!r} to name a declared {kind} resource", describe(q.resource))
        elif isinstance(res, CapacityResource) and not (q.block is not None and 0 <= q.block < res.blocks):
            fail(
                f"parameter {q.name!r} to use a block 0..{res.blocks - 1} of resource {res.name!r}", f"block {q.block}"
            )


def build_agents(spec: FleetSpec, solver_options: dict[str, Any] | None = None) -> list[AgentModel]:
    """Build the agents of a fleet with the model library (``list[AgentModel]``, in file order).

    Custom models (``model = "package.module:function"``) are imported and run: only build fleets you trust.
    ``solver_options`` go to every built-in builder. Raises :class:`FleetError` naming each agent that cannot
    be built (an empty reachable window, e.g. after a unit mistake or a deadline too early) or that does not
    fit the fleet's resources.
    """
    built, problems = build_report(spec, solver_options)
    if problems:
        raise FleetError(problems)
    return [b.model for b in built]

