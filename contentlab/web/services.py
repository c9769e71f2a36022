"""The library calls behind the pages and the API, as plain functions (they run in the thread pool).

Pages and API share these, so a draft scored in the browser and one scored
through ``POST /api/score`` get the same numbers, and a result recorded
through either goes through :func:`contentlab.experiments.record_results`
with the rules of ``contentlab record``.
"""

from __future__ import annotations

from typing import Any

from ..errors import ContentlabError
from .common import ApiError, finite
from .state import WorkspaceState

MAX_DRAFTS = 200  # per request: a planning session, not a bulk job (use contentlab score --input for that)


# ------------------------------------------------------------------ drafts

def score(state: WorkspaceState, drafts: list[dict], *, suggest: bool = True) -> tuple[list[dict], dict]:
    """Score drafts (dicts with headline, optional channel, publish_at, group) with the warm model.

    Problems name the draft's fields (``"channel"``), never a command-line option (``by_option=False``).
    """
    import pandas as pd

    from ..scoring import score_drafts

    warm = state.warm()
    frame = pd.DataFrame(drafts)
    result = score_drafts(frame, model=warm.model, history=warm.history, timezone=warm.timezone, suggest=suggest,
                          by_option=False)
    # Take the attributes off first: pandas deep-copies ``attrs`` on every column and row access,
    # which cost more than the scoring itself for one draft.
    attrs, result.attrs = result.attrs, {}
    notes = list(attrs.get("notes") or [])
    if warm.stale:
        notes.insert(0, "The model was learned before the latest changes to the history; run contentlab learn to "
                        "refresh it.")
    suggestions = attrs.get("suggestions") or [None] * len(result)
    reasons = attrs.get("reasons") or [[] for _ in range(len(result))]
    out = []
    columns = result.to_dict(orient="list")
    rows = [dict(zip(columns, values)) for values in zip(*columns.values())]
    for i, row in enumerate(rows):
        sugg = suggestions[i] or {}
        out.append({
            "headline": row["headline"],
            "channel": row.get("channel"),
            "publish_at": row.get("publish_at"),
            "planned_time": row.get("planned_time"),
            "group": row.get("group") or None,
            "predicted_rate": finite(row.get("predicted_rate")),
            "rate_low": finite(row.get("rate_low")),
            "rate_high": finite(row.get("rate_high")),
            "percentile": finite(row.get("percentile")),
            "n_channel_posts": int(row.get("n_channel_posts") or 0),
            "reasons": [r.get("text") for r in reasons[i]] if reasons[i] else [],
            "rank": int(row.get("group_rank") or 0),
            "p_better_than_next": finite(row.get("p_better_than_next")),
            "verdict": row.get("verdict") or "",
            "far_from_history": bool(row.get("far_from_history")),
            "distance_note": row.get("distance_note") or "",
            "edits": [
                {"text": s.get("text"), "lift": finite(s.get("lift")), "lift_low": finite(s.get("lift_low")),
                 "lift_high": finite(s.get("lift_high")), "how": s.get("description")}
                for s in sugg.get("suggestions", [])
            ],
            "edit_note": sugg.get("note") or "",
        })
    meta = {"notes": notes, "cautions": list(attrs.get("cautions") or []),
            "level": finite(attrs.get("level")), "outcome": attrs.get("outcome"), "timezone": attrs.get("timezone")}
    return out, meta


def prewarm(state: WorkspaceState) -> None:
    """Load the model and score one draft, so the first real request is as quick as the rest."""
    warm = state.warm()
    channels = [c for c in getattr(warm.model, "channels_", []) if c != "(none)"]
    score(state, [{"headline": "Opening hours this week", "channel": channels[0] if channels else None}])
    drivers(state)


MAX_RESULT_ROWS = 10_000


