"""One definition per idea: the criterion (solver.CRITERIA), the weekday (solver.spec.WEEKDAYS),
job kinds, job states and solve states (service.vocabulary), the JSON pointer
(service.json_pointer) and the simulation bound (service.settings)."""

from __future__ import annotations

import ast
import inspect
from pathlib import Path
from typing import get_args

import pytest

import service
from service.analysis import check_simulation
from service.json_pointer import json_pointer
from service.settings import SIMULATION_MAX_REPLICATION_DAYS, Settings
from service.vocabulary import (
    JobKind,
    JobState,
    JobStateName,
    SolveMethod,
    SolveMethodName,
    SolveMode,
    SolveModeName,
    SolveStatus,
    SolveStatusName,
)
from solver import CRITERIA, Criterion
from solver.spec import WEEKDAY_NAMES, WEEKDAYS, Weekday

SERVICE = Path(service.__file__).parent


def test_the_contracts_literals_spell_the_enums() -> None:
    assert list(get_args(JobStateName)) == [state.value for state in JobState]
    assert list(get_args(SolveStatusName)) == [state.value for state in SolveStatus]
    assert list(get_args(SolveModeName)) == [mode.value for mode in SolveMode]
    assert list(get_args(SolveMethodName)) == [method.value for method in SolveMethod]
    assert CRITERIA == get_args(Criterion) == ("discounted", "average")
    assert get_args(Weekday) == WEEKDAYS
    assert [name[:3].lower() for name in WEEKDAY_NAMES] == list(WEEKDAYS)


# Each set of words, and the one module allowed to spell all of it.
SPELLED_ONCE = {
    frozenset(CRITERIA): "solver/result.py",
    frozenset(WEEKDAYS): "solver/spec.py",
    frozenset(WEEKDAY_NAMES): "solver/spec.py",
    frozenset(kind.value for kind in JobKind): "service/vocabulary.py",
    frozenset(state.value for state in JobState): "service/vocabulary.py",
    frozenset(state.value for state in SolveStatus): "service/vocabulary.py",
    frozenset(mode.value for mode in SolveMode): "service/vocabulary.py",
    frozenset(method.value for method in SolveMethod): "service/vocabulary.py",
}


def _spelled_sets(source: Path) -> list[tuple[int, frozenset[str]]]:
    """(line, words) of each tuple, list, set or Literal[...] in `source` made of string
    constants only, at least two of them."""
    found = []
    for node in ast.walk(ast.parse(source.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Subscript) and isinstance(node.slice, ast.Tuple):
            elements = node.slice.elts
        elif isinstance(node, ast.Tuple | ast.List | ast.Set):
            elements = node.elts
        else:
            continue
        words = [
            e.value for e in elements if isinstance(e, ast.Constant) and isinstance(e.value, str)
        ]
        if len(words) == len(elements) >= 2:
            found.append((node.lineno, frozenset(words)))
    return found


def test_no_module_spells_a_vocabulary_again() -> None:
    root = SERVICE.parent
    sources = sorted([*SERVICE.rglob("*.py"), *(root / "solver").glob("*.py")])
    again = [
        f"{source.relative_to(root)}:{line}"
        for source in sources
        for line, words in _spelled_sets(source)
        if SPELLED_ONCE.get(words, str(source.relative_to(root))) != str(source.relative_to(root))
    ]
    assert again == []


@pytest.mark.parametrize(
    ("tokens", "pointer"),
    [
        ((), ""),
        (("stock", "riverside"), "/stock/riverside"),
        (("items", 3, "stock"), "/items/3/stock"),
        # RFC 6901, section 3: "~" is written "~0" and "/" "~1", "~" first.
        (("stock", "a/b"), "/stock/a~1b"),
        (("stock", "m~n"), "/stock/m~0n"),
        (("stock", "~1"), "/stock/~01"),
    ],
)
def test_json_pointer_escapes_as_rfc_6901(tokens: tuple[str | int, ...], pointer: str) -> None:
    assert json_pointer(*tokens) == pointer


def test_the_simulation_bound_has_one_default() -> None:
    default = Settings.model_fields["simulation_max_replication_days"].default
    assert default == SIMULATION_MAX_REPLICATION_DAYS
    parameter = inspect.signature(check_simulation).parameters["max_replication_days"]
    assert parameter.default == default
