"""Every bad input: exit code 2, a clear message that names it, no traceback, the workspace unchanged.

One table, kind -> input -> the words the message must hold. Each case runs the
command as a user types it (``contentlab.cli.main``) against a copy of one
small learned workspace, and compares a full SQL dump of the workspace before
and after. Faults of the machine (read-only folder, full disk, a workspace
locked by another writer) follow the table, with the fault simulated.
"""

from __future__ import annotations

import sqlite3
import threading
from pathlib import Path

import pytest

from contentlab.cli import main

from conftest import CORPUS, copy_workspace, laser_test_workspace, run_cli as run, workspace_digest

HEAD = "post_id,published_at,headline,impressions,clicks,channel\n"
GOOD = "p1,2026-03-02T09:15:00+00:00,Seven ways to use the library,1000,25,blog\n"


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """The demo corpus imported and learned (no bootstrap), with one experiment that has one result."""
    path = tmp_path_factory.mktemp("bad-inputs") / "ws"
    laser_test_workspace(path)
    assert main(["record", "laser", "--arm", "A", "--impressions", "300", "--clicks", "5", "--event-id", "b1",
                 "--workspace", str(path)]) == 0
    return path


@pytest.fixture
def ws(base, tmp_path) -> Path:
    return copy_workspace(base, tmp_path)


# A gzip header followed by a compressed block of an invalid type (zlib: "invalid block type").
DAMAGED_GZIP = b"\x1f\x8b\x08\x00\x00\x00\x00\x00\x00\x03" + b"\xff" * 40


def big_id() -> str:
    return "x" * 100_000


