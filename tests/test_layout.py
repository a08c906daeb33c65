"""The package's shape (DEVELOPERS.md, "Module map"): arrows point down the flow,
no module uses another module's private names, and functions stay short.

Read from the source with Python's own ``ast`` module, so a function-level
import is checked like a module-level one.
"""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import pytest

import warmstart

PACKAGE = Path(warmstart.__file__).parent
MODULES = sorted(PACKAGE.rglob("*.py"))
#: a function longer than this (its docstring not counted: numpy docstrings are long by
#: design) says why in a comment starting "# long:" inside it
MAX_LINES = 80

#: area -> what it must never import (the flow: data -> profile -> archive -> prior -> search
#: -> evaluate -> study / gain -> service / cli; storage is checked in test_storage_imports.py)
NOT_BELOW = {
    "search": ("warmstart.archive", "warmstart.evaluate.learners", "warmstart.evaluate.objective",
               "warmstart.study", "warmstart.gain", "warmstart.service", "warmstart.cli", "warmstart.demo"),
    "evaluate": ("warmstart.archive", "warmstart.study", "warmstart.gain", "warmstart.service", "warmstart.cli",
                 "warmstart.demo"),
    "gain": ("warmstart.service", "warmstart.cli", "warmstart.study"),
    "data": ("warmstart.archive", "warmstart.search", "warmstart.evaluate", "warmstart.gain", "warmstart.cli"),
    "prior.py": ("warmstart.archive", "warmstart.evaluate", "warmstart.gain", "warmstart.cli", "warmstart.study"),
    "profile.py": ("warmstart.archive", "warmstart.search", "warmstart.evaluate", "warmstart.gain", "warmstart.cli"),
    "similarity.py": ("warmstart.archive", "warmstart.search", "warmstart.evaluate", "warmstart.gain",
                      "warmstart.cli"),
    "space.py": ("warmstart.",),
    "study.py": ("warmstart.service", "warmstart.cli", "warmstart.gain"),
    "service": ("warmstart.cli",),
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(["warmstart", *parts])


def _imports(path: Path) -> list[tuple[str, str | None]]:
    """(module, imported name or None) for every import in the file."""
    out = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out += [(alias.name, None) for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
            out += [(node.module, alias.name) for alias in node.names]
    return out


def _area(path: Path) -> str:
    rel = path.relative_to(PACKAGE).parts
    return rel[0]


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_arrows_point_down_the_flow(path):
    banned = NOT_BELOW.get(_area(path), ())
    me = _module_name(path)
    bad = [m for m, _ in _imports(path)
           if m.startswith("warmstart") and not m.startswith(me) and any(m.startswith(b) for b in banned)
           and m != "warmstart.errors"]
    assert bad == [], f"{me} imports against the flow: {bad}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_no_private_name_crosses_modules(path):
    me = _module_name(path)
    crossing = [f"{m}.{name}" for m, name in _imports(path)
                if m.startswith("warmstart") and m != me and name and name.startswith("_")
                and not name.startswith("__")]
    assert crossing == [], f"{me} uses private names of other modules: {crossing}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_functions_are_short_or_say_why(path):
    source = path.read_text(encoding="utf-8")
    lines = source.splitlines()
    long = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            body = lines[node.lineno - 1: node.end_lineno]
            first = node.body[0]
            doc = (first.end_lineno - first.lineno + 1) if isinstance(first, ast.Expr) and isinstance(
                getattr(first, "value", None), ast.Constant) and isinstance(first.value.value, str) else 0
            if len(body) - doc > MAX_LINES and not any(line.strip().startswith("# long:") for line in body):
                long.append(f"{node.name} ({len(body) - doc} lines without its docstring)")
    assert long == [], f"{path.name}: functions over {MAX_LINES} lines without a '# long:' reason: {long}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_every_module_imports(path):
    # a name removed from one module and still imported by another fails here, not in a user's command
    importlib.import_module(_module_name(path))


def test_the_checks_see_the_package():
    # guards against a walk that finds nothing (every check above would pass vacuously)
    names = {_module_name(p) for p in MODULES}
    assert {"warmstart.space", "warmstart.study", "warmstart.search.strategy", "warmstart.archive.store"} <= names
