"""The web app and JSON API through Starlette's test client: every page and endpoint, errors, token,
CSRF, body limit, escaping, concurrency and the warm model's reload.

The workspace is the demo corpus (invented Alderbank Libraries) with a model learned by the
``learn`` command, built once per session and copied for each module.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import threading
from pathlib import Path

import pandas as pd
import pytest
from starlette.testclient import TestClient

from contentlab.cli import main as cli
from contentlab.experiments import create_experiment, experiment_status
from contentlab.history import import_history
from contentlab.web import create_app
from contentlab.web.security import CSRF_COOKIE
from contentlab.workspace import Workspace

REPO = Path(__file__).resolve().parents[1]
CORPUS = REPO / "corpus"
HOSTILE = "<script>alert(1)</script>"
DRAFTS = ["6 books to start the winter reading challenge", "Have you joined the winter reading challenge yet?"]


def build_workspace(path: Path) -> Path:
    """Demo posts, a model from the learn command (few bootstrap refits), two experiments."""
    with Workspace.open(path, timezone="Europe/London") as ws:
        import_history(ws, CORPUS / "posts.csv")
    assert cli(["learn", "--bootstrap", "12", "--quiet", "--workspace", str(path)]) == 0
    with Workspace.open(path, create=False) as ws:
        create_experiment(ws, "winter-reading", DRAFTS, channel="newsletter", seed=3)
        create_experiment(ws, "hostile", [HOSTILE + " opening hours", "Opening hours this week"],
                          channel="newsletter", seed=4)
    return path


@pytest.fixture(scope="session")
def template_ws(tmp_path_factory) -> Path:
    if not (CORPUS / "posts.csv").exists():
        pytest.skip("corpus/posts.csv is not in this checkout")
    return build_workspace(tmp_path_factory.mktemp("webtemplate") / "ws")


@pytest.fixture(scope="module")
def ws_dir(template_ws, tmp_path_factory) -> Path:
    target = tmp_path_factory.mktemp("web") / "ws"
    shutil.copytree(template_ws, target)
    return target


@pytest.fixture(scope="module")
def client(ws_dir):
    with TestClient(create_app(ws_dir), base_url="http://127.0.0.1", raise_server_exceptions=False) as c:
        c.get("/drafts")  # sets the CSRF cookie
        yield c


def csrf(client) -> str:
    return client.cookies.get(CSRF_COOKIE)


def totals(ws_dir, name):
    with Workspace.open(ws_dir, create=False) as ws:
        st = experiment_status(ws, name)
    return st.impressions, st.clicks


# ------------------------------------------------------------------ pages

@pytest.mark.parametrize("path, expect", [
    ("/drafts", 'name="headlines"'),
    ("/experiments", "winter-reading"),
    ("/experiments/winter-reading", "Probability of being best"),
    ("/history", 'id="drivers"'),
    ("/history?channel=newsletter&from=2026-01-01&to=2026-06-30", "newsletter"),
    ("/history/drivers/1", "Posts "),
    ("/report", '<iframe class="report"'),
    ("/import", 'enctype="multipart/form-data"'),
])
def test_every_page_renders(client, path, expect):
    r = client.get(path)
    assert r.status_code == 200, r.text[:300]
    assert expect in r.text
    assert r.headers["content-type"].startswith("text/html")
    csp = r.headers["content-security-policy"]
    assert "script-src 'self'" in csp and "unsafe-inline" not in csp.split("style-src")[0]
    # No inline script anywhere: every <script> tag loads a file of the app.
    for tag in re.findall(r"<script[^>]*>", r.text):
        assert re.search(r'src="/static/[\w.]+\.js"', tag), tag


def test_home_redirects_to_drafts(client):
    r = client.get("/", follow_redirects=False)
    assert r.status_code == 307 and r.headers["location"] == "/drafts"


def test_drafts_score_as_you_type_and_rank_a_group(client):
    r = client.post("/drafts/score", data={"headlines": "\n".join(DRAFTS), "channel": "newsletter",
                                           "publish_at": "2026-12-03T09:00"},
                    headers={"HX-Request": "true", "X-CSRF-Token": csrf(client)})
    assert r.status_code == 200
    assert r.text.count('data-field="predicted_rate"') == 2
    assert "90% range" in r.text and "P(truly better)" in r.text and "past newsletter posts" in r.text
    assert "<html" not in r.text  # a fragment for htmx, not a page
    assert 'action="/drafts/experiment"' in r.text


def test_drafts_error_is_shown_in_place(client):
    r = client.post("/drafts/score", data={"headlines": "A draft", "channel": "no-such-channel"},
                    headers={"HX-Request": "true", "X-CSRF-Token": csrf(client)})
    assert r.status_code == 200
    assert "not a channel in your history" in r.text


def test_more_drafts_than_the_page_takes_are_refused_not_cut(client, ws_dir):
    """The drafts box used to score the first 200 lines and drop the rest without a word."""
    lines = "\n".join(f"Opening hours for branch number {i}" for i in range(250))
    r = client.post("/drafts/score", data={"headlines": lines, "channel": "newsletter"},
                    headers={"HX-Request": "true", "X-CSRF-Token": csrf(client)})
    assert r.status_code == 200 and "250 headlines: this page scores at most 200 at a time" in r.text
    assert 'data-field="predicted_rate"' not in r.text
    r = client.post("/drafts/experiment", data={"csrf_token": csrf(client), "name": "too-many", "headlines": lines,
                                                "channel": "newsletter"}, follow_redirects=False)
    assert r.status_code == 400 and "got 250" in r.text
    assert client.get("/api/experiments/too-many").status_code == 404


def test_turn_a_group_into_an_experiment(client, ws_dir):
    r = client.post("/drafts/experiment", data={"csrf_token": csrf(client), "name": "from-drafts",
                                                "headlines": "\n".join(DRAFTS), "channel": "newsletter",
                                                "publish_at": ""}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/experiments/from-drafts"
    assert client.get("/experiments/from-drafts").status_code == 200
    again = client.post("/drafts/experiment", data={"csrf_token": csrf(client), "name": "from-drafts",
                                                    "headlines": "\n".join(DRAFTS), "channel": "newsletter"})
    assert again.status_code == 400 and "exists already" in again.text


def test_experiment_next_split_sums_to_n(client):
    r = client.get("/experiments/winter-reading?impressions=2000&part=split", headers={"HX-Request": "true"})
    assert r.status_code == 200
    counts = [int(x.replace(",", "")) for x in re.findall(r'<td class="num">([\d,]+)</td>', r.text)]
    assert sum(counts) == 2000
    assert 'id="split-why"' in r.text and "Why this split" in r.text
    bad = client.get("/experiments/winter-reading?impressions=-3")
    assert "whole number from 1 to 999,999,999" in bad.text


def test_record_form_errors_beside_the_field_and_nothing_written(client, ws_dir):
    before = totals(ws_dir, "winter-reading")
    r = client.post("/experiments/winter-reading/record",
                    data={"csrf_token": csrf(client), "arm": "A", "impressions": "100", "clicks": "300"})
    assert r.status_code == 400
    field = re.search(r'id="error-clicks">([^<]*)<', r.text)
    assert field and "more than its 100 impressions" in field.group(1)
    assert totals(ws_dir, "winter-reading") == before
    r = client.post("/experiments/winter-reading/record",
                    data={"csrf_token": csrf(client), "arm": "A", "impressions": "ten", "clicks": "1"})
    assert 'id="error-impressions"' in r.text
    assert totals(ws_dir, "winter-reading") == before


@pytest.mark.parametrize("fields, words", [
    # Cut at 200 characters, a 300-character event id was recorded as another id without a word.
    ({"event_id": "e" * 300}, "has 300 characters; an event id may have at most 200"),
    # Cut at 200 characters, a time with trailing junk was recorded as the time alone.
    ({"at": "2026-11-30T10:00" + " " * 1000 + "x"}, "has 1,017 characters; it may have at most 1,000"),
])
def test_record_form_long_field_is_refused_not_cut(client, ws_dir, fields, words):
    before = totals(ws_dir, "winter-reading")
    r = client.post("/experiments/winter-reading/record",
                    data={"csrf_token": csrf(client), "arm": "A", "impressions": "10", "clicks": "1", **fields})
    assert r.status_code == 400 and words in " ".join(re.sub(r"<[^>]+>", " ", r.text).split())
    assert totals(ws_dir, "winter-reading") == before


def test_api_control_characters_are_refused(client, ws_dir):
    """An escape sequence in a headline or id would be stored and printed as it is by every later command."""
    before = totals(ws_dir, "winter-reading")
    r = client.post("/api/score", json={"drafts": [{"headline": "Red \x1b[31malert", "channel": "newsletter"}]})
    assert r.status_code == 400 and "holds U+001B (escape)" in r.json()["error"]
    r = client.post("/api/experiments/winter-reading/results",
                    json={"results": [{"arm": "A", "impressions": 5, "clicks": 1, "event_id": "e\x07"}]})
    assert r.status_code == 400 and "row 1, column 'event_id': holds U+0007 (bell)" in r.json()["error"]
    assert totals(ws_dir, "winter-reading") == before


def test_results_file_uploaded_on_the_page_records_once_even_saved_again(client, ws_dir):
    """A results CSV uploaded in the browser is recorded as `record --input` records it: the same sheet uploaded
    again, re-saved by a spreadsheet or with a row added below, counts each result once."""
    before = totals(ws_dir, "winter-reading")
    sheet = "arm,impressions,clicks\nA,400,9\nB,400,14\n"
    r = client.post("/experiments/winter-reading/record-file", data={"csrf_token": csrf(client)},
                    files={"results": ("week 49.csv", sheet.encode(), "text/csv")})
    assert r.status_code == 200 and 'id="recorded"' in r.text and "2 recorded" in r.text
    resaved = b'\xef\xbb\xbf"arm","impressions","clicks"\r\n"A","400","9"\r\n"B","400","14"\r\n"A","100","3"\r\n'
    r = client.post("/experiments/winter-reading/record-file", data={"csrf_token": csrf(client)},
                    files={"results": ("week 49 (1).csv", resaved, "text/csv")})
    assert r.status_code == 200 and "1 recorded" in r.text and "2 already recorded" in r.text
    assert totals(ws_dir, "winter-reading") == (before[0] + 900, before[1] + 26)


@pytest.mark.parametrize("upload, words", [
    (("bad.csv", b"arm,impressions,clicks\nA,40,9\nB,30,50\n", "text/csv"),
     "bad.csv: row 3, column 'clicks': 50 clicks is more than its 30 impressions"),
    (("empty.csv", b"", "text/csv"), "empty.csv: the file is empty; nothing was recorded"),
    (("sheet.xlsx", b"PK\x03\x04" + b"\0" * 40, "application/octet-stream"), "sheet.xlsx"),
])
def test_a_bad_results_upload_names_the_file_and_row_and_records_nothing(client, ws_dir, upload, words):
    before = totals(ws_dir, "winter-reading")
    r = client.post("/experiments/winter-reading/record-file", data={"csrf_token": csrf(client)},
                    files={"results": upload})
    assert r.status_code == 400 and 'id="record-error"' in r.text
    assert html.unescape(words) in html.unescape(r.text) and "contentlab-upload-" not in r.text
    assert totals(ws_dir, "winter-reading") == before
    r = client.post("/experiments/winter-reading/record-file",
                    files={"results": ("r.csv", b"arm,impressions,clicks\nA,1,0\n", "text/csv")})
    assert r.status_code == 403 and totals(ws_dir, "winter-reading") == before  # no CSRF value: nothing read


def test_a_totals_upload_that_goes_down_names_the_box_to_untick(client, ws_dir):
    with Workspace.open(ws_dir, create=False) as ws:
        create_experiment(ws, "running-totals", DRAFTS, channel="newsletter", flat_prior=True, seed=5)
    url = "/experiments/running-totals/record-file"
    r = client.post(url, data={"csrf_token": csrf(client), "cumulative": "on"},
                    files={"results": ("totals.csv", b"arm,impressions,clicks\nA,500,10\n", "text/csv")})
    assert r.status_code == 200 and totals(ws_dir, "running-totals") == (500, 10)
    r = client.post(url, data={"csrf_token": csrf(client), "cumulative": "on"},
                    files={"results": ("totals.csv", b"arm,impressions,clicks\nA,1,0\n", "text/csv")})
    assert r.status_code == 400 and "totals.csv: row 2" in r.text and "cumulative total goes down" in r.text
    assert "untick &#39;The figures are totals so far&#39;" in r.text and "--cumulative" not in r.text
    assert totals(ws_dir, "running-totals") == (500, 10)


def test_record_form_records_and_status_changes(client, ws_dir):
    before = totals(ws_dir, "winter-reading")
    r = client.post("/experiments/winter-reading/record",
                    data={"csrf_token": csrf(client), "arm": "B", "impressions": "500", "clicks": "12",
                          "event_id": "form-1"}, headers={"HX-Request": "true"})
    assert r.status_code == 200 and 'id="recorded"' in r.text
    assert totals(ws_dir, "winter-reading") == (before[0] + 500, before[1] + 12)
    assert "<html" not in r.text and 'id="experiment"' in r.text


def test_stop_with_a_winner(client, ws_dir):
    client.post("/drafts/experiment", data={"csrf_token": csrf(client), "name": "to-stop",
                                            "headlines": "\n".join(DRAFTS), "channel": "newsletter"})
    r = client.post("/experiments/to-stop/stop", data={"csrf_token": csrf(client), "winner": "B"},
                    follow_redirects=False)
    assert r.status_code == 303
    page = client.get("/experiments/to-stop")
    assert re.search(r'id="state">stopped<', page.text)
    refused = client.post("/api/experiments/to-stop/next", json={"impressions": 100})
    assert refused.status_code == 409 and "was stopped" in refused.json()["error"]
    # Stopping it again changes nothing (was: stopped again with the leader, overwriting B and the stop time).
    again = client.post("/experiments/to-stop/stop", data={"csrf_token": csrf(client)}, follow_redirects=False)
    assert again.status_code == 409 and "nothing changed" in again.text
    with Workspace.open(ws_dir, create=False) as ws:
        from contentlab.experiments import _load

        assert _load(ws, "to-stop")["settings"]["winner"] == "B"


def test_history_filters_are_checked(client):
    assert client.get("/history?from=03/12/2026").status_code == 400
    r = client.get("/history?channel=" + HOSTILE)
    assert r.status_code == 400 and HOSTILE not in r.text and "&lt;script&gt;" in r.text


def test_driver_drilldown_splits_the_posts(client):
    rows = client.get("/api/drivers").json()["drivers"]
    for row in rows[:6]:
        r = client.get(f"/history/drivers/{row['rank']}")
        assert r.status_code == 200, row
        numbers = [int(x.replace(",", "")) for x in re.findall(r"<strong>([\d,]+)</strong> posts", r.text)]
        assert len(numbers) == 2 and all(n > 0 for n in numbers)
    assert client.get("/history/drivers/999").status_code == 404


def test_post_page_of_a_post_without_a_channel_shows_what_it_can(client, ws_dir):
    """A test created without a channel in a history of several channels gives posts the model cannot score as
    drafts: their page still shows the values and features, and says why there is no prediction."""
    with Workspace.open(ws_dir, create=False) as ws:
        create_experiment(ws, "no-channel", ["Late opening at the reading room", "The reading room opens late"],
                          flat_prior=True, seed=6)
    r = client.post("/api/experiments/no-channel/results",
                    json={"results": [{"arm": "A", "impressions": 300, "clicks": 9, "event_id": "nc-1"}]})
    assert r.status_code == 200
    r = client.get("/history/posts/no-channel:A")
    assert r.status_code == 200 and 'id="observed"' in r.text and "3.00%" in r.text
    assert 'id="unscored"' in r.text and "channel" in r.text and 'id="predicted"' not in r.text


def test_post_page_shows_features_prediction_and_residual(client, ws_dir):
    last_imported = pd.read_csv(CORPUS / "posts.csv")["post_id"].iloc[-1]  # a post the model learned from
    with Workspace.open(ws_dir, create=False) as ws:
        posts = ws.posts()
        post = posts[posts["post_id"] == last_imported].iloc[0]
    r = client.get(f"/history/posts/{post['post_id']}")
    assert r.status_code == 200, (post.to_dict(), r.text[-600:])
    assert 'id="predicted"' in r.text and 'id="residual"' in r.text and "n_chars" in r.text
    observed = post["clicks"] / post["impressions"]
    assert f"{observed * 100:.2f}%" in r.text
    assert client.get("/history/posts/NOPE-404").status_code == 404


def test_report_view_for_a_picked_week(client):
    page = client.get("/report")
    weeks = re.findall(r'<option value="(\d{4}-W\d{2})"', page.text)
    assert weeks, "the week picker lists the weeks with posts"
    r = client.get(f"/report/view?week={weeks[1]}")
    assert r.status_code == 200 and "<svg" in r.text and weeks[1] in r.text
    csp = r.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "script" not in csp  # no script may run in the report
    assert client.get("/report/view?week=2026-48").status_code == 400


# ------------------------------------------------------------------ import

def test_import_good_file(client, write_csv):
    path = write_csv()
    r = client.post("/import", data={"csrf_token": csrf(client)},
                    files={"export": ("posts.csv", path.read_bytes(), "text/csv")})
    assert r.status_code == 200, r.text[:400]
    assert "posts.csv: 3 rows read, 3 added" in r.text


def test_import_rejects_bad_rows_with_a_table_and_writes_nothing(client, ws_dir, write_csv, digest):
    from conftest import GOOD_ROWS, row_with

    path = write_csv([GOOD_ROWS[0], row_with(GOOD_ROWS[1], post_id="bad1", clicks="900"),
                      row_with(GOOD_ROWS[2], post_id="bad2", published_at="03/12/2026")], name="bad.csv")
    before = digest(ws_dir)
    r = client.post("/import", data={"csrf_token": csrf(client)},
                    files={"export": ("<img src=x onerror=alert(1)>.csv", path.read_bytes(), "text/csv")})
    assert r.status_code == 400
    table = r.text.split('id="problems"')[1]
    assert "<td>clicks</td>" in table and "<td>published_at</td>" in table
    assert "&lt;img src=x onerror=alert(1)&gt;.csv" in r.text and "<img" not in r.text
    assert "/tmp" not in r.text and "contentlab-upload" not in r.text  # no server path shown
    assert digest(ws_dir) == before


@pytest.mark.parametrize("kind, data, words", [
    ("damaged gzip", b"\x1f\x8b\x08\x00" + b"\xff" * 60, "looks gzip-compressed but cannot be read"),  # was a 500
    ("ZIP or .xlsx", b"PK\x03\x04" + bytes(range(200)), "is a ZIP archive (an Excel .xlsx workbook is one too)"),
    ("PDF", b"%PDF-1.7\n" + bytes(range(200)), "is a PDF document, not a CSV file"),
], ids=["damaged gzip", "ZIP or xlsx", "PDF"])
def test_import_upload_that_is_not_a_csv(client, ws_dir, digest, kind, data, words):
    before = digest(ws_dir)
    r = client.post("/import", data={"csrf_token": csrf(client)}, files={"export": ("posts.csv", data, "text/csv")})
    assert r.status_code == 400, r.text[:300]
    assert words in r.text.replace("&#39;", "'") and "Something went wrong" not in r.text
    assert digest(ws_dir) == before


def test_import_needs_csrf_and_a_file(client, write_csv, ws_dir, digest):
    before = digest(ws_dir)
    r = client.post("/import", files={"export": ("posts.csv", write_csv().read_bytes(), "text/csv")})
    assert r.status_code == 403 and "CSRF" in r.text
    r = client.post("/import", data={"csrf_token": csrf(client)})
    assert r.status_code == 400 and "Choose an export" in r.text
    assert digest(ws_dir) == before


def test_upload_size_limit(ws_dir, write_csv):
    app = create_app(ws_dir, max_body=2_000)
    with TestClient(app, base_url="http://127.0.0.1") as c:
        c.get("/import")
        big = b"x" * 5_000
        r = c.post("/import", data={"csrf_token": c.cookies.get(CSRF_COOKIE)},
                   files={"export": ("big.csv", big, "text/csv")})
        assert r.status_code == 413 and "limit" in r.text

        def chunks():  # no Content-Length: the limit is counted on the bytes read
            for _ in range(10):
                yield b"y" * 500

        r = c.post("/api/score", content=chunks(), headers={"content-type": "application/json"})
        assert r.status_code == 413 and "limit" in r.json()["error"]


# ------------------------------------------------------------------ CSRF, token, host

def test_form_post_without_csrf_is_refused(client, ws_dir):
    before = totals(ws_dir, "winter-reading")
    r = client.post("/experiments/winter-reading/record", data={"arm": "A", "impressions": "10", "clicks": "1"})
    assert r.status_code == 403
    r = client.post("/experiments/winter-reading/record",
                    data={"arm": "A", "impressions": "10", "clicks": "1", "csrf_token": "forged-value-000"})
    assert r.status_code == 403
    assert totals(ws_dir, "winter-reading") == before


def test_api_writes_need_json(client):
    r = client.post("/api/score", data={"drafts": "x"})
    assert r.status_code == 415 and "application/json" in r.json()["error"]


def test_token_required_on_every_page_and_api_call(ws_dir):
    token = "t" * 32
    app = create_app(ws_dir, token=token)
    with TestClient(app, base_url="http://203.0.113.5:8765") as c:
        for path in ("/drafts", "/history", "/report", "/api/experiments", "/static/app.css"):
            r = c.get(path)
            assert r.status_code == 401, path
        assert "error" in c.get("/api/drivers").json()
        assert c.get("/api/drivers", headers={"X-Contentlab-Token": "wrong" * 7}).status_code == 401
        assert c.get("/api/drivers", headers={"X-Contentlab-Token": token}).status_code == 200
        assert c.get("/api/drivers", headers={"Authorization": f"Bearer {token}"}).status_code == 200
        assert c.get("/drafts?token=nope").status_code == 401
        r = c.get(f"/history?token={token}&channel=newsletter", follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"] == "/history?channel=newsletter"
        assert "HttpOnly" in r.headers["set-cookie"]
        assert c.get("/history?channel=newsletter").status_code == 200  # the cookie now carries it


def test_local_app_refuses_foreign_host_names(ws_dir):
    with TestClient(create_app(ws_dir), base_url="http://attacker.example") as c:
        assert c.get("/api/experiments").status_code == 400


# ------------------------------------------------------------------ API

def test_api_score_matches_the_library(client, ws_dir):
    from contentlab.scoring import score_drafts

    body = {"drafts": [{"headline": h, "channel": "newsletter", "publish_at": "2026-12-03T09:00"} for h in DRAFTS]}
    r = client.post("/api/score", json=body)
    assert r.status_code == 200
    out = r.json()["drafts"]
    lib = score_drafts(pd.DataFrame(body["drafts"]), ws_dir, suggest=False)
    for d, (_, row) in zip(out, lib.iterrows()):
        assert {"headline", "predicted_rate", "rate_low", "rate_high", "percentile", "reasons"} <= set(d)
        assert d["predicted_rate"] == pytest.approx(row["predicted_rate"], rel=1e-9)
        assert d["rate_low"] <= d["predicted_rate"] <= d["rate_high"]
        assert 0 <= d["percentile"] <= 1 and isinstance(d["reasons"], list)
    assert json.loads(r.text) == r.json()  # plain JSON, no NaN


def test_api_score_drafts_with_and_without_fields(client):
    """Drafts in one call may differ in which optional fields they carry; what is missing comes back as null."""
    body = {"drafts": [{"headline": "5 things to know about the makerspace laser cutter", "channel": "newsletter",
                        "publish_at": "2026-12-03T07:30"},
                       {"headline": "<script>alert(1)</script> Inside the makerspace", "channel": "newsletter"},
                       {"headline": "Winter reading starts Monday", "channel": "blog"}]}
    r = client.post("/api/score", json=body)
    assert r.status_code == 200, r.text
    out = r.json()["drafts"]
    assert [d["publish_at"] for d in out] == ["2026-12-03T07:30", None, None]
    assert all(d["rate_low"] <= d["predicted_rate"] <= d["rate_high"] for d in out)
    assert "NaN" not in r.text


@pytest.mark.parametrize("body, status, words", [
    ({"drafts": []}, 400, "non-empty list"),
    ({"drafts": [{"channel": "newsletter"}]}, 400, 'draft 1, field "headline"'),
    ({"drafts": [{"headline": "x", "colour": 1}]}, 400, "unknown field"),
    ({"drafts": [{"headline": "A draft", "channel": "nope"}]}, 400, "not a channel in your history"),
    ({"drafts": [{"headline": "A draft", "channel": "newsletter", "publish_at": "soon-ish"}]}, 400, "publish_at"),
    ({"drafts": [{"headline": "x"}] * 201}, 400, "at most 200"),
    ([1, 2], 400, "JSON object"),
])
def test_api_score_errors(client, body, status, words):
    r = client.post("/api/score", json=body)
    assert r.status_code == status
    assert words in r.json()["error"]


def test_api_score_asks_for_the_channel_field_not_a_command_line_option(client):
    """The JSON API names the draft's field; the CLI's wording (--channel) is tested in test_bad_inputs.py."""
    r = client.post("/api/score", json={"drafts": [{"headline": "Inside the makerspace", "channel": "blog"},
                                                  {"headline": "A draft without a channel"}]})
    assert r.status_code == 400
    error = r.json()["error"]
    assert error.startswith('draft 2: give the draft a channel (its "channel" field); your history has several: ')
    assert "--channel" not in error and "column" not in error


@pytest.mark.parametrize("path, raw, words", [
    ("/api/score", b"{not json", "not valid JSON"),
    ("/api/score", b"", "not valid JSON"),
    ("/api/score", b'{"drafts": [{"headline": "caf\xe9"}]}', "not valid JSON"),  # not UTF-8
    ("/api/score", b'{"drafts":' + b"[" * 100_000 + b"]" * 100_000 + b"}", "nested too deeply"),  # was a 500
    ("/api/experiments/winter-reading/next", b'{"impressions": NaN}', "NaN is not a JSON value"),  # RFC 8259
    ("/api/experiments/winter-reading/next", b'{"impressions": -Infinity}', "-Infinity is not a JSON value"),
    ("/api/experiments/winter-reading/results",
     b'{"results": [{"arm": "A", "impressions": Infinity, "clicks": 1}]}', "Infinity is not a JSON value"),
], ids=["malformed", "empty", "not UTF-8", "nested 100,000 deep", "NaN", "-Infinity", "Infinity in results"])
def test_api_invalid_json(client, ws_dir, path, raw, words):
    """Every body that is not JSON (RFC 8259) gets 400 and a reason, never a 500; nothing is written."""
    before = totals(ws_dir, "winter-reading")
    r = client.post(path, content=raw, headers={"content-type": "application/json"})
    assert r.status_code == 400 and words in r.json()["error"], r.text[:300]
    assert totals(ws_dir, "winter-reading") == before


@pytest.mark.parametrize("impressions", [10**30, 2**53 + 1, -(10**30), 0])
def test_api_next_impressions_outside_any_count(client, impressions):
    """A whole number beyond what a count can hold is a 400 (was an OverflowError and a 500)."""
    r = client.post("/api/experiments/winter-reading/next", json={"impressions": impressions})
    assert r.status_code == 400 and "whole number from 1 to 2^53" in r.json()["error"]


def test_api_experiments_status_next(client):
    names = [e["experiment"] for e in client.get("/api/experiments").json()["experiments"]]
    assert "winter-reading" in names
    st = client.get("/api/experiments/winter-reading").json()
    assert {a["arm"] for a in st["arms"]} == {"A", "B"} and "decision" in st
    assert sum(a["prob_best"] for a in st["arms"]) == pytest.approx(1.0, abs=1e-6)
    nxt = client.post("/api/experiments/winter-reading/next", json={"impressions": 1500}).json()
    assert sum(a["impressions"] for a in nxt["arms"]) == 1500
    # The plain-words reasons of `experiment next` come with the split, as on the page.
    assert nxt["why"] and all(isinstance(w, str) and w for w in nxt["why"])
    assert "settled_on" in st
    assert client.get("/api/experiments/nope").status_code == 404
    assert client.post("/api/experiments/nope/next", json={"impressions": 5}).status_code == 404
    bad = client.post("/api/experiments/winter-reading/next", json={"impressions": "many"})
    assert bad.status_code == 400 and "whole number" in bad.json()["error"]


def test_api_results_same_rules_as_record(client, ws_dir):
    before = totals(ws_dir, "winter-reading")
    row = {"arm": "A", "impressions": 400, "clicks": 9, "at": "2026-11-30T10:00:00+00:00", "event_id": "api-1"}
    r = client.post("/api/experiments/winter-reading/results", json={"results": [row]})
    assert r.status_code == 200 and r.json()["recorded"] == 1
    again = client.post("/api/experiments/winter-reading/results", json={"results": [row]})
    assert again.status_code == 200 and again.json()["recorded"] == 0  # replay changes nothing
    assert totals(ws_dir, "winter-reading") == (before[0] + 400, before[1] + 9)
    other = client.post("/api/experiments/winter-reading/results", json={"results": [dict(row, clicks=10)]})
    assert other.status_code == 400 and "api-1" in other.json()["error"]
    bad = client.post("/api/experiments/winter-reading/results",
                      json={"results": [{"arm": "Z", "impressions": 5, "clicks": 9}]})
    assert bad.status_code == 400
    assert "not an arm" in bad.json()["error"] and "more than its 5 impressions" in bad.json()["error"]
    # An API caller sent no command-line options: a one-row problem names its row and field, not "--clicks".
    one = client.post("/api/experiments/winter-reading/results",
                      json={"results": [{"arm": "A", "impressions": 5, "clicks": 9}]})
    assert one.status_code == 400 and "--" not in one.json()["error"] and "row 1, column 'clicks'" in one.json()["error"]
    assert client.post("/api/experiments/winter-reading/next", json={"impressions": -3}).json()["error"].startswith(
        '"impressions"')
    assert totals(ws_dir, "winter-reading") == (before[0] + 400, before[1] + 9)
    assert client.post("/api/experiments/winter-reading/results", json={"rows": []}).status_code == 400


def test_api_drivers(client):
    body = client.get("/api/drivers").json()
    assert body["drivers"] and {"driver", "relative_change", "low", "high", "evidence"} <= set(body["drivers"][0])
    assert body["cautions"]


def test_unknown_api_path_and_method(client):
    assert client.get("/api/nothing").status_code == 404
    r = client.get("/api/score")
    assert r.status_code == 405 and "error" in r.json()


def test_busy_or_read_only_workspace_is_not_called_bad_input(ws_dir, monkeypatch):
    """Both were 400 ("your request is wrong"); a client should retry on 503 and stop on 403. Nothing is written."""
    import sqlite3

    import contentlab.workspace as workspace

    monkeypatch.setenv("CONTENTLAB_LOCK_WAIT", "0.5")
    body = {"results": [{"arm": "A", "impressions": 10, "clicks": 1, "event_id": "fault-1"}]}
    before = totals(ws_dir, "winter-reading")
    with TestClient(create_app(ws_dir), base_url="http://127.0.0.1", raise_server_exceptions=False) as c:
        holder = sqlite3.connect(ws_dir / "workspace.sqlite")
        holder.execute("BEGIN IMMEDIATE")
        try:
            r = c.post("/api/experiments/winter-reading/results", json=body)
        finally:
            holder.rollback()
            holder.close()
        assert r.status_code == 503 and "is busy" in r.json()["error"] and r.headers["retry-after"] == "5"
    monkeypatch.setattr(workspace, "_writable", lambda path, db: False)
    with TestClient(create_app(ws_dir), base_url="http://127.0.0.1", raise_server_exceptions=False) as c:
        r = c.post("/api/experiments/winter-reading/results", json=body)
        assert r.status_code == 403 and "is read-only" in r.json()["error"]
        assert c.get("/api/experiments/winter-reading").status_code == 200
    monkeypatch.undo()
    assert totals(ws_dir, "winter-reading") == before


def test_unexpected_error_is_json_without_trace(ws_dir, monkeypatch):
    from contentlab.web import services

    def boom(state):
        raise RuntimeError("internal detail /secret/path")

    monkeypatch.setattr(services, "drivers", boom)
    with TestClient(create_app(ws_dir), base_url="http://127.0.0.1", raise_server_exceptions=False) as c:
        r = c.get("/api/drivers")
        assert r.status_code == 500
        assert set(r.json()) == {"error"} and "secret" not in r.text and "Traceback" not in r.text
        page = c.get("/history")
        assert page.status_code == 500 and "secret" not in page.text and "Traceback" not in page.text


# ------------------------------------------------------------------ escaping

def test_hostile_text_stays_text(client):
    r = client.post("/drafts/score", data={"headlines": HOSTILE + " at the library", "channel": "newsletter"},
                    headers={"HX-Request": "true", "X-CSRF-Token": csrf(client)})
    assert HOSTILE not in r.text and "&lt;script&gt;alert(1)&lt;/script&gt;" in r.text
    for path in ("/experiments", "/experiments/hostile", "/api/experiments/hostile"):
        page = client.get(path)
        assert page.status_code == 200
        assert HOSTILE not in page.text or path.startswith("/api/")
    assert page.headers["content-type"].startswith("application/json")
    arm = client.get("/experiments/hostile").text
    assert "alert(1) opening hours" in arm  # the library stores headlines with markup stripped


# ------------------------------------------------------------------ concurrency and reload

def test_tabs_and_cli_record_at_once_lose_nothing(client, ws_dir):
    app = client.app
    before = totals(ws_dir, "winter-reading")
    errors: list[str] = []

    def tab(i: int) -> None:
        with TestClient(app, base_url="http://127.0.0.1") as c:
            for j in range(4):
                r = c.post("/api/experiments/winter-reading/results",
                           json={"results": [{"arm": "A", "impressions": 10, "clicks": 1, "event_id": f"t{i}-{j}"}]})
                if r.status_code != 200:
                    errors.append(r.text)

    def terminal() -> None:
        for j in range(4):
            code = cli(["record", "winter-reading", "--arm", "B", "--impressions", "20", "--clicks", "2",
                        "--event-id", f"cli-{j}", "--quiet", "--workspace", str(ws_dir)])
            if code != 0:
                errors.append(f"cli exit {code}")

    threads = [threading.Thread(target=tab, args=(i,)) for i in range(3)] + [threading.Thread(target=terminal)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    assert totals(ws_dir, "winter-reading") == (before[0] + 3 * 4 * 10 + 4 * 20, before[1] + 12 + 8)


def test_model_reloads_after_learn(ws_dir, client):
    state = client.app.state.workspace
    first = state.warm()
    assert state.warm() is first  # kept warm
    assert cli(["learn", "--bootstrap", "4", "--quiet", "--workspace", str(ws_dir)]) == 0
    second = state.warm()
    assert second is not first and second.key[0] > first.key[0]
    assert client.post("/api/score", json={"drafts": [{"headline": DRAFTS[0], "channel": "newsletter"}]}).status_code == 200


# ------------------------------------------------------------------ the command

def test_serve_help_and_refusals(tmp_path, capsys):
    with pytest.raises(SystemExit):
        cli(["serve", "--help"])
    assert "example:" in capsys.readouterr().out
    assert cli(["serve", "--workspace", str(tmp_path / "none"), "--no-browser"]) == 2
    err = capsys.readouterr().err
    assert "No workspace" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "none").exists()
    assert cli(["serve", "--port", "70000", "--no-browser", "--workspace", str(tmp_path)]) == 2
    assert cli(["serve", "--token", "short", "--no-browser", "--workspace", str(tmp_path)]) == 2


def test_serve_on_a_taken_port_is_one_line_and_exit_2(ws_dir, capsys):
    """The server used to print the address, then stop with its own log line and exit code 3."""
    import socket

    with socket.socket() as holder:
        holder.bind(("127.0.0.1", 0))
        holder.listen()
        port = holder.getsockname()[1]
        code = cli(["serve", "--port", str(port), "--no-browser", "--workspace", str(ws_dir)])
    out, err = capsys.readouterr()
    assert code == 2 and f"port {port} on 127.0.0.1 is in use by another program" in err and "--port" in err
    assert "Open http" not in out


def test_workspace_without_a_model_says_what_to_do(tmp_path, write_csv):
    ws_path = tmp_path / "fresh"
    with Workspace.open(ws_path) as ws:
        import_history(ws, write_csv())
    with TestClient(create_app(ws_path), base_url="http://127.0.0.1") as c:
        page = c.get("/drafts")
        assert page.status_code == 200 and "contentlab learn" in page.text
        r = c.post("/api/score", json={"drafts": [{"headline": "A draft"}]})
        assert r.status_code == 400 and "contentlab learn" in r.json()["error"]
        assert c.get("/experiments").status_code == 200
        assert c.get("/api/experiments").json() == {"experiments": []}
        assert c.get("/import").status_code == 200
        assert c.get("/history").status_code == 400


def test_prob_best_timeline_ends_at_the_status(client, ws_dir):
    """The chart replays the recorded results through the bandit: its last point is the status's P(best)
    (up to Monte Carlo error: 4,000 draws give a standard error of at most 0.008)."""
    from contentlab.web import insight

    state = client.app.state.workspace
    with Workspace.open(ws_dir, create=False) as ws:
        st = experiment_status(ws, "winter-reading")
    assert st.impressions > 0
    timeline = insight.prob_best_timeline(state, "winter-reading", st)
    last = timeline["points"][-1]
    assert last["impressions"] == st.impressions
    for arm, p in zip(st.arms["arm"], st.arms["prob_best"]):
        assert last["prob_best"][arm] == pytest.approx(p, abs=0.04)


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_serve_command_on_another_address_prints_and_requires_a_token(ws_dir):
    """``contentlab serve --host 127.0.0.2`` (a loopback address, but not the default) must generate a
    token, print the one-time link and refuse calls without it."""
    import subprocess
    import sys
    import time
    import urllib.error
    import urllib.request

    port = _free_port()
    proc = subprocess.Popen(
        [sys.executable, "-c", "from contentlab.cli import run; run()", "serve", "--workspace", str(ws_dir),
         "--host", "127.0.0.2", "--port", str(port), "--no-browser"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        lines = []
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and not any("?token=" in x for x in lines):
            line = proc.stdout.readline()
            if not line:
                break
            lines.append(line)
        link = next(x for x in lines if "?token=" in x).split()[1]
        assert link.startswith(f"http://127.0.0.2:{port}/?token=")
        token = link.split("?token=")[1]
        url = f"http://127.0.0.2:{port}/api/experiments"
        status = None
        for _ in range(600):  # until the server answers
            try:
                with urllib.request.urlopen(url, timeout=5) as r:
                    status = r.status
                break
            except urllib.error.HTTPError as exc:
                status = exc.code
                break
            except OSError:
                time.sleep(0.1)
        assert status == 401
        req = urllib.request.Request(url, headers={"X-Contentlab-Token": token})
        with urllib.request.urlopen(req, timeout=30) as r:
            assert r.status == 200 and "experiments" in json.loads(r.read())
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def test_prob_best_timeline_uses_the_experiments_own_prior(template_ws, tmp_path):
    """With lopsided results (one arm shown 250 times more), the chart's last point must still be the status's
    P(best): the replay starts from the experiment's stored prior, not from a prior of its own."""
    from contentlab.experiments import record_results
    from contentlab.web import insight
    from contentlab.web.state import WorkspaceState

    target = tmp_path / "ws"
    shutil.copytree(template_ws, target)
    with Workspace.open(target, create=False) as ws:
        results = pd.DataFrame({"arm": ["A", "B"], "impressions": [5000, 20], "clicks": [150, 0],
                                "at": ["2026-12-06T09:00", "2026-12-06T09:00"]})
        record_results(ws, "winter-reading", results)
        st = experiment_status(ws, "winter-reading")
    last = insight.prob_best_timeline(WorkspaceState(target), "winter-reading", st)["points"][-1]
    for arm, p in zip(st.arms["arm"], st.arms["prob_best"]):
        assert last["prob_best"][arm] == pytest.approx(p, abs=0.04)


