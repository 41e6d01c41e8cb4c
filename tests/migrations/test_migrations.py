"""Migrations: up to head and back down on an empty database, models matching the revisions, the
start-up check, and the `stockrelay migrate` command; on SQLite and PostgreSQL."""

from __future__ import annotations

from collections.abc import Callable, Iterator

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Connection, Engine, inspect, text
from sqlalchemy.exc import IntegrityError

from service.cli import main
from service.db import tables  # noqa: F401  (registers the tables on Base.metadata)
from service.db.base import Base
from service.db.migrate import current_revision, downgrade, head_revision, require_migrated, upgrade
from service.db.session import make_engine
from service.errors import DatabaseNotMigratedError

TABLES = {
    "tenants",
    "networks",
    "network_versions",
    "solve_jobs",
    "policies",
    "closing_counts",
    "sales_history",
    "calibration_settings",
    "instructions",
    "closing_corrections",
    "api_keys",
    "idempotency_records",
    "assortments",
    "pick_lists",
}


@pytest.fixture
def empty_engine(database_url: str) -> Iterator[Engine]:
    """An engine on an empty, un-migrated database."""
    engine = make_engine(database_url)
    yield engine
    engine.dispose()


def table_names(engine: Engine) -> set[str]:
    return set(inspect(engine).get_table_names())


def test_upgrade_downgrade_upgrade_round_trip(empty_engine: Engine) -> None:
    assert table_names(empty_engine) == set()
    head = head_revision(empty_engine)
    assert head is not None

    upgrade(empty_engine)
    assert table_names(empty_engine) == TABLES | {"alembic_version"}
    assert current_revision(empty_engine) == head
    assert {index["name"] for index in inspect(empty_engine).get_indexes("solve_jobs")} >= {
        "uq_solve_jobs_live",
        "ix_solve_jobs_state_id",
    }

    downgrade(empty_engine, "base")
    assert table_names(empty_engine) <= {"alembic_version"}
    assert current_revision(empty_engine) is None

    upgrade(empty_engine)
    assert table_names(empty_engine) == TABLES | {"alembic_version"}
    assert current_revision(empty_engine) == head


def _insert_job(connection: Connection, kind: str | None = None) -> None:
    """A queued job of the one specification stored by _seed (kind left to its default)."""
    columns = "tenant_id, version_id, spec_hash, criterion, state, attempts, created_at"
    values = "1, 1, 'abc', 'average', 'queued', 0, CURRENT_TIMESTAMP"
    if kind is not None:
        columns, values = columns + ", kind", values + f", '{kind}'"
    connection.execute(text(f"INSERT INTO solve_jobs ({columns}) VALUES ({values})"))


def _seed(connection: Connection) -> None:
    connection.execute(
        text("INSERT INTO tenants (id, name, created_at) VALUES (1, 't', CURRENT_TIMESTAMP)")
    )
    connection.execute(
        text(
            "INSERT INTO networks (id, tenant_id, name, archived, created_at) "
            "VALUES (1, 1, 'n', false, CURRENT_TIMESTAMP)"
        )
    )
    connection.execute(
        text(
            "INSERT INTO network_versions (id, network_id, number, spec_json, spec_hash, "
            "created_at) VALUES (1, 1, 1, '{}', 'abc', CURRENT_TIMESTAMP)"
        )
    )


def _second_live_solve_refused(engine: Engine) -> bool:
    try:
        with engine.begin() as connection:
            _insert_job(connection)
    except IntegrityError:
        return True
    return False


