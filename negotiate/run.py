"""The main job as one call: read a fleet, build its agents, choose orders, coordinate, verify, write files.

``run_fleet(spec)`` is what ``negotiate run fleet.toml`` does, minus printing. ``write_outputs(run, dir)``
writes ``schedule.csv`` and ``run.json`` (columns and keys documented in the README).
"""

from __future__ import annotations

import csv
import importlib
import importlib.util
import json
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from negotiate.agent import AgentModel
from negotiate.centralized import CentralizedResult, solve_centralized
from negotiate.coordinate import CoordinationResult, Method, RoundRecord, coordinate, register_method
from negotiate.nlp import try_solve
from negotiate.orders import OrderTrial, search_orders
from negotiate.results import ScheduleRow
from negotiate.spec import CapacityResource, FleetSpec

__all__ = ["RunResult", "ScheduleRow", "resolve_method", "run_fleet", "write_outputs"]


@dataclass(frozen=True)
class RunResult:
    """Everything a run found (see :func:`run_fleet`)."""

    spec: FleetSpec
    coordination: CoordinationResult
    schedule: tuple[ScheduleRow, ...]
    free_values: np.ndarray
    order_trials: tuple[OrderTrial, ...]
    centralized: CentralizedResult | None
    wall_time: float
    agents: tuple[AgentModel, ...] = field(repr=False, default=())

    @property
    def total(self) -> float:
        return self.coordination.total

    @property
    def free_total(self) -> float:
        """Weighted total of the agents' values at their free optima (a lower bound without coupling)."""
        w = np.array([a.weight for a in self.agents])
        return float(w @ self.free_values)

    @property
    def gap(self) -> float | None:
        """Relative gap to the centralized optimum, ``(total - centralized) / |centralized|``."""
        if self.centralized is None or not self.centralized.success:
            return None
        return (self.total - self.centralized.total) / max(1e-300, abs(self.centralized.total))

    def summary(self) -> dict[str, Any]:
        """The content of ``run.json``."""
        c = self.coordination
        out: dict[str, Any] = {
            "fleet": self.spec.name,
            "description": self.spec.description,
            "source": self.spec.source,
            "settings": {**asdict(self.spec.coordinator), "method": c.method},
            "status": c.status,
            "message": c.message,
            "orders": c.orders,
            "rounds": c.rounds,
            "agent_solves": c.agent_solves,
            "order_trials": len(self.order_trials),
            "total_cost": c.total,
            "free_total_cost": self.free_total,
            "wall_time_s": self.wall_time,
            "flagged_last_round": list(c.evaluation.flagged),
        }
        if self.centralized is not None:
            out["centralized_cost"] = self.centralized.total
            out["centralized_status"] = str(self.centralized.status)
            out["centralized_wall_time_s"] = self.centralized.wall_time
            out["relative_gap"] = self.gap
        return out


def resolve_method(name: str) -> str:
    """Accept a built-in method name, ``"package.module:ClassName"`` or ``"path/to/file.py:ClassName"`` of a
    user :class:`Method` (imported and registered: this imports and runs user code). Returns the
    registered name."""
    if ":" not in name:
        return name
    module, _, attr = name.rpartition(":")
    try:
        if module.endswith(".py"):
            spec = importlib.util.spec_from_file_location(Path(module).stem, module)
            if spec is None or spec.loader is None:
                raise ImportError(f"no such file {module!r}")
            mod = importlib.util.module_from_spec(spec)
            spec.loader.exec_module(mod)
        else:
            mod = importlib.import_module(module)
        cls = getattr(mod, attr)
    except (ImportError, AttributeError, OSError) as exc:
        raise ValueError(f"cannot import coordination method {name!r}: {exc}") from exc
    if not (isinstance(cls, type) and issubclass(cls, Method)):
        raise ValueError(f"{name!r} is not a subclass of negotiate.coordinate.Method")
    register_method(cls)
    return cls.name


def _schedule(
    agents: list[AgentModel], res: CoordinationResult, free: np.ndarray, spec: FleetSpec
) -> list[ScheduleRow]:
    rows = []
    for a, rep, fv in zip(agents, res.evaluation.reports, free, strict=True):
        grad = rep.gradient if rep.gradient is not None else np.full(a.problem.n_p, np.nan)
        verdict = rep.certificate.verdict if rep.certificate is not None else str(rep.status)
        done: set[str] = set()
        for k, q in enumerate(a.params):
            if q.kind == "share":
                r = spec.resource(q.resource)
                assert isinstance(r, CapacityResource) and q.block is not None
                t0 = r.start + q.block * r.block_length
                rows.append(
                    ScheduleRow(a.name, q.resource, t0, t0 + r.block_length, float(rep.p[k]), rep.value, fv,
                                np.nan, np.nan, float(grad[k]), verdict)
                )  # fmt: skip
            elif q.resource not in done:
                done.add(q.resource)
                ke = next(j for j, s in enumerate(a.params) if s.resource == q.resource and s.kind == "enter")
                kl = next(j for j, s in enumerate(a.params) if s.resource == q.resource and s.kind == "leave")
                rows.append(
                    ScheduleRow(a.name, q.resource, float(rep.p[ke]), float(rep.p[kl]), np.nan, rep.value, fv,
                                float(grad[ke]), float(grad[kl]), np.nan, verdict)
                )  # fmt: skip
    return rows


