"""The test extra gives a test setup without warnings: the HTTP test client is imported in a
fresh interpreter (this one has imported it already) with every warning an error. Starlette's
deprecation of httpx is a StarletteDeprecationWarning, a UserWarning, so that
`-W error::DeprecationWarning` lets it pass."""

from __future__ import annotations

import subprocess
import sys


def test_the_test_client_imports_without_a_warning() -> None:
    imported = subprocess.run(
        [sys.executable, "-W", "error", "-c", "import fastapi.testclient"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert imported.returncode == 0, imported.stderr