def test_job_kinds_keep_one_live_solve_and_admit_many_simulations(empty_engine: Engine) -> None:
    upgrade(empty_engine, "0004")
    with empty_engine.begin() as connection:
        _seed(connection)
        _insert_job(connection)

    upgrade(empty_engine, "0005")
    with empty_engine.begin() as connection:
        kinds = connection.execute(text("SELECT kind FROM solve_jobs")).scalars().all()
        assert kinds == ["solve"]  # jobs queued before the revision are solves
        for _ in range(2):
            _insert_job(connection, "simulate")
        _insert_job(connection, "what_if")
    assert _second_live_solve_refused(empty_engine)

    downgrade(empty_engine, "0004")
    with empty_engine.begin() as connection:
        assert connection.execute(text("SELECT count(*) FROM solve_jobs")).scalar_one() == 1
    assert "kind" not in {
        column["name"] for column in inspect(empty_engine).get_columns("solve_jobs")
    }
    assert _second_live_solve_refused(empty_engine)


def test_models_match_the_migrations(empty_engine: Engine) -> None:
    upgrade(empty_engine)
    with empty_engine.connect() as connection:
        differences = compare_metadata(MigrationContext.configure(connection), Base.metadata)
    assert differences == []


def test_require_migrated_refuses_an_empty_database_until_upgraded(empty_engine: Engine) -> None:
    with pytest.raises(DatabaseNotMigratedError, match="stockrelay migrate") as raised:
        require_migrated(empty_engine)
    assert "none (empty)" in str(raised.value)

    upgrade(empty_engine)
    require_migrated(empty_engine)

    downgrade(empty_engine, "base")
    with pytest.raises(DatabaseNotMigratedError, match="stockrelay migrate"):
        require_migrated(empty_engine)


