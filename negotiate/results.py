"""The run's machine-readable files, written after a run and read back to rebuild the report.

:func:`write_result_files` writes, next to ``schedule.csv`` and ``run.json`` (see :mod:`negotiate.run`),
``history.csv`` (one row per round), ``prices.csv`` (one row per shared parameter: its value and the
agent's value gradient, the price of moving it), ``agents.csv`` (one row per agent: free-optimum and
coordinated cost, certificate), ``resources.csv`` (gaps, blocks and limits) and one
``trajectories/<agent>.csv`` per agent. :func:`load_run` reads a run folder back into a :class:`RunFiles`,
which is all that :mod:`negotiate.report` needs: a report can be rebuilt without solving anything.

Floats are written with Python's shortest round-trip representation, so reading a file gives back the very
numbers of the run; an empty field is "not applicable" (read as ``nan``). Columns and units are listed in
``docs/outputs.md``.
"""

from __future__ import annotations

import csv
import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from negotiate.coordinate import RoundRecord
from negotiate.spec import CapacityResource, ExclusiveResource

if TYPE_CHECKING:
    from negotiate.run import RunResult

__all__ = [
    "AGENTS_COLUMNS",
    "HISTORY_COLUMNS",
    "PRICES_COLUMNS",
    "RESOURCES_COLUMNS",
    "AgentRow",
    "PriceRow",
    "ResourceRow",
    "RunFiles",
    "ScheduleRow",
    "load_run",
    "trajectory_filename",
    "write_agents",
    "write_history",
    "write_prices",
    "write_resources",
    "write_result_files",
    "write_trajectories",
]

HISTORY_COLUMNS = ("round", "trial_total", "best_total", "measure", "agent_solves", "flagged", "failed", "note")
PRICES_COLUMNS = ("agent", "resource", "parameter", "kind", "block", "unit", "value", "free_optimum", "price",
                  "price_unit", "verdict")  # fmt: skip
AGENTS_COLUMNS = ("agent", "model", "weight", "status", "free_value", "value", "increase", "verdict",
                  "weakly_active", "reason", "trajectory_file")  # fmt: skip
RESOURCES_COLUMNS = ("resource", "kind", "gap_s", "block", "start_s", "end_s", "limit", "unit")


# ---------------------------------------------------------------------------------------------------------
# cells


def _num(v: Any) -> str:
    """Shortest round-trip text of a float; empty for nan (not applicable)."""
    if v is None:
        return ""
    x = float(v)
    return "" if math.isnan(x) else repr(x)


def _float(s: str) -> float:
    return float(s) if s.strip() else float("nan")


def _names(items: Iterable[str]) -> str:
    return ";".join(items)


def _split(s: str) -> tuple[str, ...]:
    return tuple(x for x in s.split(";") if x)


