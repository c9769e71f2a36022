"""``contentlab import`` end to end: one bad input kind per test, exit code 2, workspace unchanged."""

from __future__ import annotations

import csv

import pytest

from conftest import GOOD_ROWS, HEADER, row_with, workspace_digest
from contentlab.cli import main


@pytest.fixture
def ws_dir(tmp_path, write_csv, capsys):
    """A workspace that already holds the three good posts."""
    folder = tmp_path / "ws"
    assert main(["import", str(write_csv(name="first.csv")), "--workspace", str(folder), "--quiet"]) == 0
    capsys.readouterr()
    return folder


def run_import(path, folder, *extra):
    return main(["import", str(path), "--workspace", str(folder), *extra])


# (name, rows, header, expected row, column, words in the reason)
NEW = ("p4", "2026-03-05T10:00:00Z", "A fourth post", "500", "5", "blog")
BAD_INPUTS = [
    ("unparseable date", [NEW, row_with(NEW, post_id="p5", published_at="5th of March")], None, 3, "published_at",
     "not an ISO 8601 date"),
    ("negative count", [row_with(NEW, clicks="-3")], None, 2, "clicks", "negative"),
    ("fractional count", [row_with(NEW, impressions="500.5")], None, 2, "impressions", "fractional"),
    ("non-numeric count", [row_with(NEW, clicks="twelve")], None, 2, "clicks", "'twelve' is not a number"),
    ("clicks above impressions", [row_with(NEW, clicks="501")], None, 2, "clicks", "501 clicks is more than its 500"),
    ("empty headline", [row_with(NEW, headline="")], None, 2, "headline", "is empty"),
    ("headline over 1000 characters", [row_with(NEW, headline="word " * 250)], None, 2, "headline",
     "the limit is 1000"),
    ("NaN value", [row_with(NEW, impressions="nan")], None, 2, "impressions", "is NaN"),
    ("infinite value", [row_with(NEW, clicks="inf")], None, 2, "clicks", "is infinite"),
    ("same post_id with different values", [NEW, row_with(NEW, clicks="6")], None, 3, "post_id",
     "appears again with different values"),
]


@pytest.mark.parametrize("name, rows, header, row, column, reason", BAD_INPUTS, ids=[b[0] for b in BAD_INPUTS])
def test_bad_row_rejects_file_exit_2_workspace_unchanged(ws_dir, write_csv, capsys, name, rows, header, row, column,
                                                         reason):
    before = workspace_digest(ws_dir)
    path = write_csv(rows, name="bad.csv", header=header or HEADER)
    assert run_import(path, ws_dir) == 2
    err = capsys.readouterr().err
    assert f"{path}: row {row}, column '{column}': " in err
    assert reason in err
    assert "nothing was imported" in err
    assert workspace_digest(ws_dir) == before


def test_failed_first_import_leaves_no_workspace(tmp_path, write_csv, capsys):
    folder = tmp_path / "new-ws"
    path = write_csv([row_with(NEW, clicks="-1")], name="bad.csv")
    assert run_import(path, folder) == 2
    assert "is negative" in capsys.readouterr().err
    assert not folder.exists()


def test_failed_import_with_timezone_keeps_the_old_setting(ws_dir, write_csv, capsys):
    before = workspace_digest(ws_dir)
    path = write_csv([row_with(NEW, clicks="-1")], name="bad.csv")
    assert run_import(path, ws_dir, "--timezone", "Asia/Tokyo") == 2
    assert workspace_digest(ws_dir) == before


def test_engagements_above_impressions_rejected(ws_dir, write_csv, capsys):
    before = workspace_digest(ws_dir)
    header = ["post_id", "published_at", "headline", "impressions", "engagements"]
    path = write_csv([("e1", "2026-03-05", "Engaging", "10", "11")], name="bad.csv", header=header)
    assert run_import(path, ws_dir) == 2
    err = capsys.readouterr().err
    assert f"{path}: row 2, column 'engagements': 11 engagements is more than its 10 impressions" in err
    assert workspace_digest(ws_dir) == before


