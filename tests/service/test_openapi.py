"""The committed OpenAPI document is the app's."""

from __future__ import annotations

import json
from pathlib import Path

from service.operations import openapi_document

COMMITTED = Path(__file__).resolve().parents[2] / "openapi" / "openapi.json"


def test_committed_openapi_document_matches_the_app() -> None:
    committed = json.loads(COMMITTED.read_text(encoding="utf-8"))
    assert committed == openapi_document(), (
        "openapi/openapi.json is stale: run `.venv/bin/stockrelay openapi --out "
        "openapi/openapi.json` and commit it"
    )


def test_examples_use_the_demo_scenario() -> None:
    document = openapi_document()
    schemas = document["components"]["schemas"]
    example = schemas["NetworkCreate"]["examples"][0]
    assert [location["id"] for location in example["locations"]] == ["riverside", "hilltop"]
    paths = document["paths"]
    assert "/v1/networks/{network_id}/recommendation" in paths
    assert "/v1/networks/{network_id}/locations/{location}/instructions" in paths
