"""A workspace whose last changes are still in its write-ahead log (``-wal``), left by a crash, when it cannot be
written: reading commands refuse (exit 2) rather than show the figures from before those changes, and nothing
is modified or deleted.

Simulated: the tests may run as root, who can write anywhere, so a read-only folder is the permission check
patched (as in ``tests/test_bad_inputs.py``); a full disk as in ``tests/test_full_disk.py``. The crash is real:
the database and its log are copied while another connection, with automatic checkpoints off, holds committed
changes only in the log (SQLite's WAL mode, https://www.sqlite.org/wal.html: a commit is in the WAL until a
checkpoint copies it back).
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import pytest

import contentlab.workspace as workspace

from conftest import run_cli as run

POSTS = ("post_id,published_at,headline,impressions,clicks\n"
         "p1,2026-03-02T09:15:00+00:00,Seven ways to use the library,1000,25\n"
         "p2,2026-03-03,Is the reading room open late?,800,12\n")


@pytest.fixture
def crashed(tmp_path, capsys) -> Path:
    """A workspace copied as a crash leaves it: its time zone set to Europe/Berlin only in the -wal file."""
    live = tmp_path / "live"
    (tmp_path / "posts.csv").write_text(POSTS, encoding="utf-8")
    code, _, err = run(capsys, ["import", str(tmp_path / "posts.csv"), "--timezone", "UTC", "--quiet",
                                "--workspace", str(live)])
    assert code == 0, err
    conn = sqlite3.connect(live / "workspace.sqlite")
    conn.execute("PRAGMA wal_autocheckpoint=0")
    with conn:
        conn.execute("UPDATE meta SET value='Europe/Berlin' WHERE key='timezone'")
    target = tmp_path / "ws"
    target.mkdir()
    for name in ("workspace.sqlite", "workspace.sqlite-wal"):  # the files as they are at this moment
        shutil.copyfile(live / name, target / name)
    conn.close()
    assert (target / "workspace.sqlite-wal").stat().st_size > 0
    return target


def snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_the_log_holds_committed_changes(crashed, capsys):
    """The reference for what the refusal protects: with write access the log is applied."""
    code, out, err = run(capsys, ["settings", "--workspace", str(crashed)])
    assert code == 0, err
    assert "Europe/Berlin" in out


@pytest.mark.parametrize("argv", [["settings"], ["experiment", "list"], ["features", "--quiet"]])
def test_read_only_with_unsaved_log_refuses_and_changes_nothing(crashed, capsys, monkeypatch, argv):
    monkeypatch.setattr(workspace, "_writable", lambda path, db: False)
    before = snapshot(crashed)
    code, out, err = run(capsys, argv + ["--workspace", str(crashed)])
    assert code == 2 and out == "" and "Traceback" not in err
    assert f"the workspace at {crashed} is read-only" in err
    assert str(crashed / "workspace.sqlite-wal") in err
    assert "write access" in err and "Make the folder writable" in err and "run the command again" in err
    assert snapshot(crashed) == before


def test_read_only_without_unsaved_log_still_reads(crashed, capsys, monkeypatch):
    code, _, err = run(capsys, ["settings", "--workspace", str(crashed)])  # applies the log; it is then empty
    assert code == 0, err
    monkeypatch.setattr(workspace, "_writable", lambda path, db: False)
    code, out, err = run(capsys, ["settings", "--workspace", str(crashed)])
    assert code == 0 and "Europe/Berlin" in out, err


def test_full_disk_with_unsaved_log_names_the_log(crashed, capsys, monkeypatch):
    class FullDiskConnection(workspace.WaitingConnection):
        """No room for the log's index (-shm): SQLite cannot read the database at all, so every statement fails."""

        def execute(self, sql, *args):
            raise sqlite3.OperationalError("disk I/O error")

    monkeypatch.setattr(workspace, "WaitingConnection", FullDiskConnection)
    monkeypatch.setattr(workspace, "disk_is_full", lambda path: True)
    before = snapshot(crashed)
    code, _, err = run(capsys, ["settings", "--workspace", str(crashed)])
    assert code == 2 and "is full" in err and str(crashed / "workspace.sqlite-wal") in err
    assert "Free some space" in err and "read-only" not in err
    assert snapshot(crashed) == before


def test_serve_refuses_at_start_up(crashed, monkeypatch):
    from contentlab.errors import WorkspaceReadOnly
    from contentlab.web import create_app

    monkeypatch.setattr(workspace, "_writable", lambda path, db: False)
    before = snapshot(crashed)
    with pytest.raises(WorkspaceReadOnly, match="workspace.sqlite-wal") as refused:
        create_app(crashed)
    assert refused.value.http_status == 403
    assert snapshot(crashed) == before
