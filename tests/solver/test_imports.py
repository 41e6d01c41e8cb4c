"""solver/ stays a pure numerical core: no web, database or file I/O, no service imports."""

from __future__ import annotations

import ast
from pathlib import Path

import solver

ALLOWED_ROOTS = {
    "__future__",
    "collections",
    "dataclasses",
    "functools",
    "heapq",
    "itertools",
    "math",
    "numpy",
    "pydantic",
    "pydantic_core",
    "scipy",
    "solver",
    "time",
    "typing",
    "weakref",
}


def test_solver_imports_only_numerical_and_standard_modules() -> None:
    package = Path(solver.__file__).parent
    found: dict[str, set[str]] = {}
    for source in sorted(package.glob("*.py")):
        for node in ast.walk(ast.parse(source.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                roots = {alias.name.split(".")[0] for alias in node.names}
            elif isinstance(node, ast.ImportFrom) and node.module:
                roots = {node.module.split(".")[0]}
            else:
                continue
            for root in roots - ALLOWED_ROOTS:
                found.setdefault(source.name, set()).add(root)
    assert found == {}


def test_pydantic_is_used_only_by_the_specification() -> None:
    package = Path(solver.__file__).parent
    users = {
        source.name
        for source in package.glob("*.py")
        if "pydantic" in source.read_text(encoding="utf-8").split("\n\n\n")[0]
    }
    assert users <= {"spec.py"}
