"""Checkpoints: a run writes its state into its run folder after every round and can resume from it.

``run_fleet(spec, checkpoint_dir=DIR)`` (and ``negotiate run --out DIR``) keeps the file ``DIR/checkpoint.bin``
up to date: after the start and after every coordination round it holds the fleet, the method's name, the
order trials finished so far (their orders, totals and schedules; the full result of the best one) and, for
the trial in progress, the engine's :class:`~negotiate.coordinate.EngineState` -- the current point, the
method object with its bundles and metric, the round count, the history and every agent's warm-start data
(``x``, ``lam_g``, ``lam_x`` and the certificate of its last converged solve). The file is written to a
temporary file in the same folder and then renamed over the old one (:func:`os.replace`, atomic on POSIX
and Windows), so an interruption at any moment leaves the last complete round on disk.

``run_fleet(spec, checkpoint_dir=DIR, resume=True)`` (``negotiate run --resume DIR``) reads it back, skips
the finished order trials, continues the trial in progress from its last complete round and ends at the
same schedule as the uninterrupted run: the solves are deterministic, and the method and warm starts are
restored exactly.

File format (version 1): the line ``negotiate-checkpoint``, one line of JSON (``version``, ``fleet``,
``digest``, ``payload_bytes``, ``payload_sha256``, ``trial``, ``round``), then the payload, a pickle. The
header is checked before anything is unpickled: the magic line, the version, the digest of the fleet and
method (a checkpoint of another fleet is refused) and the payload's length and SHA-256 (a truncated or
altered file is refused). Pickle runs code when it loads, so **a checkpoint is a trusted local file**: the
checks guard against accidents (a foreign or damaged file), not against a hostile one; never resume from a
checkpoint you did not write yourself.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from negotiate.agent import AgentModel
from negotiate.coordinate import CoordinationResult, EngineState, Evaluation
from negotiate.spec import FleetSpec

__all__ = [
    "FILENAME",
    "FORMAT_VERSION",
    "CheckpointError",
    "RunBook",
    "RunState",
    "TrialRecord",
    "fleet_digest",
    "read_checkpoint",
    "write_checkpoint",
]

MAGIC = b"negotiate-checkpoint\n"
FORMAT_VERSION = 1
FILENAME = "checkpoint.bin"


class CheckpointError(ValueError):
    """A checkpoint that cannot be used: missing, of another fleet or method, another version, or damaged.

    The message names the file and says what was expected and what was found.
    """


def fleet_digest(spec: FleetSpec, method: str) -> str:
    """SHA-256 of the fleet's content (its records and settings, not where it was read from) and the method."""
    text = repr(replace(spec, source="")) + "\nmethod=" + method
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass
class TrialRecord:
    """One finished order trial: its orders, total and schedule, and its full result while it is the best."""

    orders: dict[str, list[str]]
    total: float
    P: np.ndarray
    result: CoordinationResult | None


@dataclass
class RunState:
    """What a checkpoint holds (see the module docstring)."""

    spec: FleetSpec
    method: str
    trials: list[TrialRecord] = field(default_factory=list)
    current: tuple[int, dict[str, list[str]], EngineState] | None = None

    @property
    def round(self) -> int:
        """Rounds finished in the trial in progress (0 when none is in progress)."""
        return self.current[2].rounds if self.current is not None else 0


