"""The status page: one tenant's networks, solves and queue, as a server-rendered HTML page.

`gather` reads what the page shows (a handful of read-only queries, whatever the number of
networks); `render` turns it into HTML with every piece of stored text escaped. The page has no
script and refers to nothing outside itself: styles are inline, the policy heatmap is the SVG
of `service.pictures` and the solve-time sparklines are small SVG polylines, embedded in the
page. Besides solves and jobs it shows which locations have sent tonight's closing counts, each
assortment's items by state with the items each location has counted tonight, and the README's
caution in one line.
"""

from __future__ import annotations

import html
import json
import logging
import statistics
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, time

from sqlalchemy.orm import Session

from service.assortments import Standing, standings
from service.db import reporting
from service.db.base import utcnow
from service.db.monitoring import (
    job_lines,
    live_job_counts,
    recent_solve_seconds,
    reported_locations,
)
from service.db.reporting import CriterionSolve
from service.errors import PolicyNotReadyError, UnknownNetworkChoice
from service.pictures import caption, choose_plane, net_inflow_grid, render_moves
from service.serving import NetworkRef, PolicyCache, ServedPolicy, business_date_now, load_policy
from service.vocabulary import JobKind, JobState, SolveStatus
from solver import CRITERIA, NetworkSpec

__all__ = [
    "CAUTION",
    "CRITERIA",
    "RECENT_JOBS",
    "SOLVE_HISTORY",
    "Closing",
    "Heatmap",
    "JobLine",
    "NetworkLine",
    "SolveCell",
    "StatusView",
    "age",
    "gather",
    "render",
    "sparkline",
]

log = logging.getLogger(__name__)

RECENT_JOBS = 20
# Live jobs listed at most; the heading gives the full count.
QUEUE_ROWS = 100
# How often the browser reloads the page (an HTTP refresh, not a script).
REFRESH_SECONDS = 30
# Finished solves per network drawn in its solve-time sparkline, oldest to newest.
SOLVE_HISTORY = 30
# The README's "Cautions", in one line.
CAUTION = (
    "Moves follow the model and its parameters: a person reviews them before acting, above all "
    "after an automatic calibration, and local rules on labour, transport and safety come first."
)


# One criterion of a network's current version (service.db.reporting).
SolveCell = CriterionSolve


@dataclass(frozen=True)
class Closing:
    """Tonight's closing counts of one network: the business date (today in the network's time
    zone) and its locations, in network order, split by whether they have reported."""

    business_date: date
    reported: tuple[str, ...]
    missing: tuple[str, ...]


@dataclass(frozen=True)
class NetworkLine:
    id: int
    name: str
    version: int
    solves: tuple[SolveCell, ...]
    closing: Closing | None = None
    # Seconds of the network's last finished solves (any version, any criterion), oldest first.
    solve_times: tuple[float, ...] = field(default=())


@dataclass(frozen=True)
class JobLine:
    id: int
    network_id: int
    network_name: str
    version: int
    kind: str
    criterion: str
    state: str
    attempts: int
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
    solve_seconds: float | None
    error: str | None
    method: str = "exact"
    # A running priced solve's latest progress, as stored (JSON; see worker.progress_json).
    progress: str | None = None

    def progress_text(self) -> str:
        """The progress in a few words ("" when there is none or it cannot be read)."""
        if self.progress is None:
            return ""
        try:
            report = json.loads(self.progress)
            step = f"iteration {int(report['iteration'])}"
            if report.get("candidates") is not None:
                limit = report.get("trade_limit")
                plan = "plain store values" if limit is None else f"trade limit {int(limit)}"
                step = f"candidate {int(report['iteration'])} of {int(report['candidates'])} "
                step += f"({plan})"
            text = f"{report['stage']}, {step}, bound {float(report['upper_bound']):,.2f}"
            if report.get("lower_bound") is not None:
                text += f", best lower {float(report['lower_bound']):,.2f}"
            return text + f", {float(report['elapsed']):,.0f} s"
        except (ValueError, KeyError, TypeError):
            return ""


@dataclass(frozen=True)
class Heatmap:
    """The picture of the chosen network's served policy, or why there is none (`svg` None)."""

    network: NetworkLine
    svg: str | None
    note: str