def _listed(payload: Any, key: str, option: str, limit: int, unit: str, example: str) -> list:
    """The body's one list (``key``), checked: a JSON object, no unknown field but ``option``, 1 to ``limit`` items."""
    if not isinstance(payload, dict) or key not in payload:
        raise ApiError(f'The body must be a JSON object with "{key}": {example}.')
    unknown = sorted(set(payload) - {key, option})
    if unknown:
        from ..readers import short

        raise ApiError(f"Unknown field(s) {', '.join(short(u) for u in unknown[:5])}; remove them: the body has \"{key}\" and optionally \"{option}\".")
    items = payload[key]
    if not isinstance(items, list) or not items:
        raise ApiError(f'"{key}" must be a non-empty list of objects.')
    if len(items) > limit:
        raise ApiError(f'"{key}" has {len(items)} {unit}; at most {limit:,} per request.')
    return items


def check_drafts_payload(payload: Any) -> list[dict]:
    """The ``drafts`` of a JSON body, checked field by field (messages name the draft and the field)."""
    drafts = _listed(payload, "drafts", "suggest", MAX_DRAFTS, "items",
                     '[{"headline": "...", "channel": "...", "publish_at": "..."}]')
    allowed = {"headline", "channel", "publish_at", "group"}
    clean = []
    for i, d in enumerate(drafts, start=1):
        if not isinstance(d, dict):
            raise ApiError(f"draft {i}: must be an object with \"headline\".")
        extra = sorted(set(d) - allowed)
        if extra:
            raise ApiError(f"draft {i}: unknown field(s) {', '.join(extra)}; use headline, channel, publish_at, group.")
        if not isinstance(d.get("headline"), str):
            raise ApiError(f'draft {i}, field "headline": must be text.')
        for key in ("channel", "publish_at", "group"):
            if d.get(key) is not None and not isinstance(d[key], str):
                raise ApiError(f'draft {i}, field "{key}": must be text or null.')
        clean.append({k: d.get(k) for k in ("headline", "channel", "publish_at", "group")})
    if not isinstance(payload.get("suggest", False), bool):
        raise ApiError('"suggest" must be true or false.')
    return clean


# ------------------------------------------------------------------ experiments

def experiment_exists(state: WorkspaceState, name: str) -> bool:
    with state.open() as ws:
        return ws.conn.execute("SELECT 1 FROM experiments WHERE name=?", (name,)).fetchone() is not None


def require_experiment(state: WorkspaceState, name: str) -> None:
    if not experiment_exists(state, name):
        from ..readers import short

        raise ApiError(f"No experiment named '{short(name)}' in this workspace; see GET /api/experiments.", 404)


def experiments_list(state: WorkspaceState) -> list[dict]:
    from ..experiments import list_experiments

    with state.open() as ws:
        frame = list_experiments(ws)
    return _records(frame)


def status(state: WorkspaceState, name: str) -> dict:
    from ..experiments import experiment_status

    with state.open() as ws:
        st = experiment_status(ws, name)
    out = st.to_dict()
    out["_status"] = st
    return out


def allocation(state: WorkspaceState, name: str, impressions: Any, policy: str | None = None) -> dict:
    from ..experiments import next_allocation
    from ..readers import MAX_COUNT

    if isinstance(impressions, bool) or not isinstance(impressions, int) or not 1 <= impressions <= MAX_COUNT:
        shown = repr(impressions) if len(repr(impressions)) <= 40 else repr(impressions)[:39] + "…"
        raise ApiError(f'"impressions" must be a whole number from 1 to 2^53 ({MAX_COUNT:,}); got {shown}.')
    with state.open() as ws:
        alloc = next_allocation(ws, name, impressions, policy)
    return {"experiment": alloc.name, "policy": alloc.policy, "impressions": alloc.impressions,
            "arms": _records(alloc.arms), "notes": list(alloc.notes), "why": list(alloc.why)}


RESULT_FIELDS = ("arm", "impressions", "clicks", "at", "event_id")


def record(state: WorkspaceState, name: str, rows: list[dict], cumulative: bool = False,
           by_option: bool | None = None) -> dict:
    """Record result rows through the library (one transaction, replay-protected by event ids).

    ``by_option=False`` (the API): problems name row and column, never a command-line option.
    """
    import pandas as pd

    from ..experiments import record_results

    frame = pd.DataFrame([{k: ("" if r.get(k) is None else str(r.get(k))) for k in RESULT_FIELDS if k in r}
                          for r in rows])
    with state.open() as ws:
        summary = record_results(ws, name, frame, cumulative=cumulative, by_option=by_option)
    return _recorded(summary)