def run_fleet(
    spec: FleetSpec,
    agents: list[AgentModel] | None = None,
    *,
    method: str | None = None,
    verify: bool = False,
    executor: Any = None,
    progress: Callable[[RoundRecord], None] | None = None,
    checkpoint_dir: str | Path | None = None,
    resume: bool = False,
) -> RunResult:
    """Coordinate a fleet.

    Parameters
    ----------
    spec : FleetSpec
        The parsed fleet (:func:`negotiate.fleet.load_fleet`).
    agents : list of AgentModel, optional
        Built agents (built from ``spec`` when omitted).
    method : str, optional
        Overrides ``spec.coordinator.method``: a built-in name or ``"module:Class"``.
    verify : bool
        Also solve the centralized NLP for the final orders and report the gap.
    executor, progress
        Passed to :func:`negotiate.coordinate.coordinate` (an :mod:`negotiate.executor` executor also
        solves the agents at their free optima).
    checkpoint_dir : path, optional
        Run folder to keep ``checkpoint.bin`` in, written after every round (:mod:`negotiate.checkpoint`).
    resume : bool
        Continue from the checkpoint in ``checkpoint_dir`` (finished order trials are not redone, the trial
        in progress continues from its last complete round). Raises
        :class:`~negotiate.checkpoint.CheckpointError` when there is none, or it is of another fleet or
        method, or damaged.
    """
    t0 = time.perf_counter()
    if resume and checkpoint_dir is None:
        raise ValueError("'resume' needs the run folder holding the checkpoint ('checkpoint_dir')")
    settings = spec.coordinator
    if method is not None:
        settings = replace(settings, method=resolve_method(method))
    book = None
    if checkpoint_dir is not None:
        from negotiate.checkpoint import RunBook

        book = RunBook(checkpoint_dir, spec, settings.method, resume=resume)  # checked before building
    if agents is None:
        from negotiate.fleet import build_agents

        agents = build_agents(spec)
    if executor is not None:
        free_results = executor(agents, [a.free_optimum for a in agents], [None] * len(agents))
        free = np.array([r.value for r in free_results])
    else:
        free = np.array([try_solve(a.problem, a.free_optimum).value for a in agents])

    def one(
        orders: dict[str, list[str]], start: np.ndarray | None
    ) -> tuple[float, np.ndarray, CoordinationResult | None]:
        k = book.next_trial() if book is not None else 0
        if book is not None:
            done = book.finished(k, orders, agents)
            if done is not None:
                return done
        r = coordinate(
            agents, spec.resources, settings, orders=orders, start=start, executor=executor, progress=progress,
            checkpoint=book.hook(k, orders) if book is not None else None,
            resume=book.engine_state(k, orders) if book is not None else None,
        )  # fmt: skip
        total = r.total if r.evaluation.ok else float("inf")
        if book is not None:
            book.finish(k, orders, total, r)
        return total, r.P, r

    best, _orders, trials = search_orders(agents, spec.resources, settings.order, one)
    assert isinstance(best, CoordinationResult)
    central = None
    if verify:
        central = solve_centralized(
            agents,
            best.evaluation.feasible,
            start=[rep.result.x for rep in best.evaluation.reports],
            start_P=best.P,
        )
    return RunResult(
        spec=spec,
        coordination=best,
        schedule=tuple(_schedule(agents, best, free, spec)),
        free_values=free,
        order_trials=tuple(trials),
        centralized=central,
        wall_time=time.perf_counter() - t0,
        agents=tuple(agents),
    )


def _clean(v: Any) -> Any:
    if isinstance(v, float) and not np.isfinite(v):
        return None
    if isinstance(v, np.floating):
        return _clean(float(v))
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_clean(x) for x in v]
    return v


def write_outputs(run: RunResult, out_dir: str | Path) -> list[Path]:
    """Write ``schedule.csv``, ``run.json``, the files of :mod:`negotiate.results` (history, prices, agents,
    resources, trajectories) and ``report.html`` into ``out_dir`` (created if needed); return the paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    sched = out / "schedule.csv"
    with sched.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["agent", "resource", "enter", "leave", "value", "share", "free_value", "increase",
                    "d_enter", "d_leave", "d_share", "verdict"])  # fmt: skip
        for r in run.schedule:
            w.writerow([
                r.agent, r.resource, f"{r.enter:.6f}", f"{r.leave:.6f}", f"{r.value:.6f}",
                "" if np.isnan(r.share) else f"{r.share:.6f}", f"{r.free_value:.6f}",
                f"{r.value - r.free_value:.6f}",
                "" if np.isnan(r.d_enter) else f"{r.d_enter:.6g}", "" if np.isnan(r.d_leave) else f"{r.d_leave:.6g}",
                "" if np.isnan(r.d_share) else f"{r.d_share:.6g}", r.verdict,
            ])  # fmt: skip
    summary = out / "run.json"
    tmp = summary.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(_clean(run.summary()), indent=2) + "\n")
    tmp.replace(summary)
    from negotiate.report import write_report
    from negotiate.results import write_result_files

    files = write_result_files(run, out)
    return [sched, summary, *files, write_report(out)]
