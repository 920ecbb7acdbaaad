"""The layer order of DEVELOPERS.md, checked against every import in graybox.

DEVELOPERS.md holds the order as a fenced ``layers`` block, one layer a line from the
foundation up; a package names all its modules, the root ``graybox`` only its
``__init__.py``; names on one line are siblings.  Every ``import`` and ``from ... import``
statement is read with :mod:`ast` (module level, inside functions and under
``TYPE_CHECKING`` alike) and must name a module of the same entry (a module of its own
package) or of an earlier line; siblings may not import each other; and the graph of the
module-to-module imports that run (all but those under ``if TYPE_CHECKING:``) must have no
cycle.  The rule is the project's own
(DEVELOPERS.md, "Data flows one way"); Python's import semantics for relative imports
follow the language reference (section 5.7, "Package Relative Imports").
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "graybox"


def layer_lines(text: str) -> list[list[str]]:
    """The entries of each line of DEVELOPERS.md's ```layers block, foundation first."""
    found = re.findall(r"^```layers\n(.*?)^```", text, flags=re.S | re.M)
    assert len(found) == 1, "DEVELOPERS.md needs exactly one ```layers block"
    lines = []
    for line in found[0].splitlines():
        line = line.split("#", 1)[0].strip()
        if line:
            lines.append([name.strip() for name in line.split(",")])
    return lines


def module_name(path: Path) -> str:
    """graybox/data/record.py -> graybox.data.record; graybox/data/__init__.py -> graybox.data."""
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def modules() -> dict[str, Path]:
    """Every module of the graybox package, by dotted name."""
    return {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def type_only(tree: ast.AST) -> set[int]:
    """The ids of the nodes inside ``if TYPE_CHECKING:`` blocks (never run)."""
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and ast.unparse(node.test) in ("TYPE_CHECKING", "typing.TYPE_CHECKING"):
            out.update(id(n) for stmt in node.body for n in ast.walk(stmt))
    return out


def imported(name: str, path: Path, known: set[str], *, annotations: bool = True) -> set[str]:
    """The graybox modules one module imports (``from a.b import c`` counts a.b.c when that
    is a module, else a.b; a package's parents are not counted).  ``annotations=False``
    leaves out the imports under ``if TYPE_CHECKING:``, which never run."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    skip = set() if annotations else type_only(tree)
    out = set()
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module
            for alias in node.names:
                full = f"{target}.{alias.name}"
                out.add(full if full in known else target)
    return {m for m in out if m == "graybox" or m.startswith("graybox.")}


def entry_of(module: str, entries: list[str]) -> str | None:
    """The most specific layer entry that covers a module (the root covers only itself)."""
    covering = [e for e in entries if module == e or (e != "graybox" and module.startswith(e + "."))]
    return max(covering, key=len) if covering else None


@pytest.fixture(scope="module")
def graph():
    """Module -> the graybox modules it imports, annotation-only imports included."""
    mods = modules()
    known = set(mods)
    return {name: imported(name, path, known) for name, path in mods.items()}


@pytest.fixture(scope="module")
def runtime_graph():
    """Module -> the graybox modules it imports when it runs (no ``TYPE_CHECKING`` block)."""
    mods = modules()
    known = set(mods)
    return {name: imported(name, path, known, annotations=False) for name, path in mods.items()}


@pytest.fixture(scope="module")
def lines():
    return layer_lines((ROOT / "DEVELOPERS.md").read_text(encoding="utf-8"))


def test_every_module_has_a_layer(graph, lines):
    """Each module of graybox falls under exactly one named entry, and every entry names a
    module that exists (the doc cannot list a layer the code lacks)."""
    entries = [e for line in lines for e in line]
    assert len(entries) == len(set(entries)), "an entry appears twice in the layers block"
    assert [m for m in graph if entry_of(m, entries) is None] == []
    assert [e for e in entries if e not in graph] == []


def test_no_import_of_a_later_layer_or_a_sibling(graph, lines):
    """No module imports a layer after its own, nor a sibling on its own line."""
    entries = [e for line in lines for e in line]
    rank = {e: i for i, line in enumerate(lines) for e in line}
    wrong = []
    for module, targets in graph.items():
        mine = entry_of(module, entries)
        for target in targets:
            theirs = entry_of(target, entries)
            if theirs != mine and rank[theirs] >= rank[mine]:
                wrong.append(f"{module} ({mine}) imports {target} ({theirs})")
    assert wrong == []


def cycles_in(graph: dict[str, set[str]]) -> list[str]:
    """Each import cycle found by a depth-first search (grey = on the current path)."""
    state: dict[str, int] = {}
    cycles = []

    def visit(node: str, trail: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                cycles.append(" -> ".join(trail[trail.index(nxt):] + [nxt]))
            elif nxt in graph and state.get(nxt) is None:
                visit(nxt, trail + [nxt])
        state[node] = 2

    for node in sorted(graph):
        if state.get(node) is None:
            visit(node, [node])
    return cycles


def test_no_import_cycle(runtime_graph):
    """The graph of the imports that run is acyclic (an annotation-only import under ``if
    TYPE_CHECKING:`` never runs, so it closes no cycle; it still obeys the layer order)."""
    assert cycles_in(runtime_graph) == []


def test_the_checker_sees_upward_and_circular_imports(tmp_path):
    """The reader itself, on two invented modules: a function-level import and a relative
    import are both found (so a hidden upward import cannot pass unnoticed)."""
    (tmp_path / "a.py").write_text("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    import graybox.api\n"
                                   "def f():\n    from graybox.cli import main\n    from . import b\n")
    known = {"graybox.api", "graybox.cli", "graybox.x.b"}
    found = imported("graybox.x.a", tmp_path / "a.py", known)
    assert found == {"graybox.api", "graybox.cli", "graybox.x.b"}
    assert imported("graybox.x.a", tmp_path / "a.py", known, annotations=False) == {"graybox.cli", "graybox.x.b"}
    assert entry_of("graybox.data.record", ["graybox", "graybox.data"]) == "graybox.data"
    assert entry_of("graybox.other", ["graybox"]) is None
    assert cycles_in({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == ["a -> b -> c -> a"]
    assert cycles_in({"a": {"b"}, "b": set(), "c": {"a", "b"}}) == []
