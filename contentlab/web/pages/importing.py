"""Import: upload an export (and an optional column map); every row problem in a table; all or nothing.

The upload is written to a private temporary folder under fixed names (never
a name the user sent), validated with the importer's own reader, and stored
only when no row has a problem, through :func:`contentlab.history.import_history`
(one transaction). File names in messages are the uploaded name, not the
temporary path.
"""

from __future__ import annotations


from starlette.datastructures import UploadFile
from starlette.requests import Request
from starlette.routing import Route

from ...errors import ContentlabError
from ..common import blocking, render
from .forms import checked_form, save_upload, saved_upload, upload_name

MAX_PROBLEMS_SHOWN = 500


def _import(state, data: UploadFile, mapping: UploadFile | None, shown: str, shown_map: str) -> dict:
    from ...history import import_history
    from ...ingest import read_history

    with saved_upload(data, "export.csv", f"{shown}: the file is empty; nothing was imported.") as path:
        map_path = None
        if mapping is not None:
            map_path = path.parent / "columns.toml"
            save_upload(mapping, map_path)

        def named(text: str) -> str:
            text = text.replace(str(path), shown)
            return text.replace(str(map_path), shown_map) if map_path is not None else text

        try:
            with state.open() as ws:
                history = read_history(path, map_path, timezone=ws.timezone)
                if history.problems:
                    problems = [{"row": p.row, "column": p.column, "reason": named(p.reason)}
                                for p in history.problems[:MAX_PROBLEMS_SHOWN]]
                    return {"rejected": True, "rows_read": history.rows_read, "problems": problems,
                            "n_problems": len(history.problems), "n_bad_rows": int(history.rejected.shape[0])}
                summary = import_history(ws, path, map_path)
        except ContentlabError as exc:
            raise ContentlabError(named(str(exc))) from None
    return {"rejected": False, "summary": named(summary.line()), "notes": [named(n) for n in summary.notes]}


async def page(request: Request):
    return render(request, "import.html", outcome=None, error=None)


async def upload(request: Request):
    form = await checked_form(request, files=2)
    data = form.get("export")
    mapping = form.get("column_map")
    if not isinstance(data, UploadFile) or not data.filename:
        return render(request, "import.html", status=400, outcome=None, error="Choose an export file to upload.")
    if not isinstance(mapping, UploadFile) or not mapping.filename:
        mapping = None
    shown = upload_name(data, "export.csv")
    shown_map = upload_name(mapping, "columns.toml")
    try:
        outcome = await blocking(_import, request.app.state.workspace, data, mapping, shown, shown_map)
    except ContentlabError as exc:
        return render(request, "import.html", status=400, outcome=None, error=str(exc), file=shown)
    finally:
        await data.close()
        if mapping is not None:
            await mapping.close()
    return render(request, "import.html", status=400 if outcome["rejected"] else 200, outcome=outcome, error=None,
                  file=shown)


routes = [
    Route("/import", page, methods=["GET"]),
    Route("/import", upload, methods=["POST"]),
]
