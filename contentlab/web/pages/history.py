"""History and drivers: the weekly trend (by channel and period), drivers, and drill-downs to posts."""

from __future__ import annotations

from starlette.requests import Request
from starlette.routing import Route

from ...percentages import percent
from .. import insight, services
from ..common import ApiError, blocking, render
from ..svg import line_chart


def _overview(state, channel: str | None, start: str | None, end: str | None) -> dict:
    warm = state.warm()
    posts = insight.usable_posts(warm)
    channels = sorted(posts["channel"].unique().tolist())
    if channel and channel not in channels:
        raise ApiError(f"'{channel[:60]}' is not a channel of this history; the channels are: {', '.join(channels)}.")
    weeks = insight.trend(warm, channel or None, start, end)
    series = {(channel or "all channels"): [(i, float(r)) for i, r in enumerate(weeks["rate"])]}
    step = max(1, -(-len(weeks) // 6))  # at most six labels, evenly spaced
    ticks = [(i, w) for i, w in enumerate(weeks["week"]) if i % step == 0]
    chart = line_chart(series, y_label="rate per week", x_label="ISO week", y_format=lambda v: percent(v, 1),
                       x_ticks=ticks)
    rows, cautions = services.drivers(state)
    recent = posts
    if channel:
        recent = recent[recent["channel"] == channel]
    if start:
        recent = recent[recent["local_date"] >= start]
    if end:
        recent = recent[recent["local_date"] <= end]
    recent = recent.sort_values("published_at", ascending=False).head(40)
    return {
        "channels": channels, "weeks": weeks.to_dict(orient="records"), "chart": chart, "drivers": rows,
        "cautions": cautions, "outcome": getattr(warm.model, "outcome_", "clicks"),
        "recent": recent[["post_id", "headline", "channel", "local_date", "impressions", "outcome", "rate"]]
        .to_dict(orient="records"),
    }


async def index(request: Request):
    q = request.query_params
    channel = q.get("channel") or None
    start = insight.check_date(q.get("from"), "from")
    end = insight.check_date(q.get("to"), "to")
    view = await blocking(_overview, request.app.state.workspace, channel, start, end)
    return render(request, "history.html", filters={"channel": channel or "", "from": start or "", "to": end or ""},
                  **view)


def _driver(state, rank: int) -> dict:
    rows, _ = services.drivers(state)
    match = [r for r in rows if r.get("rank") == rank]
    if not match:
        raise ApiError(f"There is no driver number {rank}; the drivers are numbered 1 to {len(rows)}.", 404)
    warm = state.warm()
    return insight.driver_split(state, warm, match[0])


async def driver(request: Request):
    view = await blocking(_driver, request.app.state.workspace, request.path_params["rank"])
    return render(request, "driver.html", **view)


def _post(state, post_id: str) -> dict:
    warm = state.warm()
    return insight.post_detail(state, warm, post_id)


async def post(request: Request):
    view = await blocking(_post, request.app.state.workspace, request.path_params["post_id"])
    return render(request, "post.html", **view)


routes = [
    Route("/history", index, methods=["GET"]),
    Route("/history/drivers/{rank:int}", driver, methods=["GET"]),
    Route("/history/posts/{post_id:path}", post, methods=["GET"]),
]
