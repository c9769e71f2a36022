"""The workspace: one SQLite file that holds a user's posts, models and tests.

SQLite through the standard library, in WAL mode with foreign keys on. The
schema carries a version number; :data:`MIGRATIONS` upgrades an older file in
place, one step at a time, each step in its own transaction.

Every write that belongs together happens inside one ``with self.conn:``
block, so an import or a ``record`` call lands whole or not at all.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sqlite3
import sys
import time
import zoneinfo
from contextlib import contextmanager
from datetime import datetime, timezone as dt_timezone
from pathlib import Path
from typing import Iterable, Iterator

import numpy as np
import pandas as pd

from .errors import ContentlabError, WorkspaceBusy, WorkspaceDiskFull, WorkspaceReadOnly

DEFAULT_DIR = "contentlab-workspace"
DB_NAME = "workspace.sqlite"
# The setting that marks a workspace the demo made: only such a workspace may the demo replace.
DEMO_MARK = ("created_by", "contentlab demo")

MIGRATIONS: list[str] = [
    # 1: posts and what imported them
    """
    CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
    CREATE TABLE posts (
        post_id       TEXT PRIMARY KEY,
        published_at  TEXT NOT NULL,      -- 'YYYY-MM-DD' or UTC 'YYYY-MM-DDTHH:MM:SS+00:00'
        has_time      INTEGER NOT NULL,   -- 0 when the export gave a date only
        headline      TEXT NOT NULL,      -- markup stripped
        impressions   INTEGER NOT NULL CHECK (impressions >= 0),
        clicks        INTEGER CHECK (clicks >= 0),
        engagements   INTEGER CHECK (engagements >= 0),
        channel       TEXT,
        body          TEXT,
        experiment_id TEXT,
        image_id      TEXT,
        cost          REAL,
        source        TEXT NOT NULL,      -- 'import' or 'experiment'
        updated_at    TEXT NOT NULL,
        row_hash      TEXT NOT NULL
    );
    CREATE INDEX posts_published ON posts (published_at);
    CREATE INDEX posts_experiment ON posts (experiment_id);
    CREATE TABLE imports (
        id INTEGER PRIMARY KEY,
        file TEXT NOT NULL, at TEXT NOT NULL,
        rows_read INTEGER, added INTEGER, updated INTEGER, unchanged INTEGER, rejected INTEGER
    );
    """,
    # 2: fitted models, drafts, experiments and their observations
    """
    CREATE TABLE models (
        id INTEGER PRIMARY KEY,
        created_at TEXT NOT NULL,
        outcome TEXT NOT NULL,
        fingerprint TEXT NOT NULL,
        summary TEXT NOT NULL,            -- JSON: validation figures, drivers
        blob BLOB NOT NULL                -- pickled fitted model with its featurizer
    );
    CREATE TABLE drafts (
        id INTEGER PRIMARY KEY,
        headline TEXT NOT NULL,
        channel TEXT,
        publish_at TEXT,
        group_name TEXT,
        created_at TEXT NOT NULL
    );
    CREATE TABLE experiments (
        name TEXT PRIMARY KEY,
        created_at TEXT NOT NULL,
        channel TEXT,
        status TEXT NOT NULL DEFAULT 'running' CHECK (status IN ('running', 'stopped')),
        settings TEXT NOT NULL DEFAULT '{}'   -- JSON: policy, prior strength, thresholds
    );
    CREATE TABLE arms (
        experiment TEXT NOT NULL REFERENCES experiments (name) ON DELETE CASCADE,
        arm TEXT NOT NULL,
        headline TEXT NOT NULL,
        prior_mean REAL,
        prior_strength REAL NOT NULL DEFAULT 0,
        PRIMARY KEY (experiment, arm)
    );
    CREATE TABLE observations (
        experiment TEXT NOT NULL,
        event_id TEXT NOT NULL,
        arm TEXT NOT NULL,
        at TEXT NOT NULL,
        impressions INTEGER NOT NULL CHECK (impressions >= 0),
        clicks INTEGER NOT NULL CHECK (clicks >= 0 AND clicks <= impressions),
        PRIMARY KEY (experiment, event_id),
        FOREIGN KEY (experiment, arm) REFERENCES arms (experiment, arm) ON DELETE CASCADE
    );
    """,
]
SCHEMA_VERSION = len(MIGRATIONS)
POST_COLUMNS = [
    "post_id", "published_at", "has_time", "headline", "impressions", "clicks", "engagements",
    "channel", "body", "experiment_id", "image_id", "cost",
]


# How long a command waits for another one writing to the same workspace, in seconds
# (CONTENTLAB_LOCK_WAIT overrides it), and after how long it says that it is waiting.
LOCK_WAIT_SECONDS = 60.0
LOCK_NOTICE_SECONDS = 1.0


def lock_wait_seconds() -> float:
    try:
        return max(0.0, float(os.environ.get("CONTENTLAB_LOCK_WAIT", LOCK_WAIT_SECONDS)))
    except ValueError:
        return LOCK_WAIT_SECONDS


class WaitingConnection(sqlite3.Connection):
    """A connection whose write transactions wait visibly for another writer, then give up clearly.

    ``with conn:`` (every write in contentlab) starts with ``BEGIN IMMEDIATE``:
    the write lock is taken before anything is read or written. If another
    process holds it, a line on stderr says so after a second; after
    :func:`lock_wait_seconds` a :class:`ContentlabError` says the workspace is
    busy, and nothing was written.
    """

    workspace_path: str = "the workspace"
    read_only: bool = False
    disk_full: bool = False  # opened for reading only because its disk had no room left

    def __enter__(self):
        if not self.in_transaction:
            self.begin_immediate()
        return super().__enter__()

    def begin_immediate(self) -> None:
        if self.disk_full:
            raise WorkspaceDiskFull(disk_full_message(self.workspace_path))
        if self.read_only:
            raise WorkspaceReadOnly(read_only_message(self.workspace_path))
        limit = lock_wait_seconds()
        start = time.monotonic()
        told = False
        while True:
            waited = time.monotonic() - start
            step = min(LOCK_NOTICE_SECONDS if not told else limit - waited, max(limit - waited, 0.0))
            self.execute(f"PRAGMA busy_timeout={int(step * 1000)}")
            try:
                self.execute("BEGIN IMMEDIATE")
                return
            except sqlite3.OperationalError as exc:
                if "locked" not in str(exc) and "busy" not in str(exc):
                    raise
            finally:
                self.execute(f"PRAGMA busy_timeout={int(LOCK_NOTICE_SECONDS * 1000)}")
            waited = time.monotonic() - start
            if waited >= limit:
                raise WorkspaceBusy(
                    f"the workspace at {self.workspace_path} is busy: another contentlab command has been writing to "
                    f"it for over {limit:.0f} s. Nothing was written; try again when it has finished."
                )
            if not told:
                print(f"waiting: another contentlab command is writing to {self.workspace_path} "
                      f"(up to {limit:.0f} s)...", file=sys.stderr, flush=True)
                told = True


def resolve_dir(directory: str | os.PathLike | None) -> Path:
    """``--workspace`` if given, else ``$CONTENTLAB_WORKSPACE``, else ./contentlab-workspace.

    An empty ``--workspace ""`` (an unset shell variable, say) is refused rather than taken for the default
    folder, where it would quietly make or change another workspace.
    """
    if directory is not None and not str(directory).strip():
        raise ContentlabError('--workspace is empty: give the workspace folder, or leave the option out for '
                              '$CONTENTLAB_WORKSPACE or ./contentlab-workspace.')
    if directory:
        return Path(directory)
    env = os.environ.get("CONTENTLAB_WORKSPACE")
    return Path(env) if env else Path(DEFAULT_DIR)


def now_utc() -> str:
    return datetime.now(dt_timezone.utc).strftime("%Y-%m-%dT%H:%M:%S+00:00")


def check_timezone(name: str) -> str:
    try:
        zoneinfo.ZoneInfo(name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ContentlabError(
            f"'{name}' is not an IANA time zone name. Use one like Europe/Berlin, America/New_York or UTC."
        ) from None
    return name


def row_hash(values: Iterable) -> str:
    """Stable digest of a post's stored values, to tell updated rows from unchanged ones."""
    parts = []
    for v in values:
        if v is None or (isinstance(v, float) and np.isnan(v)):
            parts.append("\x00")
        elif isinstance(v, float):
            parts.append(repr(round(v, 9)))
        else:
            parts.append(str(v))
    return hashlib.blake2b("\x1f".join(parts).encode("utf-8"), digest_size=12).hexdigest()


