"""A workspace on a full disk: reading commands still work, writes are refused with one line that says the
disk is full (exit 2, HTTP 507), and the workspace is unchanged.

Simulated: SQLite answers "disk I/O error" when a full disk stops it from making the write-ahead log's side
files, which it needs even to read; the test makes the journal-mode step fail that way and reports the disk
as full (a real full disk, a small tmpfs, behaves the same: /work/scratch/faults2/battery2.py checks it).
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

import contentlab.workspace as workspace
from contentlab.cli import explain_failure

from conftest import run_cli as run, workspace_digest


class FullDiskConnection(workspace.WaitingConnection):
    def execute(self, sql, *args):
        if sql.startswith("PRAGMA journal_mode"):
            raise sqlite3.OperationalError("disk I/O error")
        return super().execute(sql, *args)


@pytest.fixture
def full(laser_ws, monkeypatch) -> Path:
    monkeypatch.setattr(workspace, "WaitingConnection", FullDiskConnection)
    monkeypatch.setattr(workspace, "disk_is_full", lambda path: True)
    return laser_ws


@pytest.mark.parametrize("argv", [
    ["settings"],
    ["experiment", "status", "laser"],
    ["experiment", "list"],
    ["drivers"],
    ["report", "--out", "{tmp}/elsewhere"],
])
def test_reading_commands_work_on_a_full_disk(full, tmp_path, capsys, argv):
    before = workspace_digest(full)
    code, out, err = run(capsys, [a.replace("{tmp}", str(tmp_path)) for a in argv] + ["--workspace", str(full)])
    assert code == 0, err
    assert workspace_digest(full) == before


@pytest.mark.parametrize("argv", [
    ["record", "laser", "--arm", "A", "--impressions", "9", "--clicks", "1", "--event-id", "f1"],
    ["settings", "--timezone", "Europe/Paris"],
    ["experiment", "new", "other", "Draft one here", "Draft two here", "--flat-prior", "--channel", "newsletter"],
    ["import", "{tmp}/f.csv", "--quiet"],
])
def test_writing_commands_say_the_disk_is_full(full, tmp_path, capsys, argv):
    (tmp_path / "f.csv").write_text("post_id,published_at,headline,impressions,clicks\nn1,2026-03-02,A headline,9,1\n",
                                    encoding="utf-8")
    before = workspace_digest(full)
    code, _, err = run(capsys, [a.replace("{tmp}", str(tmp_path)) for a in argv] + ["--workspace", str(full)])
    assert code == 2 and "is full" in err and "Free some space" in err and "Traceback" not in err
    assert "read-only" not in err
    assert workspace_digest(full) == before


def test_unsaved_write_ahead_log_is_never_read_past(full, capsys):
    """A crash can leave commits only in the -wal file; reading the main file alone would show old figures,
    so then the command stops with the disk-full line instead."""
    (full / "workspace.sqlite-wal").write_bytes(b"\0" * 32)
    code, out, err = run(capsys, ["experiment", "status", "laser", "--workspace", str(full)])
    assert code == 2 and "is full" in err and "Free some space" in err


def test_disk_io_error_names_a_full_disk_only_when_it_is_full(tmp_path, monkeypatch):
    error = sqlite3.OperationalError("disk I/O error")
    monkeypatch.setattr(workspace, "disk_is_full", lambda path: True)
    assert "is full" in explain_failure(error, str(tmp_path))[0]
    monkeypatch.setattr(workspace, "disk_is_full", lambda path: False)
    message, code = explain_failure(error, str(tmp_path))
    assert code == 2 and "is full" not in message and "disk error" in message


def test_api_refuses_a_write_with_507_and_pages_still_show(full):
    from starlette.testclient import TestClient

    from contentlab.web import create_app

    before = workspace_digest(full)
    with TestClient(create_app(full), base_url="http://127.0.0.1") as client:
        assert client.get("/api/experiments/laser").status_code == 200
        assert client.get("/experiments/laser").status_code == 200
        r = client.post("/api/experiments/laser/results",
                        json={"results": [{"arm": "A", "impressions": 9, "clicks": 1, "event_id": "f2"}]})
    assert r.status_code == 507 and "is full" in r.json()["error"]
    assert workspace_digest(full) == before
