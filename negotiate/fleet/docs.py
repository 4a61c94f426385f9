"""The key tables of ``docs/fleet.md``, generated from the fleet schema (:mod:`negotiate.fleet.schema`) and
the registered model families (:mod:`agents.families`): every key with its type, SI unit, default, allowed
values and meaning. ``python -m negotiate.fleet docs/fleet.md`` rewrites the generated part of the file."""

from __future__ import annotations

import dataclasses
from pathlib import Path

from agents.families import FAMILIES
from negotiate.fleet.parse import kind_keys
from negotiate.fleet.schema import (
    _AGENT_KEYS,
    _COORDINATOR_KEYS,
    _FLEET_KEYS,
    FROM_RESOURCE,
    REQUIRED,
    _Key,
    family_keys,
    nested_keys,
)
from negotiate.resources import KINDS

__all__ = ["BEGIN_MARK", "END_MARK", "schema_markdown", "update_doc"]


def _default_text(key: _Key) -> str:
    d = key.default
    if d is REQUIRED:
        return "required"
    if d is FROM_RESOURCE:
        return "the resource's"
    if d is None:
        return "omitted"
    if isinstance(d, str) and key.kind in ("string", "name", "choice"):
        return f'"{d}"' if d and key.name != "name" else (d or '""')
    if isinstance(d, bool):
        return "true" if d else "false"
    if isinstance(d, dict):
        return "{}"
    if isinstance(d, tuple):
        if d and not isinstance(d[0], float):
            return "see below"
        return "[" + ", ".join(repr(v) for v in d) + "]"
    return repr(d)


def _type_text(key: _Key) -> str:
    return {
        "number": "number",
        "integer": "integer",
        "string": "string",
        "name": "resource name",
        "bool": "boolean",
        "numbers": "list of numbers",
        "price-list": "number or list of numbers",
        "table": "table",
        "tables": "array of tables",
        "choice": " \\| ".join(f'`"{c}"`' for c in key.choices),
    }[key.kind]


def _key_table(keys: tuple[_Key, ...]) -> list[str]:
    lines = ["| key | type | unit | default | allowed | meaning |", "|---|---|---|---|---|---|"]
    for k in keys:
        doc = k.doc.replace("|", "\\|")
        allowed = k.allowed or "-"
        lines.append(f"| `{k.name}` | {_type_text(k)} | {k.unit} | {_default_text(k)} | {allowed} | {doc} |")
    return lines


def schema_markdown() -> str:
    """The key tables of ``docs/fleet.md``, generated from the records' field metadata (units, defaults)."""
    out: list[str] = []

    def section(title: str, intro: str, keys: tuple[_Key, ...]) -> None:
        out.extend([f"### {title}", "", intro, "", *_key_table(keys), ""])

    section("`[fleet]`", "Optional.", _FLEET_KEYS)
    for kind, cls in KINDS.items():
        section(f'`[resources.<name>]` with `kind = "{kind}"`', cls.about, kind_keys(kind))
    section(
        "`[coordinator]`",
        "Optional; `[coordinator.options]` holds options the method declares (docs/methods.md).",
        _COORDINATOR_KEYS,
    )
    families = ", ".join(f'"{f}"' for f in FAMILIES)
    model_key = dataclasses.replace(_AGENT_KEYS[0], doc=_AGENT_KEYS[0].doc.replace("{families}", families))
    section(
        "`[agents.<name>]`: every agent",
        "Plus the keys of its model below. A `[defaults.<model>]` table "
        "takes `weight` and the model's keys (not `model`).",
        (model_key, *_AGENT_KEYS[1:]),
    )
    for family in FAMILIES.values():
        cls = family.params
        keys = family_keys(family)
        section(f'`model = "{family.name}"` (`{cls.__name__}`)', (cls.__doc__ or "").strip().splitlines()[0], keys)
        for nest in family.nested:
            section(
                f"`[[agents.<name>.{nest.key}]]` (`{nest.record.__name__}`)",
                (nest.record.__doc__ or "").strip().splitlines()[0],
                nested_keys(nest),
            )
    return "\n".join(out).rstrip() + "\n"


BEGIN_MARK = "<!-- BEGIN GENERATED: negotiate.fleet.schema_markdown() -->"
END_MARK = "<!-- END GENERATED -->"


def update_doc(path: str | Path) -> bool:
    """Rewrite the generated part of a Markdown file between the marks; returns whether it changed."""
    p = Path(path)
    text = p.read_text(encoding="utf-8")
    head, sep, rest = text.partition(BEGIN_MARK)
    _old, sep2, tail = rest.partition(END_MARK)
    if not sep or not sep2:
        raise ValueError(f"{p}: the marks {BEGIN_MARK!r} and {END_MARK!r} must both be present")
    new = head + BEGIN_MARK + "\n\n" + schema_markdown() + "\n" + END_MARK + tail
    if new != text:
        p.write_text(new, encoding="utf-8")
        return True
    return False
