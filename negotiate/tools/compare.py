"""Coordination methods side by side on one fleet, against the centralized optimum.

:func:`compare_methods` runs each coordination method (by default every registered built-in: bundle,
gradient, newton) and the centralized IPOPT solve on the same agents with the same orders on every exclusive
resource: the first-come-first-served orders (users sorted by their free-optimum entry time), whatever the
fleet file's ``order`` setting, so that every method solves the very same problem and differences come from
the method alone. The centralized solve starts from the projected free optima, like the methods, not from
any method's answer. Before timing, every agent is solved once cold and once warm at its free optimum, so
that no method pays for building the warm-start solver. Results: a :class:`Comparison` with one
:class:`MethodRow` per method plus one for the centralized solve; :func:`write_comparison` writes
``compare.csv`` and ``compare.png``.
"""

from __future__ import annotations

import csv
import time
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from negotiate.coordination.centralized import CentralizedResult, solve_centralized
from negotiate.coordination.engine import CoordinationResult, RoundRecord, coordinate
from negotiate.coordination.methods import method_names
from negotiate.core.agent import AgentModel
from negotiate.core.nlp import try_solve
from negotiate.core.status import CoordinationStatus
from negotiate.fleet.spec import FleetSpec
from negotiate.resources.coupling import build_feasible_set, fcfs_orders

__all__ = ["COMPARE_COLUMNS", "Comparison", "MethodRow", "compare_methods", "write_comparison"]

COMPARE_COLUMNS = ("method", "status", "rounds", "agent_solves", "wall_time_s", "total_cost", "relative_gap",
                   "message")  # fmt: skip
BUILTIN = ("bundle", "gradient", "newton")


@dataclass(frozen=True)
class MethodRow:
    """One line of the comparison: status, rounds, agent solves, wall time (s), final weighted total cost and
    relative gap ``(total - centralized) / |centralized|``. ``rounds``/``agent_solves`` are 0 for the
    centralized solve; status ``error`` (total ``nan``) when the method broke down, ``message`` says how."""

    method: str
    status: str
    rounds: int
    agent_solves: int
    wall_time: float
    total: float
    relative_gap: float | None
    message: str


@dataclass(frozen=True)
class Comparison:
    """All methods' outcomes on one fleet with one set of orders."""

    fleet: str
    orders: dict[str, list[str]]
    rows: tuple[MethodRow, ...]
    results: dict[str, CoordinationResult]
    centralized: CentralizedResult | None

    @property
    def histories(self) -> dict[str, tuple[RoundRecord, ...]]:
        return {k: r.history for k, r in self.results.items()}

    def to_text(self) -> str:
        """The comparison as an aligned text table, with the orders used."""
        header = ["method", "status", "rounds", "agent solves", "wall time s", "total cost", "gap to centralized"]
        body = [
            [r.method, r.status, str(r.rounds) if r.method != "centralized" else "-",
             str(r.agent_solves) if r.method != "centralized" else "-", f"{r.wall_time:.2f}", f"{r.total:.10g}",
             "-" if r.relative_gap is None else f"{r.relative_gap:+.2e}"]
            for r in self.rows
        ]  # fmt: skip
        widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(header)]
        lines = [
            "  ".join(h.ljust(w) if i < 2 else h.rjust(w) for i, (h, w) in enumerate(zip(header, widths, strict=True)))
        ]
        for b in body:
            lines.append("  ".join(c.ljust(w) if i < 2 else c.rjust(w)
                                   for i, (c, w) in enumerate(zip(b, widths, strict=True))))  # fmt: skip
        orders = "; ".join(f"{k}: {' > '.join(v)}" for k, v in self.orders.items()) or "none (no exclusive resource)"
        for r in self.rows:
            if r.status == CoordinationStatus.ERROR:
                lines.append(f"{r.method}: {r.message}")
        lines.append(f"same orders for every method (first come, first served by free optimum): {orders}")
        return "\n".join(lines) + "\n"


def compare_methods(
    spec: FleetSpec,
    agents: Sequence[AgentModel] | None = None,
    *,
    methods: Sequence[str] | None = None,
    centralized: bool = True,
) -> Comparison:
    """Run ``methods`` (default: bundle, gradient, newton) and the centralized solve on one fleet.

    Every method gets the fleet's coordinator settings (rounds, tolerance, guard, options) with its own
    ``method`` and the first-come-first-served orders (see the module docstring).

    Raises
    ------
    ValueError
        For an unknown method name.
    """
    if agents is None:
        from negotiate.fleet.build import build_agents

        agents = build_agents(spec)
    agents = list(agents)
    names = list(methods) if methods is not None else [m for m in BUILTIN if m in method_names()]
    unknown = [m for m in names if m not in method_names()]
    if unknown:
        raise ValueError(f"unknown coordination method(s) {unknown}; expected some of {method_names()}")
    for a in agents:  # build the warm-start solvers before any timing
        try_solve(a.problem, a.free_optimum, warm=try_solve(a.problem, a.free_optimum))
    orders = fcfs_orders(agents, spec.resources)
    results: dict[str, CoordinationResult] = {}
    errors: dict[str, tuple[float, str]] = {}
    for m in names:
        settings = replace(spec.coordinator, method=m)
        t0 = time.perf_counter()
        try:
            results[m] = coordinate(agents, spec.resources, settings, orders=orders)
        except (RuntimeError, ArithmeticError, np.linalg.LinAlgError) as exc:
            # a numerical breakdown inside one method is that method's outcome, not the comparison's end
            errors[m] = (time.perf_counter() - t0, f"{type(exc).__name__}: {exc}")
    central = None
    if centralized:
        central = solve_centralized(agents, build_feasible_set(agents, spec.resources, orders))
    ref = central.total if central is not None and central.success else None
    rows = []
    for m in names:
        if m in errors:
            rows.append(MethodRow(m, CoordinationStatus.ERROR, 0, 0, errors[m][0], float("nan"), None, errors[m][1]))
            continue
        r = results[m]
        gap = None if ref is None or not r.evaluation.ok else (r.total - ref) / max(1e-300, abs(ref))
        rows.append(MethodRow(m, r.status, r.rounds, r.agent_solves, r.wall_time, r.total, gap, r.message))
    if central is not None:
        rows.append(MethodRow("centralized", str(central.status), 0, 0, central.wall_time, central.total,
                              0.0 if ref is not None else None, central.message))  # fmt: skip
    return Comparison(spec.name, orders, tuple(rows), results, central)


def write_comparison(cmp: Comparison, out_dir: str | Path, *, plot: bool = True) -> list[Path]:
    """Write ``compare.csv`` (and ``compare.png`` with ``plot``) into ``out_dir``; return the paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = out / "compare.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(COMPARE_COLUMNS)
        for r in cmp.rows:
            w.writerow([r.method, r.status, r.rounds, r.agent_solves, repr(r.wall_time), repr(float(r.total)),
                        "" if r.relative_gap is None else repr(float(r.relative_gap)), r.message])  # fmt: skip
    paths = [path]
    if plot:
        from negotiate.output import plots

        ref = cmp.centralized.total if cmp.centralized is not None and cmp.centralized.success else None
        png = out / "compare.png"
        png.write_bytes(plots.png(plots.compare_chart(cmp.rows, cmp.histories, ref)))
        paths.append(png)
    return paths
