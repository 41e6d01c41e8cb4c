"""service/ keeps its layers: what each part may import, read from the source (as
tests/solver/test_imports.py does for solver/).

Each rule is asserted outright: a module breaking it fails here.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import service

SERVICE = Path(service.__file__).parent
ROOT = SERVICE.parent

# Names of sqlalchemy that build SQL statements or parts of them.
SQL_BUILDERS = {
    "and_",
    "bindparam",
    "case",
    "delete",
    "exists",
    "func",
    "insert",
    "literal",
    "or_",
    "select",
    "text",
    "union",
    "update",
}


def _imports(source: Path) -> set[tuple[str, str]]:
    """(module, name) of each import in `source`; name "" for `import module`."""
    found: set[tuple[str, str]] = set()
    for node in ast.walk(ast.parse(source.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found |= {(alias.name, "") for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found |= {(node.module, alias.name) for alias in node.names}
    return found


def _sources() -> dict[str, set[tuple[str, str]]]:
    """Each module of service/ (as "service/db/tables.py") and what it imports, with
    `from service import x` read as an import of service.x."""
    sources = {}
    for source in sorted(SERVICE.rglob("*.py")):
        imports = set()
        for module, name in _imports(source):
            if module == "service" and name:
                imports.add((f"service.{name}", ""))
            else:
                imports.add((module, name))
        sources[str(source.relative_to(ROOT))] = imports
    return sources


def _importers(prefixes: tuple[str, ...]) -> dict[str, set[str]]:
    """Modules of service/ importing any module that is or lies under one of `prefixes`."""
    found: dict[str, set[str]] = {}
    for path, imports in _sources().items():
        hits = {
            module
            for module, _ in imports
            if any(module == p or module.startswith(p + ".") for p in prefixes)
        }
        if hits:
            found[path] = hits
    return found


def test_storage_imports_nothing_above_it() -> None:
    """service/db knows tables, the policy codec, the shared vocabulary and the service's errors:
    never the API, its HTTP models, the read path or the worker."""
    allowed = ("service.db", "service.codec", "service.vocabulary", "service.errors")
    above = {
        path: sorted(m for m, _ in imports if m.startswith("service") and not m.startswith(allowed))
        for path, imports in _sources().items()
        if path.startswith("service/db/")
    }
    assert {path: found for path, found in above.items() if found} == {}


def test_leaf_modules_import_nothing_of_the_service() -> None:
    """The vocabulary, the JSON pointer, the codec, the solving modes, the pictures, the priced
    exports, the rate limiter and the service's errors stand on the solver, libraries and the
    service's words (service.vocabulary, service.errors) alone; the errors on nothing else of
    the service."""
    leaves = [
        "service/vocabulary.py",
        "service/json_pointer.py",
        "service/codec.py",
        "service/modes.py",
        "service/pictures.py",
        "service/priced.py",
        "service/ratelimit.py",
        "service/errors.py",
    ]
    sources = _sources()
    assert {
        leaf: sorted(
            m
            for m, _ in sources[leaf]
            if m.startswith("service") and m not in ("service.errors", "service.vocabulary")
        )
        for leaf in leaves
    } == {leaf: [] for leaf in leaves}
    assert not any(m.startswith("service") for m, _ in sources["service/errors.py"])


def test_the_http_models_stand_on_the_solver_and_the_domain_definitions() -> None:
    """The HTTP models (service/api/schemas/) import no database code and, of the service, only
    each other and modules that define words and inputs (the vocabulary, the analysis
    parameters, time zones, the demo scenario, an assortment's layout and items), themselves
    free of the rest of the service: the contract does not move when storage does."""
    sources = _sources()
    definitions = {
        "service.vocabulary",
        "service.analysis_requests",
        "service.timezones",
        "service.demo",
        "service.assortment_spec",
    }
    imports = {
        module
        for path, found in sources.items()
        if path.startswith("service/api/schemas/")
        for module, _ in found
        if module.startswith(("service", "sqlalchemy"))
    }
    assert imports - definitions <= {
        f"service.api.schemas.{path.stem}" for path in (SERVICE / "api" / "schemas").glob("*.py")
    }
    for module in definitions:
        path = module.replace(".", "/") + ".py"
        assert not {m for m, _ in sources[path] if m.startswith(("service", "sqlalchemy"))}


def test_only_the_app_wires_the_routers() -> None:
    """service/api is imported by service/main.py alone (and by itself), apart from the
    supervisor, which reads the header by which the API it started answers /readyz."""
    outside = {
        path: found
        for path, found in _importers(("service.api",)).items()
        if not path.startswith("service/api/") and path != "service/main.py"
    }
    assert outside == {"service/supervisor.py": {"service.api.health"}}


def test_nothing_below_the_api_uses_the_http_models() -> None:
    """Use cases take and return domain types: the job parameters of service.analysis_requests,
    which the HTTP models reuse, not the other way round."""
    users = {
        path for path in _importers(("service.api.schemas",)) if not path.startswith("service/api/")
    }
    assert users == set()


def test_sql_is_built_in_storage_only() -> None:
    """Every SQL statement is built in service/db."""
    builders = {
        path
        for path, imports in _sources().items()
        if not path.startswith("service/db/")
        and any(
            module.startswith("sqlalchemy") and name in SQL_BUILDERS for module, name in imports
        )
    }
    assert builders == set()


def test_routers_use_sqlalchemy_only_for_sessions_and_errors() -> None:
    """A router names a Session (the request's, from service.api.deps) and catches database
    errors; it builds no SQL, and the readiness probe holds the Engine it checks."""
    found = {
        path: sorted(f"{module}.{name}" for module, name in imports if module == "sqlalchemy")
        for path, imports in _sources().items()
        if path.startswith("service/api/")
    }
    assert {path: names for path, names in found.items() if names} == {
        "service/api/health.py": ["sqlalchemy.Engine"],
    }
    other = {
        module
        for path, imports in _sources().items()
        if path.startswith("service/api/")
        for module, _ in imports
        if module.startswith("sqlalchemy.")
    }
    assert other <= {"sqlalchemy.orm", "sqlalchemy.exc"}


def test_routers_reach_storage_only_through_use_cases() -> None:
    """A router translates HTTP to use-case calls of the service layer and back: no module of
    service/api imports service.db (the row types a use case returns come from its module)."""
    users = {
        path: sorted(found)
        for path, found in _importers(("service.db",)).items()
        if path.startswith("service/api/")
    }
    assert users == {}


def test_the_feature_table_names_files_that_exist() -> None:
    """Every file named in DEVELOPERS.md's "Where each feature lives" exists (under service/,
    tests/service/ or the repository's root)."""
    guide = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    section = guide.split("## Where each feature lives", 1)[1].split("\n## ", 1)[0]
    rows = [line for line in section.splitlines() if line.startswith("| ") and ".py" in line]
    named = {
        word.strip("`")
        for row in rows
        for word in re.findall(r"`[^`]+`", row)
        if word.strip("`").endswith((".py", "/"))
    }
    assert len(rows) >= 10 and len(named) >= 30
    missing = sorted(
        name
        for name in named
        if not any((base / name).exists() for base in (ROOT, SERVICE, ROOT / "tests" / "service"))
    )
    assert missing == []


def test_exceptions_are_defined_in_the_errors_module() -> None:
    """Domain errors live in service/errors.py (one hierarchy); elsewhere only the HTTP problems
    of the API layer and the middleware's private signals define exception classes."""
    defined = {
        path: sorted(
            node.name
            for node in ast.walk(ast.parse((ROOT / path).read_text(encoding="utf-8")))
            if isinstance(node, ast.ClassDef)
            and any(
                isinstance(base, ast.Name) and base.id.endswith(("Error", "Exception"))
                for base in node.bases
            )
        )
        for path in _sources()
        if path != "service/errors.py"
    }
    assert {path: names for path, names in defined.items() if names} == {
        "service/middleware.py": ["RepeatAllowed", "_TooLarge"],
        "service/problems.py": ["ApiProblem"],
    }
