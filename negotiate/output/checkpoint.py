"""Checkpoints: a run writes its state into its run folder after every round and can resume from it.

``run_fleet(spec, out=DIR)`` or ``run_fleet(spec, checkpoint_dir=DIR)`` (and ``negotiate run --out DIR``)
keeps the file ``DIR/checkpoint.bin`` up to date: after the start and after every coordination round it holds
the fleet, the method's name, the order trials finished so far (their orders, totals and schedules; the full
result of the best one) and, for the trial in progress, the engine's
:class:`~negotiate.coordination.engine.EngineState` -- the current point, the method's state (its bundles,
metric, step sizes), the round count, the history and every agent's warm-start data (``x``, ``lam_g``,
``lam_x`` and the certificate of its last converged solve). The file is written to a new temporary file in the
same folder, flushed to the disk and renamed over the old one (:func:`os.replace`, atomic on POSIX and
Windows), so an interruption at any moment leaves the last complete round on disk.

``run_fleet(spec, out=DIR, resume=True)`` (``negotiate run --resume DIR``) reads it back, skips
the finished order trials, continues the trial in progress from its last complete round and ends at the
same schedule as the uninterrupted run: the solves are deterministic, and the method and warm starts are
restored exactly.

File format (version 2)
-----------------------
The line ``negotiate-checkpoint``, one line of JSON (``version``, ``fleet``, ``digest``, ``payload_bytes``,
``payload_sha256``, ``state_bytes``, ``trial``, ``round``), then the payload: ``state_bytes`` bytes of JSON
holding the state's structure, followed by an ``.npz`` archive (:func:`numpy.savez`) holding its arrays,
one flat array per dtype. The file is data only, and reading it never runs code: the JSON is decoded into a
closed list of record types named in :data:`RECORDS` (each rebuilt from its fields by name), numbers keep
their exact value and type (floats are written in their shortest round-trip form), and the archive is read
with ``numpy.load(..., allow_pickle=False)``, which refuses object arrays. Before anything is decoded the
magic line, the version, the digest of the fleet and method (a checkpoint of another fleet is refused) and
the payload's length and SHA-256 (a truncated or altered file is refused) are checked.

How each value is written (the ``$`` keys mark the tagged JSON objects; everything else is plain JSON):

==========================  ==============================================================================
``None``, bool, int, float  as JSON (``NaN``, ``Infinity`` as Python's :mod:`json` writes them)
str, list                   as JSON
tuple                       ``{"$t": [items]}``
dict                        ``{"$d": [[key, value], ...]}`` (keys may be any value below)
NumPy scalar                ``{"$n": [dtype, value]}`` (bool, integer and float dtypes only)
NumPy array                 ``{"$a": [dtype, offset, shape, order]}``: a slice of the archive's flat array
                            of that dtype (bool, integer and float dtypes only), C or Fortran order
:class:`~negotiate.core.status.Status`  ``{"$s": "converged"}``
CoordinationStatus          ``{"$k": "max-rounds"}`` (:class:`~negotiate.core.status.CoordinationStatus`)
record (:data:`RECORDS`)    ``{"$c": name, "f": {field: value}}``
coordination method         ``{"$m": registered name, "feasible": ..., "settings": ..., "state": {attribute:
                            value}}``: the registered class is built from the feasible set and settings and
                            given back its attributes
==========================  ==============================================================================

A record, array or method met a second time is written ``{"$r": k}``, a reference to the first, which
carries ``"$id": k``: shared objects (the feasible set, an evaluation that is both the latest and the
incumbent) are written once and shared again when read. A method is saved through its attributes; a user
method whose attributes hold something else (an open file, a lock, a function) is checkpointed between
order trials only.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np

from agents.families import family_records
from negotiate.coordination.engine import CoordinationResult, EngineState, RoundRecord
from negotiate.coordination.methods import AgentReport, Evaluation, Method
from negotiate.core.agent import AgentModel
from negotiate.core.files import write_atomic
from negotiate.core.guard import GuardReport
from negotiate.core.kkt import Certificate, ConstraintRef
from negotiate.core.nlp import LocalResult
from negotiate.core.status import CoordinationStatus, Status
from negotiate.errors import CheckpointError
from negotiate.fleet.spec import AgentSpec, CoordinatorSettings, FleetSpec
from negotiate.resources import KINDS
from negotiate.resources.coupling import FeasibleSet, Layout

__all__ = [
    "FILENAME",
    "FORMAT_VERSION",
    "RECORDS",
    "RunBook",
    "RunState",
    "TrialRecord",
    "fleet_digest",
    "read_checkpoint",
    "write_checkpoint",
]

MAGIC = b"negotiate-checkpoint\n"
FORMAT_VERSION = 2
FILENAME = "checkpoint.bin"


class _Unsavable(CheckpointError):
    """The run's state holds a value that has no data form (raised while writing, never while reading)."""


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


