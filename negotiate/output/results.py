"""The run's machine-readable files, written after a run and read back to rebuild the report.

:func:`write_result_files` writes, next to ``schedule.csv`` and ``run.json`` (see :mod:`negotiate.run`),
``history.csv`` (one row per round), ``prices.csv`` (one row per shared parameter: its value and the
agent's value gradient, the price of moving it), ``agents.csv`` (one row per agent: free-optimum and
coordinated cost, certificate), ``resources.csv`` (gaps, blocks and limits) and one
``trajectories/<agent>.csv`` per agent. :func:`load_run` reads a run folder back into a :class:`RunFiles`,
which is all that :mod:`negotiate.output.report` needs: a report can be rebuilt without solving anything.

Floats are written with Python's shortest round-trip representation, so reading a file gives back the very
numbers of the run; an empty field is "not applicable" (read as ``nan``). Columns and units are listed in
``docs/outputs.md``.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from negotiate.coordination.centralized import CentralizedResult
from negotiate.coordination.engine import CoordinationResult, RoundRecord
from negotiate.coordination.orders import OrderTrial
from negotiate.core.agent import AgentModel
from negotiate.core.files import write_atomic
from negotiate.errors import RunFolderError
from negotiate.fleet.spec import FleetSpec
from negotiate.resources import KINDS, Resource

__all__ = [
    "AGENTS_COLUMNS",
    "HISTORY_COLUMNS",
    "PRICES_COLUMNS",
    "RESOURCES_COLUMNS",
    "SCHEDULE_COLUMNS",
    "AgentRow",
    "PriceRow",
    "ResourceRow",
    "RunFiles",
    "RunResult",
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
SCHEDULE_COLUMNS = ("agent", "resource", "enter", "leave", "value", "share", "draw", "free_value", "increase",
                    "d_enter", "d_leave", "d_share", "verdict")  # fmt: skip
_SCHEDULE_NEEDED = tuple(c for c in SCHEDULE_COLUMNS if c != "draw")  # folders written before 'draw' still load


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
    """Write a CSV file whole or not at all (:func:`negotiate.core.files.write_atomic`)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    buf = io.StringIO(newline="")
    w = csv.writer(buf)
    w.writerow(header)
    w.writerows(rows)
    return write_atomic(path, buf.getvalue())


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


def write_resources(path: str | Path, resources: Sequence[Resource]) -> Path:
    """``resources.csv``: each resource's rows as its kind declares them (an exclusive resource: one row with
    its gap; a capacity resource: one row per block)."""
    rows = []
    for r in resources:
        for cells in r.table_rows():
            rows.append([r.name, r.kind, *(_cell(c, cells.get(c)) for c in RESOURCES_COLUMNS[2:])])
    return _write_csv(Path(path), RESOURCES_COLUMNS, rows)


def _cell(column: str, v: Any) -> str:
    """A cell of ``resources.csv``: empty for nothing, a block index and text as they are, numbers by
    :func:`_num`."""
    if v is None:
        return ""
    if column == "block" or isinstance(v, str):
        return str(v)
    return _num(v)


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
    kind: str = ""
    """Kind of the resource (``"exclusive"``, ``"capacity"``, ... :data:`negotiate.resources.KINDS`); read
    back from ``resources.csv``, empty for a resource that is not listed there."""

    @property
    def chart(self) -> str:
        """How the report draws the row: ``"slots"`` (an entry and an exit), ``"shares"`` (an amount per
        block) or ``""`` (a kind that is not registered)."""
        k = KINDS.get(self.kind)
        return k.chart if k is not None else ""


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
    phase_times: dict[str, float] = field(default_factory=dict)
    """Seconds spent in each phase: ``build`` (reading the fleet, claiming the folder, starting the workers,
    building the agents), ``free_optima``, ``order_search`` (every coordination of every order tried) and,
    with ``verify``, ``verify``; they add up to ``wall_time``."""
    files: tuple[Path, ...] = field(repr=False, default=())
    """The files written into the run folder (``run_fleet(..., out=DIR)``), empty when none were written."""

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
            "order_trials_infeasible": sum(1 for t in self.order_trials if t.infeasible),
            "order_search": [t.to_dict() for t in self.order_trials],
            "total_cost": c.total,
            "free_total_cost": self.free_total,
            "wall_time_s": self.wall_time,
            "phase_times_s": dict(self.phase_times),
            "flagged_last_round": list(c.evaluation.flagged),
        }
        bounded = [t for t in self.order_trials if t.gap_kind]
        if bounded:  # the order master's bound on the best order's total and the gap to it
            last = bounded[-1]
            out["order_bound"] = last.bound
            out["order_gap"] = last.gap
            out["order_relative_gap"] = last.gap / max(1.0, abs(c.total))
            out["order_gap_kind"] = last.gap_kind
            out["order_gap_reason"] = last.gap_reason
        if self.centralized is not None:
            out["centralized_cost"] = self.centralized.total
            out["centralized_status"] = str(self.centralized.status)
            out["centralized_wall_time_s"] = self.centralized.wall_time
            out["relative_gap"] = self.gap
        return out


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
    """One row of ``resources.csv``: an exclusive resource (``gap_s``), one block of a capacity one, or
    what another kind declares (:meth:`negotiate.resources.base.ResourceKind.table_rows`)."""

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

    def charted(self, chart: str) -> list[ResourceRow]:
        """Rows of the resources whose kind is drawn as ``chart`` (``"slots"`` or ``"shares"``)."""
        return [r for r in self.resources if KINDS[r.kind].chart == chart]

    def exclusive(self) -> list[ResourceRow]:
        """Rows of the resources drawn as slots (exclusive ones and the like; one row each)."""
        return self.charted("slots")

    def capacity_names(self) -> list[str]:
        """Names of the resources drawn as shares per block (capacity ones and the like)."""
        return list(dict.fromkeys(r.resource for r in self.charted("shares")))