class Workspace:
    """A user's workspace folder and its SQLite database.

    Use :meth:`open` for an existing or new workspace. ``create=False``
    refuses to make a new one (commands that only read should not leave an
    empty folder behind).
    """

    def __init__(self, path: Path, conn: sqlite3.Connection):
        self.path = path
        self.conn = conn
        self.read_only = False
        self.created = False  # this call made the database (see :func:`opened`)

    # ---------------------------------------------------------- lifecycle
    @classmethod
    def open(cls, directory: str | os.PathLike | None = None, *, create: bool = True,
             timezone: str | None = None) -> "Workspace":
        path = resolve_dir(directory)
        db = path / DB_NAME
        if path.exists() and not path.is_dir():
            raise ContentlabError(
                f"{path} is a file, not a workspace folder; give --workspace a folder (new or existing)."
            )
        if db.exists() and not db.is_file():
            raise ContentlabError(f"{db} is not a file, so {path} is not a usable workspace; move that folder out "
                                  "of the way, or give --workspace another folder.")
        if db.is_file() and _empty_database(db):
            # SQLite would take an empty file for a new database: a workspace cut to nothing would quietly
            # start again, empty. Say so instead; only the user may decide to start afresh.
            raise ContentlabError(
                f"{path} is not a usable workspace: {db} is empty (0 bytes), as a copy or a crash that cut it short "
                "leaves it. Restore it from a backup; to start a new workspace in this folder, delete that file first."
            )
        created = False
        if not db.exists():
            if not create:
                raise ContentlabError(
                    f"No workspace at {path}. Import a post history first: contentlab import FILE "
                    f"(or point --workspace / CONTENTLAB_WORKSPACE at your workspace)."
                )
            try:
                path.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise ContentlabError(f"cannot create the workspace folder {path} ({exc.strerror}).") from None
            created = True
        read_only = not created and not _writable(path, db)
        full = False
        if read_only and _pending_wal(db):
            # Read-only, the database is opened without its log: the changes still in it would be missing.
            raise WorkspaceReadOnly(unsaved_log_message(path, db, "read-only"))
        try:
            if read_only:
                conn = _open_immutable(path, db)
            else:
                conn = sqlite3.connect(db, timeout=LOCK_NOTICE_SECONDS, factory=WaitingConnection)
                try:
                    if not created:
                        _refuse_foreign(conn, path, db)  # before anything is written to it, the journal mode included
                    conn.execute("PRAGMA journal_mode=WAL")
                except sqlite3.OperationalError as exc:
                    # A full disk has no room for the WAL's side files, so even reading fails. With no
                    # unsaved WAL content the file itself is whole: read it as it is, refuse writes plainly.
                    if created or _is_corrupt(exc) or not disk_is_full(path):
                        raise
                    pending = _pending_wal(db)  # looked at before closing: SQLite may remove the log on close
                    conn.close()
                    if pending:
                        raise WorkspaceDiskFull(unsaved_log_message(path, db, "full")) from None
                    conn, read_only, full = _open_immutable(path, db), True, True
                # In WAL mode NORMAL is still safe from corruption; a power cut can lose
                # only the last commits, and it makes a large import several times faster.
                if not full:
                    conn.execute("PRAGMA synchronous=NORMAL")
            conn.execute("PRAGMA foreign_keys=ON")
            conn.workspace_path = str(path)
            conn.read_only = read_only
            conn.disk_full = full
            ws = cls(path, conn)
            ws.read_only = read_only
            ws.created = created
            ws._migrate()
        except sqlite3.DatabaseError as exc:
            if isinstance(exc, sqlite3.OperationalError) and not _is_corrupt(exc):
                raise
            raise ContentlabError(not_usable(path, exc)) from None
        if timezone is not None:
            ws.set_setting("timezone", check_timezone(timezone))
        return ws

    def close(self) -> None:
        self.conn.close()

    def __enter__(self) -> "Workspace":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _version(self) -> int:
        has_meta = self.conn.execute(
            "SELECT 1 FROM sqlite_master WHERE type='table' AND name='meta'"
        ).fetchone()
        if not has_meta:
            return 0
        row = self.conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        try:
            return int(row[0]) if row else 0
        except (TypeError, ValueError):  # answered as "not a usable workspace" by open()
            raise sqlite3.DatabaseError(f"its schema version {str(row[0])[:40]!r} is not a number") from None

    def _migrate(self) -> None:
        version = self._version()
        if version > SCHEMA_VERSION:
            raise ContentlabError(
                f"{self.path} was written by a newer contentlab (schema {version}, this one knows "
                f"{SCHEMA_VERSION}). Upgrade contentlab to use it."
            )
        if version < SCHEMA_VERSION and self.read_only:
            raise ContentlabError(
                f"{self.path} is read-only and was written by an older contentlab; it needs an upgrade that can "
                "only be written to a folder you may change. Copy it somewhere writable first."
            )
        for step in range(version, SCHEMA_VERSION):
            # executescript commits implicitly, so run the DDL inside an explicit
            # BEGIN IMMEDIATE ... COMMIT that we control.
            self.conn.begin_immediate()
            try:
                if self._version() != step:  # another process migrated meanwhile
                    self.conn.execute("ROLLBACK")
                    continue
                for statement in _split_sql(MIGRATIONS[step]):
                    self.conn.execute(statement)
                if step == 0:
                    self.conn.execute("INSERT INTO meta VALUES ('timezone', 'UTC')")
                    self.conn.execute("INSERT INTO meta VALUES ('created_at', ?)", (now_utc(),))
                self.conn.execute(
                    "INSERT INTO meta VALUES ('schema_version', ?) "
                    "ON CONFLICT(key) DO UPDATE SET value=excluded.value",
                    (str(step + 1),),
                )
                self.conn.execute("COMMIT")
            except BaseException:
                self.conn.execute("ROLLBACK")
                raise

    # ----------------------------------------------------------- settings
    def setting(self, key: str, default: str | None = None) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key=?", (key,)).fetchone()
        return row[0] if row else default

    def set_setting(self, key: str, value: str) -> None:
        with self.conn:
            self.conn.execute(
                "INSERT INTO meta VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET value=excluded.value",
                (key, value),
            )

    @property
    def timezone(self) -> str:
        """The stored IANA time zone; one this computer does not know (a damaged setting, or older time-zone data) is refused."""
        name = self.setting("timezone", "UTC") or "UTC"
        try:
            zoneinfo.ZoneInfo(name)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            raise ContentlabError(
                f"the workspace at {self.path} has the time zone '{str(name)[:60]}', which this computer does not know "
                "(the setting is damaged, or this computer's time-zone data is older). Set it again with: contentlab "
                "settings --timezone Europe/London (your zone); nothing else changes."
            ) from None
        return name

    # -------------------------------------------------------------- posts
    def existing_hashes(self, post_ids: Iterable[str]) -> dict[str, str]:
        """row_hash of the given post_ids that are already stored."""
        out: dict[str, str] = {}
        ids = list(post_ids)
        for start in range(0, len(ids), 900):  # SQLite's bound-parameter limit
            chunk = ids[start:start + 900]
            marks = ",".join("?" * len(chunk))
            for pid, h in self.conn.execute(
                f"SELECT post_id, row_hash FROM posts WHERE post_id IN ({marks})", chunk
            ):
                out[pid] = h
        return out

    def upsert_posts(self, posts: pd.DataFrame, source: str = "import", progress=None) -> tuple[int, int, int]:
        """Insert new posts, update changed ones; return (added, updated, unchanged).

        The caller wraps this in ``with ws.conn:`` together with anything else
        that must land with it. Values and digests are prepared a column at a
        time (a million posts in seconds); :func:`row_hash` stays the
        definition, and the tests check the two agree.
        """
        if posts.empty:
            return 0, 0, 0
        frame = posts[POST_COLUMNS]
        stamp = now_utc()
        cols = ", ".join(POST_COLUMNS + ["source", "updated_at", "row_hash"])
        marks = ", ".join("?" * (len(POST_COLUMNS) + 3))
        insert_sql = f"INSERT INTO posts ({cols}) VALUES ({marks})"
        sets = ", ".join(f"{c}=?" for c in POST_COLUMNS[1:] + ["source", "updated_at", "row_hash"])
        update_sql = f"UPDATE posts SET {sets} WHERE post_id=?"
        added = updated = unchanged = 0
        # In batches, so that memory stays flat however large the import; the
        # caller's transaction still makes the whole upsert one unit.
        step = 50_000
        for start in range(0, len(frame), step):
            batch = frame.iloc[start:start + step]
            columns = [_sql_values(batch[c]) for c in POST_COLUMNS]
            hashes = _row_hashes(batch)
            ids = columns[0]
            existing = self.existing_hashes(ids)
            inserts, updates = [], []
            for pos, (pid, h) in enumerate(zip(ids, hashes)):
                old = existing.get(pid)
                if old is None:
                    inserts.append(tuple(col[pos] for col in columns) + (source, stamp, h))
                    existing[pid] = h  # a repeat later in the same frame is then an update
                elif old != h:
                    updates.append(tuple(col[pos] for col in columns[1:]) + (source, stamp, h, pid))
                    existing[pid] = h
                else:
                    unchanged += 1
            self.conn.executemany(insert_sql, inserts)
            self.conn.executemany(update_sql, updates)
            added += len(inserts)
            updated += len(updates)
            if progress is not None:
                progress.update(len(batch))
        return added, updated, unchanged

    def record_import(self, file: str, rows_read: int, added: int, updated: int, unchanged: int, rejected: int) -> None:
        self.conn.execute(
            "INSERT INTO imports (file, at, rows_read, added, updated, unchanged, rejected) VALUES (?,?,?,?,?,?,?)",
            (file, now_utc(), rows_read, added, updated, unchanged, rejected),
        )

    def count_posts(self) -> int:
        return self.conn.execute("SELECT COUNT(*) FROM posts").fetchone()[0]

    def posts(self) -> pd.DataFrame:
        """All posts with local date, hour and weekday in the workspace's time zone."""
        frame = pd.read_sql_query(
            f"SELECT {', '.join(POST_COLUMNS)}, source FROM posts ORDER BY published_at, post_id", self.conn
        )
        return add_local_time(frame, self.timezone)

    def fingerprint(self, outcome: str) -> str:
        """Digest of the history a model would learn from (ids and their values)."""
        digest = hashlib.blake2b(digest_size=16)
        digest.update(outcome.encode())
        for (h,) in self.conn.execute("SELECT row_hash FROM posts ORDER BY post_id"):
            digest.update(h.encode())
        return digest.hexdigest()

    # ------------------------------------------------------------- models
    def save_model(self, outcome: str, fingerprint: str, summary: dict, model: object) -> int:
        from .modelfile import dumps

        blob = dumps(model)
        with self.conn:
            cur = self.conn.execute(
                "INSERT INTO models (created_at, outcome, fingerprint, summary, blob) VALUES (?,?,?,?,?)",
                (now_utc(), outcome, fingerprint, json.dumps(summary, default=_json_default), blob),
            )
        return int(cur.lastrowid)

    def latest_model_row(self, outcome: str | None = None, offset: int = 0):
        sql = "SELECT id, created_at, outcome, fingerprint, summary, blob FROM models"
        args: tuple = ()
        if outcome:
            sql += " WHERE outcome=?"
            args = (outcome,)
        sql += " ORDER BY id DESC LIMIT 1 OFFSET ?"
        return self.conn.execute(sql, args + (offset,)).fetchone()

    def load_model(self, outcome: str | None = None):
        """The newest fitted model (and its summary), or a clear error when there is none."""
        row = self.latest_model_row(outcome)
        if row is None:
            raise ContentlabError(
                f"No model in the workspace at {self.path}{' for ' + outcome if outcome else ''}. "
                "Run: contentlab learn"
            )
        from .modelfile import loads

        model = loads(row[5], where=f"the workspace at {self.path}")
        from .modelfile import RELEARN

        return model, stored_json(row[4], f"The model saved in the workspace at {self.path}", RELEARN)


