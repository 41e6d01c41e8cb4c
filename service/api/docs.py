"""The API's documentation: which problems each /v1 operation can answer with, a
description of every request and response field, and /docs served without any CDN.

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

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from fastapi import APIRouter, FastAPI
from fastapi.dependencies.models import Dependant
from fastapi.openapi.docs import get_swagger_ui_html, get_swagger_ui_oauth2_redirect_html
from fastapi.responses import HTMLResponse
from fastapi.routing import APIRoute
from fastapi.staticfiles import StaticFiles
from swagger_ui.utils import SWAGGER_UI_PY_ROOT

from service.api.deps import Require
from service.problems import PROBLEM_RESPONSES

__all__ = [
    "FIELD_DESCRIPTIONS",
    "describe_fields",
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


# Descriptions of request and response fields that their models leave undescribed, written into
# the OpenAPI document (FastAPI's documented way: a custom app.openapi). "Schema.field" first,
# then the field name alone; a field found in neither fails tests/service/test_openapi.py.
_TIME = "UTC time (ISO 8601)"
FIELD_DESCRIPTIONS: dict[str, str] = {
    # Shared meanings.
    "network_id": "The network's id.",
    "location": "A location's id within the network.",
    "criterion": "discounted: expected discounted profit; average: long-run profit per day.",
    "created_at": f"When it was created, {_TIME}.",
    "started_at": f"When a worker started it, {_TIME}; null before.",
    "finished_at": f"When it finished, {_TIME}; null before.",
    "solved_at": f"When the policy was solved, {_TIME}.",
    "attempts": "How many times a worker has claimed it (a lost worker's job is retried).",
    "error": "Why it failed; null otherwise.",
    "JobOut.id": "The job's id (GET /v1/jobs/{job_id}).",
    "SimulationJobOut.id": "The simulation's id (GET .../simulations/{job_id}).",
    "WhatIfJobOut.id": "The comparison's id (GET .../what-if/{job_id}).",
    "name": "A name of your choosing, unique within the tenant.",
    "business_date": "The business date of the closing count (local to the stores).",
    "units": "Whole units.",
    "from": "The sending location's id.",
    "to": "The receiving location's id.",
    "unit_cost": "Cost of moving one unit along the lane.",
    "max_units": "Most units moved per night along the lane.",
    "capacity": "Most units the location holds.",
    "unit_margin": "Profit per unit sold.",
    "holding_cost": "Cost per unit of stock on hand after the night's moves.",
    "stockout_penalty": "Cost per unit of demand that could not be served.",
    "spec_hash": "SHA-256 of the specification as canonical JSON.",
    "days": "Number of business days.",
    "first_date": "The first business date stored.",
    "last_date": "The last business date stored.",
    "sold_out_days": "Days on which sales reached the stock at open.",
    "locations": "One entry per location.",
    "lanes": "Directed lanes along which units may move at night.",
    "confidence": "Level of the intervals (e.g. 0.95).",
    "DailyDistributions.mon": "The law on Mondays.",
    "DailyDistributions.tue": "The law on Tuesdays.",
    "DailyDistributions.wed": "The law on Wednesdays.",
    "DailyDistributions.thu": "The law on Thursdays.",
    "DailyDistributions.fri": "The law on Fridays.",
    "DailyDistributions.sat": "The law on Saturdays.",
    "DailyDistributions.sun": "The law on Sundays.",
    "NightlyUnits.mon": "Most units on Monday night (0 closes the lane).",
    "NightlyUnits.tue": "Most units on Tuesday night (0 closes the lane).",
    "NightlyUnits.wed": "Most units on Wednesday night (0 closes the lane).",
    "NightlyUnits.thu": "Most units on Thursday night (0 closes the lane).",
    "NightlyUnits.fri": "Most units on Friday night (0 closes the lane).",
    "NightlyUnits.sat": "Most units on Saturday night (0 closes the lane).",
    "NightlyUnits.sun": "Most units on Sunday night (0 closes the lane).",
    "weekly": "One value per weekday, mon .. sun.",
    "dist": "Which law: poisson, negative_binomial or pmf.",
    "mean": "Mean units per day.",
    "variance": "Variance of the units per day (larger than the mean).",
    "p": "p[k]: the probability of k units; sums to 1.",
    # Jobs and solves.
    "JobOut.version_id": "Database id of the network version solved.",
    "JobOut.state": "queued, running, done or failed.",
    "JobOut.solve_seconds": "Solve time in seconds; null until done.",
    "JobOut.iterations": "Policy iterations the solve took; null until done.",
    "JobOut.residual": "Bellman residual of the final values (currency units); null until done.",
    "SolveState.criterion": "The criterion this entry is about.",
    "SolveState.state": "ready, queued, running, failed, or not_requested (never asked for).",
    "SolveState.job_id": "The job that solves it, when there is one.",
    "SolveState.solved_at": f"When the policy was solved, {_TIME}; null until ready.",
    "SolveState.error": "Why the last solve failed; null otherwise.",
    # Networks.
    "NetworkOut.id": "The network's id, used in every /v1/networks/{network_id} path.",
    "NetworkOut.archived": "True once deleted: kept for its history, no longer served.",
    "NetworkOut.solves": "Where each criterion's policy of the current version stands.",
    "VersionOut.number": "Version number, 1 for the first.",
    "VersionOut.spec": "The specification of this version.",
    "VersionOut.created_at": f"When this version was stored, {_TIME}.",
    # Recommendations.
    "RecommendationRequest.criterion": "The criterion whose policy answers.",
    "RecommendationOut.criterion": "The criterion whose policy answered.",
    "RecommendationOut.residual": "Bellman residual of the answering policy's values.",
    "RecommendationOut.stock": "The closing stock sent, by location.",
    "RecommendationOut.stock_after_transfers": "Stock by location once tonight's moves arrive.",
    "RecommendationOut.transfer_cost": "Cost of tonight's moves.",
    "RecommendationOut.value_without_transfers": "Value of moving nothing tonight and "
    "following the policy afterwards.",
    "RecommendationOut.gain_from_transfers": "expected_value minus value_without_transfers: "
    "what tonight's moves are worth.",
    "TransferOut.units": "Units to move tonight.",
    "BatchRequest.items": "Up to 1,000 recommendation requests, each with its network_id.",
    "BatchResponse.items": "One outcome per item, in the order sent.",
    "BatchOutcome.result": "The recommendation, when the item succeeded.",
    "BatchOutcome.problem": "The problem (RFC 9457), when the item failed.",
    # Problems (RFC 9457, section 3.1).
    "Problem.type": "URI of the problem type: /problems/<slug>, served by this API.",
    "Problem.title": "Short summary of the problem type.",
    "Problem.status": "The HTTP status code.",
    "Problem.detail": "What went wrong with this request, in words.",
    "Problem.instance": "The request path.",
    # Closing counts and instructions.
    "ClosingStockIn.units": "Units on hand at closing, 0 .. the location's capacity.",
    "ClosingStockOut.units": "Units on hand at closing, as recorded.",
    "ClosingStockOut.reported_at": f"When the count was recorded, {_TIME}.",
    "Movement.location": "The other location of the move.",
    "Movement.units": "Units moved.",
    "InstructionsOut.version": "Network version whose policy gave the instructions.",
    "InstructionsOut.criterion": "The criterion whose policy gave the instructions.",
    "InstructionsOut.computed_at": f"When the night's instructions were computed, {_TIME}.",
    # Sales history and calibration.
    "HistoryRowIn.date": "The business day.",
    "HistoryRowIn.units_sold": "Units sold that day.",
    "HistoryStored.received": "Rows received.",
    "HistoryStored.inserted": "Rows stored for days not stored before.",
    "HistoryStored.locations": "What is stored now, per location.",
    "HistoryUpload.rows": "One row per location and business day.",
    "HistoryOut.locations": "What is stored, per location.",
    "LocationHistoryOut.days": "Business days stored.",
    "AutoApplyOut.applied": "True when a new version was created.",
    "AutoApplyOut.reason": "Why it was or was not applied.",
    "CalibrationSettingsIn.confidence": "Level of the estimates' intervals.",
    "CalibrationOut.would_create_version": "The version number applying would create.",
    "CalibrationOut.calibrated_locations": "Locations with new estimates.",
    "CalibrationOut.largest_change": "Largest relative change of a mean or variance.",
    "CalibrationOut.settings": "The settings the estimates were made with.",
    "CalibrationOut.locations": "Estimates per location.",
    "CalibrationOut.spec_hash": "SHA-256 of that specification as canonical JSON.",
    "EstimateOut.family": "The law chosen: poisson or negative_binomial.",
    "EstimateOut.mean": "Estimated mean units per day.",
    "EstimateOut.mean_interval": "Profile-likelihood interval of the mean, at `confidence`.",
    "EstimateOut.variance": "Estimated variance of the units per day.",
    "EstimateOut.variance_interval": "Profile-likelihood interval of the variance "
    "(negative binomial only).",
    "EstimateOut.selection": "Why this family was chosen, in words.",
    "EstimateOut.confidence": "Level of the intervals.",
    "EstimateOut.effective_days": "Days of data after recency weighting.",
    "WeekdayTestOut.p_value": "p-value of the likelihood-ratio test.",
    "WeekdayTestOut.statistic": "Likelihood-ratio statistic.",
    "WeekdayTestOut.df": "Degrees of freedom of the test.",
    "WeekdayTestOut.summary": "The result in words.",
    "LocationCalibrationOut.first_date": "First business date used; null without history.",
    "LocationCalibrationOut.last_date": "Last business date used; null without history.",
    "LocationCalibrationOut.days": "Business days used.",
    "LocationCalibrationOut.days_without_stock": "Days that opened with no stock (they show "
    "no demand).",
    "LocationCalibrationOut.demand": "Estimate of daily demand (censored by stock-outs).",
    "LocationCalibrationOut.replenishment": "Estimate of daily deliveries.",
    "LocationCalibrationOut.current_replenishment": "The current version's replenishment law.",
    "LocationCalibrationOut.weekday_replenishment": "Likelihood-ratio test of a weekday "
    "effect on deliveries.",
    "LocationCalibrationOut.warnings": "What deserves a look before applying.",
    # Simulations and what-if comparisons.
    "IntervalOut.mean": "Mean over the replications.",
    "IntervalOut.high": "Upper end of the interval; null when one replication cannot show a "
    "spread.",
    "PolicySimulationOut.fill_rate_by_location": "Fill rate per location.",
    "PolicySimulationOut.stockout_days_by_location": "Stock-out day fraction per location.",
    "PolicySimulationOut.units_moved_per_night": "Units moved per night.",
    "PolicySimulationOut.move_cost_per_day": "Cost of moves per day.",
    "SimulationReportOut.criterion": "Whose optimal policy was simulated.",
    "SimulationReportOut.days": "Days measured per replication.",
    "SimulationReportOut.replications": "Independent runs.",
    "SimulationReportOut.warmup_days": "Days simulated first and not measured.",
    "SimulationReportOut.seed": "Seed of the random days; the same seed gives the same report.",
    "SimulationReportOut.start_stock": "Stock by location before the first night.",
    "SimulationReportOut.policies": "One report per policy, the optimal one first.",
    "SimulationJobOut.state": "queued, running, done or failed.",
    "WhatIfJobOut.state": "queued, running, done or failed.",
    "SimulationJobOut.criterion": "Whose optimal policy is simulated.",
    "WhatIfJobOut.criterion": "The criterion both networks are solved for.",
    "LaneRef.from": "The sending location's id.",
    "LaneOverride.unit_cost": "New cost per unit moved; absent keeps it.",
    "LaneOverride.max_units": "New most units per night; absent keeps it.",
    "LocationOverride.capacity": "New capacity; absent keeps it.",
    "LocationOverride.unit_margin": "New profit per unit sold; absent keeps it.",
    "LocationOverride.holding_cost": "New holding cost per unit; absent keeps it.",
    "LocationOverride.stockout_penalty": "New penalty per unit of lost demand; absent keeps it.",
    "Overrides.lanes": "Changes to existing lanes.",
    "Overrides.new_lanes": "Lanes to add.",
    "Overrides.remove_lanes": "Lanes to remove.",
    "WhatIfRequest.criterion": "The criterion both networks are solved for.",
    "WhatIfRequest.overrides": "Changes to the current version.",
    "WhatIfSummaryOut.states": "Number of stock states of the network.",
    "WhatIfSummaryOut.reference_stock": "The stock the values are compared at (half of each "
    "capacity, rounded down).",
    "WhatIfSummaryOut.residual": "Bellman residual of the solved values.",
    "WhatIfSummaryOut.error_bound": "Bound on the distance of the values from the optimum, "
    "implied by the residual.",
    "WhatIfChangeOut.profit_per_day": "Change of the long-run profit per day (average only).",
    "WhatIfChangeOut.mean_value": "Change of the mean value (discounted only).",
    "WhatIfChangeOut.value_at_reference": "Change of the value at the reference stock "
    "(discounted only).",
    "MoveChangesOut.base_states": "Stock states of the current version.",
    "MoveChangesOut.changed_states": "Stock states with the overrides.",
    "MoveChangesOut.detail": "The comparison in words.",
    "WhatIfResultOut.criterion": "The criterion both networks are solved for.",
    "WhatIfResultOut.base": "The current version, solved.",
    "WhatIfResultOut.changed": "The version with the overrides, solved.",
    "WhatIfResultOut.change": "Changed minus base.",
    "WhatIfResultOut.moves": "How the recommended moves differ.",
    # Network specifications (solver.spec).
    "NetworkSpec.name": "A name of your choosing, unique within the tenant.",
}


# Schemas that inherit their fields from another: look those up under the parent's name.
_PARENT = {
    "NetworkCreated": "NetworkOut",
    "NetworkCreate": "NetworkSpec",
    "NetworkUpdate": "NetworkSpec",
    "CalibrationSettingsOut": "CalibrationSettingsIn",
    "LaneOverride": "LaneRef",
    "WhatIfOut": "WhatIfResultOut",
}


def _description(schema: str, field: str) -> str | None:
    for name in (schema, _PARENT.get(schema)):
        if name is not None and f"{name}.{field}" in FIELD_DESCRIPTIONS:
            return FIELD_DESCRIPTIONS[f"{name}.{field}"]
    return FIELD_DESCRIPTIONS.get(field)


def describe_fields(document: dict[str, Any]) -> None:
    """Give every property of the document's schemas without a description the one above
    (FastAPI's own validation-error schemas are left as they are)."""
    for name, schema in document.get("components", {}).get("schemas", {}).items():
        for field, prop in schema.get("properties", {}).items():
            if "description" not in prop:
                found = _description(name, field)
                if found is not None:
                    prop["description"] = found


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