@dataclass(frozen=True)
class StatusView:
    tenant: str
    now: datetime
    networks: tuple[NetworkLine, ...]
    queued: int
    running: int
    queue: tuple[JobLine, ...]
    recent: tuple[JobLine, ...]
    heatmap: Heatmap | None
    assortments: tuple[Standing, ...] = ()

    @property
    def live_jobs(self) -> int:
        return self.queued + self.running


# -- reading -----------------------------------------------------------------------------------


def gather(
    session: Session,
    cache: PolicyCache,
    tenant_id: int,
    tenant: str,
    network_id: int | None = None,
) -> StatusView:
    """What the page shows for `tenant_id`, with the heatmap of `network_id` (default: the
    first network). UnknownNetworkChoice when `network_id` is not one of the tenant's live
    networks."""
    networks = _networks(session, tenant_id)
    chosen = networks[0] if networks and network_id is None else None
    if network_id is not None:
        chosen = next((n for n in networks if n.id == network_id), None)
        if chosen is None:
            raise UnknownNetworkChoice(f"no network {network_id}")
    live = (JobState.QUEUED.value, JobState.RUNNING.value)
    live_counts = live_job_counts(session, tenant_id)
    queue = _jobs(session, tenant_id, states=live, oldest_first=True, limit=QUEUE_ROWS)
    recent = _jobs(session, tenant_id, states=None, oldest_first=False, limit=RECENT_JOBS)
    return StatusView(
        tenant=tenant,
        now=utcnow(),
        networks=tuple(networks),
        queued=live_counts.get(JobState.QUEUED.value, 0),
        running=live_counts.get(JobState.RUNNING.value, 0),
        queue=tuple(queue),
        recent=tuple(recent),
        heatmap=None if chosen is None else _heatmap(session, cache, tenant_id, chosen),
        assortments=tuple(standings(session, tenant_id)),
    )


def _networks(session: Session, tenant_id: int) -> list[NetworkLine]:
    states = reporting.solve_states(
        session, tenant_id=tenant_id, with_spec=True, include_items=False
    )
    closing = _closing(
        session,
        [(row.network.id, row.version.spec_json, row.network.closing_cutoff) for row in states],
    )
    times = recent_solve_seconds(session, tenant_id, SOLVE_HISTORY)
    return [
        NetworkLine(
            row.network.id,
            row.network.name,
            row.version.number,
            row.solves,
            closing.get(row.network.id),
            tuple(times.get(row.network.id, ())),
        )
        for row in states
    ]


def _closing(
    session: Session, networks: Sequence[tuple[int, str, time | None]]
) -> dict[int, Closing]:
    """Tonight's counts of each (network id, current specification JSON, closing cut-off): one
    query. Tonight is the night of the current business date (service.serving)."""
    tonight: dict[int, tuple[date, list[str]]] = {}
    for network_id, spec_json, cutoff in networks:
        spec = json.loads(spec_json)
        zone = spec.get("timezone") or NetworkSpec.model_fields["timezone"].default
        ids = [location["id"] for location in spec["locations"]]
        tonight[network_id] = (business_date_now(zone, cutoff), ids)
    reported = reported_locations(
        session, {network_id: day for network_id, (day, _) in tonight.items()}
    )
    return {
        network_id: Closing(
            business_date,
            tuple(location for location in locations if location in reported[network_id]),
            tuple(location for location in locations if location not in reported[network_id]),
        )
        for network_id, (business_date, locations) in tonight.items()
    }


def _jobs(
    session: Session,
    tenant_id: int,
    *,
    states: Sequence[str] | None,
    oldest_first: bool,
    limit: int,
) -> list[JobLine]:
    rows = job_lines(session, tenant_id, states=states, oldest_first=oldest_first, limit=limit)
    return [
        JobLine(
            id=job.id,
            network_id=network_id,
            network_name=name,
            version=number,
            kind=job.kind,
            criterion=job.criterion,
            state=job.state,
            attempts=job.attempts,
            created_at=job.created_at,
            started_at=job.started_at,
            finished_at=job.finished_at,
            solve_seconds=job.solve_seconds,
            error=job.error,
            method=job.method,
            progress=job.progress if job.state == JobState.RUNNING.value else None,
        )
        for job, number, network_id, name in rows
    ]


