"""Local times at a daylight-saving change: read as before, and named to the user.

A time without an offset inside an hour the clocks skipped is moved forward to the moment they changed; one in
an hour they repeated is read as its first occurrence. What is stored does not change; every place that reads
local times (import, record, score, report --drafts, experiment new, --at, --ends-at) now says which rows or
option, what was assumed, and how to write the offset to be exact. The reference for the transitions is Python's
``zoneinfo`` (the IANA tz database; PEP 495 for times in a gap or an overlap), not pandas, which the parser uses.
"""

from __future__ import annotations

import sqlite3
import zoneinfo
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from contentlab.timeparse import clock_notes_for, parse_datetime, parse_datetimes

from conftest import copy_workspace, laser_test_workspace, run_cli as run

BERLIN, NEW_YORK = "Europe/Berlin", "America/New_York"


# ------------------------------------------------------------------ the reference: zoneinfo

def _round_trips(local: datetime, zone: zoneinfo.ZoneInfo) -> bool:
    """Whether a wall time exists in the zone (PEP 495: a time in a gap does not come back from UTC unchanged)."""
    aware = local.replace(tzinfo=zone, fold=0)
    return aware.astimezone(UTC).astimezone(zone).replace(tzinfo=None) == local


def zoneinfo_kind(local: datetime, zone: zoneinfo.ZoneInfo) -> str:
    """'skipped', 'repeated' or 'plain' for a wall time, by zoneinfo alone."""
    if not _round_trips(local, zone):
        return "skipped"
    first, second = (local.replace(tzinfo=zone, fold=f).utcoffset() for f in (0, 1))
    return "repeated" if first != second else "plain"


def zoneinfo_stored(local: datetime, zone: zoneinfo.ZoneInfo) -> str:
    """The UTC time contentlab stores: the first occurrence, or for a skipped time the first minute that exists."""
    while not _round_trips(local, zone):
        local += timedelta(minutes=1)
    return local.replace(tzinfo=zone, fold=0).astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S+00:00")


def minutes_of(day: str) -> list[datetime]:
    start = datetime.fromisoformat(day)
    return [start + timedelta(minutes=m) for m in range(0, 6 * 60, 5)]  # 00:00 to 05:55, every 5 minutes


@pytest.mark.parametrize("timezone, day, kind, hours", [
    # IANA tz database, as zoneinfo reads it: Europe/Berlin 2026 forward 29 March 02:00 -> 03:00, back 25 October
    # 03:00 -> 02:00; America/New_York 2026 forward 8 March 02:00 -> 03:00, back 1 November 02:00 -> 01:00.
    (BERLIN, "2026-03-29", "skipped", (2,)),
    (BERLIN, "2026-10-25", "repeated", (2,)),
    (NEW_YORK, "2026-03-08", "skipped", (2,)),
    (NEW_YORK, "2026-11-01", "repeated", (1,)),
])
def test_flags_and_stored_times_match_zoneinfo(timezone, day, kind, hours):
    zone = zoneinfo.ZoneInfo(timezone)
    walls = minutes_of(day)
    parsed = parse_datetimes([w.strftime("%Y-%m-%d %H:%M") for w in walls], timezone)
    expected = [zoneinfo_kind(w, zone) for w in walls]
    assert {w.hour for w, k in zip(walls, expected) if k == kind} == set(hours)  # the worked example itself
    assert parsed.skipped_hour.tolist() == [k == "skipped" for k in expected]
    assert parsed.repeated_hour.tolist() == [k == "repeated" for k in expected]
    assert parsed.stored.tolist() == [zoneinfo_stored(w, zone) for w in walls]


def test_the_day_before_and_after_have_no_flags():
    walls = minutes_of("2026-03-28") + minutes_of("2026-03-30") + minutes_of("2026-10-24") + minutes_of("2026-10-26")
    parsed = parse_datetimes([w.isoformat() for w in walls], BERLIN)
    assert not parsed.skipped_hour.any() and not parsed.repeated_hour.any()
    assert parsed.clock_notes(lambda positions: "x") == []