@contextmanager
def opened(directory: str | os.PathLike | None = None, *, create: bool = True) -> Iterator[Workspace]:
    """A workspace for one command; if this call created it and the command fails, it is removed again.

    So a command refused for bad input (``settings --timezone Nope/Zone``,
    ``experiment new ../x``) never leaves a new, empty workspace behind.
    """
    path = resolve_dir(directory)
    folder_existed = path.exists()
    ws = Workspace.open(directory, create=create)
    try:
        yield ws
    except BaseException:
        ws.close()
        if ws.created:
            remove_new_workspace(path, remove_folder=not folder_existed)
        raise
    else:
        ws.close()


def remove_new_workspace(folder: Path, remove_folder: bool) -> None:
    """Delete the database files a failed first command made (and the folder, only if it made it and it is empty)."""
    for suffix in ("", "-wal", "-shm", "-journal"):
        (folder / f"{DB_NAME}{suffix}").unlink(missing_ok=True)
    if remove_folder:
        try:
            folder.rmdir()  # only if empty: never removes anything we did not create
        except OSError:
            pass


def stored_json(text, where: str, fix: str) -> dict:
    """A JSON object stored in the workspace (settings, summaries), or a clear error when it is damaged.

    ``where`` names what holds it ("The model saved in ..."), ``fix`` says how to recover.
    """
    try:
        value = json.loads(text) if text else {}
    except (TypeError, ValueError) as exc:
        raise ContentlabError(f"{where} is damaged (what it stored is not valid JSON: {exc}). {fix}") from None
    if not isinstance(value, dict):
        raise ContentlabError(f"{where} is damaged (what it stored is a JSON {type(value).__name__}, "
                              f"not an object). {fix}")
    return value


