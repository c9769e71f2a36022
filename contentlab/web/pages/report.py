"""Report: the weekly report of any week, the same HTML the ``report`` command writes.

The report is computed by :func:`contentlab.report.build_report` and rendered
by :func:`contentlab.report.render_html`; it is shown in a frame under its own
Content-Security-Policy (its inline style is allowed, scripts are not), and
kept for as long as the workspace's model, history and results are unchanged.
"""

from __future__ import annotations

import re
import threading
from datetime import date, timedelta

from starlette.requests import Request
from starlette.responses import HTMLResponse
from starlette.routing import Route

from ...errors import ContentlabError
from ..common import ApiError, blocking, render
from ..security import REPORT_CSP

WEEK = re.compile(r"\d{4}-W\d{2}")
_CACHE: dict[tuple, str] = {}
_CACHE_LOCK = threading.Lock()
CACHE_SIZE = 8


def _weeks(state) -> list[str]:
    """ISO weeks with posts, newest first (the picker's choices)."""
    with state.open() as ws:
        rows = ws.conn.execute("SELECT MIN(published_at), MAX(published_at) FROM posts").fetchone()
    if not rows or rows[0] is None:
        return []
    first, last = date.fromisoformat(rows[0][:10]), date.fromisoformat(rows[1][:10])
    weeks, day = [], last
    while day >= first - timedelta(days=6) and len(weeks) < 156:
        y, w, _ = day.isocalendar()
        label = f"{y}-W{w:02d}"
        if not weeks or weeks[-1] != label:
            weeks.append(label)
        day -= timedelta(days=7)
    return weeks


def _check_week(week: str | None) -> str | None:
    if not week:
        return None
    if not WEEK.fullmatch(week):
        raise ApiError(f"'{week[:20]}' is not an ISO week; pick one like 2026-W48.")
    return week


def _html(state, week: str | None) -> str:
    from ...report import build_report, render_html

    with state.open() as ws:
        stamp = ws.conn.execute(
            "SELECT (SELECT MAX(id) FROM models), (SELECT MAX(id) FROM imports), "
            "(SELECT COUNT(*) FROM observations), (SELECT COUNT(*) FROM experiments WHERE status='stopped'), "
            "(SELECT COUNT(*) FROM experiments), (SELECT COUNT(*) FROM drafts)").fetchone()
        key = (str(state.path), week, tuple(stamp), date.today().isoformat())
        with _CACHE_LOCK:
            hit = _CACHE.get(key)
        if hit is not None:
            return hit
        html = render_html(build_report(ws, week=week))
    with _CACHE_LOCK:
        if len(_CACHE) >= CACHE_SIZE:
            _CACHE.pop(next(iter(_CACHE)))
        _CACHE[key] = html
    return html


async def page(request: Request):
    week = _check_week(request.query_params.get("week"))
    weeks = await blocking(_weeks, request.app.state.workspace)
    return render(request, "report.html", week=week or (weeks[0] if weeks else ""), weeks=weeks)


async def view(request: Request):
    week = _check_week(request.query_params.get("week"))
    try:
        html = await blocking(_html, request.app.state.workspace, week)
        status = 200
    except ContentlabError as exc:
        from markupsafe import escape

        html = f"<!doctype html><meta charset='utf-8'><title>No report</title><p>{escape(str(exc))}</p>"
        status = 400
    return HTMLResponse(html, status_code=status, headers={"content-security-policy": REPORT_CSP})


routes = [
    Route("/report", page, methods=["GET"]),
    Route("/report/view", view, methods=["GET"]),
]
