"""The API's documentation: which problems each /v1 operation can answer with, and /docs
served without any CDN. (Request and response fields are described on their models.)

Every operation lists only the problem statuses that can happen to it, worked out from what
the route depends on, plus those its decorator declares (a 409 the route raises, a 503 while
its policy is being solved):

* a key check (Require): 401, 429 and 503 (the database); 403 only when read scope is not
  enough;
* path parameters: 404 and 422; query and header parameters: 422; If-Match: 412 and 428;
* a JSON body: 400 (unreadable bytes), 413 and 422;
* POST and PUT: 409 and 422 from Idempotency-Key (a repeat in progress, a key reused with
  another body, a malformed key) and 413 (the body limit applies to any body).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

from fastapi import APIRouter, FastAPI
from fastapi.dependencies.models import Dependant
from fastapi.openapi.docs import get_swagger_ui_html, get_swagger_ui_oauth2_redirect_html
from fastapi.responses import HTMLResponse
from fastapi.routing import APIRoute
from fastapi.staticfiles import StaticFiles
from pydantic import BaseModel
from swagger_ui.utils import SWAGGER_UI_PY_ROOT

from service.api.deps import Require
from service.assortment_spec import ItemSpec
from service.problems import PROBLEM_RESPONSES

__all__ = [
    "UPLOAD_MODELS",
    "add_component_schemas",
    "document_problems",
    "install_docs",
    "problem_statuses",
]


def _walk(dependant: Dependant) -> Iterator[Dependant]:
    yield dependant
    for sub in dependant.dependencies:
        yield from _walk(sub)


def problem_statuses(route: APIRoute) -> set[int]:
    """The problem statuses `route` can answer with, from its dependencies and parameters."""
    parts = list(_walk(route.dependant))
    statuses: set[int] = set()
    scopes = [part.call.scope for part in parts if isinstance(part.call, Require)]
    if scopes:
        statuses |= {401, 429, 503}
        if any(scope != "read" for scope in scopes):
            statuses.add(403)
    if any(part.path_params for part in parts):
        statuses |= {404, 422}
    if any(part.query_params or part.header_params or part.cookie_params for part in parts):
        statuses.add(422)
    headers = {field.alias.lower() for part in parts for field in part.header_params}
    if "if-match" in headers:
        statuses |= {412, 428}
    if route.body_field is not None:
        statuses |= {400, 413, 422}
    if {"POST", "PUT"} & (route.methods or set()):
        statuses |= {409, 413, 422}
    return statuses


# Models of request bodies that the routes read themselves (CSV, JSON lines or JSON, streamed)
# and so declare by `$ref` in their openapi_extra: FastAPI puts into the document only the
# models its routes parse, so these are added to its component schemas here.
UPLOAD_MODELS: tuple[type[BaseModel], ...] = (ItemSpec,)


def add_component_schemas(document: dict[str, Any], models: Iterable[type[BaseModel]]) -> None:
    """Add each model's JSON schema (validation mode) and the schemas it refers to, under their
    names, to the document's components. A name the document already holds must hold the same
    schema (the network specification's distributions are shared with NetworkCreate)."""
    components = document.setdefault("components", {}).setdefault("schemas", {})
    for model in models:
        schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
        for name, definition in {**schema.pop("$defs", {}), model.__name__: schema}.items():
            if components.setdefault(name, definition) != definition:
                raise ValueError(f"{model.__name__} refers to a {name} unlike the document's")


def document_problems(router: APIRouter) -> None:
    """Set each /v1 route's documented problems: those it can answer with, then the ones its
    decorator declares (which win). Safe to call again: the result is the same."""
    for route in router.routes:
        if not isinstance(route, APIRoute) or not route.path.startswith("/v1/"):
            continue
        found: dict[int | str, dict[str, Any]] = {
            status: PROBLEM_RESPONSES[status] for status in sorted(problem_statuses(route))
        }
        route.responses = {**found, **route.responses}


# The Swagger UI distribution files that swagger-ui-py (PyPI) ships.
SWAGGER_UI_FILES = Path(SWAGGER_UI_PY_ROOT) / "static"
DOCS_ASSETS = "/docs/assets"


def install_docs(app: FastAPI) -> None:
    """/docs with the Swagger UI files served from DOCS_ASSETS, FastAPI's documented way to
    self-host them (create the app with docs_url=None and redoc_url=None): the page works
    offline and loads nothing from elsewhere."""
    app.mount(DOCS_ASSETS, StaticFiles(directory=SWAGGER_UI_FILES), name="docs-assets")
    redirect = "/docs/oauth2-redirect"

    @app.get("/docs", include_in_schema=False)
    async def swagger_ui() -> HTMLResponse:
        return get_swagger_ui_html(
            openapi_url=app.openapi_url or "/openapi.json",
            title=f"{app.title} API",
            oauth2_redirect_url=redirect,
            swagger_js_url=f"{DOCS_ASSETS}/swagger-ui-bundle.js",
            swagger_css_url=f"{DOCS_ASSETS}/swagger-ui.css",
            swagger_favicon_url=f"{DOCS_ASSETS}/favicon-32x32.png",
            # No badge that would send the document to an outside validator.
            swagger_ui_parameters={"validatorUrl": None},
        )

    @app.get(redirect, include_in_schema=False)
    async def swagger_ui_redirect() -> HTMLResponse:
        return get_swagger_ui_oauth2_redirect_html()
