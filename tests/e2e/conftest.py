"""The `live` fixture: processes started by an end-to-end test are always stopped."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.e2e.live import Live


@pytest.fixture
def live(tmp_path: Path) -> Iterator[Live]:
    pool = Live(tmp_path)
    try:
        yield pool
    finally:
        pool.stop_all()