RECORDS: dict[str, type] = {
    cls.__name__: cls
    for cls in (
        RunState, TrialRecord, FleetSpec, *KINDS.values(), CoordinatorSettings, AgentSpec,
        Layout, FeasibleSet, EngineState, CoordinationResult, RoundRecord, Evaluation, AgentReport, LocalResult,
        Certificate, ConstraintRef, GuardReport,
    )
}  # fmt: skip
"""The record types a checkpoint may hold, by name, besides the records of resource kinds and the parameter
records of model families registered later (:func:`_record_type`): nothing else is ever built when one is
read."""


def _record_type(name: str) -> type | None:
    """The record type called ``name`` that a checkpoint may hold (None if there is none): one of
    :data:`RECORDS`, of a registered resource kind, or a registered family's parameter record
    (:func:`agents.families.family_records`)."""
    cls = RECORDS.get(name) or next((k for k in KINDS.values() if k.__name__ == name), None)
    if cls is None:
        cls = next((c for c in family_records() if c.__name__ == name), None)
    return cls

_SKIPPED_FIELDS = frozenset({"_problem"})
"""Fields not saved: a result's CasADi problem is re-attached from the agents built on resume."""
_METHOD_FIELDS = ("feasible", "settings")
"""A method's attributes that its constructor takes; the others are its state."""
_DTYPE_KINDS = "biuf"
_DTYPE_NAME = re.compile(r"[<>|=]?[biuf][1248]")


# ---------------------------------------------------------------------------------------------------------
# the state as data


class _Encoder:
    """Turns a state into a JSON tree and flat arrays (one per dtype); see the module docstring."""

    def __init__(self) -> None:
        self.memo: dict[int, tuple[int, Any]] = {}
        self.chunks: dict[str, list[np.ndarray]] = {}
        self.sizes: dict[str, int] = {}

    def arrays(self) -> dict[str, np.ndarray]:
        return {dt: np.concatenate(parts) if parts else np.zeros(0, dt) for dt, parts in self.chunks.items()}

    def _shared(self, obj: Any) -> tuple[dict[str, Any] | None, int]:
        """A reference node if ``obj`` was written before, else None and the id to give it."""
        seen = self.memo.get(id(obj))
        if seen is not None:
            return {"$r": seen[0]}, seen[0]
        k = len(self.memo)
        self.memo[id(obj)] = (k, obj)  # keeps obj alive, so its id is not reused while encoding
        return None, k

    def encode(self, v: Any, where: str) -> Any:
        t = type(v)
        if v is None or t is bool or t is int or t is str:
            return v
        if t is float:
            return v
        if isinstance(v, Status):
            return {"$s": v.value}
        if isinstance(v, CoordinationStatus):
            return {"$k": v.value}
        if isinstance(v, np.generic) and v.dtype.kind in _DTYPE_KINDS:
            return {"$n": [v.dtype.str, v.item()]}
        if t is list:
            return [self.encode(x, f"{where}[{i}]") for i, x in enumerate(v)]
        if t is tuple:
            return {"$t": [self.encode(x, f"{where}[{i}]") for i, x in enumerate(v)]}
        if t is dict:
            return {"$d": [[self.encode(k, where), self.encode(x, f"{where}[{k!r}]")] for k, x in v.items()]}
        if t is np.ndarray:
            return self._array(v, where)
        if dataclasses.is_dataclass(v) and _record_type(t.__name__) is t:
            ref, k = self._shared(v)
            if ref is not None:
                return ref
            fields = {
                f.name: self.encode(getattr(v, f.name), f"{where}.{f.name}")
                for f in dataclasses.fields(v)
                if f.name not in _SKIPPED_FIELDS
            }
            return {"$c": t.__name__, "$id": k, "f": fields}
        if isinstance(v, Method):
            ref, k = self._shared(v)
            if ref is not None:
                return ref
            state = {a: x for a, x in vars(v).items() if a not in _METHOD_FIELDS}
            return {
                "$m": type(v).name, "$id": k,
                "feasible": self.encode(v.feasible, f"{where}.feasible"),
                "settings": self.encode(v.settings, f"{where}.settings"),
                "state": {a: self.encode(x, f"{where}.{a}") for a, x in state.items()},
            }  # fmt: skip
        raise _Unsavable(f"{where} is a {t.__module__}.{t.__qualname__}, which a checkpoint cannot hold")

    def _array(self, a: np.ndarray, where: str) -> dict[str, Any]:
        ref, k = self._shared(a)
        if ref is not None:
            return ref
        if a.dtype.kind not in _DTYPE_KINDS:
            raise _Unsavable(f"{where} is an array of {a.dtype}, which a checkpoint cannot hold")
        order: Literal["F", "C"] = "F" if a.flags.f_contiguous and not a.flags.c_contiguous else "C"
        dt = a.dtype.str
        offset = self.sizes.get(dt, 0)
        self.chunks.setdefault(dt, []).append(a.ravel(order=order))
        self.sizes[dt] = offset + a.size
        return {"$a": [dt, offset, list(a.shape), order], "$id": k}


