"""The main job as one call: read a fleet, build its agents, choose orders, coordinate, verify, write files.

``run_fleet(spec)`` is what ``negotiate run fleet.toml`` does, minus printing. ``write_outputs(run, dir)``
writes ``schedule.csv``, ``run.json`` and the other files of a run folder (columns and keys documented in the
README and ``docs/outputs.md``).

A run folder belongs to one run at a time: ``with claim_run_folder(dir):`` creates it, takes its lock
(a second run into the same folder is refused, naming the process that holds it), refuses a folder that
holds something other than a run, and removes an earlier run's files before a fresh run starts, so that the
outputs of two runs are never mixed.
"""

from __future__ import annotations

import contextlib
import csv
import importlib
import importlib.util
import io
import json
import os
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from negotiate.coordination.centralized import solve_centralized
from negotiate.coordination.engine import CoordinationResult, RoundRecord, coordinate
from negotiate.coordination.methods import Method, method_class, method_names, option_problems, register_method
from negotiate.coordination.orders import search_orders
from negotiate.core.agent import AgentModel
from negotiate.core.files import write_atomic
from negotiate.core.nlp import try_solve
from negotiate.errors import FleetError, Problem, RunFolderError, describe
from negotiate.fleet import parse
from negotiate.fleet.spec import CapacityResource, FleetSpec
from negotiate.output.checkpoint import FILENAME as CHECKPOINT_FILE
from negotiate.output.results import SCHEDULE_COLUMNS, RunResult, ScheduleRow, write_result_files

__all__ = [
    "LOCK_FILE",
    "OUTPUT_FILES",
    "RunResult",
    "ScheduleRow",
    "check_method_options",
    "claim_run_folder",
    "clear_outputs",
    "load_fleet",
    "resolve_method",
    "run_fleet",
    "write_outputs",
]

OUTPUT_FILES = ("schedule.csv", "run.json", "history.csv", "prices.csv", "agents.csv", "resources.csv", "report.html")
"""The files :func:`write_outputs` writes into a run folder, besides ``trajectories/<agent>.csv``."""
TRAJECTORY_FOLDER = "trajectories"
LOCK_FILE = ".negotiate-run.lock"
"""Held by the run that uses the folder (see :func:`claim_run_folder`); it holds that process's id."""


def load_fleet(path: str | Path) -> FleetSpec:
    """Read and check a fleet file (:func:`negotiate.fleet.parse.load_fleet`) whose ``[coordinator] method``
    may name any registered coordination method, built-in or user (see :func:`resolve_method`)."""
    return parse.load_fleet(path, methods=method_names())


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
            # Registered before it runs, as the import system does (dataclasses and pickle look it up there).
            sys.modules[spec.name] = mod
            try:
                spec.loader.exec_module(mod)
            except BaseException:
                sys.modules.pop(spec.name, None)
                raise
        else:
            mod = importlib.import_module(module)
        cls = getattr(mod, attr)
    except (ImportError, AttributeError, OSError) as exc:
        raise ValueError(f"cannot import coordination method {name!r}: {exc}") from exc
    if not (isinstance(cls, type) and issubclass(cls, Method)):
        raise ValueError(f"{name!r} is not a subclass of negotiate.coordination.engine.Method")
    register_method(cls)
    return cls.name


def check_method_options(spec: FleetSpec, method: str | None = None) -> None:
    """Refuse ``[coordinator.options]`` that the method (``method`` or the fleet's own, a registered name)
    does not declare, or whose values have the wrong type: a :class:`~negotiate.errors.FleetError` naming
    the fleet file, the key, what was expected and what was found (every such key at once)."""
    cls = method_class(method or spec.coordinator.method)
    problems = [
        Problem(spec.source, "coordinator.options", key, expected, describe(value))
        for key, expected, value in option_problems(cls, spec.coordinator.options)
    ]
    if problems:
        raise FleetError(problems)


