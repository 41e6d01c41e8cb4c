"""Operator commands behind the CLI: migrate, worker, networks, jobs."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

from pydantic import ValidationError
from sqlalchemy import Engine
from sqlalchemy.engine import make_url
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session, sessionmaker

from service import auth, networks
from service.db import jobs as db_jobs
from service.db import networks as db_networks
from service.db.jobs import get_job
from service.db.keys import get_or_create_tenant
from service.db.migrate import current_revision, require_migrated
from service.db.migrate import upgrade as upgrade_schema
from service.db.networks import (
    latest_version,
    versions_newest_first,
)
from service.db.session import make_engine, make_session_factory
from service.db.tables import Network
from service.errors import DatabaseNotMigratedError, NetworkArchivedError, UsageError
from service.files import load_network, write_json_atomically
from service.settings import Settings
from service.vocabulary import JobKind
from service.worker import Worker
from solver import ModelTooLargeError

__all__ = [
    "DEFAULT_TENANT",
    "create_key",
    "export_network",
    "import_network",
    "list_jobs",
    "list_keys",
    "list_networks",
    "migrate",
    "retry_job",
    "revoke_key",
    "serve",
    "worker",
    "write_openapi",
]

DEFAULT_TENANT = "default"

T = TypeVar("T")


def load_settings() -> Settings:
    try:
        return Settings()
    except ValidationError as exc:
        problems = "; ".join(
            f"STOCKRELAY_{'_'.join(map(str, e['loc'])).upper()}: {e['msg']}" for e in exc.errors()
        )
        raise UsageError(f"invalid settings: {problems}") from exc


def _require_sqlite_file(url: str) -> None:
    """Refuse, in one line naming it, a SQLite database file that does not exist: connecting
    would create an empty one (and its folder) wherever the command happens to run."""
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or parsed.database in (None, "", ":memory:"):
        return
    path = Path(parsed.database)
    if not path.is_file():
        raise UsageError(
            f"no database at {path.resolve()} (database URL {url}): run `stockrelay migrate` "
            "to create it there, or point STOCKRELAY_DATABASE_URL at an existing one"
        )


@contextmanager
def _database(*, migrated: bool = True) -> Iterator[tuple[Settings, Engine]]:
    """Settings and an engine. Only `migrate` (migrated=False) may create a SQLite file."""
    settings = load_settings()
    if migrated:
        _require_sqlite_file(settings.database_url)
    try:
        engine = make_engine(settings.database_url, pool_size=settings.database_pool_size)
    except OSError as exc:  # the SQLite file's folder cannot be made
        raise UsageError(f"cannot create the database {settings.database_url}: {exc}") from exc
    try:
        if migrated:
            require_migrated(engine)
        yield settings, engine
    except DatabaseNotMigratedError as exc:
        raise UsageError(str(exc)) from exc
    except OperationalError as exc:
        where = engine.url.render_as_string(hide_password=True)
        # Drivers spread their messages over several lines; the CLI says it in one.
        reason = " ".join(str(exc.orig or exc).split())
        raise UsageError(f"cannot use database {where}: {reason}") from exc
    finally:
        engine.dispose()


def _in_transaction(engine: Engine, work: Callable[[Session], T]) -> T:
    with make_session_factory(engine).begin() as session:
        return work(session)


def migrate(_args: argparse.Namespace) -> int:
    with _database(migrated=False) as (_settings, engine):
        upgrade_schema(engine)
        sys.stdout.write(f"database at schema revision {current_revision(engine)}\n")
    return 0


def serve(args: argparse.Namespace) -> int:
    import uvicorn

    from service.main import create_app
    from service.supervisor import port_problem

    with _database() as (settings, _engine):
        pass  # refuse to start, with one line, on a database that is not migrated
    problem = port_problem(args.host, args.port)
    if problem is not None:
        raise UsageError(problem)
    if args.processes == 1:
        uvicorn.run(create_app(settings), host=args.host, port=args.port, log_level="info")
    else:
        # Each process builds its own app (and reads the same environment).
        uvicorn.run(
            "service.main:create_app",
            factory=True,
            host=args.host,
            port=args.port,
            workers=args.processes,
            log_level="info",
            # A process on a busy machine may need more than uvicorn's default 5 s to import
            # the app (numpy, scipy, matplotlib) and answer its first health check.
            timeout_worker_healthcheck=60,
        )
    return 0


DEMO_KEY_LABEL = "demo key made by `stockrelay run`"


def run(args: argparse.Namespace) -> int:
    """API and workers for trying stockrelay out, with a write key for the default tenant that
    is revoked when the run stops (and, should the run be killed, by the next run)."""
    from service import supervisor

    def demo_key(session: Session) -> tuple[str, str]:
        # A run that was killed could not revoke its key: do it now.
        for key, _tenant in auth.list_keys(session):
            if key.label == DEMO_KEY_LABEL and key.revoked_at is None:
                auth.revoke_key(session, key.prefix)
        tenant = get_or_create_tenant(session, DEFAULT_TENANT)
        row, secret = auth.create_key(session, tenant, "write", DEMO_KEY_LABEL)
        return row.prefix, secret

    with _database() as (_settings, engine):  # refuses an un-migrated database in one line
        problem = supervisor.port_problem(args.host, args.port)
        if problem is not None:
            raise UsageError(problem)
        prefix, key = _in_transaction(engine, demo_key)
    try:
        return supervisor.supervise(args.host, args.port, args.solve_workers, key)
    finally:
        with _database() as (_settings, engine):
            _in_transaction(engine, lambda session: auth.revoke_key(session, prefix))
        sys.stderr.write(f"stockrelay: the key made for this run ({prefix}) is revoked\n")


def openapi_document() -> dict[str, Any]:
    """The OpenAPI document of the app, as committed in openapi/openapi.json."""
    from service.main import create_app

    document: dict[str, Any] = create_app(load_settings()).openapi()
    return document


def write_openapi(args: argparse.Namespace) -> int:
    text = json.dumps(openapi_document(), indent=2, sort_keys=True) + "\n"
    if args.out is None:
        sys.stdout.write(text)
    else:
        try:
            args.out.write_text(text, encoding="utf-8")
        except OSError as exc:
            raise UsageError(f"cannot write {args.out}: {exc.strerror or exc}") from exc
    return 0


def worker(args: argparse.Namespace) -> int:
    with _database() as (settings, engine):
        factory: sessionmaker[Session] = make_session_factory(engine)
        solver_worker = Worker(settings, factory)
        solver_worker.install_signal_handlers()
        solver_worker.run(until_idle=args.until_idle)
    return 0


def import_network(args: argparse.Namespace) -> int:
    spec = load_network(args.network)
    settings = load_settings()

    def work(session: Session) -> str:
        try:
            written = networks.import_network(
                session,
                args.tenant,
                spec,
                args.criteria,
                mode=args.mode,
                limits=settings.size_limits,
                skip_unchanged=args.skip_unchanged,
            )
        except (ModelTooLargeError, NetworkArchivedError) as exc:
            raise UsageError(str(exc)) from exc
        network, version = written.network, written.version
        if written.unchanged:
            return f"network {network.id} version {version.number} unchanged\n"
        queued = ", ".join(f"{job.id} ({job.criterion})" for job in written.jobs) or "none needed"
        return (
            f"network {network.id} version {version.number} "
            f"(sha256 {version.spec_hash[:12]}); jobs queued: {queued}\n"
        )

    with _database() as (_settings, engine):
        sys.stdout.write(_in_transaction(engine, work))
    return 0


def export_network(args: argparse.Namespace) -> int:
    def work(session: Session) -> str:
        network = session.get(Network, args.id)
        if network is None:
            raise UsageError(f"no network {args.id}")
        versions = versions_newest_first(session, network.id)
        chosen = [v for v in versions if args.version in (None, v.number)]
        if not chosen:
            raise UsageError(f"network {args.id} has no version {args.version}")
        return chosen[0].spec_json

    with _database() as (_settings, engine):
        document = json.loads(_in_transaction(engine, work))
    if args.out is None:
        sys.stdout.write(json.dumps(document, indent=2) + "\n")
    else:
        write_json_atomically(args.out, document)
    return 0


def list_networks(_args: argparse.Namespace) -> int:
    def work(session: Session) -> list[str]:
        lines = []
        for network in db_networks.list_networks(session):
            latest = latest_version(session, network.id)
            lines.append(
                f"{network.id:>5}  {network.name}  version {latest.number if latest else '-'}"
                + ("  (archived)" if network.archived else "")
            )
        return lines

    with _database() as (_settings, engine):
        sys.stdout.writelines(line + "\n" for line in _in_transaction(engine, work))
    return 0


def list_jobs(args: argparse.Namespace) -> int:
    kind = None if args.kind is None else JobKind(args.kind)

    def work(session: Session) -> list[str]:
        return [
            f"{job.id:>6}  {job.state:<8} {job.kind:<8} {job.criterion:<10} "
            f"network {job.network_id:<4} version {job.version_number:<4} "
            f"attempts {job.attempts}"
            + (f"  {job.solve_seconds:.3f} s" if job.solve_seconds is not None else "")
            + (f"  error: {job.error}" if job.error else "")
            for job in db_jobs.list_jobs(session, args.state, args.limit, kind=kind)
        ]

    with _database() as (_settings, engine):
        sys.stdout.writelines(line + "\n" for line in _in_transaction(engine, work))
    return 0


def create_key(args: argparse.Namespace) -> int:
    def work(session: Session) -> tuple[str, str]:
        tenant = get_or_create_tenant(session, args.tenant)
        row, key = auth.create_key(session, tenant, args.scope, args.label)
        return row.prefix, key

    with _database() as (_settings, engine):
        prefix, key = _in_transaction(engine, work)
    sys.stdout.write(
        f"{key}\n"
        f"# {args.scope} key {prefix} for tenant {args.tenant!r}; shown once, only its hash is "
        "kept\n"
    )
    return 0


def list_keys(_args: argparse.Namespace) -> int:
    def work(session: Session) -> list[str]:
        return [
            f"{key.prefix}  {tenant:<20} {key.scope:<6} created {key.created_at:%Y-%m-%d %H:%M}"
            + (f"  revoked {key.revoked_at:%Y-%m-%d %H:%M}" if key.revoked_at else "")
            + (f"  {key.label}" if key.label else "")
            for key, tenant in auth.list_keys(session)
        ]

    with _database() as (_settings, engine):
        sys.stdout.writelines(line + "\n" for line in _in_transaction(engine, work))
    return 0


def revoke_key(args: argparse.Namespace) -> int:
    def work(session: Session) -> bool:
        return auth.revoke_key(session, args.prefix)

    with _database() as (_settings, engine):
        if not _in_transaction(engine, work):
            raise UsageError(f"no active key with prefix {args.prefix!r}")
    sys.stdout.write(f"key {args.prefix} revoked\n")
    return 0


def retry_job(args: argparse.Namespace) -> int:
    def work(session: Session) -> None:
        if get_job(session, args.id) is None:
            raise UsageError(f"no job {args.id}")
        if db_jobs.retry_job(session, args.id) is None:
            raise UsageError(
                f"job {args.id} is not a failed job, or another solve of it is already queued"
            )

    with _database() as (_settings, engine):
        _in_transaction(engine, work)
    sys.stdout.write(f"job {args.id} queued again\n")
    return 0