def read_only_message(path) -> str:
    """The one message for a write to a workspace the user may not change."""
    return (f"the workspace at {path} is read-only (its folder or database file cannot be written), and this "
            "command needs to write to it; nothing was written. Reading commands still work; to change it, "
            "copy it to a folder you may write to, or ask for write access.")


def disk_full_message(path) -> str:
    """The one message for a write to a workspace whose disk has no room left."""
    return (f"the disk holding the workspace at {path} is full; nothing was written (reading commands still work). "
            "Free some space and run the command again.")


def unsaved_log_message(path, db: Path, why: str) -> str:
    """The one message for a workspace whose last changes are still in its ``-wal`` file when it cannot be written
    (``why``: "read-only" or "full"): read without them it would show figures from before those changes."""
    wal = _wal_path(db)
    if why == "full":
        cannot, fix = (f"the disk holding the workspace at {path} is full", "Free some space and run the command again")
    else:
        cannot, fix = (f"the workspace at {path} is read-only (its folder or database file cannot be written)",
                       "Make the folder writable (or copy the whole workspace folder somewhere you may write) and run "
                       "the command again")
    return (f"{cannot}, and its last changes are still in {wal} (a command stopped before saving them, or another "
            "is writing): they can only be applied with write access, and without them the workspace would show "
            f"figures from before those changes. Nothing was read, changed or deleted. {fix}.")


