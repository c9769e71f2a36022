"""Shared by the page and API modules: templates, thread-pool calls, JSON answers, number formats."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Any, Callable

from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import HTMLResponse, JSONResponse

from ..percentages import finite_or_none as finite  # a float for JSON, or None (JSON has no NaN)
from ..percentages import percent, probability, signed_percent
from .security import CSRF_COOKIE, CSRF_FIELD

HERE = Path(__file__).resolve().parent


class ApiError(Exception):
    """A problem the caller can fix, answered as ``{"error": message}`` with ``status``."""

    def __init__(self, message: str, status: int = 400):
        super().__init__(message)
        self.message = message
        self.status = status


@lru_cache(maxsize=1)
def environment():
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(HERE / "templates")),
        autoescape=True,  # every user string is escaped unless a template says otherwise (none does)
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["pct"] = percent
    env.filters["signed_pct"] = signed_percent
    env.filters["prob"] = probability  # the report's and the terminal's words: "87%", ">99%"
    env.filters["count"] = count
    return env


def render(request: Request, template: str, status: int = 200, **context: Any) -> HTMLResponse:
    """A template as HTML, with the CSRF value for its forms and the current page for the menu."""
    context.setdefault("csrf", request.cookies.get(CSRF_COOKIE, ""))
    context.setdefault("csrf_field", CSRF_FIELD)
    context.setdefault("page", request.url.path.split("/")[1] or "drafts")
    html = environment().get_template(template).render(**context)
    return HTMLResponse(html, status_code=status)


async def blocking(func: Callable, *args, **kwargs):
    """Run a blocking library call in the thread pool, so other requests go on meanwhile."""
    return await run_in_threadpool(func, *args, **kwargs)


class ApiResponse(JSONResponse):
    """JSON whose every value is plain: numpy scalars become numbers, NaN, infinity and pandas' missing become null.

    JSON has no NaN, and a missing cell (a draft sent without ``publish_at``) must not turn a good answer into
    a server error.
    """

    def render(self, content: Any) -> bytes:
        from ..experiments import jsonable

        return super().render(jsonable(_no_missing(content)))


def _no_missing(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _no_missing(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_no_missing(v) for v in obj]
    if obj is not None and not isinstance(obj, (str, bool, int, float)):
        import pandas as pd

        try:
            if pd.isna(obj):  # pd.NA, pd.NaT
                return None
        except (TypeError, ValueError):
            pass
    return obj


def json_error(message: str, status: int) -> JSONResponse:
    return ApiResponse({"error": message}, status_code=status)


def count(value: Any) -> str:
    x = finite(value)
    return "n/a" if x is None else f"{x:,.0f}"