def test_missing_required_column_exit_2_one_line(ws_dir, write_csv, capsys):
    before = workspace_digest(ws_dir)
    header = ["post_id", "published_at", "impressions", "clicks"]
    path = write_csv([("x", "2026-03-05", "10", "1")], name="bad.csv", header=header)
    assert run_import(path, ws_dir) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    assert f"{path}: row 1 (header), missing required column(s): headline" in err
    assert workspace_digest(ws_dir) == before


def test_more_than_twenty_problems_are_listed_then_counted(ws_dir, write_csv, capsys):
    rows = [row_with(NEW, post_id=f"n{i}", clicks="-1") for i in range(25)]
    assert run_import(write_csv(rows, name="bad.csv"), ws_dir) == 2
    err = capsys.readouterr().err
    assert err.count("is negative") == 20
    assert "... and 5 more problem(s)" in err
    assert "25 of 25 rows have problems" in err


def test_skip_bad_imports_good_rows_and_writes_rejected_csv(ws_dir, write_csv, capsys):
    rows = [NEW, row_with(NEW, post_id="p5", clicks="-1"), row_with(NEW, post_id="p6", published_at="soon"),
            row_with(NEW, post_id="=HYPERLINK(1)", headline="")]
    path = write_csv(rows, name="mixed.csv")
    assert run_import(path, ws_dir, "--skip-bad", "--quiet") == 0
    out = capsys.readouterr().out
    assert out.strip().splitlines() == [
        f"{path}: 4 rows read, 1 added, 0 updated, 0 unchanged, 3 rejected (see {path.with_name('mixed.rejected.csv')})"
    ]
    with open(path.with_name("mixed.rejected.csv"), newline="", encoding="utf-8") as handle:
        rejected = list(csv.DictReader(handle))
    assert [r["row"] for r in rejected] == ["3", "4", "5"]
    assert "clicks: -1 is negative" in rejected[0]["problems"]
    assert "published_at: 'soon' is not an ISO 8601" in rejected[1]["problems"]
    assert rejected[2]["post_id"] == "'=HYPERLINK(1)"  # OWASP CSV injection: formula neutralised
    assert workspace_digest(ws_dir)[0] == 4


def test_skip_bad_never_overwrites_a_rejected_file_the_user_changed(ws_dir, write_csv, capsys):
    """Fixing rows in FILE.rejected.csv, then running the import again, used to overwrite those fixes."""
    path = write_csv([NEW, row_with(NEW, post_id="p9", clicks="-1")], name="again.csv")
    first = path.with_name("again.rejected.csv")
    assert run_import(path, ws_dir, "--skip-bad", "--quiet") == 0
    written = first.read_bytes()
    assert run_import(path, ws_dir, "--skip-bad", "--quiet") == 0  # the same import again: the same file
    assert first.read_bytes() == written and not path.with_name("again.rejected-2.csv").exists()
    fixed = written.replace(b"-1", b"1")  # the user fixes the row in place
    assert fixed != written
    first.write_bytes(fixed)
    capsys.readouterr()
    assert run_import(path, ws_dir, "--skip-bad", "--quiet") == 0
    assert first.read_bytes() == fixed
    assert f"(see {path.with_name('again.rejected-2.csv')})" in capsys.readouterr().out
    assert path.with_name("again.rejected-2.csv").read_bytes() == written


def test_identical_repeated_rows_are_counted_once_and_said(ws_dir, write_csv, capsys):
    # Every row read is accounted for in the summary: a repeat of an identical row is neither lost silently
    # nor stored twice.
    path = write_csv([GOOD_ROWS[0], GOOD_ROWS[0], NEW], name="repeats.csv")
    before = workspace_digest(ws_dir)[0]
    assert run_import(path, ws_dir, "--quiet") == 0
    assert capsys.readouterr().out.strip() == (
        f"{path}: 3 rows read, 1 added, 0 updated, 1 unchanged, 0 rejected, "
        "1 repeated (identical to an earlier row of the file, counted once)")
    assert workspace_digest(ws_dir)[0] == before + 1