def test_cli_migrate_prints_the_revision_and_is_idempotent(
    database_url: str,
    empty_engine: Engine,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("STOCKRELAY_DATABASE_URL", database_url)
    head = head_revision(empty_engine)

    for _ in range(2):
        code = main(["migrate"])
        captured = capsys.readouterr()
        assert (code, captured.err) == (0, "")
        assert captured.out == f"database at schema revision {head}\n"

    assert current_revision(empty_engine) == head
    assert table_names(empty_engine) == TABLES | {"alembic_version"}


def test_cli_worker_refuses_an_unmigrated_database(
    database_url: str,
    empty_engine: Engine,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("STOCKRELAY_DATABASE_URL", database_url)

    code = main(["worker", "--until-idle"])
    captured = capsys.readouterr()

    assert code == 2
    assert captured.out == ""
    assert captured.err.count("\n") == 1
    assert captured.err.startswith("stockrelay: error: ")
    assert "run `stockrelay migrate`" in captured.err
    assert table_names(empty_engine) == set()


def _insert_policy(connection: Connection, method: str | None = None) -> None:
    columns = (
        "tenant_id, spec_hash, criterion, arrays, layout, checksum, meta, residual, "
        "error_bound, iterations, solve_seconds, solved_at"
    )
    values = "1, 'abc', 'average', :blob, '[]', 'x', '{}', 0, 0, 1, 0.5, CURRENT_TIMESTAMP"
    if method is not None:
        columns, values = columns + ", method", values + f", '{method}'"
    connection.execute(
        text(f"INSERT INTO policies ({columns}) VALUES ({values})"), {"blob": b"\x00"}
    )


def _insert_solve(connection: Connection, method: str) -> None:
    connection.execute(
        text(
            "INSERT INTO solve_jobs (tenant_id, version_id, spec_hash, criterion, state, "
            f"attempts, created_at, method) VALUES (1, 1, 'abc', 'average', 'queued', 0, "
            f"CURRENT_TIMESTAMP, '{method}')"
        )
    )


def _refused(engine: Engine, insert: Callable[[Connection], None]) -> bool:
    try:
        with engine.begin() as connection:
            insert(connection)
    except IntegrityError:
        return True
    return False


def test_solving_modes_keep_exact_and_priced_policies_of_one_specification_apart(
    empty_engine: Engine,
) -> None:
    upgrade(empty_engine, "0005")
    with empty_engine.begin() as connection:
        _seed(connection)
        _insert_job(connection)
        _insert_policy(connection)

    upgrade(empty_engine, "0008")
    with empty_engine.begin() as connection:
        # Rows from before the revision: networks in auto mode, everything else exact.
        assert connection.execute(text("SELECT mode FROM networks")).scalars().all() == ["auto"]
        for table in ("network_versions", "solve_jobs", "policies"):
            methods = connection.execute(text(f"SELECT method FROM {table}")).scalars().all()
            assert methods == ["exact"], table
        _insert_policy(connection, "priced")
        _insert_solve(connection, "priced")  # a live priced solve beside the live exact one
    assert _refused(empty_engine, lambda c: _insert_policy(c, "priced"))
    assert _refused(empty_engine, lambda c: _insert_solve(c, "priced"))
    assert _refused(empty_engine, lambda c: _insert_solve(c, "exact"))

    downgrade(empty_engine, "0005")
    with empty_engine.begin() as connection:
        assert connection.execute(text("SELECT count(*) FROM policies")).scalar_one() == 1
        assert connection.execute(text("SELECT count(*) FROM solve_jobs")).scalar_one() == 1
    assert _refused(empty_engine, lambda c: _insert_policy(c))
    assert _second_live_solve_refused(empty_engine)


def test_typed_words_are_checked_by_the_database_and_rows_survive(empty_engine: Engine) -> None:
    """Revision 0010 checks each typed column against the service's words. It rebuilds tables on
    SQLite, so rows other tables reference (a job that a policy names) must come through."""
    upgrade(empty_engine, "0009")
    with empty_engine.begin() as connection:
        _seed(connection)
        _insert_job(connection)
        _insert_policy(connection)
        connection.execute(text("UPDATE policies SET job_id = 1"))

    upgrade(empty_engine)
    with empty_engine.begin() as connection:
        kept = connection.execute(text("SELECT job_id FROM policies")).scalars().all()
        assert kept == [1]
        assert connection.execute(text("SELECT state FROM solve_jobs")).scalars().all() == [
            "queued"
        ]
    assert _second_live_solve_refused(empty_engine)  # the partial unique index came back
    wrong = [
        lambda c: c.execute(text("UPDATE solve_jobs SET state = 'paused'")),
        lambda c: c.execute(text("UPDATE solve_jobs SET kind = 'report'")),
        lambda c: c.execute(text("UPDATE solve_jobs SET criterion = 'total'")),
        lambda c: c.execute(text("UPDATE policies SET method = 'guess'")),
        lambda c: c.execute(text("UPDATE networks SET mode = 'fast'")),
        lambda c: c.execute(text("UPDATE network_versions SET method = 'guess'")),
    ]
    for update in wrong:
        assert _refused(empty_engine, update)

    downgrade(empty_engine, "0009")
    with empty_engine.begin() as connection:
        assert connection.execute(text("SELECT job_id FROM policies")).scalars().all() == [1]
    assert not _refused(empty_engine, wrong[0])


def test_sqlite_migrations_check_every_reference_before_they_commit(
    database_url: str, empty_engine: Engine
) -> None:
    """SQLite runs revisions with foreign keys off (it rebuilds tables to change them), so the
    upgrade checks every reference itself: one pointing nowhere rolls the upgrade back, and the
    connection gets its keys back either way."""
    if not database_url.startswith("sqlite"):
        pytest.skip("PostgreSQL keeps its foreign keys on while it migrates")
    upgrade(empty_engine, "0009")
    with empty_engine.begin() as connection:
        _seed(connection)
        _insert_policy(connection)
    with empty_engine.connect() as connection:
        connection.exec_driver_sql("PRAGMA foreign_keys=OFF")
        connection.commit()
        connection.execute(text("UPDATE policies SET job_id = 99"))  # no such job
        connection.commit()
        connection.exec_driver_sql("PRAGMA foreign_keys=ON")
        connection.commit()

    with pytest.raises(DatabaseNotMigratedError, match=r"point nowhere \(1 in policies\)"):
        upgrade(empty_engine)
    assert current_revision(empty_engine) == "0009"
    with empty_engine.connect() as connection:
        assert connection.exec_driver_sql("PRAGMA foreign_keys").scalar_one() == 1
