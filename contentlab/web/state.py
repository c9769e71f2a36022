"""What the web app keeps warm between requests: the model, the history and what follows from them.

Every ``contentlab`` command loads the model and the history afresh, which
costs seconds. The app loads them once and keeps them until the workspace
changes: each request reads four indexed maxima (newest model, import,
observation and post rows), and only what moved is reloaded (the model only
when a newer one was saved). A ``learn`` run in a terminal, or an import from
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


# Derived state that depends on the model alone, kept when only the history changed.
MODEL_ONLY = {"drivers"}


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
        """The cheap key of what the warm state depends on (each an indexed maximum: O(1) reads).

        The newest model id; the newest import id, observation and post rows (recording results
        adds or updates the arms' posts, importing adds or updates posts); the time zone.
        """
        row = ws.conn.execute(
            "SELECT (SELECT MAX(id) FROM models), (SELECT MAX(id) FROM imports), "
            "(SELECT MAX(rowid) FROM observations), (SELECT MAX(rowid) FROM posts)"
        ).fetchone()
        return (*row, ws.timezone)

    def warm(self, ws: Workspace | None = None) -> Warm:
        """The current model and history; the model is loaded again only when a newer one was saved,
        the history only when posts or results changed."""
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
            if current is not None and current.key[0] == key[0]:
                model, summary = current.model, current.summary  # same model, newer history
            else:
                model, summary = ws.load_model()
            row = ws.conn.execute("SELECT outcome, fingerprint FROM models WHERE id=?", (key[0],)).fetchone()
            stale = bool(row is not None and row[1] != ws.fingerprint(row[0]))
            history = ws.posts()
            kept = {k: v for k, v in current.cache.items() if k in MODEL_ONLY} \
                if current is not None and current.model is model else {}
            self._warm = Warm(key, model, summary, history, ws.timezone, stale, kept)
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