AGAIN = "write the folder again with 'negotiate run FLEET --out DIR' (or 'negotiate run --resume DIR')"
"""What to do about a damaged or incomplete run folder."""

NEED = ("run.json", "schedule.csv", "history.csv", "prices.csv", "agents.csv", "resources.csv")
"""The files :func:`load_run` reads in every run folder (trajectory files are named in ``agents.csv``)."""

# run.json: what each key holds when it is there (the report shows a dash for a key that is missing)
_SUMMARY_KEYS: dict[str, str] = {
    "fleet": "str", "description": "str", "source": "str", "status": "str", "message": "str",
    "centralized_status": "str", "rounds": "int", "agent_solves": "int", "order_trials": "int",
    "total_cost": "num", "free_total_cost": "num", "wall_time_s": "num", "centralized_cost": "num",
    "centralized_wall_time_s": "num", "relative_gap": "num", "settings": "object", "orders": "orders",
    "flagged_last_round": "names", "order_bound": "num", "order_gap": "num", "order_relative_gap": "num",
    "order_gap_kind": "str", "order_gap_reason": "str",
}  # fmt: skip
_KIND_TEXT = {
    "str": "a string", "int": "an integer", "num": "a number or null", "object": "an object",
    "orders": "an object of resource: [agent names]", "names": "a list of agent names",
}  # fmt: skip


def _found(v: Any) -> str:
    """A short description of a JSON value, for messages."""
    if isinstance(v, dict):
        return f"an object with {len(v)} key{'s' * (len(v) != 1)}"
    if isinstance(v, list):
        return f"a list of {len(v)} entr{'ies' if len(v) != 1 else 'y'}"
    text = json.dumps(v, allow_nan=True)
    return text if len(text) <= 40 else text[:37] + "..."


def _json_ok(kind: str, v: Any) -> bool:
    if kind == "str":
        return isinstance(v, str)
    if kind == "int":
        return type(v) is int
    if kind == "num":
        return v is None or type(v) in (int, float)
    if kind == "object":
        return isinstance(v, dict)
    if kind == "orders":
        return isinstance(v, dict) and all(
            isinstance(o, list) and all(isinstance(a, str) for a in o) for o in v.values()
        )
    return isinstance(v, list) and all(isinstance(a, str) for a in v)  # names


