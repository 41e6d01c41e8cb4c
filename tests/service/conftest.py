"""Fixtures of the HTTP, CLI and worker tests."""

from __future__ import annotations

from collections.abc import Callable, Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine
from threadpoolctl import threadpool_info, threadpool_limits

from tests.service.api_support import open_client


@pytest.fixture
def client(engine: Engine) -> Iterator[TestClient]:
    """The app on the migrated test database, with a write key of tenant "test"."""
    with open_client(engine) as test_client:
        yield test_client


@pytest.fixture
def blas_threads() -> Iterator[Callable[[], set[int]]]:
    """Reads the thread counts of the loaded BLAS libraries; whatever a test sets, later tests
    get the counts this process had before."""

    def counts() -> set[int]:
        return {pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"}

    with threadpool_limits(limits=None, user_api="blas"):
        yield counts
