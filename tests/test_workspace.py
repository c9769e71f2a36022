"""The SQLite workspace: pragmas, migrations, settings, upserts, local time."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from contentlab.errors import ContentlabError
from contentlab.workspace import (
    DB_NAME,
    MIGRATIONS,
    POST_COLUMNS,
    SCHEMA_VERSION,
    Workspace,
    _row_hashes,
    _split_sql,
    add_local_time,
    resolve_dir,
    row_hash,
)


def post(pid: str, **kw) -> dict:
    base = {"post_id": pid, "published_at": "2026-03-02T09:00:00+00:00", "has_time": 1, "headline": f"Post {pid}",
            "impressions": 100, "clicks": 5, "engagements": None, "channel": "blog", "body": None,
            "experiment_id": None, "image_id": None, "cost": None}
    base.update(kw)
    return base


def test_open_sets_wal_foreign_keys_and_schema_version(tmp_path):
    with Workspace.open(tmp_path / "ws") as ws:
        assert ws.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert ws.conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        assert ws.setting("schema_version") == str(SCHEMA_VERSION)
        assert ws.timezone == "UTC"
        tables = {r[0] for r in ws.conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"meta", "posts", "imports", "models", "drafts", "experiments", "arms", "observations"} <= tables


def test_open_without_create_refuses_and_leaves_nothing(tmp_path):
    with pytest.raises(ContentlabError, match="No workspace"):
        Workspace.open(tmp_path / "missing", create=False)
    assert not (tmp_path / "missing").exists()


def test_workspace_dir_from_option_env_or_default(monkeypatch, tmp_path):
    monkeypatch.setenv("CONTENTLAB_WORKSPACE", str(tmp_path / "env"))
    assert resolve_dir(None) == tmp_path / "env"
    assert resolve_dir(tmp_path / "opt") == tmp_path / "opt"
    monkeypatch.delenv("CONTENTLAB_WORKSPACE")
    assert resolve_dir(None) == Path("contentlab-workspace")


def test_bad_timezone_is_refused(tmp_path):
    with pytest.raises(ContentlabError, match="IANA"):
        Workspace.open(tmp_path / "ws", timezone="Mars/Olympus")


def test_migration_from_schema_1_keeps_posts(tmp_path):
    """A workspace written by schema 1 (posts only) is upgraded in place to the current schema."""
    folder = tmp_path / "old"
    folder.mkdir()
    conn = sqlite3.connect(folder / DB_NAME)
    for statement in _split_sql(MIGRATIONS[0]):
        conn.execute(statement)
    conn.execute("INSERT INTO meta VALUES ('timezone', 'Europe/London')")
    conn.execute("INSERT INTO meta VALUES ('schema_version', '1')")
    values = post("old-1")
    conn.execute(
        f"INSERT INTO posts ({', '.join(POST_COLUMNS)}, source, updated_at, row_hash) "
        f"VALUES ({', '.join('?' * (len(POST_COLUMNS) + 3))})",
        [values[c] for c in POST_COLUMNS] + ["import", "2026-01-01T00:00:00+00:00", row_hash(values[c] for c in POST_COLUMNS)],
    )
    conn.commit()
    conn.close()
    with Workspace.open(folder) as ws:
        assert ws.setting("schema_version") == str(SCHEMA_VERSION)
        assert ws.timezone == "Europe/London"
        assert ws.posts()["post_id"].tolist() == ["old-1"]
        ws.conn.execute("SELECT COUNT(*) FROM observations").fetchone()  # schema 2 table exists


def test_newer_schema_is_refused(tmp_path):
    with Workspace.open(tmp_path / "ws") as ws:
        ws.set_setting("schema_version", str(SCHEMA_VERSION + 1))
    with pytest.raises(ContentlabError, match="newer contentlab"):
        Workspace.open(tmp_path / "ws")


def test_upsert_counts_added_updated_unchanged(tmp_path):
    with Workspace.open(tmp_path / "ws") as ws:
        frame = pd.DataFrame([post("a"), post("b")])
        with ws.conn:
            assert ws.upsert_posts(frame) == (2, 0, 0)
        with ws.conn:
            assert ws.upsert_posts(frame) == (0, 0, 2)
        changed = pd.DataFrame([post("a", clicks=6), post("b"), post("c")])
        with ws.conn:
            assert ws.upsert_posts(changed) == (1, 1, 1)
        stored = ws.posts().set_index("post_id")
        assert stored.loc["a", "clicks"] == 6 and len(stored) == 3


def test_column_wise_hashes_equal_row_hash():
    frame = pd.DataFrame([
        post("a"),
        post("b", clicks=np.nan, cost=1.123456789123, channel=None, image_id=np.int64(4)),
        post("c", engagements=7, body="", cost=2.0, experiment_id="T1"),
        post("d", headline="ends with nul\x00", image_id="x"),
    ])
    expected = []
    for rec in frame[POST_COLUMNS].astype(object).where(frame[POST_COLUMNS].notna(), None).itertuples(
            index=False, name=None):
        expected.append(row_hash(int(v) if isinstance(v, np.integer) else float(v) if isinstance(v, np.floating)
                                 else v for v in rec))
    assert _row_hashes(frame) == expected


def test_failed_transaction_leaves_posts_unchanged(tmp_path):
    with Workspace.open(tmp_path / "ws") as ws:
        with ws.conn:
            ws.upsert_posts(pd.DataFrame([post("a")]))
        bad = pd.DataFrame([post("b"), post("c", impressions=-1)])  # CHECK (impressions >= 0) fails
        with pytest.raises(sqlite3.IntegrityError):
            with ws.conn:
                ws.upsert_posts(bad)
        assert ws.count_posts() == 1


def test_add_local_time_naive_offset_and_date_only():
    frame = pd.DataFrame({
        "published_at": ["2026-03-02T23:30:00+00:00", "2026-07-01T06:00:00+00:00", "2026-03-04"],
        "has_time": [1, 1, 0],
    })
    out = add_local_time(frame, "America/New_York")
    # New York is UTC-5 in March (EST) and UTC-4 in July (EDT): IANA tz database.
    assert out["local_hour"].tolist()[:2] == [18.5, 2.0]
    assert out["local_date"].dt.strftime("%Y-%m-%d").tolist() == ["2026-03-02", "2026-07-01", "2026-03-04"]
    assert np.isnan(out["local_hour"].iloc[2])
    assert out["local_weekday"].tolist() == [0.0, 2.0, 2.0]  # Monday, Wednesday, Wednesday


def test_models_round_trip_and_missing_model_message(tmp_path):
    with Workspace.open(tmp_path / "ws") as ws:
        with pytest.raises(ContentlabError, match="contentlab learn"):
            ws.load_model("clicks")
        ws.save_model("clicks", "fp", {"n": np.int64(3)}, {"weights": [1, 2]})
        model, summary = ws.load_model("clicks")
        assert model == {"weights": [1, 2]} and summary == {"n": 3}