def _heatmap(session: Session, cache: PolicyCache, tenant_id: int, network: NetworkLine) -> Heatmap:
    """The net-move heatmap of the first criterion with a served policy, drawn by
    `service.pictures` as for GET /v1/networks/{id}/policy.svg."""
    served: ServedPolicy | None = None
    criterion = ""
    for criterion in CRITERIA:
        try:
            served = load_policy(session, cache, NetworkRef(network.id, tenant_id), criterion)
        except PolicyNotReadyError:
            continue
        break
    if served is None:
        return Heatmap(network, None, "No policy is ready yet: the picture appears once solved.")
    plane = choose_plane(served.result, None, None, {})
    subject = f"version {served.version_number} · net moves, {criterion} policy"
    try:
        svg = render_moves(
            net_inflow_grid(served.result, plane),
            x_id=plane.x_id,
            y_id=plane.y_id,
            title=caption(network.name, subject, plane),
            image_format="svg",
        ).decode("utf-8")
    except ValueError as exc:  # matplotlib refuses some text (e.g. unbalanced "$" math)
        log.warning("status page: no heatmap for network %d: %s", network.id, exc)
        return Heatmap(network, None, "The picture of this policy could not be drawn.")
    note = f"Version {served.version_number}, {criterion} criterion"
    if served.stale:
        note += f" (version {network.version} is being solved)"
    return Heatmap(network, _inline(svg), note + ".")


def _inline(svg: str) -> str:
    """An SVG document as an element of an HTML page: without its XML declaration and DOCTYPE,
    scaled to the width of the page."""
    start = svg.find("<svg")
    element = svg[start:] if start >= 0 else svg
    return element.replace("<svg", '<svg class="heatmap" role="img"', 1)


