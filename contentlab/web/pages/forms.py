"""Reading a posted form with its CSRF check (shared by every page that takes a post)."""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from starlette.datastructures import UploadFile
from starlette.requests import Request

from ...errors import ContentlabError
from ..common import ApiError
from ..security import csrf_ok

MAX_FIELD_BYTES = 200_000  # a textarea of drafts, not a file


async def checked_form(request: Request, *, files: int = 0):
    """The form of a POST whose CSRF value matches its cookie, else 403 (nothing read further)."""
    form = await request.form(max_files=files, max_fields=50, max_part_size=MAX_FIELD_BYTES)
    if not csrf_ok(request, form):
        raise ApiError("This form has expired or came from another site (CSRF check failed); reload the page and "
                       "send it again.", 403)
    return form


def text(form, name: str, limit: int = 100_000) -> str:
    """A text field (files and missing fields count as empty); one over ``limit`` characters is refused, never
    cut (a cut event id or time would be stored as something the user did not type)."""
    value = form.get(name)
    if not isinstance(value, str):
        return ""
    if len(value) > limit:
        raise ApiError(f"The field '{name}' has {len(value):,} characters; it may have at most {limit:,}. Shorten it "
                       "and send the form again (nothing was changed).")
    return value


def is_htmx(request: Request) -> bool:
    return request.headers.get("hx-request") == "true"


def upload_name(upload: UploadFile | None, default: str) -> str:
    """The uploaded file's own name (no folders, at most 120 characters) for messages; never used as a path."""
    name = (upload.filename if upload is not None else None) or default
    return Path(name.replace("\\", "/")).name[:120] or default


def save_upload(upload: UploadFile, target: Path) -> int:
    """Write the upload to ``target`` (a fixed name in a private temporary folder); its size in bytes."""
    upload.file.seek(0)
    with open(target, "wb") as out:
        shutil.copyfileobj(upload.file, out)
    return target.stat().st_size


@contextmanager
def saved_upload(upload: UploadFile, name: str, if_empty: str) -> Iterator[Path]:
    """The upload saved as ``name`` (``name.gz`` when gzip-compressed) in a private temporary folder, removed
    after; an empty upload is refused with ``if_empty``. The folder may take other files (a column map)."""
    with tempfile.TemporaryDirectory(prefix="contentlab-upload-") as tmp:
        path = Path(tmp) / name
        if save_upload(upload, path) == 0:
            raise ContentlabError(if_empty)
        with open(path, "rb") as fh:
            if fh.read(2) == b"\x1f\x8b":
                path = path.rename(path.with_name(name + ".gz"))
        yield path
