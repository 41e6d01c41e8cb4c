"""The committed OpenAPI document is the app's."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import jsonschema_rs
import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError

from service.api.docs import add_component_schemas
from service.assortment_spec import ItemSpec
from service.main import create_app
from service.operations import openapi_document
from service.settings import Settings

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


def _problems(document: dict[str, Any], method: str, path: str) -> set[int]:
    responses = document["paths"][path][method]["responses"]
    return {int(status) for status in responses if int(status) >= 400}


def test_each_operation_lists_only_the_problems_that_can_happen_to_it() -> None:
    document = openapi_document()
    listed = {
        (method, path): _problems(document, method, path)
        for path, operations in document["paths"].items()
        if path.startswith("/v1/")
        for method in operations
    }
    assert len(set(map(frozenset, listed.values()))) > 5
    # No parameters, read scope: only the key, its rate and the database can fail.
    assert listed["get", "/v1/networks"] <= {401, 422, 429, 503}
    # Read scope is the lowest: a read route never answers 403; recommendations are read.
    for (method, path), statuses in listed.items():
        if method == "get":
            assert not statuses & {400, 403, 412, 413, 428}, (method, path)
    assert 403 not in listed["post", "/v1/networks/{network_id}/recommendation"]
    assert 403 not in listed["post", "/v1/recommendations/batch"]
    assert 403 in listed["post", "/v1/networks"]
    # Only routes that take If-Match compare versions.
    assert {412, 428} <= listed["put", "/v1/networks/{network_id}"]
    assert not {412, 428} & listed["post", "/v1/networks"]
    assert 415 in listed["post", "/v1/networks/{network_id}/history"]
    assert 415 not in listed["post", "/v1/networks"]
    assert 404 not in listed["post", "/v1/networks"]
    instructions = "/v1/networks/{network_id}/locations/{location}/instructions"
    assert 409 in listed["get", instructions]
    assert 409 not in listed["get", "/v1/networks/{network_id}"]


def test_the_scope_sentence_agrees_with_the_readme() -> None:
    readme = COMMITTED.parents[1].joinpath("README.md").read_text(encoding="utf-8")
    [sentence] = re.findall(r"Read\s+scope answers[^.]*\.", readme)
    description = " ".join(openapi_document()["info"]["description"].split())
    assert " ".join(sentence.split()) in description


def test_every_field_of_every_schema_is_described() -> None:
    schemas = openapi_document()["components"]["schemas"]
    undescribed = [
        f"{name}.{field}"
        for name, schema in schemas.items()
        for field, prop in schema.get("properties", {}).items()
        if not prop.get("description")
    ]
    assert undescribed == [], (
        "describe them on their models: Field(description=...), or an alias of "
        "service.api.schemas.common for a meaning many fields share"
    )


def test_docs_load_only_files_the_app_serves() -> None:
    # Neither the page nor its files need the database: the lifespan is not entered.
    client = TestClient(create_app(Settings()))
    page = client.get("/docs")
    assert page.status_code == 200
    parser = _References()
    parser.feed(page.text)
    assert len(parser.urls) >= 2, "the page names no script or stylesheet"
    # Every script, stylesheet and icon is a path of this app (no scheme, no host).
    for url in parser.urls:
        assert urlsplit(url).scheme == "" and urlsplit(url).netloc == "", url
        assert url.startswith("/"), url
        assert client.get(url).status_code == 200, url
    # The page's own script reads the document from this app, and names no other host.
    assert re.findall(r"url: '([^']*)'", page.text) == ["/openapi.json"]
    assert "://" not in page.text
    assert client.get("/openapi.json").status_code == 200


class _References(HTMLParser):
    """The URLs a page loads: script src, link href, img src."""

    def __init__(self) -> None:
        super().__init__()
        self.urls: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        wanted = {"script": "src", "link": "href", "img": "src"}.get(tag)
        for name, value in attrs:
            if name == wanted and value:
                self.urls.append(value)


def test_the_item_upload_documents_its_items_and_that_schema_judges_as_the_service_does() -> None:
    """The item upload's JSON body refers to ItemSpec's schema, added to the components beside
    the network specification's laws it shares. An independent JSON Schema validator
    (jsonschema-rs, from the package registry) fed that schema accepts an item the service
    stores and refuses one the service refuses."""
    document = openapi_document()
    body = document["paths"]["/v1/assortments/{assortment_id}/items"]["post"]["requestBody"]
    items = body["content"]["application/json"]["schema"]["properties"]["items"]
    assert items["items"] == {"$ref": "#/components/schemas/ItemSpec"}
    schema = {"$ref": "#/components/schemas/ItemSpec", "components": document["components"]}
    validator = jsonschema_rs.Draft202012Validator(schema)
    law = {"dist": "poisson", "mean": 1.2}
    good = {
        "item": "DRL-18V",
        "unit_volume": 0.02,
        "locations": {
            store: {"capacity": 8, "unit_margin": 38.5, "demand": law, "replenishment": law}
            for store in ("harbour", "old-town")
        },
        "lane_limits": {"harbour>old-town": 0},
    }
    ItemSpec.model_validate(good)
    assert validator.is_valid(good)
    for bad in (
        {**good, "lane_limits": {"harbour>old-town": -1}},
        {**good, "colour": "red"},
        {key: value for key, value in good.items() if key != "locations"},
    ):
        with pytest.raises(ValidationError):
            ItemSpec.model_validate(bad)
        assert not validator.is_valid(bad)


def test_an_upload_model_must_agree_with_the_schemas_it_shares() -> None:
    document = openapi_document()
    document["components"]["schemas"]["PoissonDemand"]["description"] = "something else"
    with pytest.raises(ValueError, match="PoissonDemand"):
        add_component_schemas(document, [ItemSpec])