class _Decoder:
    """Rebuilds a state from the JSON tree and the flat arrays; raises ValueError, TypeError or KeyError on
    anything that is not what :class:`_Encoder` writes (the caller names the file)."""

    def __init__(self, flat: dict[str, np.ndarray]) -> None:
        self.flat = flat
        self.objects: dict[int, Any] = {}

    def _keep(self, node: dict[str, Any], obj: Any) -> Any:
        k = node.get("$id")
        if type(k) is not int or k in self.objects:
            raise ValueError(f"bad or repeated object id {k!r}")
        self.objects[k] = obj
        return obj

    def decode(self, node: Any) -> Any:
        t = type(node)
        if node is None or t in (bool, int, float, str):
            return node
        if t is list:
            return [self.decode(x) for x in node]
        if t is not dict:
            raise TypeError(f"unexpected JSON value {node!r}")
        if "$t" in node:
            return tuple(self.decode(x) for x in _listed(node["$t"]))
        if "$d" in node:
            return {self.decode(_pair(p)[0]): self.decode(_pair(p)[1]) for p in _listed(node["$d"])}
        if "$r" in node:
            k = node["$r"]
            if type(k) is not int or k not in self.objects:
                raise ValueError(f"reference to an unknown object {k!r}")
            return self.objects[k]
        if "$s" in node:
            return Status(node["$s"])
        if "$k" in node:
            return CoordinationStatus(node["$k"])
        if "$n" in node:
            dt, value = _pair(node["$n"])
            dtype = _dtype(dt)
            if type(value) not in (bool, int, float):
                raise TypeError(f"a number of dtype {dt}, found {value!r}")
            return dtype.type(value)
        if "$a" in node:
            return self._keep(node, self._array(node["$a"]))
        if "$c" in node:
            cls = _record_type(node["$c"]) if type(node["$c"]) is str else None
            if cls is None:
                names = [*RECORDS, *(c.__name__ for c in family_records())]
                raise ValueError(f"unknown record type {node['$c']!r} (expected one of {', '.join(names)})")
            fields = node["f"]
            if type(fields) is not dict:
                raise TypeError(f"fields of {node['$c']} are not a JSON object")
            known = {f.name for f in dataclasses.fields(cls) if f.init and f.name not in _SKIPPED_FIELDS}
            extra = set(fields) - known
            if extra:
                raise ValueError(f"{node['$c']} has no field(s) {', '.join(sorted(extra))}")
            return self._keep(node, cls(**{name: self.decode(x) for name, x in fields.items()}))
        if "$m" in node:
            return self._keep(node, self._method(node))
        raise ValueError(f"unexpected JSON object with keys {sorted(node)}")

    def _array(self, spec: Any) -> np.ndarray:
        if type(spec) is not list or len(spec) != 4:
            raise TypeError(f"an array reference [dtype, offset, shape, order], found {spec!r}")
        dt, offset, shape, order = spec
        dtype = _dtype(dt)
        flat = self.flat.get(dtype.str)
        if flat is None:
            raise ValueError(f"no array data of dtype {dt}")
        if type(shape) is not list or any(type(n) is not int or n < 0 for n in shape) or order not in ("C", "F"):
            raise ValueError(f"bad array shape {shape!r} or order {order!r}")
        size = math.prod(shape)
        if type(offset) is not int or offset < 0 or offset + size > flat.size:
            raise ValueError(f"array of {size} values at offset {offset!r} lies outside the {flat.size} stored")
        return flat[offset : offset + size].reshape(shape, order=order).copy(order="K")

    def _method(self, node: dict[str, Any]) -> Method:
        from negotiate.coordination.methods import method_class, method_names

        name = node["$m"]
        cls = method_class(name) if type(name) is str and name in method_names() else None
        if cls is None:
            raise ValueError(
                f"the trial in progress uses the coordination method {name!r}, which is not loaded "
                "(give a user method again with --method)"
            )
        feasible, settings = self.decode(node["feasible"]), self.decode(node["settings"])
        state = node["state"]
        if not (isinstance(feasible, FeasibleSet) and isinstance(settings, CoordinatorSettings)):
            raise TypeError("a method needs its feasible set and settings")
        if type(state) is not dict or not all(type(a) is str and a.isidentifier() for a in state):
            raise TypeError("a method's state must map attribute names to values")
        method = cls(feasible, settings)
        vars(method).update({a: self.decode(x) for a, x in state.items()})
        return method


