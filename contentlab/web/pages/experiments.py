"""Experiments: the list; one experiment's arms, P(best) over time, next split, recording results, stopping."""

from __future__ import annotations

import re
from urllib.parse import quote

from starlette.requests import Request
from starlette.responses import RedirectResponse
from starlette.routing import Route

from ...errors import ContentlabError
from .. import insight, services
from ..common import ApiError, blocking, render
from ..svg import line_chart
from .forms import checked_form, is_htmx, saved_upload, text, upload_name

RECORD_FIELDS = ("arm", "impressions", "clicks", "at", "event_id")
# record's messages for one row name the option: "--impressions: ...", "--event-id: ...".
_OPTION = re.compile(r"^--(arm|impressions|clicks|at|event-id)\b:?\s*")


def field_errors(message: str) -> tuple[dict[str, str], str]:
    """Split record's one-line message into the problems of each form field and the rest."""
    body = message
    tail = "; nothing was recorded."
    if body.endswith(tail):
        body = body[: -len(tail)]
    fields: dict[str, list[str]] = {}
    rest: list[str] = []
    current: str | None = None
    for part in body.split("; "):
        m = _OPTION.match(part)
        if m:
            current = m.group(1).replace("-", "_")
            fields.setdefault(current, []).append(part[m.end():])
        elif current is not None and not part.startswith("(and "):
            # The rest of that field's problem ("has 300 characters; an event id may have at most 200"):
            # its what-to-do stays beside the field.
            fields[current][-1] += "; " + part
        else:
            rest.append(part)
    general = "; ".join(rest)
    if fields:
        general = (general + "; " if general else "") + "nothing was recorded."
    else:
        general = message
    return {k: "; ".join(v) for k, v in fields.items()}, general


async def index(request: Request):
    rows = await blocking(services.experiments_list, request.app.state.workspace)
    return render(request, "experiments.html", experiments=rows)


def _view(state, name: str, impressions: int | None) -> dict:
    services.require_experiment(state, name)
    st = services.status(state, name)
    status = st.pop("_status")
    timeline = insight.prob_best_timeline(state, name, status)
    series = {f"{a}": [(p["impressions"], p["prob_best"][a]) for p in timeline["points"]] for a in timeline["arms"]}
    chart = line_chart(series, y_label="probability of being best", x_label="impressions recorded",
                       y_max=1.0, x_ticks=None)
    split, split_error = None, None
    if impressions is not None and st["status"] != "stopped":
        try:
            split = services.allocation(state, name, impressions)
        except (ContentlabError, ApiError) as exc:
            split_error = str(exc)
    return {"st": st, "chart": chart, "split": split, "split_error": split_error, "rounds": len(timeline["points"]) - 1}


def _impressions(request: Request) -> tuple[int | None, str | None]:
    raw = request.query_params.get("impressions")
    if raw is None or raw == "":
        return None, None
    if not re.fullmatch(r"\d{1,9}", raw.strip()) or int(raw) < 1:
        return None, f"Impressions must be a whole number from 1 to 999,999,999; got '{raw[:20]}'."
    return int(raw), None


async def detail(request: Request):
    name = request.path_params["name"]
    n, problem = _impressions(request)
    view = await blocking(_view, request.app.state.workspace, name, n)
    if problem:
        view["split_error"] = problem
    if is_htmx(request) and request.query_params.get("part") == "split":
        return render(request, "experiment_split.html", name=name, **view)
    return render(request, "experiment.html", name=name, record={}, errors={}, general=None, done=None, done_notes=[],
                  **view)


async def record(request: Request):
    name = request.path_params["name"]
    state = request.app.state.workspace
    form = await checked_form(request)
    values = {k: text(form, k, 1000).strip() for k in RECORD_FIELDS}  # record names longer ones
    row = {k: v for k, v in values.items() if v or k in ("arm", "impressions", "clicks")}
    errors: dict[str, str] = {}
    general = done = None
    done_notes: list[str] = []
    await blocking(services.require_experiment, state, name)
    try:
        out = await blocking(services.record, state, name, [row], False)
        done, done_notes = out["summary"], out["notes"]
        values = {}
    except ContentlabError as exc:
        errors, general = field_errors(str(exc))
    view = await blocking(_view, state, name, None)
    status = 400 if (errors or general) else 200
    template = "experiment_body.html" if is_htmx(request) else "experiment.html"
    # htmx swaps only successful answers; a refusal is still shown in place (nothing was written).
    if is_htmx(request):
        status = 200
    return render(request, template, status=status, name=name, record=values, errors=errors, general=general,
                  done=done, done_notes=done_notes, **view)


def _record_upload(state, name: str, upload, shown: str, cumulative: bool) -> dict:
    """Save the upload under a fixed name in a private temporary folder and record it (all rows or none)."""
    empty = (f"{shown}: the file is empty; nothing was recorded. Upload a CSV with a header (arm, impressions, "
             "clicks) and one result a row.")
    with saved_upload(upload, "results.csv", empty) as path:
        return services.record_file(state, name, path, shown, cumulative)


async def record_file(request: Request):
    """A results file uploaded on the experiment's page: recorded as ``contentlab record NAME --input FILE``."""
    from starlette.datastructures import UploadFile

    name = request.path_params["name"]
    state = request.app.state.workspace
    form = await checked_form(request, files=1)
    upload = form.get("results")
    cumulative = text(form, "cumulative", 10) == "on"
    general = done = None
    done_notes: list[str] = []
    await blocking(services.require_experiment, state, name)
    if not isinstance(upload, UploadFile) or not upload.filename:
        general = "Choose a results file to upload (CSV: arm, impressions, clicks, and optionally at and event_id)."
    else:
        try:
            out = await blocking(_record_upload, state, name, upload, upload_name(upload, "results.csv"), cumulative)
            done, done_notes = out["summary"], out["notes"]
        except ContentlabError as exc:
            # The page's word for the command's option.
            general = str(exc).replace("leave out --cumulative", "untick 'The figures are totals so far'")
        finally:
            await upload.close()
    view = await blocking(_view, state, name, None)
    return render(request, "experiment.html", status=400 if general else 200, name=name, record={}, errors={},
                  general=general, done=done, done_notes=done_notes, **view)


async def stop(request: Request):
    name = request.path_params["name"]
    state = request.app.state.workspace
    form = await checked_form(request)
    await blocking(services.require_experiment, state, name)
    await blocking(services.stop, state, name, text(form, "winner", 1000) or None)
    return RedirectResponse(f"/experiments/{quote(name, safe='')}", status_code=303)


routes = [
    Route("/experiments", index, methods=["GET"]),
    Route("/experiments/{name}", detail, methods=["GET"]),
    Route("/experiments/{name}/record", record, methods=["POST"]),
    Route("/experiments/{name}/record-file", record_file, methods=["POST"]),
    Route("/experiments/{name}/stop", stop, methods=["POST"]),
]