class _Folder:
    """Reads the files of one run folder, never outside it; every problem is a RunFolderError naming the file."""

    def __init__(self, folder: str | Path) -> None:
        self.d = Path(folder)
        try:
            self.root = self.d.resolve(strict=True)
        except (OSError, RuntimeError) as exc:
            raise RunFolderError(
                f"{self.d}: no such run folder ({getattr(exc, 'strerror', None) or exc}); give the folder that "
                "'negotiate run FLEET --out DIR' wrote"
            ) from None
        if not self.root.is_dir():
            raise RunFolderError(f"{self.d}: expected a run folder, found a file; give the folder of a run")

    def path(self, rel: str, named_in: str = "") -> Path:
        """The regular file ``rel`` inside the folder (links followed, but never out of it)."""
        where = f" (named in {named_in})" if named_in else ""
        shown = self.d / rel
        if not rel or Path(rel).is_absolute() or Path(rel).drive or "\x00" in rel:
            raise RunFolderError(
                f"{self.d}: expected a path inside the run folder{where}, found {rel!r}; a run folder only "
                "names its own files"
            )
        try:
            target = (self.root / rel).resolve()
        except (OSError, RuntimeError) as exc:
            raise RunFolderError(f"{shown}: cannot follow this path{where} ({exc})") from None
        if not target.is_relative_to(self.root):
            raise RunFolderError(
                f"{shown}{where}: leads outside the run folder {self.d}, to {target}; refused: the report "
                "only reads files inside the folder"
            )
        parent = target.parent
        while parent != self.root and not parent.exists():
            parent = parent.parent
        if not parent.is_dir():
            raise RunFolderError(f"{parent}: expected a folder holding {rel}{where}, found a file; {AGAIN}")
        if not target.exists():
            raise RunFolderError(f"{shown}: missing{where}; the folder is incomplete: {AGAIN}")
        if not target.is_file():
            raise RunFolderError(f"{shown}: expected a file{where}, found a folder or other non-file; {AGAIN}")
        return target

    def text(self, rel: str, named_in: str = "") -> str:
        path = self.path(rel, named_in)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise RunFolderError(f"{self.d / rel}: cannot read it ({exc.strerror or exc})") from None
        try:
            return data.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise RunFolderError(
                f"{self.d / rel}: expected UTF-8 text, found undecodable bytes ({exc.reason} at byte {exc.start}); "
                f"the file is damaged: {AGAIN}"
            ) from None

    def summary(self) -> dict[str, Any]:
        rel = "run.json"
        text = self.text(rel)
        try:
            data = json.loads(text)
        except (ValueError, RecursionError) as exc:
            raise RunFolderError(f"{self.d / rel}: expected JSON, found damaged text ({exc}); {AGAIN}") from None
        if not isinstance(data, dict):
            raise RunFolderError(f"{self.d / rel}: expected a JSON object, found {_found(data)}; {AGAIN}")
        for key, kind in _SUMMARY_KEYS.items():
            if key in data and not _json_ok(kind, data[key]):
                raise RunFolderError(
                    f"{self.d / rel}: key '{key}': expected {_KIND_TEXT[kind]}, found {_found(data[key])}; {AGAIN}"
                )
        return data

    def table(self, rel: str, columns: Sequence[str], named_in: str = "") -> tuple[list[str], list[_Row]]:
        """The header and rows of a CSV file with (at least) ``columns``; blank lines are skipped."""
        text = self.text(rel, named_in)
        where = self.d / rel
        rows: list[_Row] = []
        try:
            reader = csv.reader(io.StringIO(text, newline=""))
            header = next(reader, None)
            if header is None:
                raise RunFolderError(
                    f"{where}: empty file, expected a header line"
                    + (f" ({','.join(columns)})" if columns else "") + f"; {AGAIN}"
                )  # fmt: skip
            missing = [c for c in columns if c not in header]
            if missing:
                raise RunFolderError(
                    f"{where}: expected the column(s) {', '.join(missing)} in the header line, found "
                    f"{','.join(header)[:200]!r}; {AGAIN}"
                )
            twice = sorted({c for c in header if header.count(c) > 1})
            if twice:
                raise RunFolderError(f"{where}: column(s) {', '.join(twice)} appear twice in the header; {AGAIN}")
            for r in reader:
                if not r:
                    continue
                if len(r) != len(header):
                    raise RunFolderError(
                        f"{where} line {reader.line_num}: expected {len(header)} fields, found {len(r)}; "
                        f"the file is damaged: {AGAIN}"
                    )
                rows.append(_Row(where, reader.line_num, dict(zip(header, r, strict=True))))
        except csv.Error as exc:
            raise RunFolderError(f"{where}: not a readable CSV file ({exc}); {AGAIN}") from None
        return header, rows

    def rows(self, rel: str, columns: Sequence[str]) -> list[_Row]:
        return self.table(rel, columns)[1]