def record_file(state: WorkspaceState, name: str, path, shown: str, cumulative: bool = False) -> dict:
    """Record a results CSV saved at ``path`` (an upload) as ``record --input`` does; messages name it ``shown``.

    The rows are identified as the command identifies a file's rows, so the same
    sheet uploaded again, even re-saved or with rows added below, counts each
    result once.
    """
    from ..experiments import read_results, record_results

    try:
        with state.open() as ws:
            frame = read_results(path)
            summary = record_results(ws, name, frame, cumulative=cumulative, source_file=shown)
    except ContentlabError as exc:
        raise ContentlabError(str(exc).replace(str(path), shown)) from None
    reply = _recorded(summary)
    reply["notes"] = [n.replace(str(path), shown) for n in reply["notes"]]
    return reply


def _recorded(summary) -> dict:
    """A record summary as the API and the pages show it."""
    return {"experiment": summary.name, "rows_read": summary.rows_read, "recorded": summary.added,
            "already_recorded": summary.duplicates, "unchanged_totals": summary.unchanged,
            "impressions_added": summary.impressions_added, "clicks_added": summary.clicks_added,
            "event_ids": list(summary.event_ids), "summary": summary.line(), "notes": list(summary.notes)}


def check_results_payload(payload: Any) -> tuple[list[dict], bool]:
    rows = _listed(payload, "results", "cumulative", MAX_RESULT_ROWS, "rows",
                   '[{"arm": "A", "impressions": 300, "clicks": 5, "at": "2026-12-03T09:00", "event_id": "..."}]')
    for i, r in enumerate(rows, start=1):
        if not isinstance(r, dict):
            raise ApiError(f"result {i}: must be an object with arm, impressions and clicks.")
        extra = sorted(set(r) - set(RESULT_FIELDS))
        if extra:
            raise ApiError(f"result {i}: unknown field(s) {', '.join(extra)}; use {', '.join(RESULT_FIELDS)}.")
        for k, v in r.items():
            if isinstance(v, bool) or not (v is None or isinstance(v, (str, int))):
                raise ApiError(f'result {i}, field "{k}": must be text or a whole number.')
    cumulative = payload.get("cumulative", False)
    if not isinstance(cumulative, bool):
        raise ApiError('"cumulative" must be true or false.')
    return rows, cumulative


def stop(state: WorkspaceState, name: str, winner: str | None) -> dict:
    from ..experiments import stop_experiment

    with state.open() as ws:
        out = stop_experiment(ws, name, winner=winner or None)
    return {"experiment": out["experiment"], "winner": out["winner"], "stopped_early": bool(out["stopped_early"])}


def create(state: WorkspaceState, name: str, drafts: list[dict], channel: str | None) -> dict:
    import pandas as pd

    from ..experiments import create_experiment
    from ..readers import publish_time_notes

    frame = pd.DataFrame(drafts)
    with state.open() as ws:
        created = create_experiment(ws, name, frame, channel=channel or None)
        notes = publish_time_notes(frame, ws.timezone)  # local publish times at a clock change: how they are read
    return {"experiment": created.name, "arms": _records(created.arms), "notes": notes + list(created.notes)}


# ------------------------------------------------------------------ drivers

def drivers(state: WorkspaceState) -> tuple[list[dict], list[str]]:
    from ..drivers import driver_table

    warm = state.warm()
    table = state.cached(warm, "drivers", lambda: driver_table(warm.model))
    return _records(table), list(table.attrs.get("cautions") or [])


def _records(frame) -> list[dict]:
    """DataFrame rows as JSON-safe dicts (NaN -> None, numpy scalars -> Python)."""
    from ..experiments import jsonable

    rows = frame.astype(object).where(frame.notna(), None).to_dict(orient="records")
    return jsonable(rows)


def user_error(exc: ContentlabError) -> ApiError:
    """A library refusal as an API error: 409 when it conflicts with the workspace's state, 503 when another
    command holds the workspace (try again), 403 when it is read-only, else 400."""
    text = str(exc)
    if exc.http_status != 400:
        return ApiError(text, exc.http_status)
    conflict = ("exists already" in text or "was stopped" in text)
    return ApiError(text, 409 if conflict else 400)