def _listed(v: Any) -> list[Any]:
    if type(v) is not list:
        raise TypeError(f"a JSON list, found {v!r}")
    return v


def _pair(v: Any) -> list[Any]:
    if type(v) is not list or len(v) != 2:
        raise TypeError(f"a pair, found {v!r}")
    return v


def _dtype(dt: Any) -> np.dtype:
    if type(dt) is not str or not _DTYPE_NAME.fullmatch(dt):
        raise ValueError(f"expected the name of a bool, integer or float dtype, found {dt!r}")
    return np.dtype(dt)


def _encode(state: RunState) -> tuple[bytes, bytes]:
    """The state's JSON and the ``.npz`` archive of its arrays (see the module docstring)."""
    enc = _Encoder()
    tree = enc.encode(state, "the run's state")
    flat = enc.arrays()
    names = sorted(flat)
    text = json.dumps({"tree": tree, "arrays": names}, separators=(",", ":"), allow_nan=True)
    buf = io.BytesIO()
    members: dict[str, Any] = {f"a{i}": flat[dt] for i, dt in enumerate(names)}  # np.savez's keywords: arrays
    np.savez(buf, **members)
    return text.encode("utf-8"), buf.getvalue()


def _decode(state_json: bytes, archive: bytes) -> Any:
    """The object the payload describes; ValueError (and friends) when it is not one :func:`_encode` wrote."""
    doc = json.loads(state_json.decode("utf-8"))
    if type(doc) is not dict or type(doc.get("arrays")) is not list or "tree" not in doc:
        raise ValueError("the state is not a JSON object with 'tree' and 'arrays'")
    flat: dict[str, np.ndarray] = {}
    with np.load(io.BytesIO(archive), allow_pickle=False) as npz:  # object arrays are refused, never unpickled
        for i, dt in enumerate(doc["arrays"]):
            a = npz[f"a{i}"]
            dtype = _dtype(dt)
            if a.dtype != dtype or a.ndim != 1:
                raise ValueError(f"array a{i}: expected a flat array of {dtype}, found {a.dtype} of shape {a.shape}")
            flat[dtype.str] = a
    return _Decoder(flat).decode(doc["tree"])


def write_checkpoint(folder: str | Path, state: RunState) -> Path:
    """Write ``state`` atomically into ``folder/checkpoint.bin`` (new temporary file, fsync, :func:`os.replace`).

    Raises
    ------
    CheckpointError
        The state holds a value a checkpoint cannot hold (a user method's attribute: see the module
        docstring), or the file cannot be written (the message names it and the system's reason).
    """
    folder = Path(folder)
    path = folder / FILENAME
    state_json, archive = _encode(state)
    payload = state_json + archive
    header = {
        "version": FORMAT_VERSION,
        "fleet": state.spec.name,
        "digest": fleet_digest(state.spec, state.method),
        "payload_bytes": len(payload),
        "payload_sha256": hashlib.sha256(payload).hexdigest(),
        "state_bytes": len(state_json),
        "trial": len(state.trials),
        "round": state.round,
    }
    data = MAGIC + json.dumps(header, sort_keys=True).encode("utf-8") + b"\n" + payload
    try:
        folder.mkdir(parents=True, exist_ok=True)
        write_atomic(path, data, durable=True)
    except OSError as exc:
        raise CheckpointError(
            f"{path}: cannot write the checkpoint ({exc.strerror or exc}); make room or fix the folder's "
            f"permissions, then continue from the last one written: negotiate run --resume {folder}"
        ) from None
    return path


