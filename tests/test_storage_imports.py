"""Storage never imports models or the command line (DESIGN.md section 3).

Read from the source with Python's own ``ast`` module: every import statement
of the archive package, at module level or inside a function, is listed and
checked against the modules storage must not reach (learners, objectives,
worker pools, searches, gain, the CLI, scikit-learn, click). The metric facts
storage needs live in ``warmstart.evaluate.metrics``, which imports no model.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import warmstart

PACKAGE = Path(warmstart.__file__).parent
STORAGE = sorted((PACKAGE / "archive").glob("*.py"))
FORBIDDEN = (
    "warmstart.evaluate.learners", "warmstart.evaluate.objective", "warmstart.evaluate.workers",
    "warmstart.evaluate.deadline", "warmstart.search", "warmstart.gain", "warmstart.cli", "warmstart.demo",
    "sklearn", "click",
)


def imported_modules(source: str, package: str) -> list[str]:
    """Every module an ``import`` or ``from ... import`` in ``source`` names, at any
    depth (relative imports resolved against ``package``)."""
    names = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            names += [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parts = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join(parts + ([base] if base else []))
            names += [base] + [f"{base}.{alias.name}" for alias in node.names]
    return names


def imports_of(path: Path) -> list[str]:
    package = ".".join(["warmstart", *path.relative_to(PACKAGE).parts[:-1]])
    return imported_modules(path.read_text(encoding="utf-8"), package)


def forbidden(names: list[str]) -> list[str]:
    return [name for name in names if any(name == f or name.startswith(f + ".") for f in FORBIDDEN)]


def test_the_archive_package_has_modules_to_check():
    assert {p.name for p in STORAGE} >= {"store.py", "ingest.py", "curate.py", "labels.py", "merge.py",
                                         "exchange.py", "faults.py"}


@pytest.mark.parametrize("path", STORAGE, ids=lambda p: p.name)
def test_storage_imports_no_model_and_no_cli(path):
    assert forbidden(imports_of(path)) == [], f"{path.name} imports what storage must not"


def test_the_check_sees_imports_inside_functions_and_relative_ones():
    source = ("import json\n"
              "def f():\n    from warmstart.evaluate.learners import METRICS\n"
              "def g():\n    import click\n"
              "from ..cli import main\n")
    assert sorted(forbidden(imported_modules(source, "warmstart.archive"))) == [
        "click", "warmstart.cli", "warmstart.cli.main", "warmstart.evaluate.learners",
        "warmstart.evaluate.learners.METRICS"]


def test_evaluate_package_init_imports_nothing():
    # importing warmstart.evaluate.metrics must not run model imports through the package's __init__
    init = PACKAGE / "evaluate" / "__init__.py"
    assert imports_of(init) == []


def test_metric_facts_import_no_model():
    names = imports_of(PACKAGE / "evaluate" / "metrics.py")
    assert not [n for n in names if n.startswith(("sklearn", "warmstart.evaluate.learners", "warmstart.evaluate.objective"))]
