"""The app factory: routes of the pages and the API, error handlers, security middleware, static files."""

from __future__ import annotations

import logging
from pathlib import Path

from starlette.applications import Starlette
from starlette.exceptions import HTTPException
from starlette.middleware import Middleware
from starlette.requests import Request
from starlette.responses import JSONResponse, Response
from starlette.routing import Mount
from starlette.staticfiles import StaticFiles

from ..errors import ContentlabError
from . import api
from .common import HERE, ApiError, json_error, render
from .pages import drafts, experiments, history, importing, report
from .security import BodyTooLarge, SecurityMiddleware
from .services import user_error
from .state import WorkspaceState

log = logging.getLogger("contentlab.web")

# Largest request body: an export of ~150,000 posts; larger histories go through contentlab import.
MAX_BODY_BYTES = 25_000_000
LOCAL_HOSTS = ["127.0.0.1", "localhost", "::1"]


def create_app(workspace_dir: str | Path, token: str | None = None, *, max_body: int = MAX_BODY_BYTES,
               allowed_hosts: list[str] | None = None) -> Starlette:
    """The web app on one workspace.

    ``token``: when given, every page and API call must carry it (see
    :mod:`contentlab.web.security`). ``allowed_hosts``: Host header names
    accepted (default: this computer's names when there is no token, any
    when there is one), against DNS rebinding of a local app.
    """
    state = WorkspaceState(workspace_dir)
    if allowed_hosts is None and not token:
        allowed_hosts = list(LOCAL_HOSTS)
    routes = [
        *drafts.routes,
        *experiments.routes,
        *history.routes,
        *report.routes,
        *importing.routes,
        *api.routes,
        Mount("/static", app=StaticFiles(directory=str(HERE / "static")), name="static"),
    ]
    app = Starlette(
        debug=False,
        routes=routes,
        middleware=[Middleware(SecurityMiddleware, token=token, max_body=max_body, allowed_hosts=allowed_hosts)],
        exception_handlers={
            ApiError: _api_error,
            ContentlabError: _library_error,
            BodyTooLarge: _too_large,
            HTTPException: _http_error,
            Exception: _unexpected,
        },
    )
    app.state.workspace = state
    return app


def _is_api(request: Request) -> bool:
    return request.url.path.startswith("/api/")


def _answer(request: Request, message: str, status: int) -> Response:
    if _is_api(request):
        response = json_error(message, status)
    else:
        response = render(request, "error.html", status=status, message=message, status_code=status)
    if status == 503:  # the workspace is busy: a client may try again shortly (RFC 9110, section 10.2.3)
        response.headers["Retry-After"] = "5"
    return response


async def _api_error(request: Request, exc: ApiError) -> Response:
    return _answer(request, exc.message, exc.status)


async def _library_error(request: Request, exc: ContentlabError) -> Response:
    err = user_error(exc)
    return _answer(request, err.message, err.status)


async def _too_large(request: Request, exc: BodyTooLarge) -> Response:
    return _answer(request, str(exc), 413)


async def _http_error(request: Request, exc: HTTPException) -> Response:
    if _is_api(request):
        messages = {404: f"No API endpoint {request.url.path[:200]}; see the README's API section.",
                    405: f"{request.url.path[:200]} does not take {request.method}; see the README's API section."}
    else:
        messages = {404: "There is no page at this address.", 405: "This address does not take that method."}
    return _answer(request, messages.get(exc.status_code, str(exc.detail)), exc.status_code)


async def _unexpected(request: Request, exc: Exception) -> Response:
    # The details go to the server's log only; the answer never carries a stack trace.
    log.error("unexpected error on %s %s", request.method, request.url.path, exc_info=exc)
    message = "Something went wrong on the server; nothing was changed by this request. The server log has details."
    if _is_api(request):
        return JSONResponse({"error": message}, status_code=500)
    return render(request, "error.html", status=500, message=message, status_code=500)
