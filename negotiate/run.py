"""The main job as one call: read a fleet, build its agents, choose orders, coordinate, verify, write files.

``run_fleet(spec, out=dir)`` is what ``negotiate run fleet.toml --out dir`` does, minus printing: the run
folder, the executor (``workers``, ``scheduler``, ``cluster``), the time limit, resume, the outputs and the
timing (see its parameters). ``write_outputs(run, dir)`` writes ``schedule.csv``, ``run.json`` and the
other files of a run folder (columns and keys documented in the README and ``docs/outputs.md``).

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
import signal
import sys
import time
import warnings
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from negotiate.coordination.centralized import solve_centralized
from negotiate.coordination.engine import CoordinationResult, RoundRecord, coordinate
from negotiate.coordination.master import search_master
from negotiate.coordination.methods import Method, method_class, method_names, option_problems, register_method
from negotiate.coordination.orders import OrderTrial, order_option_problems, search_orders
from negotiate.core.agent import AgentModel
from negotiate.core.files import write_atomic
from negotiate.core.status import CoordinationStatus
from negotiate.errors import FleetError, Problem, RunFolderError, describe
from negotiate.execution.base import Executor
from negotiate.execution.make import make_executor
from negotiate.fleet import build, parse
from negotiate.fleet.spec import CoordinatorSettings, FleetSpec
from negotiate.output.checkpoint import FILENAME as CHECKPOINT_FILE
from negotiate.output.checkpoint import RunBook
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
    does not declare, or whose values have the wrong type, and ``[coordinator.order_options]`` that the order
    rule does not declare, or whose values have the wrong type or lie out of range: a
    :class:`~negotiate.errors.FleetError` naming the fleet file, the table, the key, what was expected and
    what was found (every such key at once)."""
    cls = method_class(method or spec.coordinator.method)
    problems = [
        Problem(spec.source, "coordinator.options", key, expected, describe(value))
        for key, expected, value in option_problems(cls, spec.coordinator.options)
    ]
    problems += [
        Problem(spec.source, "coordinator.order_options", key, expected, describe(value))
        for key, expected, value in order_option_problems(spec.coordinator.order, spec.coordinator.order_options)
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
        own = []  # each resource's rows, listed in the order of the agent's parameters
        for name in dict.fromkeys(q.resource for q in a.params):
            r = spec.resource(name)
            own += [(s.first, name, r.kind, s) for s in r.schedule_rows(a, rep.p, grad, draw)]
        for _first, name, kind, s in sorted(own, key=lambda row: row[0]):
            rows.append(ScheduleRow(a.name, name, s.enter, s.leave, s.share, rep.value, fv, s.d_enter, s.d_leave,
                                    s.d_share, verdict, s.draw, kind))  # fmt: skip
    return rows


def run_fleet(
    spec: FleetSpec | None = None,
    agents: list[AgentModel] | None = None,
    *,
    method: str | None = None,
    verify: bool = False,
    executor: Executor | Callable[..., Any] | None = None,
    progress: Callable[[RoundRecord], None] | None = None,
    checkpoint_dir: str | Path | None = None,
    resume: bool = False,
    build_time: float = 0.0,
    out: str | Path | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    cluster: str | None = None,
    time_limit: float | None = None,
    on_built: Callable[[FleetSpec, list[AgentModel], CoordinatorSettings], None] | None = None,
    stop_on_signal: bool = False,
) -> RunResult:
    """Coordinate a fleet: what ``negotiate run`` does, minus printing.

    In this order: claim the run folder ``out`` (when given); import and register a user ``method``; read
    the checkpoint to resume from (and the fleet it records, when ``spec`` is None); refuse method options
    the method does not declare; start the executor (``workers``, ``scheduler`` or ``cluster``; in process
    otherwise); build the agents (unless given); solve them at their free optima; choose the orders and
    coordinate (checkpointed after every round); verify against the centralized NLP (``verify``); write the
    outputs into ``out``. The executor this call starts is closed however it ends.

    Parameters
    ----------
    spec : FleetSpec, optional
        The parsed fleet (:func:`load_fleet`). May be None only with ``resume``: the fleet recorded in the
        checkpoint is used.
    agents : list of AgentModel, optional
        Built agents (built from ``spec`` when omitted, where ``time_limit`` applies to them in process).
    method : str, optional
        Overrides ``spec.coordinator.method``: a registered name, ``"package.module:Class"`` or
        ``"path/to/file.py:Class"`` (:func:`resolve_method`; this imports and runs user code).
    verify : bool
        Also solve the centralized NLP for the final orders and report the gap.
    executor : Executor or callable, optional
        Solves the agents (:mod:`negotiate.execution`; also the free optima); the caller keeps it
        open and closes it. When omitted, one is made from ``workers``, ``scheduler`` and ``cluster``
        (:func:`negotiate.execution.make.make_executor`), started before the agents are built and
        closed at the end.
    progress : callable, optional
        Called with each :class:`~negotiate.coordination.engine.RoundRecord`; its ``trial`` field says which
        order trial (0, 1, ...) the round belongs to, its ``round`` counts within that trial.
    checkpoint_dir : path, optional
        Folder to keep ``checkpoint.bin`` in, written after every round (:mod:`negotiate.output.checkpoint`);
        nothing else is written there. With ``out``, the run folder is the checkpoint's folder.
    resume : bool
        Continue from the checkpoint in ``out`` (or ``checkpoint_dir``): finished order trials are not
        redone, the trial in progress continues from its last complete round. Raises
        :class:`~negotiate.errors.CheckpointError` when there is none, or it is of another fleet or
        method, or damaged.
    build_time : float
        Seconds the caller spent before this call on the run (reading the fleet file, building ``agents``)
        (s), added to the run's wall time and its ``build`` phase.
    out : path, optional
        The run folder, as ``negotiate run --out DIR``: claimed for the duration of the call
        (:func:`claim_run_folder`: created, locked, an earlier run's files removed; with ``resume`` it must
        exist and is kept), the checkpoint kept there, and the outputs written there at the end
        (:func:`write_outputs`; their paths are the result's ``files``).
    workers : int, optional
        Solve the agents in this many local worker processes (with ``scheduler`` or ``cluster``: the number
        of local Dask workers, default 2).
    scheduler : str, optional
        Address of a Dask scheduler (``tcp://HOST:PORT``) whose workers solve the agents.
    cluster : {"local"}, optional
        Start a Dask cluster on this machine (loopback) for the run.
    time_limit : float, optional
        Seconds per agent solve (s, > 0): a solve that runs longer counts as failed for that agent
        (``time-limit``). In process it is IPOPT's own ``max_wall_time``, set when the agents are built
        here; remote executors pass it on and also bound the reply time.
    on_built : callable, optional
        Called once as ``on_built(spec, agents, settings)`` when the agents are built, before anything is
        solved; ``settings`` are the coordinator settings in force (``method`` resolved).
    stop_on_signal : bool
        Catch SIGINT and SIGTERM while the call runs (main thread only; the previous handlers are put back
        afterwards): the first is acted on after the round in progress, once its checkpoint is written,
        by raising :class:`KeyboardInterrupt`; a second terminates the worker processes this call started
        and ends the process at once with exit status 130. Without it a signal acts as Python's default does.

    Returns
    -------
    RunResult
        The schedule, the coordination, the order trials, the centralized reference (``verify``), the wall
        time and its phases; ``files`` lists the outputs written into ``out``.

    Raises
    ------
    FleetError
        When ``[coordinator.options]`` holds a key the method does not declare or a value of the wrong type,
        or ``[coordinator.order_options]`` one the order rule does not accept (:func:`check_method_options`),
        before anything is built or solved; or when an agent cannot be built.
    DeadlockError, InfeasibleOrdersError
        When the first order (first-come-first-served) admits no schedule; later candidates of an order
        search that admit none are recorded as infeasible trials and skipped.
    RunFolderError
        When ``out`` cannot be claimed (:func:`claim_run_folder`), or the outputs cannot be written into it
        (the finished run stays in its checkpoint: resume to write them).
    CheckpointError
        When the checkpoint to resume from cannot be used, or one cannot be written.
    ValueError
        For a ``method`` that cannot be imported, a ``time_limit`` that is not a positive number, arguments
        that contradict each other, or an executor address that is not one.
    ImportError
        When ``scheduler`` or ``cluster`` is given and Dask is not installed.
    """
    t0 = time.perf_counter() - float(build_time)
    if time_limit is not None and not (0 < time_limit < float("inf")):
        raise ValueError(f"'time_limit' must be a positive number of seconds, got {time_limit}")
    if executor is not None and (workers is not None or scheduler is not None or cluster is not None):
        raise ValueError("give either an executor or 'workers', 'scheduler' and 'cluster' to make one, not both")
    if out is None:
        return _run(t0, spec, agents, method, verify, executor, progress, checkpoint_dir, resume, workers,
                    scheduler, cluster, time_limit, on_built, stop_on_signal)  # fmt: skip
    if checkpoint_dir is not None and Path(checkpoint_dir).resolve() != Path(out).resolve():
        raise ValueError("'out' keeps the checkpoint in the run folder; leave out 'checkpoint_dir'")
    # The folder is claimed (created, locked, checked, an earlier run's files removed) before anything is
    # built, and released however the run ends.
    with claim_run_folder(out, resume=resume):
        run = _run(t0, spec, agents, method, verify, executor, progress, out, resume, workers, scheduler,
                   cluster, time_limit, on_built, stop_on_signal)  # fmt: skip
        try:
            files = write_outputs(run, out)
        except OSError as exc:
            raise RunFolderError(
                f"cannot write the outputs into {out} ({exc.strerror or exc}"
                + (f": {exc.filename}" if exc.filename else "")
                + f"); the finished run is kept in {Path(out) / CHECKPOINT_FILE}: fix the folder, then write them "
                f"with 'negotiate run --resume {out}'"
            ) from exc
    return replace(run, files=tuple(files))


def _run(
    t0: float,
    spec: FleetSpec | None,
    agents: list[AgentModel] | None,
    method: str | None,
    verify: bool,
    executor: Any,
    progress: Callable[[RoundRecord], None] | None,
    checkpoint_dir: str | Path | None,
    resume: bool,
    workers: int | None,
    scheduler: str | None,
    cluster: str | None,
    time_limit: float | None,
    on_built: Callable[[FleetSpec, list[AgentModel], CoordinatorSettings], None] | None,
    stop_on_signal: bool,
) -> RunResult:
    """:func:`run_fleet` once its run folder is claimed: everything but the claim and the outputs."""
    if resume and checkpoint_dir is None:
        raise ValueError("'resume' needs the run folder holding the checkpoint ('out' or 'checkpoint_dir')")
    # A user method is imported once, before a checkpoint that names it (and may hold its state) is read.
    resolved = resolve_method(method) if method is not None else None
    if spec is None:
        if not resume or checkpoint_dir is None:
            raise ValueError("give the fleet ('spec'), or resume a run from its checkpoint ('resume')")
        spec = RunBook.saved_spec(checkpoint_dir)
    settings = spec.coordinator if resolved is None else replace(spec.coordinator, method=resolved)
    book = None
    if checkpoint_dir is not None and resume:
        # A checkpoint of another fleet or method is refused before anything else is checked or built.
        book = RunBook(checkpoint_dir, spec, settings.method, resume=True)
    check_method_options(spec, settings.method)
    if checkpoint_dir is not None and book is None:
        book = RunBook(checkpoint_dir, spec, settings.method)  # a fleet it cannot save is refused here
    own = executor is None
    in_process = own and workers is None and scheduler is None and cluster is None
    if time_limit is not None and not own:
        warnings.warn("'time_limit' is ignored with an executor of your own: give it to that executor",
                      stacklevel=3)  # fmt: skip
    elif time_limit is not None and in_process and agents is not None:
        warnings.warn("'time_limit' in process applies to agents built here: build yours with "
                      "solver_options={'ipopt.max_wall_time': seconds}", stacklevel=3)  # fmt: skip

    # A signal is acted on after the current round, once its checkpoint is written: raising inside a solve
    # would end it as a failed solve (CasADi turns the interrupt into a solver status). A second signal
    # exits at once; the checkpoint on disk is the last complete round either way.
    stop: list[int] = []
    made: list[Executor] = []  # the executor this call made, for a second signal to terminate

    def interrupted(signum: int, frame: object) -> None:
        if stop:
            for ex in made:  # no worker process may outlive the run
                with contextlib.suppress(Exception):
                    ex.terminate()
            os._exit(130)
        stop.append(signum)
        # os.write, not print: the handler may run while a progress bar is writing to stderr.
        os.write(2, b"negotiate run: stopping after the round in progress; a second signal stops at once\n")

    previous = {s: signal.signal(s, interrupted) for s in (signal.SIGINT, signal.SIGTERM)} if stop_on_signal else {}
    try:
        if own:
            executor = make_executor(spec, workers=workers, scheduler=scheduler, cluster=cluster, time_limit=time_limit)
            made.append(executor)
            executor.start()  # remote workers build their agents while this process builds its own
        if agents is None:
            limit = {"ipopt.max_wall_time": time_limit} if time_limit is not None and in_process else None
            agents = build.build_agents(spec, solver_options=limit)
        phases = {"build": time.perf_counter() - t0}  # reading, claiming, starting the workers, building
        if on_built is not None:
            on_built(spec, agents, settings)
        t1 = time.perf_counter()
        free_results = executor(agents, [a.free_optimum for a in agents], [None] * len(agents))
        free = np.array([r.value for r in free_results])
        t2 = time.perf_counter()
        phases["free_optima"] = t2 - t1
        best, trials = _search(spec, agents, settings, executor, progress, book, stop if stop_on_signal else None)
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
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        for ex in made:
            ex.close()
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


def _search(
    spec: FleetSpec,
    agents: list[AgentModel],
    settings: CoordinatorSettings,
    executor: Any,
    progress: Callable[[RoundRecord], None] | None,
    book: RunBook | None,
    stop: list[int] | None,
) -> tuple[CoordinationResult, list[OrderTrial]]:
    """Choose the orders and coordinate each candidate (the order search), checkpointed through ``book``;
    ``stop`` non-empty (a signal came) ends the run with :class:`KeyboardInterrupt` after a round."""
    coordinated = 0  # order trials handed to the coordinator so far
    master = settings.order == "master"

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
        tell = None
        if progress is not None or stop is not None:

            def tell(rec: RoundRecord) -> None:
                if stop:
                    raise KeyboardInterrupt
                if progress is not None:
                    progress(replace(rec, trial=trial))

        hook = book.hook(k, orders) if book is not None else None
        r = coordinate(
            agents, spec.resources, settings, orders=orders, start=start, executor=executor, progress=tell,
            checkpoint=hook, resume=book.engine_state(k, orders) if book is not None else None,
        )  # fmt: skip
        total = r.total if r.evaluation.ok and r.status is not CoordinationStatus.UNREACHABLE else float("inf")
        if book is not None:
            book.finish(k, orders, total, r)
        return total, r.P, r

    if master:
        # The master's cuts come from each coordination's final evaluation, which a checkpoint keeps with the
        # finished trial: a resumed run then gives the master the same cuts as the uninterrupted one.
        best, _orders, trials = search_master(agents, spec.resources, one, options=settings.order_options)
    else:
        best, _orders, trials = search_orders(agents, spec.resources, settings.order, one,
                                              options=settings.order_options)  # fmt: skip
    assert isinstance(best, CoordinationResult)
    return best, list(trials)


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
