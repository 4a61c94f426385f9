"""Check a fleet before coordinating it: parse, build every agent, show what each one can do and who shares what.

:func:`check_fleet` (a file) and :func:`check_data` (a decoded dictionary) never raise for user mistakes:
they return a :class:`CheckResult` holding a row per agent (model, weight, build time and, for each shared
parameter, its reachable ``[lower, upper]`` and free optimum with its unit), a row per resource (its users
and whether their free optima collide), the conflict graph, every problem found and warnings about what is
legal but looks like a mistake (a capacity limit far below what its users ask for, as after writing kW where
W is meant; see :data:`LIMIT_WARN_RATIO`). The command ``negotiate check fleet.toml`` prints
:meth:`CheckResult.to_text`.

The conflict graph (:func:`conflict_graph`) has a node per agent and per resource and an edge where an agent
uses a resource. Its connected components are groups of agents that share nothing with the other groups, so
that each group can be coordinated on its own.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np

from negotiate.coordination.methods import method_names
from negotiate.errors import FleetError, Problem, describe
from negotiate.fleet.build import BuiltAgent, build_report
from negotiate.fleet.parse import load_fleet, parse_fleet
from negotiate.fleet.spec import CapacityResource, FleetSpec

__all__ = [
    "LIMIT_WARN_RATIO",
    "AgentRow",
    "CheckResult",
    "ParamRow",
    "ResourceRow",
    "check_data",
    "check_fleet",
    "conflict_graph",
]

LIMIT_WARN_RATIO = 10**-1.5
"""A capacity limit below this fraction (about 3.2 %) of the summed free-optimum shares of its users in a
block draws a warning. It is the geometric mean of 1 (a limit of the order of what the users ask for, tight
or not) and 1e-3 (the same limit written in the next SI prefix, kW read as W): on a log scale such a limit
is nearer a unit mistake than any plausible tight limit. A limit of 0 is never a unit mistake and is not
warned about."""


@dataclass(frozen=True)
class ParamRow:
    """One shared parameter of a built agent: reachable bounds and free optimum, in ``unit``."""

    name: str
    resource: str
    kind: str
    unit: str
    lower: float
    upper: float
    free: float


@dataclass(frozen=True)
class AgentRow:
    """One agent: model, weight, build time (s) and its parameters (empty if it could not be built)."""

    name: str
    model: str
    weight: float
    built: bool
    build_time: float
    params: tuple[ParamRow, ...] = ()


@dataclass(frozen=True)
class ResourceRow:
    """One resource: its users and whether their free optima collide on it.

    ``contended`` is None when some user could not be built (so it is unknown); ``detail`` says why in words.
    """

    name: str
    kind: str
    users: tuple[str, ...]
    contended: bool | None
    detail: str


@dataclass(frozen=True)
class CheckResult:
    """Outcome of :func:`check_fleet`.

    Attributes
    ----------
    source : str
        Where the fleet came from.
    spec : FleetSpec or None
        The parsed fleet (None if the file has mistakes that stop parsing).
    description : str
        The fleet's description.
    agents, resources : tuple
        :class:`AgentRow` and :class:`ResourceRow` per agent and resource, in file order.
    graph : networkx.Graph
        The conflict graph (node attribute ``kind``: ``"agent"`` or the resource's kind, ``"exclusive"``,
        ``"capacity"`` ...).
    groups : tuple of tuple of str
        Connected components of the graph (agents and resources), in file order.
    schedule : bool or None
        Whether the coupling polyhedron (:mod:`negotiate.resources.coupling`) with first-come-first-served orders on
        the exclusive resources -- the coordinator's default start -- holds a point, i.e. whether some
        choice of slots and shares meets every agent's reachable set and every resource's rules at once
        (None when not checked: some agent was not built); ``schedule_detail`` says it in words.
    problems : tuple of Problem
        Every mistake found; empty when the fleet is ready to coordinate.
    warnings : tuple of str
        What is legal but looks like a mistake (one line each); warnings do not make the check fail.
    """

    source: str
    spec: FleetSpec | None
    description: str = ""
    agents: tuple[AgentRow, ...] = ()
    resources: tuple[ResourceRow, ...] = ()
    graph: nx.Graph = field(default_factory=nx.Graph)
    groups: tuple[tuple[str, ...], ...] = ()
    schedule: bool | None = None
    schedule_detail: str = "not checked"
    problems: tuple[Problem, ...] = ()
    warnings: tuple[str, ...] = ()

    @property
    def ok(self) -> bool:
        """Whether no problem was found."""
        return not self.problems

    @property
    def error(self) -> FleetError | None:
        """The problems as one :class:`FleetError` (None when there are none)."""
        return FleetError(self.problems) if self.problems else None

    def to_dict(self) -> dict[str, Any]:
        """Plain data (``json.dumps`` accepts it); the graph as its list of edges."""
        return {
            "source": self.source,
            "fleet": self.spec.name if self.spec else None,
            "description": self.description,
            "agents": [
                {
                    **{k: getattr(a, k) for k in ("name", "model", "weight", "built", "build_time")},
                    "params": [vars(p).copy() for p in a.params],
                }
                for a in self.agents
            ],
            "resources": [{**vars(r), "users": list(r.users)} for r in self.resources],
            "edges": [
                {"agent": a, "resource": r, "params": list(d.get("params", ()))} for a, r, d in _agent_edges(self.graph)
            ],
            "groups": [list(g) for g in self.groups],
            "schedule": self.schedule,
            "schedule_detail": self.schedule_detail,
            "problems": [vars(p).copy() for p in self.problems],
            "warnings": list(self.warnings),
        }

    def to_text(self) -> str:
        """The plain-text report printed by ``negotiate check``."""
        return _text(self)


# --------------------------------------------------------------------------------------------------------


def check_fleet(path: str | Path, build: bool = True) -> CheckResult:
    """Check a fleet file: parse it, build every agent (unless ``build`` is False) and describe the result.

    Raises only :class:`FileNotFoundError` / :class:`OSError` when the file cannot be read; every mistake in
    it is a problem in the result. Custom models named by import path are imported and run when building.
    """
    try:
        spec = load_fleet(path, method_names())
    except FleetError as exc:
        return CheckResult(source=str(path), spec=None, problems=exc.problems)
    return _check_spec(spec, build)


def check_data(data: Mapping[str, Any], source: str = "<memory>", build: bool = True) -> CheckResult:
    """Like :func:`check_fleet` for an already-decoded fleet dictionary."""
    try:
        spec = parse_fleet(data, source, method_names())
    except FleetError as exc:
        return CheckResult(source=source, spec=None, problems=exc.problems)
    return _check_spec(spec, build)


def _check_spec(spec: FleetSpec, build: bool) -> CheckResult:
    problems: list[Problem] = []
    built: list[BuiltAgent] = []
    if build:
        built, problems = build_report(spec)
    models = {b.spec.name: b.model for b in built if b.model is not None}
    rows = []
    for agent in spec.agents:
        b = next((x for x in built if x.spec.name == agent.name), None)
        m = models.get(agent.name)
        params: tuple[ParamRow, ...] = ()
        if m is not None:
            params = tuple(
                ParamRow(q.name, q.resource, q.kind, q.unit, float(lo), float(hi), float(fr))
                for q, lo, hi, fr in zip(m.params, m.reachable.lower, m.reachable.upper, m.free_optimum, strict=True)
            )
        rows.append(
            AgentRow(agent.name, agent.model, agent.weight, m is not None, b.seconds if b is not None else 0.0, params)
        )
    graph = conflict_graph(spec, models)
    resources, capacity_problems, warnings = _resource_rows(spec, graph, models, complete=build and not problems)
    problems += capacity_problems + _option_problems(spec)
    schedule, schedule_detail = None, "not checked (not every agent was built)" if build else "not checked"
    if build and not problems:
        schedule, schedule_detail, schedule_problem = _schedule(spec, [models[a.name] for a in spec.agents])
        if schedule_problem is not None:
            problems.append(schedule_problem)
    order = {n: i for i, n in enumerate([a.name for a in spec.agents] + [r.name for r in spec.resources])}
    groups = sorted(
        (tuple(sorted(c, key=order.__getitem__)) for c in nx.connected_components(graph)), key=lambda g: order[g[0]]
    )
    return CheckResult(
        source=spec.source,
        spec=spec,
        description=spec.description,
        agents=tuple(rows),
        resources=tuple(resources),
        graph=graph,
        groups=tuple(groups),
        schedule=schedule,
        schedule_detail=schedule_detail,
        problems=tuple(problems),
        warnings=tuple(warnings),
    )


def _option_problems(spec: FleetSpec) -> list[Problem]:
    """``[coordinator.options]`` the fleet's method does not declare (a built-in method; a user method named
    by "module:Class" is not imported by a check) and ``[coordinator.order_options]`` the order rule does not
    accept."""
    from negotiate.coordination.orders import order_option_problems
    from negotiate.run import check_method_options

    if spec.coordinator.method not in method_names():
        c = spec.coordinator
        return [Problem(spec.source, "coordinator.order_options", key, expected, describe(value))
                for key, expected, value in order_option_problems(c.order, c.order_options)]  # fmt: skip
    try:
        check_method_options(spec)
    except FleetError as exc:
        return list(exc.problems)
    return []


def _schedule(spec: FleetSpec, agents: list[Any]) -> tuple[bool, str, Problem | None]:
    """Whether the coupling polyhedron with the orders a run starts from is non-empty (one or two LPs): first
    come, first served per resource, else one ranking of all agents
    (:func:`~negotiate.resources.coupling.first_orders`)."""
    from negotiate.resources.coupling import fcfs_orders, first_orders

    what = "a fleet whose agents' reachable sets admit a schedule with first-come-first-served orders"
    try:
        orders = first_orders(agents, spec.resources)
    except ValueError as exc:  # DeadlockError and InfeasibleOrdersError are ValueErrors
        found = f"none: {exc}"
        return False, found, Problem(spec.source, "", None, what, found)
    if orders != fcfs_orders(agents, spec.resources):
        return True, ("a schedule exists with one first-come-first-served ranking of all agents (first come, "
                      "first served on each resource alone admits none)"), None
    return True, "a schedule exists with first-come-first-served orders", None


def conflict_graph(spec: FleetSpec, models: Mapping[str, Any] | None = None) -> nx.Graph:
    """Agents and resources as nodes, an edge where an agent uses a resource (attribute ``params``).

    Built-in agents' resources are read from their parameter records; a user-written agent's from the
    ``SlotParam`` s of its built model (``models``: agent name -> AgentModel), so it has no edge unbuilt.
    """
    models = models or {}
    g = nx.Graph()
    for r in spec.resources:
        g.add_node(r.name, kind=r.kind)
    for agent in spec.agents:
        g.add_node(agent.name, kind="agent", model=agent.model)
        uses: dict[str, list[str]] = {}
        m = models.get(agent.name)
        if m is not None:
            for q in m.params:
                uses.setdefault(q.resource, []).append(q.name)
        else:
            prm = agent.params
            for entry in (*getattr(prm, "zones", ()), *getattr(prm, "stations", ()), prm):
                res = getattr(entry, "resource", None)
                if isinstance(res, str):
                    uses.setdefault(res, [])
        for res, names in uses.items():
            if res in g and g.nodes[res]["kind"] != "agent":
                g.add_edge(agent.name, res, params=tuple(names))
    return g


def _agent_edges(g: nx.Graph) -> list[tuple[str, str, dict[str, Any]]]:
    out = []
    for u, v, d in g.edges(data=True):
        a, r = (u, v) if g.nodes[u]["kind"] == "agent" else (v, u)
        out.append((a, r, d))
    return out


def _users(g: nx.Graph, resource: str, spec: FleetSpec) -> tuple[str, ...]:
    order = [a.name for a in spec.agents]
    return tuple(sorted(g.neighbors(resource), key=order.index))


def _slot(m: Any, resource: str) -> tuple[float, float] | None:
    enter = leave = None
    for q, v in zip(m.params, m.free_optimum, strict=True):
        if q.resource == resource and q.kind == "enter":
            enter = float(v)
        elif q.resource == resource and q.kind == "leave":
            leave = float(v)
    return None if enter is None or leave is None else (enter, leave)


def _resource_rows(
    spec: FleetSpec, g: nx.Graph, models: Mapping[str, Any], complete: bool
) -> tuple[list[ResourceRow], list[Problem], list[str]]:
    rows: list[ResourceRow] = []
    problems: list[Problem] = []
    warnings: list[str] = []
    for r in spec.resources:
        users = _users(g, r.name, spec)
        known = [u for u in users if u in models]
        if not users:
            rows.append(ResourceRow(r.name, _kind(r), users, False, "no agent uses it"))
            continue
        if len(known) < len(users):
            rows.append(ResourceRow(r.name, _kind(r), users, None, "unknown (not every user was built)"))
            continue
        if r.needs_order:  # users take turns: do their free-optimum slots overlap?
            slots = [(u, s) for u in users if (s := _slot(models[u], r.name)) is not None]
            gap = float(getattr(r, "gap", 0.0))
            pairs = total = 0
            for i in range(len(slots)):
                for j in range(i + 1, len(slots)):
                    (a0, a1), (b0, b1) = slots[i][1], slots[j][1]
                    total += 1
                    if a1 + gap > b0 and b1 + gap > a0:
                        pairs += 1
            detail = (
                f"{pairs} of {total} pairs of free-optimum slots overlap (gap included)" if total else "a single user"
            )
            rows.append(ResourceRow(r.name, r.kind, users, pairs > 0, detail))
        elif isinstance(r, CapacityResource):
            demand = np.zeros(r.blocks)
            floor = np.zeros(r.blocks)
            for u in users:
                m = models[u]
                for q, lo, fr in zip(m.params, m.reachable.lower, m.free_optimum, strict=True):
                    if q.resource == r.name and q.kind == "share" and q.block is not None and q.block < r.blocks:
                        demand[q.block] += fr
                        floor[q.block] += lo
            limits = np.asarray(r.limits)
            over = np.flatnonzero(demand > limits * (1 + 1e-9))
            if over.size:
                excess = float(np.max(demand[over] - limits[over]))
                detail = (
                    f"free-optimum shares exceed the limit in block(s) {', '.join(map(str, over))} "
                    f"(by up to {_num(excess)} {r.unit})"
                )
            else:
                detail = "free-optimum shares fit within every block's limit"
            rows.append(ResourceRow(r.name, r.kind, users, bool(over.size), detail))
            low = _low_limits(spec, r, demand)
            if low is not None:
                warnings.append(low)
            short = np.flatnonzero(floor > limits * (1 + 1e-9))
            if complete and short.size:
                problems.append(
                    Problem(
                        spec.source,
                        f"resources.{r.name}",
                        "limits",
                        "limits at least the sum of the users' smallest shares",
                        f"blocks {', '.join(map(str, short))} short",
                    )
                )
        else:
            rows.append(ResourceRow(r.name, r.kind, users, None, f"no contention check for a {r.kind} resource"))
    return rows, problems, warnings


def _low_limits(spec: FleetSpec, r: CapacityResource, demand: np.ndarray) -> str | None:
    """A warning when some block's limit is below :data:`LIMIT_WARN_RATIO` of its users' free-optimum shares.

    Blocks with a zero limit or no demand are left out (neither can come from a unit mistake)."""
    limits = np.asarray(r.limits, dtype=float)
    seen = (limits > 0) & (demand > 0)
    ratio = np.full(limits.size, np.inf)
    ratio[seen] = limits[seen] / demand[seen]
    low = np.flatnonzero(ratio < LIMIT_WARN_RATIO)
    if not low.size:
        return None
    k = int(low[np.argmin(ratio[low])])
    return (
        f"{spec.source}: [resources.{r.name}] key 'limits': limit {_si(limits[k], r.unit)} in block {k} is "
        f"{_share(ratio[k])} of the {_si(demand[k], r.unit)} its users' free optima ask for there "
        f"({low.size} of {limits.size} blocks below {100 * LIMIT_WARN_RATIO:.1f} %); limits are in {r.unit}"
        + (" (1 kW is 1e3 W)" if r.unit == "W" else "")
    )


def _si(v: float, unit: str) -> str:
    """Three significant digits with an SI prefix (39 kW, 1.2 MW, 40 W)."""
    for scale, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(v) >= scale:
            return f"{v / scale:.3g} {prefix}{unit}"
    return f"{v:.3g} {unit}"


def _share(fraction: float) -> str:
    """A fraction as a percentage with two significant digits (0.17 %, 3.1 %, 45 %)."""
    return f"{100 * fraction:.2g} %"


def _kind(r: Any) -> str:
    return str(r.kind)


# --------------------------------------------------------------------------------------------------------
# text
# --------------------------------------------------------------------------------------------------------


def _fixed(v: float, unit: str) -> str:
    """Times to 0.01 s and powers to 1 W (aligned columns); anything else in 6 significant digits."""
    if not math.isfinite(v):
        return str(v)
    return {"s": f"{v:.2f}", "W": f"{v:.0f}"}.get(unit, f"{v:.6g}")


def _num(v: float) -> str:
    if not math.isfinite(v):
        return str(v)
    if v != 0 and (abs(v) >= 1e7 or abs(v) < 1e-3):
        return f"{v:.4e}"
    return f"{v:.6g}" if abs(v) < 1e4 else f"{v:.0f}"


def _table(
    header: Sequence[str], rows: Sequence[Sequence[str]], right: Sequence[bool], indent: str = "  "
) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(header)]

    def line(cells: Sequence[str]) -> str:
        return (
            indent
            + "  ".join(
                c.rjust(w) if ra else c.ljust(w) for c, w, ra in zip(cells, widths, right, strict=True)
            ).rstrip()
        )

    return [line(header), *(line(r) for r in rows)]


def _text(res: CheckResult) -> str:
    out: list[str] = []
    spec = res.spec
    if spec is None:
        out.append(f"{res.source}: not a valid fleet file; {len(res.problems)} problem(s):")
        out.extend(str(p) for p in res.problems)
        return "\n".join(out) + "\n"
    c = spec.coordinator
    out.append(f"fleet {spec.name!r} ({res.source})")
    if res.description:
        out.append(f"  {res.description}")
    out.append(
        f"  {len(spec.agents)} agent(s), {len(spec.resources)} resource(s); coordinator: method {c.method}, "
        f"max_rounds {c.max_rounds}, tolerance {c.tolerance:g}, order {c.order}, "
        f"guard {'on' if c.guard else 'off'}"
    )
    out.append("")
    for a in res.agents:
        state = f"built in {a.build_time:.2f} s" if a.built else "not built"
        out.append(f"agent {a.name}   model {a.model}   weight {a.weight:g}   {state}")
        if a.params:
            rows = [
                [p.name, p.unit, _fixed(p.lower, p.unit), _fixed(p.upper, p.unit), _fixed(p.free, p.unit)]
                for p in a.params
            ]
            out.extend(
                _table(
                    ["parameter", "unit", "reachable lower", "reachable upper", "free optimum"],
                    rows,
                    [False, False, True, True, True],
                )
            )
        out.append("")
    out.append("resources")
    rows = []
    for r, row in zip(spec.resources, res.resources, strict=True):
        what = r.describe(_num)
        contended = {True: "yes", False: "no", None: "unknown"}[row.contended]
        rows.append([r.name, what, str(len(row.users)), contended, row.detail])
    out.extend(_table(["resource", "kind", "users", "contended", "detail"], rows, [False, False, True, False, False]))
    out.append("")
    g = res.graph
    n_agents = sum(1 for _, d in g.nodes(data=True) if d["kind"] == "agent")
    out.append(
        f"conflict graph: {n_agents} agent(s), {g.number_of_nodes() - n_agents} resource(s), "
        f"{g.number_of_edges()} use(s); {len(res.groups)} group(s) that can be coordinated independently"
    )
    kinds = nx.get_node_attributes(g, "kind")
    for i, group in enumerate(res.groups, start=1):
        agents = [n for n in group if kinds[n] == "agent"]
        resources = [n for n in group if kinds[n] != "agent"]
        out.append(f"  group {i}: resources {', '.join(resources) or '(none)'}; agents {', '.join(agents) or '(none)'}")
    for r in spec.resources:
        users = list(g.neighbors(r.name))
        if users:
            out.append(f"  {r.name} <- " + ", ".join(_users(g, r.name, spec)))
    out.append("")
    state = {True: "feasible", False: "INFEASIBLE", None: "unknown"}[res.schedule]
    out.append(f"schedule check: {state}: {res.schedule_detail}")
    out.append("")
    if res.warnings:
        out.append(f"{len(res.warnings)} warning(s) (the check does not fail on them):")
        out.extend(res.warnings)
        out.append("")
    if res.problems:
        out.append(f"{len(res.problems)} problem(s):")
        out.extend(str(p) for p in res.problems)
    else:
        out.append("no problems found")
    return "\n".join(out) + "\n"
