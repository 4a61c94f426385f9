"""Every exception the package raises for a user mistake or a refusal, and the record of a single mistake.

* :class:`FleetError` -- a fleet file (or dictionary) with mistakes in it, each a :class:`Problem`;
* :class:`FieldError` -- a record (model parameters, a resource) that refused one of its fields;
* :class:`DeadlockError`, :class:`InfeasibleOrdersError` -- orders on exclusive resources that no schedule
  can meet (a cycle of precedences; an empty coupling polyhedron);
* :class:`RunFolderError` -- a run folder that cannot be used, or a file in it that cannot be read;
* :class:`CheckpointError` -- a checkpoint that cannot be used (missing, of another fleet, damaged).

Each subclasses :class:`ValueError`, so callers may catch either; each is importable from ``negotiate``.

A fleet file can hold many mistakes at once; the parser collects all of them before it gives up, so that
one run shows everything to fix. :class:`FleetError` carries them as :class:`Problem` records (file, table
path, key, what was expected, what was found); its text lists them one per line::

    fleet.toml: [agents.truck-03] key 'mass': expected a number within (0, 1e7] (kg), found -5

``FleetError`` subclasses :class:`ValueError`, so callers may catch either. Numerical failures of a solve
are not exceptions (they are a status in a result); only a fleet that cannot even be built -- an agent whose
reachable window is empty, a builder that fails -- is reported as a ``FleetError`` naming the agent.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = [
    "CheckpointError",
    "DeadlockError",
    "FieldError",
    "FleetError",
    "InfeasibleOrdersError",
    "Problem",
    "RunFolderError",
    "check_field",
    "describe",
    "table_path",
]

_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")
_PRINTABLE = re.compile(r"^[^\x00-\x1f\x7f\x85\u2028\u2029'\\]*$")
_LINE_BREAKS = re.compile(r"\s*[\n\r\x0b\x0c\x1c-\x1e\x85\u2028\u2029]+\s*")


def _quote(text: str) -> str:
    """``text`` as a TOML basic string: quoted, with backslashes, quotes and control characters escaped."""
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F or ch in "\x85\u2028\u2029":
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


@dataclass(frozen=True)
class Problem:
    """One mistake in a fleet file.

    Attributes
    ----------
    file : str
        Where the fleet was read from (a path, or the ``source`` given to the parser).
    table : str
        Dotted path of the table holding the mistake, e.g. ``"agents.truck-03.zones[1]"`` (array entries
        counted from 0); empty for the top level of the file.
    key : str or None
        The key in that table, or None when the mistake concerns the table as a whole (a missing table, an
        agent that cannot be built).
    expected : str
        What was expected, with its unit where it has one (``"a number > 0 (kg)"``).
    found : str
        What was found (the value as written in TOML, ``"nothing"`` for a missing key).
    """

    file: str
    table: str
    key: str | None
    expected: str
    found: str

    def __str__(self) -> str:
        where = self.file
        if self.table or self.key is not None:
            where += ":"
        if self.table:
            where += f" [{self.table}]"
        if self.key is not None:
            key = self.key if _PRINTABLE.match(self.key) else _quote(self.key)
            where += f" key '{key}'"
        # One line per problem, whatever the texts hold (a builder's exception may span several lines).
        expected = _LINE_BREAKS.sub(" ", self.expected)
        found = _LINE_BREAKS.sub(" ", self.found)
        return f"{where}: expected {expected}, found {found}"


class FleetError(ValueError):
    """A fleet file (or fleet dictionary) with mistakes in it; ``problems`` lists every one of them.

    ``str(error)`` is one line per problem, in the order they were found.
    """

    def __init__(self, problems: Iterable[Problem]) -> None:
        self.problems: tuple[Problem, ...] = tuple(problems)
        if not self.problems:
            raise ValueError("FleetError needs at least one problem")
        super().__init__("\n".join(str(p) for p in self.problems))

    def __str__(self) -> str:
        return "\n".join(str(p) for p in self.problems)

    def __reduce__(self) -> tuple[Any, ...]:
        # Picklable (worker processes may raise it), although __init__ does not take the message.
        return (type(self), (self.problems,))


class FieldError(ValueError):
    """A record refused one of its fields: who owns it, the key, what was expected and what was found.

    Raised by the plain records (model parameters, resources) when they are made; the fleet parser turns it
    into a :class:`Problem` from its attributes. ``str(error)`` reads ``"<owner>: '<key>' must be
    <expected>, got <found>"``.
    """

    def __init__(self, owner: str, key: str, expected: str, found: str) -> None:
        self.owner, self.key, self.expected, self.found = owner, key, expected, found
        super().__init__(f"{owner}: '{key}' must be {expected}, got {found}")

    def __reduce__(self) -> tuple[Any, ...]:
        return (type(self), (self.owner, self.key, self.expected, self.found))


class DeadlockError(ValueError):
    """A set of orders on exclusive resources that no schedule can meet (a cycle of precedences)."""


class InfeasibleOrdersError(ValueError):
    """Orders (without a cycle) whose coupling polyhedron is empty: no schedule meets the gaps, capacity
    limits and every agent's reachable set at once. ``rows`` names the rules that conflict."""

    def __init__(self, message: str, rows: Sequence[str] = ()) -> None:
        super().__init__(message)
        self.rows = tuple(rows)


class RunFolderError(ValueError):
    """A run folder that cannot be used, or a file in it that cannot be read.

    Raised for a folder that is missing a file the report needs, a file that is damaged (not UTF-8, not
    JSON or CSV, missing columns, a cell that is not a number, a path that leads outside the folder), and by
    :func:`negotiate.run.claim_run_folder` for a folder in use by another run, a non-empty folder that is
    not a run folder, or a path that cannot be written. The message names the folder or file, what was
    expected and what was found, and what to do.
    """


class CheckpointError(ValueError):
    """A checkpoint that cannot be used: missing, of another fleet or method, another version, or damaged.

    The message names the file and says what was expected and what was found.
    """


def check_field(owner: str, key: str, value: Any, ok: bool, expected: str) -> None:
    """Raise :class:`FieldError` (``found`` is ``repr(value)``) unless ``ok``; NaN is never ok."""
    if not ok or (isinstance(value, float) and math.isnan(value)):
        raise FieldError(owner, key, expected, repr(value))


def table_path(*parts: str | int) -> str:
    """Dotted table path; integers become ``[i]`` indices, names that are not bare TOML keys are quoted."""
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            key = part if _BARE_KEY.match(part) else _quote(part)
            out += ("." if out else "") + key
    return out


def describe(value: Any, _depth: int = 0) -> str:
    """A value as it would be written in a TOML file (for the ``found`` part of a :class:`Problem`)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        text = str(value) if abs(value) < 10**30 else f"an integer of {len(str(abs(value)))} digits"
        return text
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        text = _quote(value)
        return text if len(text) <= 80 else text[:76] + ' ..."'
    if isinstance(value, list | tuple):
        if _depth >= 3:
            return "[...]"
        text = "[" + ", ".join(describe(v, _depth + 1) for v in value[:20]) + (", ...]" if len(value) > 20 else "]")
        return text if len(text) <= 80 else text[:76] + " ...]"
    if isinstance(value, dict):
        keys = ", ".join(str(k) if _BARE_KEY.match(str(k)) else _quote(str(k)) for k in value)
        if len(keys) > 60:
            keys = keys[:56] + " ..."
        return f"a table ({keys})" if keys else "an empty table"
    return f"a {type(value).__name__}"
