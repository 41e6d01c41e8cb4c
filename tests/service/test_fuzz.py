"""Property-based fuzzing of the API from its own OpenAPI document (schemathesis, PyPI):
generated requests to every operation must get no 5xx, and every response must conform to the
documented status codes, media types and schemas. Bounded: a few examples per operation."""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service.db.migrate import upgrade
from service.db.session import make_engine
from service.main import create_app
from service.settings import Settings
from tests.service.api_support import demo_document, make_key, run_worker

# The app must exist when the module is collected (schemathesis reads its schema then); its
# lifespan, and so its database connection, starts in the fixture below.
_FOLDER = Path(tempfile.mkdtemp(prefix="stockrelay-fuzz-"))
_URL = f"sqlite:///{_FOLDER / 'fuzz.db'}"
_ENGINE = make_engine(_URL)
upgrade(_ENGINE)  # schemathesis enters the app's lifespan, which needs a migrated database
APP = create_app(Settings(database_url=_URL, rate_limit_per_second=1e6, rate_limit_burst=10**6))
schema = schemathesis.openapi.from_asgi("/openapi.json", APP)
AUTH: dict[str, str] = {}


@pytest.fixture(scope="module", autouse=True)
def running_app() -> Iterator[None]:
    """A migrated database with one solved network; the app's lifespan entered."""
    engine = _ENGINE
    key = make_key(engine, tenant="default")
    AUTH["Authorization"] = f"Bearer {key}"
    try:
        with TestClient(APP) as client:
            client.headers.update(AUTH)
            assert client.post("/v1/networks", json=demo_document()).status_code == 201
            run_worker(engine)
            yield
    finally:
        engine.dispose()
        shutil.rmtree(_FOLDER, ignore_errors=True)


@schema.parametrize()
@settings(
    max_examples=20,
    deadline=None,
    suppress_health_check=list(HealthCheck),
    derandomize=True,
)
def test_generated_requests_get_documented_answers(case: schemathesis.Case[Any]) -> None:
    case.call_and_validate(
        headers=AUTH,
        checks=[
            not_a_server_error,
            status_code_conformance,
            content_type_conformance,
            response_schema_conformance,
        ],
    )