@dataclass(frozen=True)
class _Row:
    """One CSV record with its file and line, for messages."""

    file: Path
    line: int
    cells: dict[str, str]

    def _bad(self, col: str, expected: str) -> RunFolderError:
        return RunFolderError(
            f"{self.file} line {self.line}, column '{col}': expected {expected}, found {self.cells[col][:40]!r}; "
            f"the file is damaged: {AGAIN}"
        )

    def text(self, col: str) -> str:
        return self.cells[col]

    def num(self, col: str, finite: bool = False) -> float:
        """A float (``nan`` for an empty cell); with ``finite``, inf and nan are refused."""
        s = self.cells[col]
        if not s.strip():
            return float("nan")
        try:
            v = float(s)
        except ValueError:
            raise self._bad(col, "a number") from None
        if finite and not math.isfinite(v):
            raise self._bad(col, "a finite number")
        return v

    def whole(self, col: str, optional: bool = False) -> int | None:
        s = self.cells[col]
        if optional and not s.strip():
            return None
        try:
            return int(s)
        except ValueError:
            raise self._bad(col, "an integer" + (" or nothing" if optional else "")) from None


def load_run(folder: str | Path) -> RunFiles:
    """Read a folder written by ``negotiate run`` (or :func:`negotiate.run.write_outputs`).

    Only files inside ``folder`` are read: a trajectory path (or a link) that leads outside it is refused.

    Raises
    ------
    RunFolderError
        If the folder or one of its files is missing, damaged or of the wrong shape (the message names the
        file, the line and column where it applies, what was expected and what was found).
    """
    f = _Folder(folder)
    d = f.d
    missing = [n for n in NEED if not (d / n).exists() and not (d / n).is_symlink()]
    if missing:
        raise RunFolderError(
            f"{d}: not a complete run folder, expected {', '.join(NEED)}; missing {', '.join(missing)} "
            f"(write it with: negotiate run FLEET --out {d})"
        )
    summary = f.summary()
    resources = tuple(_resource(r) for r in f.rows("resources.csv", RESOURCES_COLUMNS))
    kind_of = {r.resource: r.kind for r in resources}
    schedule = tuple(
        ScheduleRow(r.text("agent"), r.text("resource"), r.num("enter", True), r.num("leave", True), r.num("share"),
                    r.num("value"), r.num("free_value"), r.num("d_enter"), r.num("d_leave"), r.num("d_share"),
                    r.text("verdict"), r.num("draw") if "draw" in r.cells else float("nan"),
                    kind_of.get(r.text("resource"), ""))
        for r in f.rows("schedule.csv", _SCHEDULE_NEEDED)
    )  # fmt: skip
    history = tuple(
        RoundRecord(r.whole("round"), r.num("trial_total"), r.num("best_total"), r.num("measure"),  # type: ignore[arg-type]
                    r.whole("agent_solves"), _split(r.text("flagged")), _split(r.text("failed")), r.text("note"))  # type: ignore[arg-type]
        for r in f.rows("history.csv", HISTORY_COLUMNS)
    )  # fmt: skip
    prices = tuple(
        PriceRow(r.text("agent"), r.text("resource"), r.text("parameter"), r.text("kind"), r.whole("block", True),
                 r.text("unit"), r.num("value"), r.num("free_optimum"), r.num("price"), r.text("price_unit"),
                 r.text("verdict"))
        for r in f.rows("prices.csv", PRICES_COLUMNS)
    )  # fmt: skip
    agents = tuple(
        AgentRow(r.text("agent"), r.text("model"), r.num("weight"), r.text("status"), r.num("free_value"),
                 r.num("value"), r.num("increase"), r.text("verdict"), _split(r.text("weakly_active")),
                 r.text("reason"), r.text("trajectory_file"))
        for r in f.rows("agents.csv", AGENTS_COLUMNS)
    )  # fmt: skip
    trajectories: dict[str, dict[str, np.ndarray]] = {}
    for a in agents:
        if a.trajectory_file:
            header, rows = f.table(a.trajectory_file, (), named_in=f"agents.csv for agent {a.agent!r}")
            trajectories[a.agent] = {c: np.array([r.num(c) for r in rows], dtype=float) for c in header}
    return RunFiles(d, summary, schedule, history, prices, agents, resources, trajectories)


def _resource(r: _Row) -> ResourceRow:
    kind = r.text("kind")
    if kind not in KINDS:
        names = [f"'{k}'" for k in KINDS]
        raise r._bad("kind", ", ".join(names[:-1]) + " or " + names[-1])
    if KINDS[kind].chart == "shares":  # a row per block, with its times and limit
        block, finite = r.whole("block"), True
    else:
        block, finite = r.whole("block", True), False
    return ResourceRow(r.text("resource"), kind, r.num("gap_s"), block, r.num("start_s", finite),
                       r.num("end_s", finite), r.num("limit", finite), r.text("unit"))  # fmt: skip
