"""Drafts: type headlines (one a line; a blank line starts another group), see their scores as you type."""

from __future__ import annotations

from urllib.parse import quote

from starlette.requests import Request
from starlette.responses import RedirectResponse
from starlette.routing import Route

from ...errors import ContentlabError
from .. import services
from ..common import blocking, render
from .forms import checked_form, is_htmx, text

MAX_LINES = services.MAX_DRAFTS


def parse_lines(block: str, channel: str, publish_at: str) -> list[dict]:
    """Headlines of the text area as drafts; a blank line between lines starts a new group."""
    drafts, group, seen = [], 1, False
    for line in block.replace("\r\n", "\n").split("\n"):
        line = line.strip()
        if not line:
            if seen:
                group, seen = group + 1, False
            continue
        seen = True
        drafts.append({"headline": line, "channel": channel or None, "publish_at": publish_at or None,
                       "group": f"group {group}"})
    return drafts  # all of them: a caller that cannot take so many says so, never drops the rest


def _channels(state) -> tuple[list[str], str | None]:
    try:
        warm = state.warm()
    except ContentlabError as exc:
        return [], str(exc)
    return [c for c in getattr(warm.model, "channels_", []) if c != "(none)"], None


async def page(request: Request):
    state = request.app.state.workspace
    channels, problem = await blocking(_channels, state)
    return render(request, "drafts.html", channels=channels, problem=problem, form={}, result=None)


async def _score_form(request: Request, form) -> dict:
    state = request.app.state.workspace
    values = {"headlines": text(form, "headlines"), "channel": text(form, "channel", 1000),
              "publish_at": text(form, "publish_at", 1000)}
    drafts = parse_lines(values["headlines"], values["channel"], values["publish_at"])
    result = {"drafts": [], "groups": [], "error": None, "notes": [], "cautions": []}
    if len(drafts) > MAX_LINES:
        result["error"] = (f"{len(drafts):,} headlines: this page scores at most {MAX_LINES} at a time. Score the "
                           "rest in another round, or all of them with: contentlab score --input drafts.csv")
    elif drafts:
        try:
            scored, meta = await blocking(services.score, state, drafts, suggest=True)
        except ContentlabError as exc:
            result["error"] = str(exc)
        else:
            result.update(drafts=scored, notes=meta["notes"], cautions=meta["cautions"])
            groups: dict[str, list[dict]] = {}
            for d in scored:
                groups.setdefault(d["group"] or "", []).append(d)
            result["groups"] = [
                {"name": g, "drafts": sorted(ds, key=lambda d: d["rank"]),
                 "headlines": "\n".join(d["headline"] for d in ds)}
                for g, ds in groups.items()
            ]
    return {"values": values, "result": result}


async def score(request: Request):
    form = await checked_form(request)
    scored = await _score_form(request, form)
    if is_htmx(request):
        return render(request, "drafts_scores.html", result=scored["result"], form=scored["values"])
    state = request.app.state.workspace
    channels, problem = await blocking(_channels, state)
    return render(request, "drafts.html", channels=channels, problem=problem, form=scored["values"],
                  result=scored["result"])


async def make_experiment(request: Request):
    """One step from a group of drafts to a running experiment (priors from the model, as the CLI does)."""
    form = await checked_form(request)
    state = request.app.state.workspace
    name = text(form, "name", 1000).strip()
    channel = text(form, "channel", 1000)
    publish_at = text(form, "publish_at", 1000)
    drafts = [{"headline": d["headline"], "publish_at": d["publish_at"] or ""}
              for d in parse_lines(text(form, "headlines"), channel, publish_at)]
    try:
        if len(drafts) < 2:
            raise ContentlabError("An experiment needs at least two drafts in the group.")
        await blocking(services.create, state, name, drafts, channel or None)
    except ContentlabError as exc:
        channels, problem = await blocking(_channels, state)
        values = {"headlines": text(form, "headlines"), "channel": channel, "publish_at": publish_at}
        return render(request, "drafts.html", status=400, channels=channels, problem=problem, form=values,
                      result=None, create_error=str(exc), create_name=name)
    return RedirectResponse(f"/experiments/{quote(name, safe='')}", status_code=303)


async def home(request: Request):
    return RedirectResponse("/drafts", status_code=307)


routes = [
    Route("/", home, methods=["GET"]),
    Route("/drafts", page, methods=["GET"]),
    Route("/drafts/score", score, methods=["POST"]),
    Route("/drafts/experiment", make_experiment, methods=["POST"]),
]
