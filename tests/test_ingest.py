"""Reading and validating exports (contentlab.ingest): formats, maps, time zones, every bad-input kind."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from contentlab.errors import ContentlabError
from contentlab.ingest import format_problems, parse_times, read_history, sniff_delimiter
from conftest import GOOD_ROWS as GOOD, HEADER, row_with


def problems_of(write_csv, rows, header=HEADER):
    return read_history(write_csv(rows, header=header)).problems


# ------------------------------------------------------------- formats

@pytest.mark.parametrize("kwargs", [
    {},
    {"bom": True},
    {"encoding": "cp1252"},
    {"delimiter": ";"},
    {"delimiter": "\t", "name": "posts.tsv"},
    {"gz": True, "name": "posts.csv.gz"},
    {"gz": True, "bom": True, "delimiter": ";", "name": "posts.csv.gz"},
])
def test_encodings_delimiters_and_gzip_give_the_same_posts(write_csv, kwargs):
    rows = [r[:2] + ("Caf\u00e9 \u2013 \u201cquotes\u201d & more",) + r[3:] if i == 0 else r for i, r in enumerate(GOOD)]
    history = read_history(write_csv(rows, **kwargs))
    assert history.problems == []
    assert history.posts["post_id"].tolist() == ["p1", "p2", "p3"]
    assert history.posts["headline"].iloc[0] == "Café – “quotes” & more"
    assert history.posts["impressions"].tolist() == [1000, 800, 1200]


def test_delimiter_is_taken_from_the_header_not_the_headlines():
    text = 'post_id;published_at;headline;impressions;clicks\np1;2026-01-01;"One, two, three, four";10;1\n'
    assert sniff_delimiter(text) == ";"
    assert sniff_delimiter("a,b,c\n1,2,3\n") == ","
    assert sniff_delimiter("a\tb\tc\n1\t2\t3\n") == "\t"


def test_an_excel_sep_line_names_the_delimiter_and_rows_keep_their_file_lines(tmp_path):
    # Excel's "sep=;" first line (written by some spreadsheet exports) names the delimiter; the header is line 2.
    path = tmp_path / "posts.csv"
    path.write_bytes(b"\xef\xbb\xbfsep=;\r\npost_id;published_at;headline;impressions;clicks\r\n"
                     b"p1;2026-01-01;One, two, three;100;5\r\np2;2026-01-02;Four;100;500\r\n")
    history = read_history(path)
    assert history.posts["post_id"].tolist() == ["p1"]
    assert history.posts["headline"].iloc[0] == "One, two, three"
    assert [(p.row, p.column) for p in history.problems] == [(4, "clicks")]
    path.write_bytes(b"sep=,\npost_id,published_at,title,impressions,clicks\np1,2026-01-01,Hi,1,0\n")
    with pytest.raises(ContentlabError, match="row 2 \\(header\\), missing required column"):
        read_history(path)


def test_markup_in_headlines_is_stripped_on_import(write_csv):
    history = read_history(write_csv())
    assert history.posts["headline"].iloc[2] == "New makerspace hours & prices"


def test_column_map_renames_an_export(write_csv, tmp_path):
    header = ["ID", "Date", "Post title", "Reach", "Link clicks", "Network"]
    path = write_csv(GOOD, header=header)
    mapping = tmp_path / "map.toml"
    mapping.write_text(
        '[columns]\npost_id = "ID"\npublished_at = "Date"\nheadline = "Post title"\n'
        'impressions = "Reach"\nclicks = "Link clicks"\nchannel = "Network"\n', encoding="utf-8")
    history = read_history(path, mapping)
    assert history.problems == []
    assert history.posts["clicks"].tolist() == [25, 12, 30]
    assert history.posts["channel"].tolist() == ["blog", "newsletter", "social_short"]


@pytest.mark.parametrize("content, message", [
    ("columns = 3", "needs a \\[columns\\] table"),
    ("[columns]\nheadlin = \"Title\"", "'headlin' is not a contentlab column"),
    ("[columns\n", "not valid TOML"),
    ("[columns]\nheadline = \"Nope\"", 'the file has no column "Nope"'),
])
def test_bad_column_maps_are_explained(write_csv, tmp_path, content, message):
    mapping = tmp_path / "map.toml"
    mapping.write_text(content, encoding="utf-8")
    with pytest.raises(ContentlabError, match=message):
        read_history(write_csv(), mapping)


def test_engagement_parts_sum_into_engagements(write_csv):
    header = ["post_id", "published_at", "headline", "impressions", "likes", "comments", "shares"]
    rows = [("a", "2026-01-01", "Hello", "100", "5", "2", "1"), ("b", "2026-01-02", "World", "100", "0", "0", "0")]
    posts = read_history(write_csv(rows, header=header)).posts
    assert posts["engagements"].tolist() == [8, 0]
    assert posts["clicks"].isna().all()


def test_identical_repeats_are_dropped_quietly(write_csv):
    history = read_history(write_csv(GOOD + [GOOD[0]]))
    assert history.problems == []
    assert len(history.posts) == 3


def test_blank_lines_keep_row_numbers(write_csv):
    rows = [GOOD[0], ("",), GOOD[1], row_with(GOOD[2], impressions="-1")]
    path = write_csv(rows)
    problem = read_history(path).problems[0]
    assert problem.row == 5  # header 1, p1 2, blank 3, p2 4, p3 5


# ------------------------------------------------------------- time zones

def test_parse_times_naive_offset_and_date_only():
    raw = pd.Series(["2026-03-02T09:15:00+01:00", "2026-03-02 09:15", "2026-03-02", "2026-07-01T12:00:00Z", "02/03/2026"])
    stored, has_time, failed = parse_times(raw, "Europe/Berlin")
    assert stored.tolist()[:4] == [
        "2026-03-02T08:15:00+00:00",  # offset honoured
        "2026-03-02T08:15:00+00:00",  # naive read as Berlin local time (CET, UTC+1)
        "2026-03-02",  # date only stays a date
        "2026-07-01T12:00:00+00:00",
    ]
    assert has_time.tolist() == [True, True, False, True, False]
    assert failed.tolist() == [False, False, False, False, True]


def test_naive_time_in_the_autumn_dst_overlap_is_read_as_first_occurrence():
    # 2026-10-25 02:30 happens twice in Berlin (CEST then CET); IANA tz database rules.
    stored, _, failed = parse_times(pd.Series(["2026-10-25T02:30:00"]), "Europe/Berlin")
    assert not failed[0]
    assert stored.iloc[0] == "2026-10-25T00:30:00+00:00"


# ------------------------------------------------------- bad-input kinds

def test_missing_required_column_is_a_file_problem(write_csv):
    header = ["post_id", "published_at", "impressions", "clicks"]
    rows = [("a", "2026-01-01", "10", "1")]
    with pytest.raises(ContentlabError) as info:
        read_history(write_csv(rows, header=header))
    message = str(info.value)
    assert "posts.csv: row 1 (header)" in message and "headline" in message and "--map" in message


def test_missing_outcome_column_is_a_file_problem(write_csv):
    header = ["post_id", "published_at", "headline", "impressions"]
    with pytest.raises(ContentlabError, match="an outcome"):
        read_history(write_csv([("a", "2026-01-01", "Hi", "10")], header=header))


@pytest.mark.parametrize("field, value, column, reason", [
    ("published_at", "yesterday", "published_at", "not an ISO 8601 date"),
    ("published_at", "2026-02-30", "published_at", "not an ISO 8601 date"),
    ("impressions", "-5", "impressions", "negative"),
    ("clicks", "2.5", "clicks", "fractional"),
    ("clicks", "lots", "clicks", "'lots' is not a number"),
    ("clicks", "", "clicks", "is empty"),
    ("clicks", "5000", "clicks", "5000 clicks is more than its 800 impressions"),
    ("headline", "", "headline", "is empty"),
    ("headline", "<br>&nbsp;", "headline", "is empty after removing markup"),
    ("headline", "x" * 1001, "headline", "has 1001 characters; the limit is 1000"),
    ("impressions", "NaN", "impressions", "is NaN"),
    ("clicks", "inf", "clicks", "is infinite"),
    ("impressions", "-Infinity", "impressions", "is infinite"),
    ("post_id", "", "post_id", "is empty"),
    ("impressions", "1e30", "impressions", "too large"),
])
def test_each_bad_cell_is_reported_with_file_row_column_reason(write_csv, field, value, column, reason):
    rows = [GOOD[0], row_with(GOOD[1], **{field: value}), GOOD[2]]
    path = write_csv(rows)
    history = read_history(path)
    assert len(history.problems) == 1, history.problems
    p = history.problems[0]
    assert (p.file, p.row, p.column) == (str(path), 3, column)
    assert reason in p.reason
    assert str(p).startswith(f"{path}: row 3, column '{column}': ")
    assert history.posts["post_id"].tolist() == ["p1", "p3"]
    assert history.rejected["row"].tolist() == [3]
    assert column in history.rejected["problems"].iloc[0]


def test_engagements_above_impressions(write_csv):
    header = ["post_id", "published_at", "headline", "impressions", "likes", "shares"]
    rows = [("a", "2026-01-01", "Hi", "10", "8", "3")]
    (p,) = read_history(write_csv(rows, header=header)).problems
    assert p.column == "likes+shares" and "11 engagements is more than its 10 impressions" in p.reason


def test_same_post_id_with_different_values(write_csv):
    rows = [GOOD[0], GOOD[1], row_with(GOOD[0], clicks="26")]
    (p,) = read_history(write_csv(rows)).problems
    assert (p.row, p.column) == (4, "post_id")
    assert "'p1' appears again with different values (first at row 2)" in p.reason


def test_one_bad_count_gives_one_problem_not_two(write_csv):
    # a bad impressions cell must not also trigger "clicks greater than impressions"
    rows = [row_with(GOOD[0], impressions="n/a")]
    problems = read_history(write_csv(rows)).problems
    assert [p.column for p in problems] == ["impressions"]


def test_format_problems_lists_twenty_then_counts():
    from contentlab.ingest import Problem

    problems = [Problem("f.csv", i, "clicks", "bad") for i in range(2, 30)]
    text = format_problems(problems)
    lines = text.splitlines()
    assert len(lines) == 21 and lines[-1] == "... and 8 more problem(s)"


def test_unreadable_and_missing_files(tmp_path):
    with pytest.raises(ContentlabError, match="no such file"):
        read_history(tmp_path / "nope.csv")
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(ContentlabError, match="empty"):
        read_history(tmp_path / "empty.csv")
    (tmp_path / "bad.gz").write_bytes(b"\x1f\x8bnot really gzip")
    with pytest.raises(ContentlabError, match="gzip"):
        read_history(tmp_path / "bad.gz")


def test_real_archive_extract_reads_cleanly(archive_path):
    """Upworthy Research Archive (Matias, Munger, Aubin Le Quere, Ebersole, Scientific Data 2021)."""
    history = read_history(archive_path)
    assert history.rows_read > 10_000
    assert len(history.problems) <= history.rows_read * 0.01
    assert not history.posts["headline"].str.contains("<strong>", regex=False).any()
    assert history.posts["has_time"].eq(0).all()  # the archive gives the week only
    clicks, impressions = history.posts["clicks"], history.posts["impressions"]
    assert (clicks <= impressions).all()
    rate = float(np.median(clicks / impressions))
    assert 0.005 < rate < 0.03 and math.isfinite(rate)  # README: median click rate about 1.3%