# Below this much free space a SQLite error on opening or writing is taken for a full disk: the WAL's side
# files and one transaction's pages need at least this much (common practice: SQLite's default page cache
# is 2 MiB, a WAL index 32 KiB).
FULL_DISK_BYTES = 1 << 20


def disk_is_full(path) -> bool:
    """Whether the disk holding ``path`` (or its nearest existing parent) has less than FULL_DISK_BYTES free."""
    path = Path(path)
    while not path.exists() and path != path.parent:
        path = path.parent
    try:
        return shutil.disk_usage(path).free < FULL_DISK_BYTES
    except OSError:
        return False


def _pending_wal(db: Path) -> bool:
    """Whether the database has a write-ahead log with content not yet copied back (left by a crash)."""
    try:
        return _wal_path(db).stat().st_size > 0
    except OSError:
        return False


def _wal_path(db: Path) -> Path:
    """The database's write-ahead log (SQLite's name for it: the database's name with ``-wal``)."""
    return db.with_name(db.name + "-wal")


def _open_immutable(path: Path, db: Path) -> sqlite3.Connection:
    """Nobody can write here, so nothing changes under us: open without the WAL's side files."""
    conn = sqlite3.connect(f"{db.resolve().as_uri()}?immutable=1", uri=True, timeout=LOCK_NOTICE_SECONDS,
                           factory=WaitingConnection)
    conn.execute("PRAGMA query_only=ON")
    _refuse_foreign(conn, path, db)
    return conn