def _schedule(
    agents: list[AgentModel], res: CoordinationResult, free: np.ndarray, spec: FleetSpec
) -> list[ScheduleRow]:
    rows = []
    for a, rep, fv in zip(agents, res.evaluation.reports, free, strict=True):
        grad = rep.gradient if rep.gradient is not None else np.full(a.problem.n_p, np.nan)
        verdict = rep.certificate.verdict if rep.certificate is not None else str(rep.status)
        draw = np.full(a.problem.n_p, np.nan)
        if a.draw is not None and rep.ok:
            planned = np.asarray(a.draw(rep.result), dtype=float).ravel()
            draw = planned if planned.shape == draw.shape else draw
        done: set[str] = set()
        for k, q in enumerate(a.params):
            if q.kind == "share":
                r = spec.resource(q.resource)
                assert isinstance(r, CapacityResource) and q.block is not None
                t0 = r.start + q.block * r.block_length
                rows.append(
                    ScheduleRow(a.name, q.resource, t0, t0 + r.block_length, float(rep.p[k]), rep.value, fv,
                                np.nan, np.nan, float(grad[k]), verdict, float(draw[k]))
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
    build_time: float = 0.0,
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
    executor : Executor, optional
        Passed to :func:`negotiate.coordination.engine.coordinate` (an :mod:`negotiate.execution.executor` executor also
        solves the agents at their free optima).
    progress : callable, optional
        Called with each :class:`~negotiate.coordination.engine.RoundRecord`; its ``trial`` field says which order
        trial (0, 1, ...) the round belongs to, its ``round`` counts within that trial.
    checkpoint_dir : path, optional
        Run folder to keep ``checkpoint.bin`` in, written after every round (:mod:`negotiate.output.checkpoint`).
    resume : bool
        Continue from the checkpoint in ``checkpoint_dir`` (finished order trials are not redone, the trial
        in progress continues from its last complete round). Raises
        :class:`~negotiate.errors.CheckpointError` when there is none, or it is of another fleet or
        method, or damaged.
    build_time : float
        Seconds the caller spent building ``agents`` (s), counted in the run's wall time and its ``build``
        phase; ignored when the agents are built here.

    Raises
    ------
    FleetError
        When ``[coordinator.options]`` holds a key the method does not declare or a value of the wrong type
        (:func:`check_method_options`), before anything is built or solved.
    DeadlockError, InfeasibleOrdersError
        When the first order (first-come-first-served) admits no schedule; later candidates of an order
        search that admit none are recorded as infeasible trials and skipped.
    """
    t0 = time.perf_counter()
    phases = {"build": float(build_time)}
    if resume and checkpoint_dir is None:
        raise ValueError("'resume' needs the run folder holding the checkpoint ('checkpoint_dir')")
    settings = spec.coordinator
    if method is not None:
        settings = replace(settings, method=resolve_method(method))
    check_method_options(spec, settings.method)
    book = None
    if checkpoint_dir is not None:
        from negotiate.output.checkpoint import RunBook

        book = RunBook(checkpoint_dir, spec, settings.method, resume=resume)  # checked before building
    if agents is None:
        from negotiate.fleet.parse import build_agents

        agents = build_agents(spec)
        phases["build"] = time.perf_counter() - t0
    t1 = time.perf_counter()
    if executor is not None:
        free_results = executor(agents, [a.free_optimum for a in agents], [None] * len(agents))
        free = np.array([r.value for r in free_results])
    else:
        free = np.array([try_solve(a.problem, a.free_optimum).value for a in agents])
    t2 = time.perf_counter()
    phases["free_optima"] = t2 - t1
    coordinated = 0  # order trials handed to the coordinator so far

    def one(
        orders: dict[str, list[str]], start: np.ndarray | None
    ) -> tuple[float, np.ndarray, CoordinationResult | None]:
        nonlocal coordinated
        trial, coordinated = coordinated, coordinated + 1
        k = book.next_trial() if book is not None else 0
        if book is not None:
            done = book.finished(k, orders, agents)
            if done is not None:
                return done
        tell = None if progress is None else (lambda rec: progress(replace(rec, trial=trial)))
        r = coordinate(
            agents, spec.resources, settings, orders=orders, start=start, executor=executor, progress=tell,
            checkpoint=book.hook(k, orders) if book is not None else None,
            resume=book.engine_state(k, orders) if book is not None else None,
        )  # fmt: skip
        total = r.total if r.evaluation.ok else float("inf")
        if book is not None:
            book.finish(k, orders, total, r)
        return total, r.P, r

    best, _orders, trials = search_orders(agents, spec.resources, settings.order, one)
    assert isinstance(best, CoordinationResult)
    t3 = time.perf_counter()
    phases["order_search"] = t3 - t2
    central = None
    if verify:
        central = solve_centralized(
            agents,
            best.evaluation.feasible,
            start=[rep.result.x for rep in best.evaluation.reports],
            start_P=best.P,
        )
        phases["verify"] = time.perf_counter() - t3
    return RunResult(
        spec=spec,
        coordination=best,
        schedule=tuple(_schedule(agents, best, free, spec)),
        free_values=free,
        order_trials=tuple(trials),
        centralized=central,
        wall_time=sum(phases.values()),
        agents=tuple(agents),
        phase_times=phases,
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


def _six(v: float) -> str:
    """Six decimals; a value that rounds to zero is written 0.000000 whatever its sign (a solver's -1e-18 W)."""
    text = f"{v:.6f}"
    return text[1:] if text == "-0.000000" else text


def _ours(name: str) -> bool:
    """Whether ``name`` is a file a run writes into its folder (an output, the checkpoint, a temporary file)."""
    known = (*OUTPUT_FILES, CHECKPOINT_FILE, LOCK_FILE, TRAJECTORY_FOLDER)
    if name in known:
        return True
    return name.startswith(".") and name.endswith(".tmp") and any(name.startswith(f".{k}.") for k in known)


def clear_outputs(folder: str | Path, *, checkpoint: bool = False) -> None:
    """Remove the files an earlier run wrote into ``folder`` (:data:`OUTPUT_FILES`, ``trajectories/*.csv``,
    temporary files; with ``checkpoint``, ``checkpoint.bin`` too). Nothing else is touched: a folder of
    ``trajectories/`` that holds other files stays. Raises :class:`OSError` as the system reports it."""
    d = Path(folder)
    if not d.is_dir():
        return
    for entry in os.scandir(d):
        name = entry.name
        if name in (LOCK_FILE, TRAJECTORY_FOLDER) or not _ours(name):
            continue
        if name == CHECKPOINT_FILE and not checkpoint:
            continue
        if entry.is_symlink() or entry.is_file():
            os.unlink(entry.path)
    traj = d / TRAJECTORY_FOLDER
    if traj.is_symlink():
        traj.unlink()  # writing through it would leave the folder
    elif traj.is_dir():
        for entry in os.scandir(traj):
            if entry.name.endswith((".csv", ".tmp")) and (entry.is_symlink() or entry.is_file()):
                os.unlink(entry.path)
        with contextlib.suppress(OSError):
            traj.rmdir()  # only when empty


class _Lock:
    """An exclusive lock on a run folder: ``fcntl.flock`` on the lock file, which holds the holder's pid.

    The kernel releases a flock when its process ends however it ends, so a lock file left by a run that
    died is simply taken over. Where ``fcntl`` is missing (Windows) the lock file is created with
    ``O_CREAT | O_EXCL`` instead, and one left behind must be deleted by hand (the message says so).
    """

    def __init__(self, folder: Path) -> None:
        self.path = folder / LOCK_FILE
        flags = os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0)
        try:
            import fcntl
        except ImportError:  # pragma: no cover - Windows
            fcntl = None  # type: ignore[assignment]
            flags |= os.O_EXCL
        for _ in range(20):
            try:
                fd = os.open(self.path, flags, 0o644)
            except FileExistsError:  # pragma: no cover - Windows
                raise self._busy(self._holder(None), "; if no run is using it, delete that file") from None
            except OSError as exc:
                raise RunFolderError(
                    f"{folder}: cannot write into this folder ({exc.strerror or exc} creating {self.path.name}); "
                    "choose a folder you can write to with --out"
                ) from None
            if fcntl is not None:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                except OSError:
                    holder = self._holder(fd)
                    os.close(fd)
                    raise self._busy(holder, "") from None
                # The file locked must still be the one at the path: a run that ends removes its lock file
                # (while holding it), and a lock on a removed file guards nothing.
                try:
                    same = os.path.samestat(os.fstat(fd), os.stat(self.path, follow_symlinks=False))
                except FileNotFoundError:
                    same = False
                if not same:
                    os.close(fd)
                    continue
            os.ftruncate(fd, 0)
            os.write(fd, f"{os.getpid()}\n".encode())
            self.fd = fd
            return
        raise RunFolderError(f"{folder}: cannot take the lock {self.path.name}: other runs keep taking it")

    def _holder(self, fd: int | None) -> str:
        try:
            if fd is None:
                text = self.path.read_text()
            else:
                text = os.pread(fd, 64, 0).decode("ascii", "replace")
        except OSError:
            text = ""
        text = text.strip()
        return f"pid {text}" if text.isdigit() else "a process whose id is not recorded yet"

    def _busy(self, holder: str, hint: str) -> RunFolderError:
        folder = self.path.parent
        return RunFolderError(
            f"folder {folder} is in use by another run ({holder}, lock file {self.path}); wait until it ends, or "
            f"choose another folder with --out{hint}"
        )

    def release(self) -> None:
        try:
            os.unlink(self.path)  # removed while still held: a waiting run re-checks the path (see __init__)
        except OSError:
            pass
        finally:
            os.close(self.fd)


@contextlib.contextmanager
def claim_run_folder(folder: str | Path, *, resume: bool = False) -> Iterator[Path]:
    """Make ``folder`` this run's folder for the duration of the ``with`` block, before anything is built.

    * ``folder`` is created if needed (with its parents); a path that is a file, or that cannot be created
      or written, is refused.
    * Its lock is taken (:data:`LOCK_FILE`); a folder in use by another run is refused, naming that run's
      process id. The lock is released however the block ends (the lock file is removed; one left by a run
      that was killed is taken over).
    * For a fresh run (``resume`` False) a non-empty folder must be a run folder (it holds ``run.json`` or
      ``checkpoint.bin``, or only files a run writes), and not one whose run was interrupted
      (``checkpoint.bin`` without ``run.json``: continue it with ``--resume``, or delete the checkpoint).
      The earlier run's files are then removed (:func:`clear_outputs`, the checkpoint included), so that
      no file of it mixes with the new run's.
    * For ``resume`` the folder must exist; nothing in it is removed (the checkpoint is read afterwards, and
      :func:`write_outputs` replaces the outputs at the end).

    A folder this call created is removed again if it is empty when the block ends.

    Raises
    ------
    RunFolderError
        For each case above; the message names the folder and says what to do.
    """
    d = Path(folder)
    if d.exists() and not d.is_dir():
        raise RunFolderError(f"{d}: is a file, not a folder; give --out a folder (new, empty, or of an earlier run)")
    created = False
    if not d.exists():
        if resume:
            raise RunFolderError(
                f"{d}: no such folder, so no run to resume; give the folder of an interrupted run "
                "(the --out DIR it was started with)"
            )
        try:
            d.mkdir(parents=True)
            created = True
        except OSError as exc:
            raise RunFolderError(
                f"{d}: cannot create this folder ({exc.strerror or exc}); choose a folder you can write to with --out"
            ) from None
    lock = _Lock(d)
    try:
        if not resume:
            others = sorted(n for n in os.listdir(d) if n != LOCK_FILE)
            foreign = [n for n in others if not _ours(n)]
            if foreign and "run.json" not in others and CHECKPOINT_FILE not in others:
                shown = ", ".join(foreign[:5]) + (f" and {len(foreign) - 5} more" if len(foreign) > 5 else "")
                raise RunFolderError(
                    f"{d}: not a run folder (it holds {shown}, but no run.json or {CHECKPOINT_FILE}); nothing was "
                    "written: give --out a new or empty folder, or the folder of an earlier run"
                )
            if CHECKPOINT_FILE in others and "run.json" not in others:
                raise RunFolderError(
                    f"{d}: holds an interrupted run ({CHECKPOINT_FILE} without run.json); continue it with "
                    f"'negotiate run --resume {d}', or delete {d / CHECKPOINT_FILE} to start afresh there"
                )
            try:
                clear_outputs(d, checkpoint=True)
            except OSError as exc:
                raise RunFolderError(
                    f"{d}: cannot remove the earlier run's files ({exc.strerror or exc}: {exc.filename}); "
                    "fix the folder's permissions, or choose another folder with --out"
                ) from None
        yield d
    finally:
        lock.release()
        if created:
            with contextlib.suppress(OSError):
                d.rmdir()  # only when nothing was written


def write_outputs(run: RunResult, out_dir: str | Path) -> list[Path]:
    """Write ``schedule.csv``, ``run.json``, the files of :mod:`negotiate.output.results` (history, prices, agents,
    resources, trajectories) and ``report.html`` into ``out_dir`` (created if needed); return the paths.

    The files an earlier run wrote there are removed first (:func:`clear_outputs`; ``checkpoint.bin`` is
    kept), so no trajectory of another fleet stays behind. Each file is written whole or not at all
    (:func:`negotiate.core.files.write_atomic`). Raises :class:`OSError` when the folder cannot be written.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    clear_outputs(out)
    buf = io.StringIO(newline="")
    w = csv.writer(buf)
    w.writerow(SCHEDULE_COLUMNS)
    for r in run.schedule:
        w.writerow([
            r.agent, r.resource, f"{r.enter:.6f}", f"{r.leave:.6f}", f"{r.value:.6f}",
            "" if np.isnan(r.share) else f"{r.share:.6f}", "" if np.isnan(r.draw) else _six(r.draw),
            f"{r.free_value:.6f}", f"{r.value - r.free_value:.6f}",
            "" if np.isnan(r.d_enter) else f"{r.d_enter:.6g}", "" if np.isnan(r.d_leave) else f"{r.d_leave:.6g}",
            "" if np.isnan(r.d_share) else f"{r.d_share:.6g}", r.verdict,
        ])  # fmt: skip
    sched = write_atomic(out / "schedule.csv", buf.getvalue())
    summary = write_atomic(out / "run.json", json.dumps(_clean(run.summary()), indent=2) + "\n")
    from negotiate.output.report import write_report

    files = write_result_files(run, out)
    return [sched, summary, *files, write_report(out)]