def trajectory_filename(agent: str) -> str:
    """File name of an agent's trajectory CSV (characters other than letters, digits, ``.-_`` become ``_``)."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", agent) + ".csv"


def _write_csv(path: Path, header: Sequence[str], rows: Iterable[Sequence[str]]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".tmp")
    with tmp.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    tmp.replace(path)
    return path


def _read_csv(path: Path) -> list[dict[str, str]]:
    with path.open(newline="") as fh:
        return list(csv.DictReader(fh))


def _price_unit(unit: str) -> str:
    return f"cost/{unit}"


# ---------------------------------------------------------------------------------------------------------
# writers


def write_history(path: str | Path, history: Sequence[RoundRecord]) -> Path:
    """``history.csv``: one row per round of the coordination (see ``docs/outputs.md``)."""
    rows = [
        [str(h.round), _num(h.trial_total), _num(h.best_total), _num(h.measure), str(h.agent_solves),
         _names(h.flagged), _names(h.failed), h.note]
        for h in history
    ]  # fmt: skip
    return _write_csv(Path(path), HISTORY_COLUMNS, rows)


def write_prices(path: str | Path, run: RunResult) -> Path:
    """``prices.csv``: every shared parameter of every agent with its value and dV/dp (cost per unit)."""
    rows = []
    for a, rep in zip(run.agents, run.coordination.evaluation.reports, strict=True):
        grad = rep.gradient if rep.gradient is not None else np.full(len(a.params), np.nan)
        verdict = rep.certificate.verdict if rep.certificate is not None else str(rep.status)
        for k, q in enumerate(a.params):
            block = "" if q.block is None else str(q.block)
            rows.append([a.name, q.resource, q.name, q.kind, block, q.unit, _num(rep.p[k]), _num(a.free_optimum[k]),
                         _num(grad[k]), _price_unit(q.unit), verdict])  # fmt: skip
    return _write_csv(Path(path), PRICES_COLUMNS, rows)


def write_agents(path: str | Path, run: RunResult) -> Path:
    """``agents.csv``: per agent its free-optimum cost, coordinated cost, increase and certificate."""
    rows = []
    for a, rep, fv in zip(run.agents, run.coordination.evaluation.reports, run.free_values, strict=True):
        cert = rep.certificate
        rows.append([
            a.name, a.model, _num(a.weight), str(rep.status), _num(fv), _num(rep.value), _num(rep.value - fv),
            cert.verdict if cert is not None else "", _names(str(r) for r in cert.weakly_active) if cert else "",
            cert.reason if cert is not None else rep.result.message,
            f"trajectories/{trajectory_filename(a.name)}" if a.trajectory is not None and rep.ok else "",
        ])  # fmt: skip
    return _write_csv(Path(path), AGENTS_COLUMNS, rows)


def write_resources(path: str | Path, resources: Sequence[ExclusiveResource | CapacityResource]) -> Path:
    """``resources.csv``: one row per exclusive resource (its gap) and per block of a capacity resource."""
    rows = []
    for r in resources:
        if isinstance(r, CapacityResource):
            for k, lim in enumerate(r.limits):
                t0 = r.start + k * r.block_length
                rows.append([r.name, "capacity", "", str(k), _num(t0), _num(t0 + r.block_length), _num(lim), r.unit])
        else:
            rows.append([r.name, "exclusive", _num(r.gap), "", "", "", "", "s"])
    return _write_csv(Path(path), RESOURCES_COLUMNS, rows)


def write_trajectories(out_dir: str | Path, run: RunResult) -> list[Path]:
    """``trajectories/<agent>.csv`` from each agent's ``trajectory(result)`` at the coordinated parameters.

    Agents without a ``trajectory`` callable, or whose final solve failed, get no file.
    """
    folder = Path(out_dir) / "trajectories"
    paths = []
    for a, rep in zip(run.agents, run.coordination.evaluation.reports, strict=True):
        if a.trajectory is None or not rep.ok:
            continue
        series = {k: np.asarray(v, dtype=float).ravel() for k, v in a.trajectory(rep.result).items()}
        n = max((v.size for v in series.values()), default=0)
        cols = list(series)
        rows = [[_num(series[c][i]) if i < series[c].size else "" for c in cols] for i in range(n)]
        paths.append(_write_csv(folder / trajectory_filename(a.name), cols, rows))
    return paths


def write_result_files(run: RunResult, out_dir: str | Path) -> list[Path]:
    """Write history, prices, agents, resources and trajectory CSVs into ``out_dir``; return the paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = [
        write_history(out / "history.csv", run.coordination.history),
        write_prices(out / "prices.csv", run),
        write_agents(out / "agents.csv", run),
        write_resources(out / "resources.csv", run.spec.resources),
    ]
    return paths + write_trajectories(out, run)


# ---------------------------------------------------------------------------------------------------------
# reading back


@dataclass(frozen=True)
class ScheduleRow:
    """One slot (or capacity share) of the schedule, with the agent's value and prices (a row of
    ``schedule.csv``).

    ``enter``/``leave`` in s (for a capacity share: the block's start and end), ``share`` in the
    resource's unit (``nan`` for slots), ``value`` the agent's optimal cost there, ``d_enter``/``d_leave``
    its value gradient w.r.t. the slot's entry and exit (cost per s), ``d_share`` w.r.t. the share (cost per
    unit of share), ``draw`` what the agent plans to use of its share in the block, in the resource's unit
    (``nan`` for slots, and for agents whose model does not say).
    """

    agent: str
    resource: str
    enter: float
    leave: float
    share: float
    value: float
    free_value: float
    d_enter: float
    d_leave: float
    d_share: float
    verdict: str
    draw: float = math.nan


@dataclass(frozen=True)
class PriceRow:
    """One row of ``prices.csv``: ``value`` (coordinated) and ``free_optimum`` in ``unit``, ``price`` = dV/dp
    at the coordinated value in ``price_unit``."""

    agent: str
    resource: str
    parameter: str
    kind: str
    block: int | None
    unit: str
    value: float
    free_optimum: float
    price: float
    price_unit: str
    verdict: str


