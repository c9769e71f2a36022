"""The JSON API under ``/api/``: score drafts, read and run experiments, read the drivers.

Every error is ``{"error": message}`` with 400 (bad input), 404 (no such
experiment), 409 (conflicts with the workspace's state, e.g. a stopped
experiment), 413 (body too large), 415 (not JSON), 401 (no access token),
403 (read-only workspace) or 503 (workspace busy, with Retry-After); never a
stack trace. Writes take ``Content-Type: application/json``.
"""

from __future__ import annotations

import json

from starlette.requests import Request
from starlette.routing import Route

from . import services
from .common import ApiError, ApiResponse, blocking


async def _json_body(request: Request):
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype != "application/json":
        raise ApiError("Send the body as JSON with the header Content-Type: application/json.", 415)
    raw = await request.body()
    try:
        return json.loads(raw, parse_constant=_no_constant)
    except (ValueError, UnicodeDecodeError) as exc:
        raise ApiError(f"The body is not valid JSON ({exc}); send one JSON object, as the README's API section "
                       "shows.") from None
    except RecursionError:
        raise ApiError("The body is not valid JSON for this API: its lists or objects are nested too deeply; send the flat "
                       "form the README's API section shows.") from None


def _no_constant(name: str):
    """NaN, Infinity and -Infinity are not JSON (RFC 8259), though Python's reader takes them."""
    raise ValueError(f"{name} is not a JSON value; send a number or null")


async def score(request: Request) -> ApiResponse:
    payload = await _json_body(request)
    drafts = services.check_drafts_payload(payload)
    state = request.app.state.workspace
    scored, meta = await blocking(services.score, state, drafts, suggest=bool(payload.get("suggest", False)))
    return ApiResponse({"drafts": scored, **meta})


async def experiments(request: Request) -> ApiResponse:
    rows = await blocking(services.experiments_list, request.app.state.workspace)
    return ApiResponse({"experiments": rows})


async def experiment(request: Request) -> ApiResponse:
    name = request.path_params["name"]
    state = request.app.state.workspace
    await blocking(services.require_experiment, state, name)
    out = await blocking(services.status, state, name)
    out.pop("_status", None)
    return ApiResponse(out)


async def next_split(request: Request) -> ApiResponse:
    name = request.path_params["name"]
    payload = await _json_body(request)
    if not isinstance(payload, dict) or set(payload) - {"impressions", "policy"}:
        raise ApiError('The body must be a JSON object {"impressions": 2000} (optionally "policy": '
                       '"thompson" or "top-two").')
    state = request.app.state.workspace
    await blocking(services.require_experiment, state, name)
    policy = payload.get("policy")
    if policy is not None and not isinstance(policy, str):
        raise ApiError('"policy" must be "thompson" or "top-two".')
    out = await blocking(services.allocation, state, name, payload.get("impressions", 1000), policy)
    return ApiResponse(out)


async def results(request: Request) -> ApiResponse:
    name = request.path_params["name"]
    payload = await _json_body(request)
    rows, cumulative = services.check_results_payload(payload)
    state = request.app.state.workspace
    await blocking(services.require_experiment, state, name)
    out = await blocking(services.record, state, name, rows, cumulative, False)
    return ApiResponse(out)


async def drivers(request: Request) -> ApiResponse:
    rows, cautions = await blocking(services.drivers, request.app.state.workspace)
    return ApiResponse({"drivers": rows, "cautions": cautions})


routes = [
    Route("/api/score", score, methods=["POST"]),
    Route("/api/experiments", experiments, methods=["GET"]),
    Route("/api/experiments/{name}", experiment, methods=["GET"]),
    Route("/api/experiments/{name}/next", next_split, methods=["POST"]),
    Route("/api/experiments/{name}/results", results, methods=["POST"]),
    Route("/api/drivers", drivers, methods=["GET"]),
]
