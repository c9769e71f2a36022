"""What the web app keeps warm between requests: the model, the history and what follows from them.

Every ``contentlab`` command loads the model and the history afresh, which
costs seconds. The app loads them once and keeps them until the workspace
changes: each request reads two small numbers (the newest model's id and the
newest import's id, both indexed primary keys), and only when one of them
moved is anything reloaded. A ``learn`` run in a terminal, or an import from
the app or the CLI, is therefore picked up by the next request.

Database connections are opened per call (SQLite connections belong to one
thread, and the blocking library calls run in a thread pool); the library's
own writes are transactional and concurrency-safe, so several browser tabs
and a ``contentlab record`` in a terminal lose nothing.
"""

from __future__ import annotations

import threading
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

from ..errors import ContentlabError
from ..workspace import Workspace


@dataclass
class Warm:
    """The loaded model with the history it is scored against, valid for one ``key``."""

    key: tuple
    model: Any
    summary: dict
    history: Any  # posts DataFrame
    timezone: str
    stale: bool  # the model was learned before the latest change to the history
    cache: dict = field(default_factory=dict)  # per-model derived state (drivers, feature tables)


class WorkspaceState:
    """One workspace folder, its warm model and a lock so that one thread loads at a time."""

    def __init__(self, workspace_dir: str | Path):
        self.path = Path(workspace_dir)
        self._lock = threading.Lock()
        self._warm: Warm | None = None
        self._no_model_key: tuple | None = None
        with self.open():  # refuse at start-up when there is no workspace
            pass

    @contextmanager
    def open(self) -> Iterator[Workspace]:
        """A connection to the workspace for one call (never creates one)."""
        ws = Workspace.open(self.path, create=False)
        try:
            yield ws
        finally:
            ws.close()

    @staticmethod
    def version(ws: Workspace) -> tuple:
        """The cheap key of what the warm state depends on: newest model id and newest import id."""
        model_id = ws.conn.execute("SELECT MAX(id) FROM models").fetchone()[0]
        import_id = ws.conn.execute("SELECT MAX(id) FROM imports").fetchone()[0]
        return (model_id, import_id, ws.timezone)

    def warm(self, ws: Workspace | None = None) -> Warm:
        """The current model and history, loaded now only when the workspace changed since last time."""
        if ws is None:
            with self.open() as own:
                return self.warm(own)
        key = self.version(ws)
        current = self._warm
        if current is not None and current.key == key:
            return current
        with self._lock:
            current = self._warm
            if current is not None and current.key == key:
                return current
            if key[0] is None:
                raise ContentlabError(
                    f"No model in the workspace at {self.path} yet. Run: contentlab learn "
                    f"--workspace {self.path} (then reload this page)."
                )
            model, summary = ws.load_model()
            row = ws.latest_model_row()
            stale = bool(row is not None and row[3] != ws.fingerprint(row[2]))
            history = ws.posts()
            self._warm = Warm(key, model, summary, history, ws.timezone, stale)
            return self._warm

    def has_model(self, ws: Workspace) -> bool:
        return self.version(ws)[0] is not None

    def cached(self, warm: Warm, name: str, compute):
        """``compute()`` once per warm model and history (e.g. the drivers table)."""
        if name not in warm.cache:
            with self._lock:
                if name not in warm.cache:
                    warm.cache[name] = compute()
        return warm.cache[name]