def test_stored_values_are_those_of_before():
    """The values stored before the notes existed (worked by hand: CET is +01:00, CEST +02:00)."""
    parsed = parse_datetimes(["2026-03-29 02:30", "2026-10-25 02:30", "2026-10-25T02:30+01:00", "2026-03-29 03:30",
                              "2026-10-25 01:59", "2026-03-29"], BERLIN)
    assert parsed.stored.tolist() == [
        "2026-03-29T01:00:00+00:00",  # 02:30 does not exist: moved forward to 03:00 CEST
        "2026-10-25T00:30:00+00:00",  # the first 02:30, CEST
        "2026-10-25T01:30:00+00:00",  # the second, as its offset says
        "2026-03-29T01:30:00+00:00",
        "2026-10-24T23:59:00+00:00",
        "2026-03-29",
    ]
    assert parsed.skipped_hour.tolist() == [True, False, False, False, False, False]
    assert parsed.repeated_hour.tolist() == [False, True, False, False, False, False]


def test_notes_say_what_was_assumed_and_how_to_be_exact():
    parsed = parse_datetimes(["2026-03-29 02:30", "2026-10-25 02:30", "2026-10-25T02:40", "ok?"], BERLIN)
    skipped, repeated = parsed.clock_notes(lambda positions: f"f.csv: positions {positions}, column 'at'")
    assert skipped == ("f.csv: positions [0], column 'at': 2026-03-29 02:30 does not exist in Europe/Berlin (clocks "
                       "went forward): read as 03:00 (+02:00), the moment they changed. To be exact, write the UTC "
                       "offset, e.g. 2026-03-29T02:30+01:00 for the time on a clock not yet changed.")
    assert repeated == ("f.csv: positions [1, 2], column 'at': 2026-10-25 02:30 occurs twice in Europe/Berlin (clocks "
                        "went back): read as the first, summer-time 02:30 (+02:00); 1 more such time read the same way. "
                        "Write the offset, e.g. 2026-10-25T02:30+01:00, to mean the second.")
    new_york = parse_datetimes(["2026-11-01 01:30:15"], NEW_YORK).clock_notes(lambda positions: "--at")
    assert new_york == ["--at: 2026-11-01 01:30:15 occurs twice in America/New_York (clocks went back): read as the "
                        "first, summer-time 01:30 (-04:00). Write the offset, e.g. 2026-11-01T01:30:15-05:00, to mean "
                        "the second."]
    # The offset the note suggests means the second occurrence (zoneinfo's fold=1), as it says.
    second = datetime(2026, 11, 1, 1, 30, 15, tzinfo=zoneinfo.ZoneInfo(NEW_YORK), fold=1).astimezone(UTC)
    assert parse_datetimes(["2026-11-01T01:30:15-05:00"], NEW_YORK).stored[0] == f"{second:%Y-%m-%dT%H:%M:%S+00:00}"


def test_offsets_dates_and_utc_give_no_notes():
    values = ["2026-03-29T02:30+01:00", "2026-10-25T02:30Z", "2026-03-29", "2026-10-25"]
    assert parse_datetimes(values, BERLIN).clock_notes(lambda positions: "x") == []
    assert parse_datetimes(["2026-03-29 02:30"], "UTC").clock_notes(lambda positions: "x") == []
    assert clock_notes_for("2026-10-25 02:30", BERLIN, "--ends-at")[0].startswith("--ends-at: 2026-10-25 02:30 occurs")


def test_one_value_reads_as_the_column_does():
    stamp, has_time = parse_datetime("2026-03-29 02:30", BERLIN)
    assert has_time and stamp.isoformat() == "2026-03-29T03:00:00+02:00"


# ------------------------------------------------------------------ the command line