def not_usable(path: Path, exc: BaseException) -> str:
    """The one message for a workspace database that SQLite cannot read."""
    return (f"{path} is not a usable workspace: {path / DB_NAME} cannot be read as a contentlab database "
            f"({exc}). Restore it from a backup, or use another --workspace.")


def _refuse_foreign(conn: sqlite3.Connection, path: Path, db: Path) -> None:
    """An SQLite file with tables but no contentlab ``meta`` table is another program's database (or one whose
    settings table was lost): adding contentlab's tables to it would change a file that is not ours."""
    tables = [name for (name,) in conn.execute(
        "SELECT name FROM sqlite_master WHERE type='table' AND name NOT LIKE 'sqlite_%' ORDER BY name")]
    if tables and "meta" not in tables:
        conn.close()
        shown = ", ".join(tables[:5]) + (f" and {len(tables) - 5} more" if len(tables) > 5 else "")
        raise ContentlabError(
            f"{path} is not a usable workspace: {db} is an SQLite database without contentlab's settings table "
            f"(it holds the table(s) {shown}), so it belongs to another program or lost part of itself; nothing "
            "was changed in it. Give --workspace another folder, or restore the workspace from a backup."
        )


def _is_corrupt(exc: sqlite3.DatabaseError) -> bool:
    text = str(exc).lower()
    return any(k in text for k in ("not a database", "malformed", "corrupt", "no such table", "file is encrypted"))