def read_checkpoint(folder: str | Path, digest: str | None = None) -> RunState:
    """Read and check ``folder/checkpoint.bin``; with ``digest``, refuse a checkpoint of another fleet/method.

    Reading never runs code (see the module docstring).

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
            f"{path}: no checkpoint to resume from (expected the file that 'negotiate run FLEET --out {folder}' "
            "writes); start the run with that command"
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
        old = " (a pickle, which is never loaded: loading one can run code)" if header.get("version") == 1 else ""
        raise CheckpointError(
            f"{path}: expected checkpoint format version {FORMAT_VERSION}, found version {header.get('version')!r}"
            f"{old}; start the run afresh: delete the file, or run into another folder"
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
    split = header.get("state_bytes")
    try:
        if type(split) is not int or not 0 <= split <= len(payload):
            raise ValueError(f"state_bytes {split!r} does not fit the payload")
        state = _decode(payload[:split], payload[split:])
    except Exception as exc:  # noqa: BLE001 - whatever the decoding meets, the file is unusable
        raise CheckpointError(
            f"{path}: the checkpoint's state cannot be read ({type(exc).__name__}: {exc}); "
            "start the run afresh: delete the file, or run into another folder"
        ) from None
    if not _is_run_state(state) or header.get("digest") != fleet_digest(state.spec, state.method):
        raise CheckpointError(
            f"{path}: expected the state of a run, found something else; start the run afresh: delete the file, "
            "or run into another folder"
        )
    return state


def _is_run_state(state: Any) -> bool:
    """Whether a decoded state has the shape a run's state has (its records are checked as they are built)."""
    if not (isinstance(state, RunState) and isinstance(state.spec, FleetSpec) and type(state.method) is str):
        return False
    if type(state.trials) is not list or not all(
        isinstance(t, TrialRecord) and isinstance(t.P, np.ndarray) and isinstance(t.orders, dict)
        and (t.result is None or isinstance(t.result, CoordinationResult))
        for t in state.trials
    ):  # fmt: skip
        return False
    cur = state.current
    return cur is None or (
        type(cur) is tuple and len(cur) == 3 and type(cur[0]) is int and isinstance(cur[1], dict)
        and isinstance(cur[2], EngineState) and isinstance(cur[2].method, Method)
        and isinstance(cur[2].latest, Evaluation)
    )  # fmt: skip


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
        try:
            _encode(self.state)  # a fleet that cannot be saved is refused before anything is built
        except _Unsavable as exc:
            raise CheckpointError(
                f"{self.folder / FILENAME}: cannot save this fleet in a checkpoint: {exc} (give a user "
                "model's parameters as a table of numbers, strings and lists)"
            ) from None
        self._best = float("inf")
        self._next = 0
        # The order master takes its cuts from every finished coordination's final evaluation, so a master run
        # keeps each trial's result (without its round history); other rules need the best trial's only.
        self._keep_all = spec.coordinator.order == "master"
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
            except _Unsavable as exc:
                # A user method whose attributes hold something with no data form (an open file, a
                # function) cannot be saved mid-trial: the checkpoint then holds the finished trials only.
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
        # when it lowers the total by this margin, see negotiate.coordination.orders); the others keep their numbers.
        first = not self.state.trials
        if first or rec.total < self._best - 1e-9 * max(1.0, abs(self._best)):
            for old in self.state.trials:
                old.result = self._former(old.result)
            self._best = rec.total
        else:
            rec = replace(rec, result=self._former(rec.result))
        self.state.trials.append(rec)

    def _former(self, result: CoordinationResult | None) -> CoordinationResult | None:
        """What is kept of a trial that is not the best: nothing, or for the order master its result without
        the round history (its final evaluation gives the master its cuts when the run is resumed)."""
        return replace(result, history=()) if self._keep_all and result is not None else None


def describe(state: RunState) -> dict[str, Any]:
    """A short summary of a checkpoint's content (fleet, method, trials finished, rounds of the current)."""
    return {"fleet": state.spec.name, "method": state.method, "trials": len(state.trials), "round": state.round}