def write_checkpoint(folder: str | Path, state: RunState) -> Path:
    """Write ``state`` atomically into ``folder/checkpoint.bin`` (temporary file, then :func:`os.replace`)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    try:
        payload = pickle.dumps(state, protocol=pickle.HIGHEST_PROTOCOL)
    except (pickle.PicklingError, TypeError, AttributeError) as exc:
        raise CheckpointError(
            f"{folder / FILENAME}: cannot save the run's state ({exc}); a user method must be picklable "
            "to be checkpointed"
        ) from exc
    header = {
        "version": FORMAT_VERSION,
        "fleet": state.spec.name,
        "digest": fleet_digest(state.spec, state.method),
        "payload_bytes": len(payload),
        "payload_sha256": hashlib.sha256(payload).hexdigest(),
        "trial": len(state.trials),
        "round": state.round,
    }
    path = folder / FILENAME
    tmp = folder / f".{FILENAME}.{os.getpid()}.tmp"
    with open(tmp, "wb") as fh:
        fh.write(MAGIC)
        fh.write(json.dumps(header, sort_keys=True).encode("utf-8") + b"\n")
        fh.write(payload)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    return path


def read_checkpoint(folder: str | Path, digest: str | None = None) -> RunState:
    """Read and check ``folder/checkpoint.bin``; with ``digest``, refuse a checkpoint of another fleet/method.

    Raises
    ------
    CheckpointError
        The file is missing, is not a checkpoint, has another format version, belongs to another fleet or
        method, or is truncated or damaged.
    """
    path = Path(folder) / FILENAME
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise CheckpointError(
            f"{path}: no checkpoint to resume from (expected the file that 'negotiate run --out {folder}' writes)"
        ) from None
    except OSError as exc:
        raise CheckpointError(f"{path}: cannot read the checkpoint: {exc.strerror or exc}") from None
    if not data.startswith(MAGIC):
        raise CheckpointError(f"{path}: expected a negotiate checkpoint, found a file that does not start with one")
    end = data.find(b"\n", len(MAGIC))
    try:
        if end < 0:
            raise ValueError("no header line")
        header = json.loads(data[len(MAGIC) : end].decode("utf-8"))
        if not isinstance(header, dict):
            raise ValueError("header is not a JSON object")
    except (ValueError, UnicodeDecodeError) as exc:
        raise CheckpointError(
            f"{path}: expected a checkpoint header line (JSON), found a damaged one ({exc})"
        ) from None
    if header.get("version") != FORMAT_VERSION:
        raise CheckpointError(
            f"{path}: expected checkpoint format version {FORMAT_VERSION}, found version {header.get('version')!r}"
        )
    if digest is not None and header.get("digest") != digest:
        raise CheckpointError(
            f"{path}: expected a checkpoint of this fleet and method, found one of another "
            f"(fleet {header.get('fleet')!r}, or a changed file or method); start afresh without --resume"
        )
    payload = data[end + 1 :]
    if len(payload) != header.get("payload_bytes") or hashlib.sha256(payload).hexdigest() != header.get(
        "payload_sha256"
    ):
        raise CheckpointError(
            f"{path}: expected {header.get('payload_bytes')} bytes of state with the recorded checksum, "
            f"found {len(payload)} bytes that do not match (a truncated or damaged checkpoint)"
        )
    try:
        state = pickle.loads(payload)  # trusted local file, header checked (see the module docstring)
    except Exception as exc:  # noqa: BLE001 - anything unpickling raises means the file is unusable
        raise CheckpointError(f"{path}: the checkpoint's state cannot be read ({type(exc).__name__}: {exc})") from None
    if not isinstance(state, RunState) or header.get("digest") != fleet_digest(state.spec, state.method):
        raise CheckpointError(f"{path}: expected the state of a run, found something else")
    return state


def _attach_evaluation(ev: Evaluation, agents: Sequence[AgentModel]) -> Evaluation:
    reports = tuple(
        replace(r, result=replace(r.result, _problem=a.problem)) for r, a in zip(ev.reports, agents, strict=True)
    )
    return replace(ev, reports=reports)


class RunBook:
    """Keeps a run's checkpoint: which order trials are done, and the state of the one in progress.

    ``run_fleet`` asks it, for each trial in turn, for a finished result (:meth:`finished`) or a state to
    resume (:meth:`engine_state`), hands :meth:`hook` to the coordinator, and reports each finished trial
    (:meth:`finish`).
    """

    def __init__(self, folder: str | Path, spec: FleetSpec, method: str, *, resume: bool = False) -> None:
        self.folder = Path(folder)
        self.digest = fleet_digest(spec, method)
        self.saved: RunState | None = read_checkpoint(self.folder, self.digest) if resume else None
        self.state = RunState(spec, method)
        self._best = float("inf")
        self._next = 0
        self.unsaved: str | None = None
        """Why rounds are not being saved (None while they are)."""

    @classmethod
    def saved_spec(cls, folder: str | Path) -> FleetSpec:
        """The fleet recorded in a checkpoint (to resume without the fleet file)."""
        return read_checkpoint(folder).spec

    def next_trial(self) -> int:
        k = self._next
        self._next += 1
        return k

    def finished(
        self, k: int, orders: dict[str, list[str]], agents: Sequence[AgentModel]
    ) -> tuple[float, np.ndarray, CoordinationResult | None] | None:
        """The recorded outcome of trial ``k`` if the checkpoint has it finished (with these orders)."""
        if self.saved is None or k >= len(self.saved.trials) or self.saved.trials[k].orders != orders:
            return None
        rec = self.saved.trials[k]
        result = rec.result
        if result is not None:
            result = replace(result, evaluation=_attach_evaluation(result.evaluation, agents))
        self._keep(TrialRecord(rec.orders, rec.total, rec.P, result))
        return rec.total, rec.P, result

    def engine_state(self, k: int, orders: dict[str, list[str]]) -> EngineState | None:
        """The saved state of trial ``k`` if the checkpoint stopped during it (with these orders)."""
        if self.saved is None or self.saved.current is None:
            return None
        index, saved_orders, state = self.saved.current
        return state if index == k and saved_orders == orders else None

    def hook(self, k: int, orders: dict[str, list[str]]) -> Callable[[EngineState], None]:
        """The coordinator's ``checkpoint`` callback for trial ``k``."""

        def save(state: EngineState) -> None:
            if self.unsaved is not None:
                return
            self.state.current = (k, {r: list(v) for r, v in orders.items()}, state)
            try:
                write_checkpoint(self.folder, self.state)
            except CheckpointError as exc:
                # A method object that does not pickle (e.g. a class loaded from a file path) cannot be
                # saved mid-trial: the checkpoint then holds the finished trials only.
                self.unsaved = str(exc)
                self.state.current = None
                write_checkpoint(self.folder, self.state)

        return save

    def finish(self, k: int, orders: dict[str, list[str]], total: float, result: CoordinationResult) -> None:
        """Record trial ``k`` as finished and write the checkpoint."""
        self.state.current = None
        self._keep(TrialRecord({r: list(v) for r, v in orders.items()}, total, np.asarray(result.P), result))
        write_checkpoint(self.folder, self.state)

    def _keep(self, rec: TrialRecord) -> None:
        # Only the best trial's full result can be the run's answer (the order search keeps a trial only
        # when it lowers the total by this margin, see negotiate.orders); the others keep their numbers.
        first = not self.state.trials
        if first or rec.total < self._best - 1e-9 * max(1.0, abs(self._best)):
            for old in self.state.trials:
                old.result = None
            self._best = rec.total
        else:
            rec = replace(rec, result=None)
        self.state.trials.append(rec)


def describe(state: RunState) -> dict[str, Any]:
    """A short summary of a checkpoint's content (fleet, method, trials finished, rounds of the current)."""
    return {"fleet": state.spec.name, "method": state.method, "trials": len(state.trials), "round": state.round}