# -- writing -----------------------------------------------------------------------------------


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def age(seconds: float) -> str:
    """A duration for people: "45 s", "12 min", "3 h 5 min", "2 d 4 h"."""
    seconds = max(0, int(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes, hours = seconds // 60, seconds // 3600
    if seconds < 3600:
        return f"{minutes} min"
    if seconds < 86_400:
        return f"{hours} h {minutes % 60} min"
    return f"{seconds // 86_400} d {hours % 24} h"


def _since(now: datetime, then: datetime | None) -> str:
    return "" if then is None else age((now - then).total_seconds())


def _seconds(value: float | None) -> str:
    return "" if value is None else f"{value:.3f} s"


def _work(kind: str, method: str = "exact") -> str:
    """What a job does, for people."""
    if kind == JobKind.SOLVE and method != "exact":
        return f"{method} solve"
    words: dict[str, str] = {
        JobKind.SOLVE: "solve",
        JobKind.SIMULATE: "simulation",
        JobKind.WHAT_IF: "what-if",
        JobKind.CALIBRATE: "calibration",
    }
    return words.get(kind, kind)


def _badge(state: str) -> str:
    words = state.replace("_", " ")  # "not_requested" reads "not requested"
    return f'<span class="state state-{_e(words.replace(" ", "-"))}">{_e(words)}</span>'


def _solve_cell(cell: SolveCell, now: datetime) -> str:
    parts = [_badge(cell.state)]
    if cell.state == SolveStatus.READY and cell.solved_at is not None:
        parts.append(
            f'<span class="detail">solved {_e(_since(now, cell.solved_at))} ago'
            f" in {_e(_seconds(cell.solve_seconds))}</span>"
        )
    elif cell.job_id is not None:
        parts.append(f'<span class="detail">job {cell.job_id}</span>')
    if cell.error:
        parts.append(f'<span class="error">{_e(cell.error)}</span>')
    return f'<td data-criterion="{_e(cell.criterion)}">{" ".join(parts)}</td>'


def _networks_table(view: StatusView) -> str:
    if not view.networks:
        return '<p class="empty">No networks yet: POST one to /v1/networks.</p>'
    chosen = view.heatmap.network.id if view.heatmap else None
    rows = []
    for network in view.networks:
        mark = ' class="chosen"' if network.id == chosen else ""
        rows.append(
            f'<tr{mark} data-network="{network.id}"><td class="num">{network.id}</td>'
            f'<td><a href="?network={network.id}">{_e(network.name)}</a></td>'
            f'<td class="num">{network.version}</td>'
            + "".join(_solve_cell(cell, view.now) for cell in network.solves)
            + "</tr>"
        )
    head = "".join(f"<th>{_e(criterion)}</th>" for criterion in CRITERIA)
    return (
        '<table class="networks"><thead><tr><th>id</th><th>network</th><th>version</th>'
        f"{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )


def _assortments_section(view: StatusView) -> str:
    """Each assortment's items by state and tonight's closing counts per location; nothing
    when the tenant has no assortment."""
    if not view.assortments:
        return ""
    rows = []
    for standing in view.assortments:
        states = standing.states
        reported = " · ".join(
            f"{location} {count} of {standing.items}"
            for location, count in standing.reported.items()
        )
        rows.append(
            f'<tr data-assortment="{standing.assortment.id}">'
            f'<td class="num">{standing.assortment.id}</td>'
            f"<td>{_e(standing.assortment.name)}</td>"
            f'<td class="num">{standing.items}</td>'
            f'<td class="num" data-state="ready">{states["ready"]}</td>'
            f'<td class="num" data-state="waiting">{states["waiting"]}</td>'
            f'<td class="num" data-state="failed">{states["failed"]}</td>'
            f"<td>{_e(standing.business_date.isoformat())}</td>"
            f'<td class="detail">{_e(reported)}</td></tr>'
        )
    return (
        '<section id="assortments"><h2>Assortments</h2>'
        '<table class="assortments"><thead><tr><th>id</th><th>assortment</th><th>items</th>'
        "<th>ready</th><th>waiting</th><th>failed</th><th>business date</th>"
        "<th>items counted tonight, by location</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table></section>"
    )


def _queue_table(view: StatusView) -> str:
    if not view.queue:
        return '<p class="empty">Nothing queued or running.</p>'
    rows = []
    for job in view.queue:
        if job.state == JobState.RUNNING.value:
            waiting = f"running for {_since(view.now, job.started_at)}"
            if job.progress_text():
                waiting += f" · {job.progress_text()}"
        else:
            waiting = f"waiting {_since(view.now, job.created_at)}"
        rows.append(
            f'<tr data-job="{job.id}"><td class="num">{job.id}</td>'
            f'<td>{_e(job.network_name)} <span class="detail">v{job.version}</span></td>'
            f"<td>{_e(_work(job.kind, job.method))}</td><td>{_e(job.criterion)}</td>"
            f"<td>{_badge(job.state)}</td>"
            f'<td class="num">{job.attempts}</td><td>{_e(waiting)}</td></tr>'
        )
    more = ""
    if view.live_jobs > len(view.queue):
        more = f'<p class="detail">{view.live_jobs - len(view.queue)} more not listed.</p>'
    return (
        '<table class="queue"><thead><tr><th>job</th><th>network</th><th>work</th>'
        "<th>criterion</th><th>state</th><th>attempts</th><th>age</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>{more}"
    )


def _recent_table(view: StatusView) -> str:
    if not view.recent:
        return '<p class="empty">No solve jobs yet.</p>'
    rows = []
    for job in view.recent:
        finished = f"{_since(view.now, job.finished_at)} ago" if job.finished_at else ""
        rows.append(
            f'<tr data-job="{job.id}"><td class="num">{job.id}</td>'
            f'<td>{_e(job.network_name)} <span class="detail">v{job.version}</span></td>'
            f"<td>{_e(_work(job.kind, job.method))}</td><td>{_e(job.criterion)}</td>"
            f"<td>{_badge(job.state)}</td>"
            f'<td class="num">{job.attempts}</td>'
            f'<td class="num">{_e(_seconds(job.solve_seconds))}</td>'
            f"<td>{_e(finished)}</td>"
            f'<td class="error">{_e(job.error or "")}</td></tr>'
        )
    return (
        '<table class="recent"><thead><tr><th>job</th><th>network</th><th>work</th>'
        "<th>criterion</th><th>state</th><th>attempts</th><th>seconds</th><th>finished</th>"
        "<th>error</th>"
        f"</tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )


def _closing_table(view: StatusView) -> str:
    if not view.networks:
        return '<p class="empty">No networks yet.</p>'
    rows = []
    for network in view.networks:
        closing = network.closing
        if closing is None:
            continue
        total = len(closing.reported) + len(closing.missing)
        reported = ", ".join(closing.reported) or "none yet"
        missing = ", ".join(closing.missing) or "none: all reported"
        state = "done" if not closing.missing else "queued"
        rows.append(
            f'<tr data-network="{network.id}"><td>{_e(network.name)}</td>'
            f"<td>{_e(closing.business_date.isoformat())}</td>"
            f'<td><span class="state state-{state}">{len(closing.reported)} of {total}</span></td>'
            f"<td>{_e(reported)}</td><td>{_e(missing)}</td></tr>"
        )
    return (
        '<table class="closing"><thead><tr><th>network</th><th>business date</th>'
        "<th>reported</th><th>locations reported</th><th>still to report</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def sparkline(values: Sequence[float], width: int = 160, height: int = 28) -> str:
    """An inline SVG polyline of `values` (oldest first, at least one), scaled from 0 to their
    maximum; the newest value is marked with a dot."""
    if len(values) == 1:
        values = [values[0], values[0]]  # one solve: a level line, not a lone dot
    top = max(values) or 1.0
    step = width / (len(values) - 1)
    points = [
        (round(i * step, 1), round(height - 2 - (height - 4) * value / top, 1))
        for i, value in enumerate(values)
    ]
    line = " ".join(f"{x},{y}" for x, y in points)
    last_x, last_y = points[-1]
    return (
        f'<svg class="spark" width="{width}" height="{height}" viewBox="0 0 {width} {height}" '
        'role="img" aria-label="solve seconds, oldest to newest">'
        f'<polyline points="{line}" fill="none" stroke="#3d5a80" stroke-width="1.5"/>'
        f'<circle cx="{last_x}" cy="{last_y}" r="2.5" fill="#3d5a80"/></svg>'
    )


def _solve_times_table(view: StatusView) -> str:
    timed = [network for network in view.networks if network.solve_times]
    if not timed:
        return '<p class="empty">No finished solves yet.</p>'
    rows = []
    for network in timed:
        times = network.solve_times
        rows.append(
            f'<tr data-network="{network.id}"><td>{_e(network.name)}</td>'
            f"<td>{sparkline(times)}</td>"
            f'<td class="num">{len(times)}</td>'
            f'<td class="num">{_e(_seconds(times[-1]))}</td>'
            f'<td class="num">{_e(_seconds(statistics.median(times)))}</td>'
            f'<td class="num">{_e(_seconds(max(times)))}</td></tr>'
        )
    return (
        '<table class="solve-times"><thead><tr><th>network</th><th>oldest to newest</th>'
        "<th>solves</th><th>last</th><th>median</th><th>longest</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def _heatmap_section(view: StatusView) -> str:
    if view.heatmap is None:
        return ""
    heatmap = view.heatmap
    picture = heatmap.svg if heatmap.svg is not None else '<p class="empty">No picture.</p>'
    return (
        f'<section id="policy"><h2>Policy of {_e(heatmap.network.name)}</h2>'
        f'<p class="detail">{_e(heatmap.note)} Net units moved tonight, by closing stock.</p>'
        f'<figure class="picture">{picture}</figure></section>'
    )


def _tiles(view: StatusView) -> str:
    ready = sum(cell.state == SolveStatus.READY for n in view.networks for cell in n.solves)
    failed = sum(job.state == JobState.FAILED.value for job in view.recent)
    tiles: Iterable[tuple[str, int]] = (
        ("networks", len(view.networks)),
        ("policies ready", ready),
        ("queued", view.queued),
        ("running", view.running),
        ("failed, last 20 jobs", failed),
    )
    return (
        '<ul class="tiles">'
        + "".join(f"<li><b>{count}</b> {_e(label)}</li>" for label, count in tiles)
        + "</ul>"
    )


_STYLE = """
:root { --ink: #1d2330; --muted: #667085; --paper: #f7f6f2; --card: #ffffff; --rule: #dedbd2;
  --accent: #3d5a80; }
* { box-sizing: border-box; }
body { margin: 0; font: 14px/1.45 system-ui, sans-serif; color: var(--ink);
  background: var(--paper); }
header { background: var(--ink); color: #f4f1ea; padding: 14px 28px; display: flex;
  align-items: baseline; gap: 18px; flex-wrap: wrap; }
header h1 { font-size: 18px; margin: 0; letter-spacing: 0.04em; }
header p { margin: 0; color: #c8c3b8; }
main { padding: 18px 28px 40px; max-width: 1280px; }
section { background: var(--card); border: 1px solid var(--rule); border-radius: 6px;
  padding: 12px 16px; margin: 0 0 18px; }
h2 { font-size: 15px; margin: 0 0 10px; }
table { border-collapse: collapse; width: 100%; }
th { text-align: left; font-weight: 600; color: var(--muted); border-bottom: 2px solid var(--rule);
  padding: 4px 8px; }
td { border-bottom: 1px solid var(--rule); padding: 5px 8px; vertical-align: top; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
tr.chosen td { background: #eef2f7; }
a { color: var(--accent); }
.tiles { list-style: none; display: flex; gap: 12px; padding: 0; margin: 0 0 18px;
  flex-wrap: wrap; }
.tiles li { background: var(--card); border: 1px solid var(--rule); border-radius: 6px;
  padding: 8px 14px; color: var(--muted); }
.tiles b { display: block; font-size: 20px; color: var(--ink); }
.state { display: inline-block; padding: 0 8px; border-radius: 10px; font-size: 12px;
  font-weight: 600; border: 1px solid transparent; }
.state-ready, .state-done { background: #e4f0e8; color: #24613f; border-color: #b9d8c4; }
.state-queued { background: #f6efdc; color: #7a5a12; border-color: #e4d3a4; }
.state-running { background: #e3ebf5; color: #29507a; border-color: #bccde3; }
.state-failed { background: #f6e3de; color: #8e2f1e; border-color: #e5bcb2; }
.state-not-requested { background: #eeede9; color: var(--muted); }
.detail { color: var(--muted); font-size: 12px; }
.error { color: #8e2f1e; font-size: 12px; white-space: pre-wrap; word-break: break-word; }
.empty { color: var(--muted); margin: 4px 0; }
figure.picture { margin: 0; }
.caution { margin: 0 0 14px; padding: 8px 14px; border-left: 4px solid #c9a227;
  background: #fbf6e4; color: #5c4a10; }
svg.spark { display: block; }
svg.heatmap { max-width: 100%; height: auto; }
"""


def render(view: StatusView) -> str:
    """The page, HTML5; every piece of stored text escaped."""
    shown = f" · {len(view.queue)} listed" if view.live_jobs > len(view.queue) else ""
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="refresh" content="{REFRESH_SECONDS}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>stockrelay status · {_e(view.tenant)}</title>"
        f"<style>{_STYLE}</style></head><body>"
        f"<header><h1>stockrelay</h1><p>status of tenant <b>{_e(view.tenant)}</b></p>"
        f"<p>{_e(view.now.strftime('%Y-%m-%d %H:%M:%S'))} UTC · reloads every "
        f"{REFRESH_SECONDS} s</p></header><main>"
        f'<p class="caution">{_e(CAUTION)}</p>'
        f"{_tiles(view)}"
        f'<section id="networks"><h2>Networks</h2>{_networks_table(view)}</section>'
        f"{_assortments_section(view)}"
        f'<section id="closing"><h2>Tonight\'s closing counts</h2>{_closing_table(view)}'
        "</section>"
        f'<section id="queue"><h2>Queue ({view.live_jobs} live{shown})</h2>'
        f"{_queue_table(view)}</section>"
        f"{_heatmap_section(view)}"
        f'<section id="solve-times"><h2>Solve times</h2>{_solve_times_table(view)}</section>'
        f'<section id="recent"><h2>Recent jobs</h2>{_recent_table(view)}</section>'
        "</main></body></html>\n"
    )