# kind, files to write ({name: bytes}), argv ({ws} = the workspace copy, {tmp} = the test folder), fragment
CASES = [
    ("duplicated header column", {"f.csv": (HEAD.strip() + ",clicks\n" + GOOD.strip() + ",25\n").encode()},
     ["import", "{tmp}/f.csv"], "column 'clicks' appears twice (columns 5 and 7)"),
    ("row with more cells than the header", {"f.csv": (HEAD + GOOD + GOOD.replace("p1", "p2").strip() + ",extra\n").encode()},
     ["import", "{tmp}/f.csv"], "row 3 has 7 cells but the header has 6"),
    ("NUL byte inside the file", {"f.csv": (HEAD + GOOD + "p2,2026-03-02,Hel\x00lo,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "row 3 holds a NUL byte"),
    ("100,000-character post_id", {"f.csv": (HEAD + big_id() + ",2026-03-02,Hello,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "column 'post_id': has 100,000 characters; an id may have at most 200"),
    ("over-long channel name", {"f.csv": (HEAD + "p9,2026-03-02,Hello,10,1," + "c" * 500 + "\n").encode()},
     ["import", "{tmp}/f.csv"], "column 'channel': has 500 characters; a channel may have at most 100"),
    ("row number after a quoted multi-line headline",
     {"f.csv": (HEAD + 'p1,2026-03-02,"Two\nlines\nhere",10,1,blog\np2,2026-03-02,Hello,10,50,blog\n').encode()},
     ["import", "{tmp}/f.csv"], "row 5, column 'clicks': 50 clicks is more than its 10 impressions"),
    ("unbalanced quote", {"f.csv": (HEAD + GOOD + 'p2,2026-03-02,"Unclosed,10,1,blog\n' + GOOD.replace("p1", "p3")).encode()},
     ["import", "{tmp}/f.csv"], "row 3: a quote (\") opens a cell that never closes"),
    ("UTF-16 file cut inside a character", {"f.csv": (HEAD + GOOD).encode("utf-16")[:-1] + b"\x00\xd8"},
     ["import", "{tmp}/f.csv"], "reads as UTF-16 text up to row 3"),
    # Read as cp1252 (the fallback), Shift-JIS text was stored garbled without a word.
    ("Shift-JIS file", {"f.csv": (HEAD + GOOD + "p2,2026-03-02,冬の読書チャレンジ,10,1,blog\n").encode("shift_jis")},
     ["import", "{tmp}/f.csv"], "row 3 holds a byte (0x8F) that neither UTF-8 nor Windows-1252 text uses"),
    ("count above 2^53", {"f.csv": (HEAD + "p1,2026-03-02,Hello,9007199254740993,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "9007199254740993 is too large to be a count"),
    ("year 2300 at import", {"f.csv": (HEAD + "p1,2300-03-02,Hello,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "row 2, column 'published_at': '2300-03-02': year 2300 is outside the years contentlab works with (1970 to 2200)"),
    ("year 1600 at import", {"f.csv": (HEAD + "p1,1600-03-02T10:00Z,Hello,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "year 1600 is outside the years contentlab works with"),
    ("day/month date at import", {"f.csv": (HEAD + "p1,03/12/2026,Hello,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "'03/12/2026' is a day/month form"),
    ("one-digit offset at import", {"f.csv": (HEAD + "p1,2026-03-02T10:00+1,Hello,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "has the UTC offset '+1'; write offsets with two-digit hours: Z, +01, +0100 or +01:00"),
    ("day/month date in score --at", {}, ["score", "A new reading room", "--channel", "newsletter", "--at", "03/12/2026 09:00"],
     "--at: '03/12/2026 09:00' is a day/month form"),
    ("one-digit offset in score --at", {}, ["score", "A new reading room", "--channel", "newsletter", "--at", "2026-12-03T09:00+1"],
     "--at: '2026-12-03T09:00+1' has the UTC offset '+1'"),
    ("score without a channel when the history has several", {}, ["score", "A new reading room"],
     "draft 1: give the draft a channel (--channel, or a 'channel' column); your history has several"),
    ("day/month date in record --at", {}, ["record", "laser", "--arm", "A", "--impressions", "10", "--clicks", "1", "--at", "03/12/2026"],
     "--at: '03/12/2026' is a day/month form"),
    ("one-digit offset in a results file", {"r.csv": b"arm,impressions,clicks,at\nA,10,1,2026-12-03T09:00-5\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "row 2, column 'at': '2026-12-03T09:00-5' has the UTC offset '-5'"),
    ("day/month date in a drafts file", {"d.csv": b"headline,time\nFirst draft here,03/12/2026 09:00\nSecond draft here,03/12/2026 09:00\n"},
     ["experiment", "new", "winter", "--drafts", "{tmp}/d.csv"], "row 2, column 'publish_at': '03/12/2026 09:00' is a day/month form"),
    ("day/month date in report --from", {}, ["report", "--from", "03/12/2026", "--to", "2026-12-09", "--out", "{tmp}/out"],
     "--from: '03/12/2026' is a day/month form"),
    ("year 2300 in report --week", {}, ["report", "--week", "2300-W02", "--out", "{tmp}/out"], "year 2300 is outside"),
    ("report range of centuries", {}, ["report", "--from", "2026-01-01", "--to", "2199-01-01", "--out", "{tmp}/out"],
     "spans 63,188 days; a report covers at most 731 days (two years)"),  # was OverflowError, "unexpected error"
    ("column map that is a folder", {"map.toml/keep": b""}, ["import", str(CORPUS / "posts.csv"), "--map", "{tmp}/map.toml"],
     "is a folder; give the column map's .toml file"),
    ("column map that is not UTF-8", {"map.toml": b'[columns]\npost_id = "Ident\xe9"\n'},
     ["import", str(CORPUS / "posts.csv"), "--map", "{tmp}/map.toml"], "the column map is not UTF-8 text"),
    ("negative experiment seed", {}, ["experiment", "new", "seeded", "Draft one here", "Draft two here", "--seed", "-5"],
     "--seed must be a whole number from 0 to 2147483647; got -5"),
    ("planned end time in the past", {},
     ["experiment", "new", "ending", "Draft one here", "Draft two here", "--ends-at", "2020-01-01T10:00"],
     "--ends-at 2020-01-01T10:00: that time (2020-01-01 10:00 Europe/London) has already passed"),
    ("planned end time and budget together", {},
     ["experiment", "new", "ending", "Draft one here", "Draft two here", "--ends-at", "2199-01-01", "--budget", "500"],
     "give --budget N (the impressions the test will get) or --ends-at TIME (when it is planned to end), not both"),
    ("impressions to split beyond any count", {}, ["experiment", "next", "laser", "--impressions", "99999999999999999999"],
     "--impressions must be at most 2^53"),
    ("report on a week in the future", {}, ["report", "--week", "2199-W02", "--out", "{tmp}/out"],
     "nothing to report: week 2199-W02 has not begun yet"),
    ("record: non-numeric clicks", {"r.csv": b"arm,impressions,clicks\nA,10,x\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "row 2, column 'clicks': 'x' is not a number; write a whole number in digits (e.g. 1234); nothing was recorded."),
    ("record: unknown arm", {"r.csv": b"arm,impressions,clicks\nQ,10,1\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "row 2, column 'arm': 'Q' is not an arm of laser"),
    ("record: event id reused with other values", {},
     ["record", "laser", "--arm", "A", "--impressions", "301", "--clicks", "5", "--event-id", "b1"],
     "--event-id: event id 'b1' is already recorded with different values (A: 300 impressions, 5 clicks)"),
    ("demo over a user's workspace", {}, ["demo", "--workspace", "{ws}", "--out", "{tmp}/out"],
     "holds a contentlab workspace that the demo did not create"),
    # A damaged gzip stream raises zlib.error, not OSError: it was an "unexpected error" for every reader.
    ("damaged gzip export", {"f.csv.gz": DAMAGED_GZIP}, ["import", "{tmp}/f.csv.gz"],
     "f.csv.gz: looks gzip-compressed but cannot be read"),
    ("damaged gzip results", {"r.csv.gz": DAMAGED_GZIP}, ["record", "laser", "--input", "{tmp}/r.csv.gz"],
     "r.csv.gz: looks gzip-compressed but cannot be read"),
    ("damaged gzip drafts", {"d.csv.gz": DAMAGED_GZIP}, ["score", "--input", "{tmp}/d.csv.gz"],
     "d.csv.gz: looks gzip-compressed but cannot be read"),
    ("workbook (.xlsx is a ZIP) given as the export", {"f.xlsx": b"PK\x03\x04" + bytes(range(256)) * 4},
     ["import", "{tmp}/f.xlsx"], "is a ZIP archive (an Excel .xlsx workbook is one too), not a CSV file"),
    ("Excel 97-2003 workbook as results", {"r.xls": b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(500)},
     ["record", "laser", "--input", "{tmp}/r.xls"], "is an Excel 97-2003 (.xls) workbook"),
    ("PDF given as drafts", {"d.pdf": b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n1 0 obj\n"}, ["score", "--input", "{tmp}/d.pdf"],
     "is a PDF document, not a CSV file"),
    # Read as they are, such rows gave "published_at is empty" and "write 0": the wrong fix.
    ("rows split by semicolons under a comma header", {"f.csv": (HEAD + GOOD.replace(",", ";")).encode()},
     ["import", "{tmp}/f.csv"], "row 2 separates its cells with semicolons but the header row uses commas"),
    ("rows split by commas under a semicolon header", {"r.csv": b"arm;impressions;clicks\nA,10,1\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "row 2 separates its cells with commas but the header row uses semicolons"),
    ("count with a thousands separator", {"f.csv": (HEAD + 'p1,2026-03-02,Hello,"1,234",1,blog\n').encode()},
     ["import", "{tmp}/f.csv"], "'1,234' is not a number; write it without thousands separators (e.g. 1234)"),
    ("count given as a percentage", {"r.csv": b"arm,impressions,clicks\nA,100,12%\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "'12%' is not a number; give the count itself, not a percentage"),
    ("cost with a currency sign", {"f.csv": (HEAD.strip() + ",cost\n" + GOOD.strip() + ",$12\n").encode()},
     ["import", "{tmp}/f.csv"], "'$12' is not a finite number; write the cost as a plain number without a currency sign"),
    ("flat prior and a prior strength together", {},
     ["experiment", "new", "both", "Draft one here", "Draft two here", "--flat-prior", "--prior-strength", "50"],
     "give --flat-prior (every arm starts at Beta(1, 1)) or --prior-strength S"),
    ("file name longer than the system allows", {}, ["import", "{tmp}/" + "x" * 300 + ".csv"],
     "cannot be read (File name too long); check the path"),
    ("bootstrap refits beyond any use", {}, ["learn", "--bootstrap", "100000000"],  # was "ran out of memory"
     "--bootstrap must be from 0 to 5,000; got 100,000,000"),
    # Mixed encodings: read as cp1252 (the fallback) the UTF-8 rows were stored garbled ('CafÃ©') without a word.
    ("export mixing UTF-8 and latin-1 rows",
     {"f.csv": (HEAD + "p1,2026-03-02,Café opens,10,1,blog\n").encode() + b"p2,2026-03-02,Na\xefve,10,1,blog\n"},
     ["import", "{tmp}/f.csv"], "mixes two encodings: row 2 holds UTF-8 text"),
    ("results mixing UTF-8 and cp1252 rows",
     {"r.csv": "arm,impressions,clicks,event_id\nA,10,1,café\n".encode() + b"B,10,1,caf\xe9\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "row 3 holds a byte (0xE9) that is not UTF-8"),
    ("drafts mixing UTF-8 and cp1252 rows",
     {"d.csv": "headline,channel\nCafé — open late,blog\n".encode() + b"Caf\xe9 opens,blog\n"},
     ["score", "--input", "{tmp}/d.csv"], "mixes two encodings"),
    # Control characters were stored and printed as they were: an escape sequence drove the user's terminal.
    ("escape sequence in an export headline",
     {"f.csv": (HEAD + "p1,2026-03-02,Red \x1b[31malert,10,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "row 2, column 'headline': holds U+001B (escape) at character 5"),
    ("bell in a results event id", {"r.csv": b"arm,impressions,clicks,event_id\nA,10,1,e\x07\n"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "row 2, column 'event_id': holds U+0007 (bell)"),
    ("control character in a drafts file", {"d.csv": b"headline,channel\nDraft\x08 one,blog\n"},
     ["score", "--input", "{tmp}/d.csv"], "row 2, column 'headline': holds U+0008 (backspace)"),
    ("control character in drafts of a flat-prior experiment", {"d.csv": b"headline\nBell\x07 here\nAnother draft\n"},
     ["experiment", "new", "bells", "--drafts", "{tmp}/d.csv", "--flat-prior"],
     "row 2, column 'headline': holds U+0007 (bell) at character 5"),
    ("control character in a headline argument", {}, ["score", "Red \x1b[31malert", "--channel", "newsletter"],
     "draft 1, headline: holds U+001B (escape)"),
    ("control character in an arm name is not echoed", {}, ["record", "laser", "--arm", "A\x1b[2J", "--impressions",
                                                            "5", "--clicks", "1"], "--arm: 'A\\x1b[2J' is not an arm"),
    # Other files given as CSV were read as CSV: a header of JSON text, "column appears twice" or "missing column".
    ("JSON given as drafts", {"d.json": b'[{"headline": "One", "channel": "blog"}]'}, ["score", "--input", "{tmp}/d.json"],
     "is JSON, not a CSV file"),
    ("web page given as results", {"r.csv": b"<!DOCTYPE html><html><body>sign in</body></html>"},
     ["record", "laser", "--input", "{tmp}/r.csv"], "is a web page (HTML), not a CSV file"),
    ("PNG image given as the export", {"f.csv": b"\x89PNG\r\n\x1a\n" + bytes(200)}, ["import", "{tmp}/f.csv"],
     "is a PNG image, not a CSV file"),
    ("export with a header and no rows", {"f.csv": HEAD.encode()}, ["import", "{tmp}/f.csv"],
     "has a header but no rows; nothing was imported. Export the posts again"),
    ("count with a thousands dot", {"f.csv": (HEAD + "p1,2026-03-02,Hello,1.234,1,blog\n").encode()},
     ["import", "{tmp}/f.csv"], "1.234 is fractional; counts must be whole numbers; if it means 1234, write it without"),
    # report --drafts: a bad file was written into the report as "could not be scored", exit 0.
    ("report --drafts with a bad time", {"d.csv": b"headline,channel,publish_at\nA draft,blog,soon\n"},
     ["report", "--drafts", "{tmp}/d.csv", "--out", "{tmp}/out"], "row 2, column 'publish_at': 'soon' is not an ISO 8601"),
    ("report --drafts without channels", {"d.csv": b"headline\nA draft here\n"},
     ["report", "--drafts", "{tmp}/d.csv", "--out", "{tmp}/out"], "has no 'channel' column; your history has several"),
    ("report --drafts with an unknown channel", {"d.csv": b"headline,channel\nA draft here,tiktok\n"},
     ["report", "--drafts", "{tmp}/d.csv", "--out", "{tmp}/out"], "row 2, column 'channel': 'tiktok' is not a channel"),
    ("report --out empty", {}, ["report", "--out", ""], "--out is empty"),  # wrote the report into the current folder
    ("report --out a file", {"afile": b"mine"}, ["report", "--out", "{tmp}/afile"], "is a file, not a folder"),
    ("number option with a thousands separator", {}, ["experiment", "next", "laser", "--impressions", "1,000"],
     "'1,000' is not a whole number; write it in digits without separators"),
    ("decimal option that is not a number", {}, ["experiment", "status", "laser", "--discount", "half"],
     "'half' is not a number; write it in digits"),
]


@pytest.mark.parametrize("kind, files, argv, fragment", CASES, ids=[c[0] for c in CASES])
def test_bad_input_exit_2_one_clear_line_workspace_unchanged(ws, tmp_path, capsys, kind, files, argv, fragment):
    for name, data in files.items():
        target = tmp_path / name
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(data)
    args = [a.replace("{tmp}", str(tmp_path)).replace("{ws}", str(ws)) for a in argv]
    if "--workspace" not in args:
        args += ["--workspace", str(ws)]
    before = workspace_digest(ws)
    code, _out, err = run(capsys, args)
    assert code == 2, err
    assert "Traceback" not in err and "usage:" not in err
    assert err.startswith(f"contentlab {args[0]}"), err
    assert "\x1b" not in err and "\x07" not in err  # never echoed to the terminal as they are
    assert err.count("\n") == 1 or args[0] == "import", err  # one line (import lists its bad rows below)
    assert fragment in " ".join(err.split()), err
    assert workspace_digest(ws) == before


def test_record_problems_name_real_columns_once(ws, tmp_path, capsys):
    """A non-numeric cell is one problem: no false 'more than impressions', no column 'row' the file lacks."""
    path = tmp_path / "r.csv"
    path.write_text("arm,impressions,clicks\nA,abc,5\nB,10,1\n", encoding="utf-8")
    code, _, err = run(capsys, ["record", "laser", "--input", str(path), "--workspace", str(ws)])
    assert code == 2
    assert "'abc' is not a number" in err
    assert "more than" not in err and "column 'row'" not in err
    assert err.count("row 2") == 1


@pytest.mark.parametrize("argv, fragment", [
    (["learn"], "no posts in the workspace"),
    (["report"], "nothing to report: no posts in the workspace"),
])
def test_empty_workspace_says_import_first(tmp_path, capsys, argv, fragment):
    empty = tmp_path / "empty"
    assert main(["settings", "--timezone", "UTC", "--workspace", str(empty)]) == 0
    before = workspace_digest(empty)
    code, _, err = run(capsys, argv + ["--workspace", str(empty)])
    assert code == 2 and fragment in err and "import first" in err
    assert workspace_digest(empty) == before


@pytest.mark.parametrize("argv", [
    ["settings", "--timezone", "Nope/Zone"],
    ["settings", "--timezone", ""],  # an empty zone is refused, not taken as "not given"
    ["import", str(CORPUS / "posts.csv"), "--timezone", " "],
    ["experiment", "new", "../x", "Draft one here", "Draft two here"],
    ["import", "missing.csv"],
])
def test_refused_command_leaves_no_new_workspace(tmp_path, capsys, argv):
    target = tmp_path / "new-folder"
    code, _, err = run(capsys, argv + ["--workspace", str(target)])
    assert code == 2 and "Traceback" not in err
    assert not target.exists()


@pytest.mark.parametrize("argv", [["drivers"], ["import", str(CORPUS / "posts.csv"), "--quiet"], ["settings", "--timezone", "UTC"]])
def test_empty_database_file_is_not_taken_for_a_new_workspace(tmp_path, capsys, argv):
    """A workspace.sqlite cut to 0 bytes was silently made a fresh, empty workspace (SQLite's default)."""
    folder = tmp_path / "ws"
    folder.mkdir()
    (folder / "workspace.sqlite").write_bytes(b"")
    code, _, err = run(capsys, argv + ["--workspace", str(folder)])
    assert code == 2 and "is empty (0 bytes)" in err and "Restore it from a backup" in err, err
    assert (folder / "workspace.sqlite").read_bytes() == b""
    assert sorted(p.name for p in folder.iterdir()) == ["workspace.sqlite"]


@pytest.mark.parametrize("argv", [["import", str(CORPUS / "posts.csv"), "--quiet", "--workspace", ""],
                                  ["--workspace", "", "settings", "--timezone", "UTC"],
                                  ["demo", "--workspace", " "]])
def test_empty_workspace_option_is_refused_not_taken_for_the_default(tmp_path, capsys, monkeypatch, argv):
    """--workspace "$UNSET" used to fall back to ./contentlab-workspace (or ./demo-workspace) and write there."""
    monkeypatch.chdir(tmp_path)
    code, _, err = run(capsys, argv)
    assert code == 2 and "--workspace is empty" in err, err
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("argv", [["settings", "--timezone", "UTC"], ["import", str(CORPUS / "posts.csv"), "--quiet"],
                                  ["experiment", "list"], ["drivers"]])
def test_another_programs_database_is_not_taken_for_a_workspace(tmp_path, capsys, argv):
    """An SQLite file of another program got contentlab's tables (and WAL mode) added to it."""
    folder = tmp_path / "ws"
    folder.mkdir()
    db = folder / "workspace.sqlite"
    conn = sqlite3.connect(db)
    conn.execute("CREATE TABLE contacts (name TEXT)")
    conn.execute("INSERT INTO contacts VALUES ('Ann')")
    conn.commit()
    conn.close()
    before = db.read_bytes()
    code, _, err = run(capsys, argv + ["--workspace", str(folder)])
    assert code == 2 and "without contentlab's settings table (it holds the table(s) contacts)" in err, err
    assert "nothing was changed in it" in err
    assert db.read_bytes() == before and sorted(p.name for p in folder.iterdir()) == ["workspace.sqlite"]


def test_workspace_path_that_is_a_file(tmp_path, capsys):
    path = tmp_path / "a-file"
    path.write_text("not a folder")
    code, _, err = run(capsys, ["settings", "--workspace", str(path)])
    assert code == 2 and "is a file, not a workspace folder" in err
    assert path.read_text() == "not a folder"


@pytest.mark.parametrize("damage", ["garbage", "truncated"])
@pytest.mark.parametrize("argv", [["settings"], ["drivers"], ["experiment", "list"], ["import", str(CORPUS / "posts.csv")]])
def test_corrupt_or_truncated_database_is_not_a_usable_workspace(base, tmp_path, capsys, damage, argv):
    folder = tmp_path / "broken"
    folder.mkdir()
    db = folder / "workspace.sqlite"
    if damage == "garbage":
        db.write_bytes(b"this is not a database at all\n" * 100)
    else:
        src = sqlite3.connect(base / "workspace.sqlite")
        copy = sqlite3.connect(tmp_path / "whole.sqlite")
        src.backup(copy)
        src.close()
        copy.close()
        db.write_bytes((tmp_path / "whole.sqlite").read_bytes()[:5000])
    before = db.read_bytes()
    code, _, err = run(capsys, argv + ["--workspace", str(folder)])
    assert code == 2 and "Traceback" not in err
    assert "is not a usable workspace" in err
    assert db.read_bytes() == before


# What can be damaged inside a readable database (a crash of another tool, a hand edit, an older time-zone
# database), the SQL that simulates it, and the words of the message; every command that reads it must say
# what is wrong and how to recover, never "unexpected error", and change nothing.
DAMAGED_STATE = [
    ("model summary not JSON", "UPDATE models SET summary = '{not json'",
     "The model saved in the workspace at {ws} is damaged (what it stored is not valid JSON"),
    ("experiment settings not JSON", "UPDATE experiments SET settings = '{broken'",
     "Experiment laser in the workspace at {ws} is damaged (what it stored is not valid JSON"),
    ("experiment settings a JSON list", "UPDATE experiments SET settings = '[]'",
     "Experiment laser in the workspace at {ws} is damaged (what it stored is a JSON list, not an object)"),
    ("time zone this computer does not know", "UPDATE meta SET value = 'Mars/Olympus' WHERE key = 'timezone'",
     "has the time zone 'Mars/Olympus', which this computer does not know"),
    ("schema version not a number", "UPDATE meta SET value = 'two' WHERE key = 'schema_version'",
     "is not a usable workspace: {ws}/workspace.sqlite cannot be read as a contentlab database (its schema version 'two' is not a number)"),
    ("stored post time unreadable", "UPDATE posts SET published_at = 'garbage' WHERE post_id = (SELECT MIN(post_id) FROM posts)",
     "post(s) whose stored time cannot be read"),
    ("stored result time unreadable", "UPDATE observations SET at = 'garbage'",
     "Experiment laser holds 1 result(s) whose stored time cannot be read ('garbage')"),
]
DAMAGED_READERS = {
    "model summary not JSON": [["score", "A new reading room", "--channel", "newsletter"], ["drivers"]],
    "experiment settings not JSON": [["experiment", "status", "laser"], ["experiment", "next", "laser"],
                                     ["experiment", "list"], ["record", "laser", "--arm", "A", "--impressions", "5",
                                                              "--clicks", "1"]],
    "experiment settings a JSON list": [["experiment", "status", "laser"], ["report", "--out", "{tmp}/out"]],
    "time zone this computer does not know": [["settings"], ["learn", "--bootstrap", "0", "--quiet"],
                                              ["record", "laser", "--arm", "A", "--impressions", "5", "--clicks", "1"],
                                              ["score", "A new reading room", "--channel", "newsletter"]],
    "schema version not a number": [["settings"], ["drivers"], ["experiment", "list"]],
    "stored post time unreadable": [["features", "--quiet"], ["learn", "--bootstrap", "0", "--quiet"],
                                    ["report", "--out", "{tmp}/out"]],
    "stored result time unreadable": [["experiment", "status", "laser"], ["report", "--out", "{tmp}/out"]],
}


@pytest.mark.parametrize("kind, sql, words, argv", [
    (kind, sql, words, argv) for kind, sql, words in DAMAGED_STATE for argv in DAMAGED_READERS[kind]
], ids=[f"{kind}: {' '.join(argv[:2])}" for kind, _, _ in DAMAGED_STATE for argv in DAMAGED_READERS[kind]])
def test_damaged_workspace_state_says_what_and_how_to_recover(ws, tmp_path, capsys, kind, sql, words, argv):
    conn = sqlite3.connect(ws / "workspace.sqlite")
    conn.execute(sql)
    conn.commit()
    conn.close()
    before = workspace_digest(ws)
    args = [a.replace("{tmp}", str(tmp_path)) for a in argv] + ["--workspace", str(ws)]
    code, _, err = run(capsys, args)
    assert code == 2, err
    assert "unexpected error" not in err and "Traceback" not in err
    assert words.replace("{ws}", str(ws)) in " ".join(err.split()), err
    assert any(fix in err for fix in ("`contentlab learn` again", "Restore", "restore", "settings --timezone", "Import the export"))
    assert workspace_digest(ws) == before


def test_unknown_time_zone_is_repaired_by_setting_it_again(ws, capsys):
    conn = sqlite3.connect(ws / "workspace.sqlite")
    conn.execute("UPDATE meta SET value = 'Mars/Olympus' WHERE key = 'timezone'")
    conn.commit()
    conn.close()
    code, out, err = run(capsys, ["settings", "--timezone", "Europe/London", "--workspace", str(ws)])
    assert code == 0 and "Europe/London" in out, err
    assert run(capsys, ["experiment", "status", "laser", "--workspace", str(ws)])[0] == 0


def test_stopping_a_stopped_experiment_keeps_its_winner_and_time(ws, capsys):
    """A second stop used to overwrite the winner the user chose with the current leader, and the stop time."""
    assert run(capsys, ["experiment", "stop", "laser", "--winner", "B", "--workspace", str(ws)])[0] == 0
    before = workspace_digest(ws)
    code, _, err = run(capsys, ["experiment", "stop", "laser", "--workspace", str(ws)])
    assert code == 2 and "was stopped on" in err and "with B as the winner; nothing changed" in err, err
    assert workspace_digest(ws) == before
    code, out, _ = run(capsys, ["experiment", "stop", "laser", "--winner", "A", "--workspace", str(ws)])
    assert code == 0 and "its winner is now A (was B)" in out
    from contentlab.experiments import _load
    from contentlab.workspace import Workspace

    with Workspace.open(ws, create=False) as opened_ws:
        settings = _load(opened_ws, "laser")["settings"]
    assert settings["winner"] == "A" and settings["winner_before"] == "B" and "stopped_at" in settings


def test_results_after_a_stop_are_kept_and_the_summary_says_so(ws, capsys):
    """Real results are never dropped: a late batch of a stopped test is recorded, with a note."""
    assert run(capsys, ["experiment", "stop", "laser", "--winner", "B", "--workspace", str(ws)])[0] == 0
    code, out, err = run(capsys, ["record", "laser", "--arm", "A", "--impressions", "40", "--clicks", "2",
                                  "--event-id", "late-1", "--workspace", str(ws)])
    assert code == 0, err
    assert "1 recorded (+40 impressions, +2 clicks)" in out
    assert "laser was stopped with B as the winner; these results are added to its totals" in " ".join(out.split())


@pytest.mark.parametrize("header, cells", [
    ("Arm,Impressions,Clicks,Event ID", "A,40,2,batch-9"),
    ("arm,impressions,clicks,event-id", "A,40,2,batch-9"),
    ("ARM,IMPRESSIONS,CLICKS,EventId", "A,40,2,batch-9"),
    ("arm\u200b,impressions,clicks,\ufeffevent_id", "A,40,2,batch-9"),  # invisible characters pasted in with names
])
def test_known_column_in_another_spelling_is_read_not_skipped(ws, tmp_path, capsys, header, cells):
    """'Event ID' was skipped without a word, and with it the id that makes a replay harmless."""
    path = tmp_path / "r.csv"
    path.write_text(f"{header}\n{cells}\n", encoding="utf-8")
    assert run(capsys, ["record", "laser", "--input", str(path), "--workspace", str(ws)])[0] == 0
    path.write_text(f"{header}\n{cells}\n\n", encoding="utf-8")  # other bytes, same event id: recorded once
    code, out, _ = run(capsys, ["record", "laser", "--input", str(path), "--workspace", str(ws)])
    assert code == 0 and "0 recorded" in out and "1 already recorded" in out


@pytest.mark.parametrize("files, argv, fragment", [
    ({"r.csv": "arm,impressions,clicks,event_id,Event ID\nA,1,0,e,e\n"}, ["record", "laser", "--input", "{tmp}/r.csv"],
     "columns 'event_id', 'Event ID' are all read as event_id; keep one"),
    ({"d.csv": "headline,Head-line\nA draft,Another\n"}, ["score", "--input", "{tmp}/d.csv"],
     "columns 'headline', 'Head-line' are all read as headline; keep one"),
    ({"f.csv": "post_id,Post ID,published_at,headline,impressions,clicks\np1,p1,2026-03-02,Hello,10,1\n"},
     ["import", "{tmp}/f.csv"], "more than one column would be read as post_id"),
])
def test_two_spellings_of_one_column_are_refused(ws, tmp_path, capsys, files, argv, fragment):
    for name, text in files.items():
        (tmp_path / name).write_text(text, encoding="utf-8")
    before = workspace_digest(ws)
    code, _, err = run(capsys, [a.replace("{tmp}", str(tmp_path)) for a in argv] + ["--workspace", str(ws)])
    assert code == 2 and fragment in err, err
    assert workspace_digest(ws) == before


def test_columns_not_read_are_named(ws, tmp_path, capsys):
    """Nothing a user gave is dropped without a word: columns contentlab does not read are listed."""
    export = tmp_path / "f.csv"
    export.write_text("Post ID,Published At,Headline,Impressions,Clicks,Link clicks,,\n"
                      "p1,2026-03-02,Hello there,10,1,1,,\np2,2026-03-02,Hello again,10,1,1,kept?,\n", encoding="utf-8")
    code, out, err = run(capsys, ["import", str(export), "--quiet", "--workspace", str(ws)])
    assert code == 0, err
    # A column without a header is named only when it holds something (a trailing delimiter makes an empty one).
    assert "2 added" in out and "not read: column(s) 'Link clicks', '(unnamed column 7)' (" in out
    results = tmp_path / "r.csv"
    results.write_text("arm,impressions,clicks,note\nA,10,1,from the newsletter tool\n", encoding="utf-8")
    code, out, err = run(capsys, ["record", "laser", "--input", str(results), "--workspace", str(ws)])
    assert code == 0 and "not read: column(s) 'note'" in out, err


def test_experiment_list_with_mixed_channels(ws, capsys):
    """Drafts on two channels give an experiment without one channel: the list shows '-' (was a TypeError)."""
    d = ws.parent / "d.csv"
    d.write_text("headline,channel\nFirst draft here,newsletter\nSecond draft here,blog\n", encoding="utf-8")
    assert main(["experiment", "new", "mixed", "--drafts", str(d), "--flat-prior", "--workspace", str(ws)]) == 0
    code, out, err = run(capsys, ["experiment", "list", "--workspace", str(ws)])
    assert code == 0, err
    row = next(line for line in out.splitlines() if line.strip().startswith("mixed"))
    assert " - " in row


# ------------------------------------------------------------------ faults of the machine

def test_read_only_workspace_reads_but_refuses_writes(ws, capsys, monkeypatch):
    """Simulated: the tests may run as root, who can write anywhere, so the permission check is patched."""
    import contentlab.workspace as workspace

    monkeypatch.setattr(workspace, "_writable", lambda path, db: False)
    before = workspace_digest(ws)
    for argv in (["settings"], ["experiment", "status", "laser"], ["drivers"], ["experiment", "list"]):
        code, out, err = run(capsys, argv + ["--workspace", str(ws)])
        assert code == 0, err
    for argv in (["settings", "--timezone", "UTC"], ["import", str(CORPUS / "posts.csv"), "--quiet"],
                 ["record", "laser", "--arm", "A", "--impressions", "5", "--clicks", "1"],
                 ["learn", "--bootstrap", "0", "--quiet"]):
        code, _, err = run(capsys, argv + ["--workspace", str(ws)])
        assert code == 2 and "is read-only" in err and "Traceback" not in err, err
    monkeypatch.undo()
    assert workspace_digest(ws) == before


def test_disk_full_says_so_and_writes_nothing(ws, tmp_path, capsys, monkeypatch):
    """Simulated with the error SQLite raises (SQLITE_FULL: 'database or disk is full') in the middle of an import."""
    from contentlab.workspace import Workspace

    real = Workspace.upsert_posts

    def fill_up(self, posts, *args, **kwargs):
        real(self, posts.iloc[:1], *args, **kwargs)  # something was written inside the transaction...
        raise sqlite3.OperationalError("database or disk is full")

    monkeypatch.setattr(Workspace, "upsert_posts", fill_up)
    path = tmp_path / "f.csv"
    path.write_text(HEAD + GOOD.replace("p1", "new1") + GOOD.replace("p1", "new2"), encoding="utf-8")
    before = workspace_digest(ws)
    code, _, err = run(capsys, ["import", str(path), "--workspace", str(ws)])
    assert code == 2 and "Traceback" not in err
    assert "is full; nothing was written" in err
    assert workspace_digest(ws) == before  # ...and rolled back


@pytest.mark.parametrize("target, argv", [
    ("contentlab.workspace.Workspace.upsert_posts", ["import", "{tmp}/f.csv", "--quiet"]),
    ("contentlab.workspace.Workspace.record_import", ["import", "{tmp}/f.csv", "--quiet"]),
    ("contentlab.experiments._sync_posts", ["record", "laser", "--arm", "A", "--impressions", "9", "--clicks", "1"]),
    ("contentlab.modelfile.dumps", ["learn", "--bootstrap", "0", "--no-meaning", "--quiet"]),
])
def test_ctrl_c_inside_a_write_leaves_the_workspace_as_it_was(ws, tmp_path, capsys, monkeypatch, target, argv):
    """Simulated: KeyboardInterrupt raised after part of the write was done inside its transaction."""
    import importlib

    module_name, _, attr = target.rpartition(".")
    try:
        owner = importlib.import_module(module_name)
    except ModuleNotFoundError:  # a class: module.Class.method
        module_name, _, cls = module_name.rpartition(".")
        owner = getattr(importlib.import_module(module_name), cls)
    real = getattr(owner, attr)

    def interrupted(*args, **kwargs):
        real(*args, **kwargs)
        raise KeyboardInterrupt

    monkeypatch.setattr(owner, attr, interrupted)
    (tmp_path / "f.csv").write_text(HEAD + GOOD.replace("p1", "new1"), encoding="utf-8")
    before = workspace_digest(ws)
    code, _, err = run(capsys, [a.replace("{tmp}", str(tmp_path)) for a in argv] + ["--workspace", str(ws)])
    assert code == 130 and "nothing more was written" in err and "run the command again" in err
    assert workspace_digest(ws) == before


def test_locked_workspace_waits_visibly_then_gives_a_clear_error(ws, capsys, monkeypatch):
    monkeypatch.setenv("CONTENTLAB_LOCK_WAIT", "1.5")
    holder = sqlite3.connect(ws / "workspace.sqlite")
    holder.execute("BEGIN IMMEDIATE")
    try:
        code, _, err = run(capsys, ["settings", "--timezone", "UTC", "--workspace", str(ws)])
    finally:
        holder.rollback()
        holder.close()
    assert code == 2 and "Traceback" not in err
    assert "waiting: another contentlab command is writing to" in err
    assert "is busy" in err and "Nothing was written" in err


def test_locked_workspace_proceeds_once_the_other_writer_finishes(ws, capsys, monkeypatch):
    monkeypatch.setenv("CONTENTLAB_LOCK_WAIT", "20")
    holder = sqlite3.connect(ws / "workspace.sqlite", check_same_thread=False)
    holder.execute("BEGIN IMMEDIATE")
    timer = threading.Timer(1.5, holder.rollback)
    timer.start()
    try:
        code, out, err = run(capsys, ["settings", "--timezone", "Europe/Paris", "--workspace", str(ws)])
    finally:
        timer.join()
        holder.close()
    assert code == 0, err
    assert "waiting:" in err and "Europe/Paris" in out


def test_unexpected_error_is_one_line_unless_debugging(ws, capsys, monkeypatch):
    """A real bug still says it is one, and CONTENTLAB_DEBUG=1 shows where."""
    import contentlab.cli.importing as importing

    def broken(args):
        raise TypeError("boom")

    monkeypatch.setattr(importing, "cmd_settings", broken)
    code, _, err = run(capsys, ["settings", "--workspace", str(ws)])
    assert code == 1 and "Traceback" not in err
    assert "unexpected error (TypeError: boom)" in err and "CONTENTLAB_DEBUG=1" in err
    monkeypatch.setenv("CONTENTLAB_DEBUG", "1")
    with pytest.raises(TypeError):
        main(["settings", "--workspace", str(ws)])


# ------------------------------------------------------------------ built for the kind, not the case

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

CELL = st.one_of(
    st.text(max_size=12),
    st.sampled_from(["", " ", '"', '""', "\x00", "\r", "\n", ";", ",", "\t", "2026-03-14", "03/12/2026",
                     "2026-03-14T09:30+1", "2300-01-01", "1e400", "-0", "9007199254740993", "NaN", "ｐ1"]),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(st.lists(CELL, min_size=0, max_size=8), min_size=0, max_size=5),
       encoding=st.sampled_from(["utf-8", "cp1252", "utf-16", "latin-1"]))
def test_any_export_is_read_or_refused_with_a_message(tmp_path_factory, rows, encoding):
    """Whatever bytes a file holds, reading it gives posts or a ContentlabError: never another exception."""
    from contentlab.errors import ContentlabError
    from contentlab.ingest import read_history

    lines = [HEAD.strip()] + [",".join(r) for r in rows]
    path = tmp_path_factory.mktemp("fuzz") / "f.csv"
    path.write_bytes("\n".join(lines).encode(encoding, errors="replace"))
    try:
        history = read_history(path, timezone="Europe/London")
    except ContentlabError as exc:
        assert str(exc)
        return
    assert history.posts["published_at"].map(lambda t: 1970 <= int(t[:4]) <= 2200).all()
    assert (history.posts["impressions"] <= 2**53).all()


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=40))
def test_any_time_text_is_read_or_refused_with_a_reason(text):
    from contentlab.timeparse import parse_datetimes

    parsed = parse_datetimes([text], "America/New_York")
    if parsed.empty[0]:
        return
    if parsed.errors[0] is None:
        import pandas as pd

        assert pd.Timestamp(parsed.stored[0]).year in range(1969, 2202)  # a local time near a year's edge may cross it in UTC
    else:
        assert text.strip()[:20] in parsed.errors[0] or len(text.strip()) > 40


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(header=st.lists(st.sampled_from(["arm", "Arm", "impressions", "clicks", "at", "event_id", "Event ID", "note",
                                        "headline", "channel", "publish_at", "time", "group", "", "arm"]),
                       min_size=0, max_size=6),
       rows=st.lists(st.lists(CELL, min_size=0, max_size=7), min_size=0, max_size=5),
       delimiter=st.sampled_from([",", ";", "\t"]),
       wrap=st.sampled_from(["plain", "gzip", "damaged gzip", "bom", "utf-16"]))
def test_any_results_or_drafts_file_is_read_or_refused_with_a_message(tmp_path_factory, header, rows, delimiter, wrap):
    """Results and drafts files, like exports: rows or a ContentlabError, never another exception."""
    import gzip

    from contentlab.errors import ContentlabError
    from contentlab.readers import check_results, prepare_drafts, read_drafts, read_results

    text = "\n".join([delimiter.join(header)] + [delimiter.join(r) for r in rows])
    raw = text.encode("utf-16") if wrap == "utf-16" else text.encode("utf-8", errors="replace")
    if wrap == "bom":
        raw = b"\xef\xbb\xbf" + raw
    elif wrap == "gzip":
        raw = gzip.compress(raw)
    elif wrap == "damaged gzip":
        raw = gzip.compress(raw)[:10] + b"\xff" * 20  # a valid header, then a block zlib cannot read
    path = tmp_path_factory.mktemp("fuzz-files") / "f.csv"
    path.write_bytes(raw)
    for read, check in ((read_results, lambda f: check_results(f, ["A", "B"], "Europe/London", source=str(path))),
                        (read_drafts, lambda f: prepare_drafts(f, "Europe/London", source=str(path)))):
        try:
            check(read(path))
        except ContentlabError as exc:
            assert str(exc)


@pytest.mark.parametrize("raw, offset", [
    (b"plain ascii", None),
    ("Café — all UTF-8".encode(), None),
    (b"abc\xffdef", 3),
    (b"xxxxx\xc3\xa9\xff", 7),  # a two-byte letter across the block edge, then a stray byte
    (b"xxxxx\xc3A", 5),  # a sequence cut by an ASCII letter: the lead byte is the first bad one
    (b"xxxxxx\xe2\x80", 6),  # cut short at the end of the file
])
def test_first_byte_that_is_not_utf8_across_blocks(raw, offset):
    """The row named in the mixed-encoding message is found a block at a time (block of 6 bytes here)."""
    from contentlab.readers import _first_non_utf8

    assert _first_non_utf8(raw, block=6) == offset
    if offset is not None:  # the same offset the whole-file decoder reports
        with pytest.raises(UnicodeDecodeError) as info:
            raw.decode("utf-8")
        assert info.value.start == offset


@pytest.mark.parametrize("codec, delimiter", [
    ("utf-16", "\t"),  # a spreadsheet's "Unicode Text" export: UTF-16 little-endian with a mark, tab-separated
    ("utf-16-be", ","),  # no byte-order mark: told by where the NUL bytes sit
    ("utf-16-le", ";"),
    ("utf-32", ","),
])
def test_wide_unicode_files_read_like_utf8(tmp_path, codec, delimiter):
    """UTF-16 and UTF-32 files give the same posts as the same text in UTF-8, accents and emoji included."""
    from contentlab.ingest import read_history

    text = (HEAD + "p1,2026-03-02,Café déjà vu 🎉,10,1,blog\n").replace(",", delimiter)
    wide, plain = tmp_path / "wide.csv", tmp_path / "plain.csv"
    wide.write_bytes(text.encode(codec))
    plain.write_bytes(text.encode("utf-8"))
    got, want = read_history(wide, timezone="UTC").posts, read_history(plain, timezone="UTC").posts
    assert got["headline"].tolist() == ["Café déjà vu 🎉"]
    assert got.drop(columns=[c for c in got.columns if "source" in c]).equals(
        want.drop(columns=[c for c in want.columns if "source" in c]))


@pytest.mark.parametrize("text, fragment", [
    # 1763629200 s after 1970-01-01 UTC is 2025-11-20 09:00 UTC (checked with GNU date: date -u -d @1763629200)
    ("1763629200", "looks like a Unix time (counted from 1970); write it as 2025-11-20T09:00:00Z"),
    ("1763629200000", "write it as 2025-11-20T09:00:00Z"),
    ("2999-01-01", "year 2999 is outside the years contentlab works with (1970 to 2200); check the year"),
    ("123456", "is not an ISO 8601 date or date-time (e.g."),
])
def test_a_time_that_is_refused_says_what_to_write(text, fragment):
    from contentlab.timeparse import why_not_iso

    assert fragment in why_not_iso(text)


def test_count_problems_say_what_to_check(tmp_path):
    from contentlab.ingest import read_history

    path = tmp_path / "f.csv"
    path.write_text(HEAD + "p1,2026-03-02,Hello,10,50,blog\np2,2026-03-02,Hi,-5,1,blog\n", encoding="utf-8")
    problems = str(read_history(path, timezone="UTC").problems)
    assert "50 clicks is more than its 10 impressions; check the two columns are not swapped" in problems
    assert "-5 is negative; counts cannot be below 0, so check the value and the column" in problems
