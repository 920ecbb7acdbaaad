"""Every public function, class and method in the packages listed below has a docstring
(issue 14, item 5; DEVELOPERS.md, "Keep docstrings on public functions": common practice,
no source).  Public: a name without a leading underscore, at module level or inside a
public class; read with :mod:`ast`, so nothing is imported."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "graybox"
# the packages held to the rule (with every top-level module): all of graybox
COVERED = ("data", "estimate", "runs", "batch", "model", "simulate", "posterior")


def undocumented(path: Path) -> list[str]:
    """``file:line name`` of each public function or class without a docstring."""
    out = []

    def walk(body, prefix: str) -> None:
        for node in body:
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)) and not node.name.startswith("_"):
                if ast.get_docstring(node) is None:
                    out.append(f"{path.relative_to(PACKAGE.parent)}:{node.lineno} {prefix}{node.name}")
                if isinstance(node, ast.ClassDef):
                    walk(node.body, f"{prefix}{node.name}.")

    walk(ast.parse(path.read_text(encoding="utf-8")).body, "")
    return out


def covered_files() -> list[Path]:
    """The files the rule covers: the packages of COVERED and every graybox/*.py."""
    files = sorted(PACKAGE.glob("*.py"))
    for name in COVERED:
        files += sorted((PACKAGE / name).rglob("*.py"))
    return files


def test_every_public_function_and_class_has_a_docstring():
    assert len(covered_files()) > 40  # the walk found the package
    assert [item for f in covered_files() for item in undocumented(f)] == []


def test_the_count_sees_a_missing_docstring(tmp_path):
    """The reader on an invented module: a bare public function and method are found, a
    private one and a documented one are not."""
    src = tmp_path / "graybox" / "m.py"
    src.parent.mkdir()
    src.write_text('def f():\n    pass\n\ndef _g():\n    pass\n\nclass C:\n    """Doc."""\n\n    def m(self):\n'
                   '        pass\n')
    global PACKAGE
    saved, PACKAGE = PACKAGE, tmp_path / "graybox"
    try:
        assert undocumented(src) == ["graybox/m.py:1 f", "graybox/m.py:10 C.m"]
    finally:
        PACKAGE = saved
