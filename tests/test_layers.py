"""The package tree is the architecture: a lower layer never imports a higher one, and no module imports
itself back through others (checked on the source, every import statement counted: module level, inside
functions and under ``TYPE_CHECKING``)."""

from __future__ import annotations

import ast
from pathlib import Path

import networkx as nx
import pytest

ROOT = Path(__file__).resolve().parent.parent

# Lowest first. A module may import modules of its own layer or of any layer below.
LAYERS = (
    ("negotiate.errors", "negotiate.core"),
    ("negotiate.resources", "agents"),
    ("negotiate.fleet",),
    ("negotiate.execution",),
    ("negotiate.coordination",),
    ("negotiate.output",),
    ("negotiate.run",),
    ("negotiate.tools",),
    ("negotiate.cli", "negotiate"),  # the command line and the package index (which loads names lazily)
)


def _layer(module: str) -> int:
    best, rank = -1, None
    for i, prefixes in enumerate(LAYERS):
        for p in prefixes:
            if (module == p or module.startswith(p + ".")) and len(p) > best:
                best, rank = len(p), i
    if rank is None:
        raise AssertionError(f"{module} is in no layer: add its package to LAYERS")
    return rank


def _modules() -> dict[str, Path]:
    out = {}
    for top in ("negotiate", "agents"):
        for path in sorted((ROOT / top).rglob("*.py")):
            parts = path.relative_to(ROOT).with_suffix("").parts
            out[".".join(parts[:-1] if parts[-1] == "__init__" else parts)] = path
    return out


def _imports(module: str, path: Path, known: set[str]) -> set[str]:
    """The project modules that ``module`` imports (a name imported from a package that is itself a module
    counts as that module)."""
    tree = ast.parse(path.read_text(), str(path))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            out.add(base)
            out.update(f"{base}.{a.name}" for a in node.names if f"{base}.{a.name}" in known)
    return {m for m in out if m in known}


MODULES = _modules()
GRAPH = nx.DiGraph()
for _name, _path in MODULES.items():
    GRAPH.add_node(_name)
    GRAPH.add_edges_from((_name, m) for m in _imports(_name, _path, set(MODULES)) if m != _name)


def test_every_module_has_a_layer():
    assert {m: _layer(m) for m in MODULES}


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_upward_import(module):
    """Layers (lowest first): errors + core; resources, agents; fleet; execution; coordination; output;
    run; tools; cli + the package index."""
    here = _layer(module)
    upward = sorted(m for m in GRAPH.successors(module) if _layer(m) > here)
    assert upward == [], f"{module} (layer {here}) imports a higher layer: {upward}"


def test_layers_do_not_skip_upward_through_a_package_init():
    """A package's ``__init__`` is imported with any of its modules: it must stay as low as its package."""
    for name, path in MODULES.items():
        if path.name == "__init__.py" and name not in ("negotiate",):
            assert all(_layer(m) <= _layer(name) for m in GRAPH.successors(name)), name


def _package(module: str) -> str:
    return module if MODULES[module].name == "__init__.py" else module.rpartition(".")[0]


@pytest.mark.parametrize("module", sorted(MODULES))
def test_private_names_stay_in_their_package(module):
    """A name with a leading underscore is imported only by modules of the package that defines it."""
    tree = ast.parse(MODULES[module].read_text())
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module in MODULES and not node.level:
            private = [a.name for a in node.names if a.name.startswith("_") and not a.name.startswith("__")]
            if private and _package(node.module) != _package(module) and node.module != _package(module):
                found.append(f"{node.module}: {', '.join(private)}")
    assert found == []


def test_no_import_circle():
    assert sorted(sorted(c) for c in nx.simple_cycles(GRAPH)) == []


def test_the_graph_is_real():
    """Positive control: the graph holds imports known to exist (so an empty graph cannot pass the tests)."""
    assert GRAPH.has_edge("negotiate.core.nlp", "negotiate.core.kkt")
    assert GRAPH.has_edge("negotiate.run", "negotiate.coordination.engine")
    assert _layer("negotiate.cli") > _layer("negotiate.run") > _layer("negotiate.core.nlp")
