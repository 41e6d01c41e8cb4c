"""Fixtures of the HTTP tests."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from tests.service.api_support import open_client


@pytest.fixture
def client(engine: Engine) -> Iterator[TestClient]:
    """The app on the migrated test database, with a write key of tenant "test"."""
    with open_client(engine) as test_client:
        yield test_client