def _empty_database(db: Path) -> bool:
    """A database file of 0 bytes with no write-ahead log holding pages for it."""
    try:
        if db.stat().st_size:
            return False
        return not _pending_wal(db)
    except OSError:
        return False


def _writable(path: Path, db: Path) -> bool:
    return os.access(path, os.W_OK) and os.access(db, os.W_OK)


def add_local_time(frame: pd.DataFrame, timezone: str) -> pd.DataFrame:
    """Add local_date, local_hour (NaN when only a date is known) and local_weekday."""
    frame = frame.copy()
    text = frame["published_at"].astype(str)
    has_time = frame["has_time"].astype(bool).to_numpy() if "has_time" in frame else text.str.len().gt(10).to_numpy()
    local_date = pd.Series(pd.NaT, index=frame.index, dtype="datetime64[ns]")
    hour = np.full(len(frame), np.nan)
    if (~has_time).any():
        days = pd.to_datetime(text[~has_time], format="%Y-%m-%d", errors="coerce")
        if days.isna().any():
            _damaged_time(frame.loc[~has_time].loc[days.isna().to_numpy()])
        local_date[~has_time] = days.to_numpy()
    if has_time.any():
        stamps = pd.to_datetime(text[has_time], utc=True, format="ISO8601", errors="coerce")
        if stamps.isna().any():
            _damaged_time(frame.loc[has_time].loc[stamps.isna().to_numpy()])
        stamps = stamps.dt.tz_convert(timezone)
        local_date[has_time] = stamps.dt.tz_localize(None).dt.normalize().to_numpy()
        hour[has_time] = (stamps.dt.hour + stamps.dt.minute / 60.0).to_numpy()
    frame["local_date"] = local_date
    frame["local_hour"] = hour
    frame["local_weekday"] = local_date.dt.day_of_week.astype(float).to_numpy()
    return frame