@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """The learned demo workspace with the 'laser' experiment, its time zone set to Europe/Berlin."""
    from contentlab.cli import main

    path = tmp_path_factory.mktemp("clock") / "ws"
    laser_test_workspace(path)
    assert main(["settings", "--timezone", BERLIN, "--workspace", str(path)]) == 0
    return path


@pytest.fixture
def ws(base, tmp_path) -> Path:
    return copy_workspace(base, tmp_path)


def _stored(ws: Path, sql: str, args=()) -> list[tuple]:
    conn = sqlite3.connect(ws / "workspace.sqlite")
    try:
        return conn.execute(sql, args).fetchall()
    finally:
        conn.close()


def test_import_names_the_rows_and_keeps_them(ws, tmp_path, capsys):
    posts = tmp_path / "posts.csv"
    posts.write_text("post_id,published_at,headline,impressions,clicks\n"
                     "c1,2026-03-29 02:30,Spring forward at the library,100,3\n"
                     "c2,2026-03-29T02:15,Another spring post here,100,3\n"
                     "c3,2026-10-25 02:30,Autumn hour at the library,100,3\n"
                     "c4,2026-10-25T02:30+01:00,The second half past two,100,3\n"
                     "c5,2026-03-29 02:45,A bad row in the gap,-1,3\n", encoding="utf-8")
    code, out, err = run(capsys, ["import", str(posts), "--skip-bad", "--quiet", "--workspace", str(ws)])
    assert code == 0, err
    assert "4 added" in out and "1 rejected" in out
    assert (f"Note: {posts}: rows 2, 3, column 'published_at': 2026-03-29 02:30 does not exist in Europe/Berlin "
            "(clocks went forward): read as 03:00 (+02:00)") in out
    assert "row 6" not in out  # the rejected row is not stored, so it has no note
    assert (f"Note: {posts}: row 4, column 'published_at': 2026-10-25 02:30 occurs twice in Europe/Berlin (clocks "
            "went back): read as the first, summer-time 02:30 (+02:00)") in out
    stored = dict(_stored(ws, "SELECT post_id, published_at FROM posts WHERE post_id LIKE 'c%'"))
    assert stored == {"c1": "2026-03-29T01:00:00+00:00", "c2": "2026-03-29T01:00:00+00:00",
                      "c3": "2026-10-25T00:30:00+00:00", "c4": "2026-10-25T01:30:00+00:00"}


def test_record_file_and_option_say_how_at_was_read(ws, tmp_path, capsys):
    results = tmp_path / "results.csv"
    results.write_text("arm,impressions,clicks,at,event_id\nA,100,2,2026-12-01T10:00,r1\n"
                       "B,100,3,2026-10-25 02:10,r2\n", encoding="utf-8")
    code, out, err = run(capsys, ["record", "laser", "--input", str(results), "--workspace", str(ws)])
    assert code == 0, err
    assert (f"{results}: row 3, column 'at': 2026-10-25 02:10 occurs twice in Europe/Berlin (clocks went back): "
            "read as the first") in " ".join(out.split())
    code, out, err = run(capsys, ["record", "laser", "--arm", "A", "--impressions", "50", "--clicks", "1",
                                  "--at", "2026-03-29 02:30", "--event-id", "r3", "--workspace", str(ws)])
    assert code == 0, err
    flat = " ".join(out.split())
    assert "Note: --at: 2026-03-29 02:30 does not exist in Europe/Berlin (clocks went forward): read as 03:00" in flat
    assert "e.g. 2026-03-29T02:30+01:00" in flat
    stored = dict(_stored(ws, "SELECT event_id, at FROM observations WHERE experiment='laser'"))
    assert stored["r2"].startswith("2026-10-25T00:10:00") and stored["r3"].startswith("2026-03-29T01:00:00")


