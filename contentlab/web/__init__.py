"""``contentlab serve``: a local web app and JSON API on one workspace, with the model kept warm.

Pages (Drafts, Experiments, History and drivers, Report, Import) and the API
under ``/api/`` call the same library functions as the commands. Starlette
serves them (uvicorn in ``contentlab serve``); templates are Jinja2 with
autoescape; the only script is htmx (vendored in ``static/``, version in
``static/VENDORED.txt``) and ``static/app.js``.
"""

from __future__ import annotations

__all__ = ["create_app"]


def create_app(workspace_dir, token=None, **kwargs):
    """The Starlette app on ``workspace_dir`` (see :func:`contentlab.web.app.create_app`)."""
    from .app import create_app as build

    return build(workspace_dir, token, **kwargs)