@dataclass(frozen=True)
class AgentRow:
    """One row of ``agents.csv`` (costs in the agent's cost unit, unweighted)."""

    agent: str
    model: str
    weight: float
    status: str
    free_value: float
    value: float
    increase: float
    verdict: str
    weakly_active: tuple[str, ...]
    reason: str
    trajectory_file: str


@dataclass(frozen=True)
class ResourceRow:
    """One row of ``resources.csv``: an exclusive resource (``gap_s``) or one block of a capacity one."""

    resource: str
    kind: str
    gap_s: float
    block: int | None
    start_s: float
    end_s: float
    limit: float
    unit: str


@dataclass(frozen=True)
class RunFiles:
    """A run folder read back: ``run.json`` as a dict and the rows of every CSV file."""

    folder: Path
    summary: Mapping[str, Any]
    schedule: tuple[ScheduleRow, ...]
    history: tuple[RoundRecord, ...]
    prices: tuple[PriceRow, ...]
    agents: tuple[AgentRow, ...]
    resources: tuple[ResourceRow, ...]
    trajectories: Mapping[str, Mapping[str, np.ndarray]] = field(default_factory=dict)

    def exclusive(self) -> list[ResourceRow]:
        return [r for r in self.resources if r.kind == "exclusive"]

    def capacity_names(self) -> list[str]:
        return list(dict.fromkeys(r.resource for r in self.resources if r.kind == "capacity"))


class RunFolderError(FileNotFoundError):
    """A run folder lacks a file the report needs (the message names it)."""


def load_run(folder: str | Path) -> RunFiles:
    """Read a folder written by ``negotiate run`` (or :func:`negotiate.run.write_outputs`).

    Raises
    ------
    RunFolderError
        If ``run.json`` or one of the CSV files is missing.
    """
    d = Path(folder)
    need = ["run.json", "schedule.csv", "history.csv", "prices.csv", "agents.csv", "resources.csv"]
    missing = [n for n in need if not (d / n).is_file()]
    if missing:
        raise RunFolderError(
            f"{d}: not a complete run folder, expected {', '.join(need)}; missing {', '.join(missing)} "
            "(write it with: negotiate run FLEET --out DIR)"
        )
    summary = json.loads((d / "run.json").read_text())
    schedule = tuple(
        ScheduleRow(r["agent"], r["resource"], _float(r["enter"]), _float(r["leave"]), _float(r["share"]),
                _float(r["value"]), _float(r["free_value"]), _float(r["d_enter"]), _float(r["d_leave"]),
                _float(r["d_share"]), r["verdict"], _float(r.get("draw") or ""))
        for r in _read_csv(d / "schedule.csv")
    )  # fmt: skip
    history = tuple(
        RoundRecord(int(r["round"]), _float(r["trial_total"]), _float(r["best_total"]), _float(r["measure"]),
                       int(r["agent_solves"]), _split(r["flagged"]), _split(r["failed"]), r["note"])
        for r in _read_csv(d / "history.csv")
    )  # fmt: skip
    prices = tuple(
        PriceRow(r["agent"], r["resource"], r["parameter"], r["kind"], int(r["block"]) if r["block"] else None,
                 r["unit"], _float(r["value"]), _float(r["free_optimum"]), _float(r["price"]), r["price_unit"],
                 r["verdict"])
        for r in _read_csv(d / "prices.csv")
    )  # fmt: skip
    agents = tuple(
        AgentRow(r["agent"], r["model"], _float(r["weight"]), r["status"], _float(r["free_value"]),
                 _float(r["value"]), _float(r["increase"]), r["verdict"], _split(r["weakly_active"]), r["reason"],
                 r["trajectory_file"])
        for r in _read_csv(d / "agents.csv")
    )  # fmt: skip
    resources = tuple(
        ResourceRow(r["resource"], r["kind"], _float(r["gap_s"]), int(r["block"]) if r["block"] else None,
                    _float(r["start_s"]), _float(r["end_s"]), _float(r["limit"]), r["unit"])
        for r in _read_csv(d / "resources.csv")
    )  # fmt: skip
    trajectories: dict[str, dict[str, np.ndarray]] = {}
    for a in agents:
        if a.trajectory_file and (d / a.trajectory_file).is_file():
            rows = _read_csv(d / a.trajectory_file)
            cols = list(rows[0]) if rows else []
            trajectories[a.agent] = {c: np.array([_float(r[c]) for r in rows]) for c in cols}
    return RunFiles(d, summary, schedule, history, prices, agents, resources, trajectories)