# ------------------------------------------------------------------ built for the kind, not the case

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

JSON_LEAF = st.one_of(st.none(), st.booleans(), st.integers(min_value=-(10**30), max_value=10**30),
                      st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=30),
                      st.sampled_from(["A", "B", "", "newsletter", "2026-12-03T09:00", "03/12/2026", "1,234", "9e999"]))
JSON_VALUE = st.recursive(JSON_LEAF, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.sampled_from(
        ["drafts", "results", "impressions", "policy", "suggest", "cumulative", "headline", "channel", "publish_at",
         "group", "arm", "clicks", "at", "event_id", "x"]), inner, max_size=5)), max_leaves=12)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(path=st.sampled_from(["/api/score", "/api/experiments/winter-reading/next",
                             "/api/experiments/winter-reading/results"]), body=JSON_VALUE)
def test_any_json_body_gets_an_answer_or_a_4xx_never_a_500(client, path, body):
    """Whatever JSON a client sends, the API answers it or says what is wrong: never a 500 or a trace."""
    r = client.post(path, content=json.dumps(body).encode(), headers={"content-type": "application/json"})
    assert r.status_code < 500, (body, r.text[:300])
    payload = r.json()
    assert (r.status_code == 200) != ("error" in payload), payload
    assert "Traceback" not in r.text