def test_reimport_is_idempotent_and_updates_changed_metrics(ws_dir, write_csv, capsys):
    path = write_csv(name="first.csv")
    before = workspace_digest(ws_dir)
    assert run_import(path, ws_dir, "--quiet") == 0
    assert capsys.readouterr().out.strip() == f"{path}: 3 rows read, 0 added, 0 updated, 3 unchanged, 0 rejected"
    count, _ = workspace_digest(ws_dir)
    assert count == before[0]
    changed = [row_with(GOOD_ROWS[0], clicks="40"), GOOD_ROWS[1], GOOD_ROWS[2], NEW]
    path2 = write_csv(changed, name="second.csv")
    assert run_import(path2, ws_dir, "--quiet") == 0
    assert capsys.readouterr().out.strip() == f"{path2}: 4 rows read, 1 added, 1 updated, 2 unchanged, 0 rejected"
    from contentlab.workspace import Workspace

    with Workspace.open(ws_dir, create=False) as ws:
        posts = ws.posts().set_index("post_id")
    assert posts.loc["p1", "clicks"] == 40


def test_timezone_option_sets_local_hour(tmp_path, write_csv, capsys):
    folder = tmp_path / "ws"
    rows = [("t1", "2026-03-02T09:15:00+00:00", "Offset given", "10", "1", "blog"),
            ("t2", "2026-03-02T09:15:00", "Naive and read as local", "10", "1", "blog"),
            ("t3", "2026-03-02", "Date only", "10", "1", "blog")]
    assert run_import(write_csv(rows), folder, "--timezone", "Asia/Tokyo", "--quiet") == 0
    from contentlab.workspace import Workspace

    with Workspace.open(folder, create=False) as ws:
        assert ws.timezone == "Asia/Tokyo"
        posts = ws.posts().set_index("post_id")
    # Tokyo is UTC+9 all year (IANA tz database)
    assert posts.loc["t1", "local_hour"] == pytest.approx(18.25)
    assert posts.loc["t2", "local_hour"] == pytest.approx(9.25)
    assert posts.loc["t2", "published_at"] == "2026-03-02T00:15:00+00:00"
    assert posts.loc["t3", "local_hour"] != posts.loc["t3", "local_hour"]  # NaN: hour unknown
    assert posts.loc["t3", "local_weekday"] == 0.0  # a Monday


def test_bad_timezone_exit_2_creates_nothing(tmp_path, write_csv, capsys):
    folder = tmp_path / "ws"
    assert run_import(write_csv(), folder, "--timezone", "Nowhere/City") == 2
    assert "IANA" in capsys.readouterr().err
    assert not folder.exists()


def test_progress_bar_on_large_file_goes_to_stderr_and_one_summary_line(tmp_path, write_csv, capsys, monkeypatch):
    import contentlab.history as history

    monkeypatch.setattr(history, "LARGE_FILE_BYTES", 0)  # treat this small file as large
    path = write_csv(name="big.csv")
    assert run_import(path, tmp_path / "ws") == 0
    captured = capsys.readouterr()
    assert captured.out.splitlines() == [f"{path}: 3 rows read, 3 added, 0 updated, 0 unchanged, 0 rejected"]
    assert "checking big.csv" in captured.err or "storing" in captured.err  # tqdm wrote its bar to stderr


def test_demo_corpus_import(tmp_path, demo_posts, capsys):
    assert run_import(demo_posts, tmp_path / "ws", "--timezone", "Europe/London", "--quiet") == 0
    out = capsys.readouterr().out.strip()
    assert out == f"{demo_posts}: 2000 rows read, 2000 added, 0 updated, 0 unchanged, 0 rejected"


def test_import_help_has_an_example(capsys):
    with pytest.raises(SystemExit):
        main(["import", "--help"])
    assert "example:" in capsys.readouterr().out
