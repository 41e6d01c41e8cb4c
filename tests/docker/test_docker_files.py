"""docker/Dockerfile and docker/compose.yaml, checked without a Docker engine: the compose file
is valid YAML with the services the deployment needs, in the right order, every command is one
our CLI accepts, and the image runs as an unprivileged user."""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import pytest
import yaml
from sqlalchemy.engine import make_url

from service import operations
from service.cli import _parser
from service.settings import Settings

ROOT = Path(__file__).resolve().parents[2]
DOCKER = ROOT / "docker"
SERVE = ["stockrelay", "serve", "--host", "0.0.0.0", "--port", "8000"]


def compose() -> dict[str, Any]:
    document: dict[str, Any] = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    return document


def dockerfile() -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) in order, continuation lines joined, comments dropped."""
    instructions: list[tuple[str, str]] = []
    pending = ""
    for raw in (DOCKER / "Dockerfile").read_text().splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        keyword, _, arguments = (pending + line).partition(" ")
        instructions.append((keyword.upper(), arguments.strip()))
        pending = ""
    return instructions


def cli_command(argv: list[str]) -> argparse.Namespace:
    """What our CLI makes of `argv` (SystemExit if it refuses it)."""
    assert argv[0] == "stockrelay", argv
    return _parser().parse_args(argv[1:])


def test_compose_runs_migration_once_the_database_is_healthy_then_api_and_worker() -> None:
    services = compose()["services"]
    assert set(services) == {"db", "migrate", "api", "worker"}

    db = services["db"]
    assert db["image"] == "postgres:16"
    assert "pg_isready" in " ".join(db["healthcheck"]["test"])
    assert services["migrate"]["depends_on"] == {"db": {"condition": "service_healthy"}}
    for name in ("api", "worker"):
        assert services[name]["depends_on"] == {
            "migrate": {"condition": "service_completed_successfully"}
        }

    assert cli_command(services["migrate"]["command"]).handler is operations.migrate
    assert services["api"]["command"] == SERVE
    assert cli_command(services["api"]["command"]).handler is operations.serve
    worker = cli_command(services["worker"]["command"])
    assert (worker.handler, worker.until_idle) == (operations.worker, False)
    assert services["api"]["ports"] == ["127.0.0.1:8000:8000"]


def test_compose_points_every_stockrelay_service_at_the_database_service() -> None:
    services = compose()["services"]
    db_env = services["db"]["environment"]
    for name in ("migrate", "api", "worker"):
        service = services[name]
        assert (ROOT / "docker" / service["build"]["context"]).resolve() == ROOT
        assert (ROOT / service["build"]["dockerfile"]).is_file()
        url = service["environment"]["STOCKRELAY_DATABASE_URL"]
        parsed = make_url(Settings(database_url=url).database_url)
        assert parsed.drivername == "postgresql+psycopg"
        assert (parsed.host, parsed.port) == ("db", 5432)
        assert (parsed.username, parsed.password, parsed.database) == (
            db_env["POSTGRES_USER"],
            db_env["POSTGRES_PASSWORD"],
            db_env["POSTGRES_DB"],
        )


def test_image_runs_the_api_as_an_unprivileged_user() -> None:
    instructions = dockerfile()
    assert instructions[0] == ("FROM", "python:3.11-slim")
    users = [arguments for keyword, arguments in instructions if keyword == "USER"]
    assert users, "the image must not run as root"
    assert users[-1].split(":")[0] not in ("root", "0")
    created = [a for k, a in instructions if k == "RUN" and "useradd" in a and users[-1] in a]
    assert created, f"user {users[-1]!r} is never created"

    [cmd] = [arguments for keyword, arguments in instructions if keyword == "CMD"]
    assert json.loads(cmd) == SERVE  # exec form: stockrelay is PID 1 and gets SIGTERM itself
    assert cli_command(json.loads(cmd)).handler is operations.serve

    # Everything copied in exists, and the install happens after the sources are there.
    keywords = [keyword for keyword, _ in instructions]
    copies = [arguments.split()[:-1] for keyword, arguments in instructions if keyword == "COPY"]
    for source in (source for sources in copies for source in sources):
        assert (ROOT / source).exists(), source
    install = next(i for i, (k, a) in enumerate(instructions) if k == "RUN" and "pip install" in a)
    assert install > max(i for i, keyword in enumerate(keywords) if keyword == "COPY")


@pytest.mark.parametrize("kept_out", [".git", ".venv", "var", "**/__pycache__"])
def test_dockerignore_keeps_local_state_out_of_the_build_context(kept_out: str) -> None:
    patterns = [
        line.strip()
        for line in (ROOT / ".dockerignore").read_text().splitlines()
        if line.strip() and not line.startswith("#")
    ]
    assert kept_out in patterns