def _damaged_time(bad: pd.DataFrame) -> None:
    """Stored times are written only by contentlab; one it cannot read means the database was changed or damaged."""
    pid = str(bad["post_id"].iat[0]) if "post_id" in bad else "?"
    raise ContentlabError(
        f"the workspace holds {len(bad)} post(s) whose stored time cannot be read (post '{pid[:60]}': "
        f"'{str(bad['published_at'].iat[0])[:40]}'); its database was changed outside contentlab or is damaged. "
        "Import the export holding those posts again (it rewrites their times), or restore the workspace from a backup."
    )


def _is_missing(value) -> bool:
    if value is None:
        return True
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _native(value):
    """NumPy scalars as Python ones (what sqlite3 and row_hash expect); missing as None."""
    if _is_missing(value):
        return None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


def _sql_values(column: pd.Series) -> list:
    """One column as Python values for sqlite3, missing values as None."""
    kind = column.dtype.kind if isinstance(column.dtype, np.dtype) else ""
    if kind in "iu" and kind:
        return column.tolist()
    if kind == "f":
        return [None if v != v else v for v in column.tolist()]
    if _all_text(column):
        return _fill_missing(column, None)
    return [_native(v) for v in column.astype(object).tolist()]


def _fill_missing(column: pd.Series, fill) -> list:
    # Into an object array by hand: pandas' where() and NumPy's str arrays drop a trailing "\x00".
    values = column.to_numpy(dtype=object, copy=True)
    values[column.isna().to_numpy()] = fill
    return values.tolist()


def _all_text(column: pd.Series) -> bool:
    """True when every value is text or missing (the common case, handled without a Python loop)."""
    return isinstance(column.dtype, pd.StringDtype) or pd.api.types.infer_dtype(column, skipna=True) in ("string", "empty")


def _hash_texts(column: pd.Series) -> list[str]:
    """Each value as :func:`row_hash` writes it."""
    kind = column.dtype.kind if isinstance(column.dtype, np.dtype) else ""
    if kind in "iu" and kind:
        return column.astype(str).tolist()
    if kind == "f":
        return ["\x00" if v != v else repr(round(v, 9)) for v in column.tolist()]
    if _all_text(column):
        return _fill_missing(column, "\x00")
    out = []
    for v in column.astype(object).tolist():
        v = _native(v)
        if v is None:
            out.append("\x00")
        elif isinstance(v, float):
            out.append("\x00" if np.isnan(v) else repr(round(v, 9)))
        else:
            out.append(str(v))
    return out


def _row_hashes(frame: pd.DataFrame) -> list[str]:
    """:func:`row_hash` of every row of ``frame[POST_COLUMNS]``, a column at a time."""
    texts = [_hash_texts(frame[c]) for c in POST_COLUMNS]
    blake2b = hashlib.blake2b
    return [blake2b("\x1f".join(parts).encode("utf-8"), digest_size=12).hexdigest() for parts in zip(*texts)]


def _split_sql(script: str) -> list[str]:
    statements = []
    for part in script.split(";"):
        lines = [line.split("--", 1)[0] for line in part.splitlines()]
        stmt = "\n".join(lines).strip()
        if stmt:
            statements.append(stmt)
    return statements


def _json_default(value):
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return float(value)
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")