def test_score_at_and_drafts_file_name_the_option_and_rows(ws, tmp_path, capsys):
    code, out, err = run(capsys, ["score", "Inside the makerspace laser cutter", "--channel", "newsletter",
                                  "--at", "2026-03-29 02:30", "--no-suggest", "--workspace", str(ws)])
    assert code == 0, err
    flat = " ".join(out.split())
    assert "note: --at: 2026-03-29 02:30 does not exist in Europe/Berlin (clocks went forward): read as 03:00" in flat
    assert "03:00" in flat  # the planned time shown is the one assumed
    drafts = tmp_path / "drafts.csv"
    drafts.write_text("headline,channel,publish_at\nInside the makerspace laser cutter,newsletter,2026-10-25 02:30\n"
                      "Meet the makerspace laser cutter,newsletter,2026-10-26 09:00\n", encoding="utf-8")
    code, out, err = run(capsys, ["score", "--input", str(drafts), "--format", "csv", "--no-suggest",
                                  "--workspace", str(ws)])
    assert code == 0, err
    assert (f"note: {drafts}: row 2, column 'publish_at': 2026-10-25 02:30 occurs twice in Europe/Berlin") in err
    code, out, err = run(capsys, ["report", "--drafts", str(drafts), "--out", str(tmp_path / "rep"),
                                  "--workspace", str(ws)])
    assert code == 0, err
    assert f"Note: {drafts}: row 2, column 'publish_at': 2026-10-25 02:30 occurs twice" in out


def _next_change(timezone: str, kind: str, after: datetime) -> datetime:
    """The wall time half an hour into the next skipped or repeated hour after ``after``, found with zoneinfo."""
    zone = zoneinfo.ZoneInfo(timezone)
    when = after.replace(minute=30, second=0, microsecond=0)
    while zoneinfo_kind(when, zone) != kind:
        when += timedelta(hours=1)
    return when


def test_experiment_new_names_draft_times_and_ends_at(ws, tmp_path, capsys):
    soon = datetime.now() + timedelta(days=2)
    gap = _next_change(BERLIN, "skipped", soon)
    twice = _next_change(BERLIN, "repeated", soon)
    drafts = tmp_path / "arms.csv"
    drafts.write_text("headline,publish_at\nOpen late at the makerspace,{}\nThe makerspace is open late,{}\n"
                      .format(f"{gap:%Y-%m-%d %H:%M}", f"{gap:%Y-%m-%d}T09:00"), encoding="utf-8")
    code, out, err = run(capsys, ["experiment", "new", "spring", "--drafts", str(drafts), "--flat-prior",
                                  "--channel", "newsletter", "--ends-at", f"{twice:%Y-%m-%d %H:%M}",
                                  "--workspace", str(ws)])
    assert code == 0, err
    flat = " ".join(out.split())
    assert (f"Note: {drafts}: row 2, column 'publish_at': {gap:%Y-%m-%d %H:%M} does not exist in Europe/Berlin "
            "(clocks went forward)") in flat
    assert f"Note: --ends-at: {twice:%Y-%m-%d %H:%M} occurs twice in Europe/Berlin (clocks went back)" in flat
    assert _stored(ws, "SELECT COUNT(*) FROM arms WHERE experiment='spring'") == [(2,)]


def test_api_record_carries_the_note(ws):
    from starlette.testclient import TestClient

    from contentlab.web import create_app

    with TestClient(create_app(ws), base_url="http://127.0.0.1") as client:
        r = client.post("/api/experiments/laser/results",
                        json={"results": [{"arm": "A", "impressions": 9, "clicks": 1, "at": "2026-10-25 02:30",
                                           "event_id": "w1"}]})
    assert r.status_code == 200, r.text
    notes = r.json()["notes"]
    assert any("row 1, column 'at': 2026-10-25 02:30 occurs twice in Europe/Berlin" in n for n in notes), notes
    assert np.array(_stored(ws, "SELECT at FROM observations WHERE event_id='w1'"))[0, 0].startswith(
        "2026-10-25T00:30:00")
