"""Issue 9, items 1-5 and 11: results never silently dropped, the demo never deletes a user's work, one
workspace rule, one reader per kind of input, one date-time parser, and words that mean what the trade means."""

from __future__ import annotations

import io
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from contentlab.cli import main
from contentlab.errors import ContentlabError
from contentlab.experiments import create_experiment, read_results, record_results
from contentlab.readers import read_drafts, read_results as read_results_file
from contentlab.timeparse import YEAR_MAX, YEAR_MIN, parse_datetime, parse_datetimes
from contentlab.workspace import Workspace

from conftest import CORPUS, REPO, learned_demo_workspace, workspace_digest


def run(capsys, *argv) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def learned(tmp_path_factory) -> Path:
    return learned_demo_workspace(tmp_path_factory.mktemp("ways-in") / "contentlab-workspace", bootstrap=0)


@pytest.fixture
def exp(tmp_path) -> Path:
    root = tmp_path / "ws"
    with Workspace.open(root) as ws:
        create_experiment(ws, "laser", ["Inside the laser cutter", "5 things about the laser cutter"], flat_prior=True)
    return root


def record_text(capsys, root: Path, path: Path, text: str) -> tuple[int, str]:
    """Write ``text`` as a results file and record it into 'laser': exit code and the output on one line."""
    path.write_text(text, encoding="utf-8")
    code, out, _ = run(capsys, "record", "laser", "--input", path, "--workspace", root)
    return code, " ".join(out.split())


def totals(root: Path) -> tuple[int, int]:
    with Workspace.open(root, create=False) as ws:
        return tuple(ws.conn.execute("SELECT SUM(impressions), SUM(clicks) FROM observations").fetchone())


# ------------------------------------------------------------------ 1. results never silently dropped

def test_two_batches_under_one_file_name_with_identical_rows_both_count(exp, tmp_path, capsys):
    """The README's habit: each batch saved as results.csv. A thin arm's 'A,20,0' repeats; both batches count."""
    path = tmp_path / "results.csv"
    path.write_text("arm,impressions,clicks\nA,20,0\nB,400,9\n", encoding="utf-8")
    assert run(capsys, "record", "laser", "--input", path, "--workspace", exp)[0] == 0
    path.write_text("arm,impressions,clicks\nA,20,0\nB,380,12\n", encoding="utf-8")
    code, out, _ = run(capsys, "record", "laser", "--input", path, "--workspace", exp)
    assert code == 0 and "2 recorded" in out and "0 already recorded" in out
    assert totals(exp) == (20 + 400 + 20 + 380, 21)


def test_identical_file_twice_counts_once_and_says_what_was_skipped(exp, tmp_path, capsys):
    path = tmp_path / "results.csv"
    path.write_text("arm,impressions,clicks\nA,20,0\nA,20,0\nB,400,9\n", encoding="utf-8")
    code, out, _ = run(capsys, "record", "laser", "--input", path, "--workspace", exp)
    assert code == 0 and "3 recorded" in out  # identical rows inside one batch are two results
    copy = tmp_path / "renamed-copy.csv"
    copy.write_bytes(path.read_bytes())
    code, out, _ = run(capsys, "record", "laser", "--input", copy, "--workspace", exp)
    text = " ".join(out.split())
    assert code == 0 and "0 recorded" in text and "3 already recorded" in text
    assert "Skipped rows 2, 3, 4: a file with the same rows (whatever its name or format) was already recorded" in text
    assert totals(exp) == (440, 9)


def test_a_file_saved_again_by_a_spreadsheet_counts_once(exp, tmp_path, capsys):
    """Re-saving changes the bytes (byte-order mark, CRLF line ends, quotes) but not the results."""
    path = tmp_path / "results.csv"
    path.write_text("arm,impressions,clicks\nA,1200,30\nA,1200,30\nB,1400,41\n", encoding="utf-8")
    assert run(capsys, "record", "laser", "--input", path, "--workspace", exp)[0] == 0
    resaved = tmp_path / "results (1).csv"
    resaved.write_bytes(b'\xef\xbb\xbf"arm","impressions","clicks"\r\n"A","1200","30"\r\n"A","1200","30"\r\n'
                        b'"B","1400","41"\r\n')
    code, out, _ = run(capsys, "record", "laser", "--input", resaved, "--workspace", exp)
    assert code == 0 and "0 recorded" in out and "3 already recorded" in " ".join(out.split())
    assert totals(exp) == (3800, 101)


def test_the_same_sheet_with_rows_added_below_records_only_the_new_rows(exp, tmp_path, capsys):
    """A running results sheet exported each day: yesterday's rows are not counted again, today's are."""
    path = tmp_path / "results.csv"
    assert record_text(capsys, exp, path, "arm,impressions,clicks\nA,500,10\nB,500,14\n")[0] == 0
    code, text = record_text(capsys, exp, path, "arm,impressions,clicks\nA,500,10\nB,500,14\nA,300,4\nB,700,20\n")
    assert code == 0 and "2 recorded" in text and "2 already recorded" in text
    assert "Skipped rows 2, 3: they are the rows of a results file already recorded, in the same order" in text
    assert totals(exp) == (2000, 48)
    # A third export with one more row: only that row is new; the whole file again changes nothing.
    third = "arm,impressions,clicks\nA,500,10\nB,500,14\nA,300,4\nB,700,20\nA,100,1\n"
    assert "1 recorded" in record_text(capsys, exp, path, third)[1]
    assert "0 recorded" in record_text(capsys, exp, path, third)[1]
    assert totals(exp) == (2100, 49)


def test_a_new_batch_that_starts_like_a_one_row_file_counts_in_full(exp, tmp_path, capsys):
    """One matching first row is too often a new batch with the same figures: only earlier files of two or more
    rows found at the start of a longer one are taken as the same sheet saved again."""
    path = tmp_path / "results.csv"
    assert record_text(capsys, exp, path, "arm,impressions,clicks\nA,1000,20\n")[0] == 0
    code, text = record_text(capsys, exp, path, "arm,impressions,clicks\nA,1000,20\nB,1000,25\n")
    assert code == 0 and "2 recorded" in text
    assert totals(exp) == (3000, 65)


def test_timed_rows_are_known_by_arm_time_and_figures_in_any_order_or_file(exp, tmp_path, capsys):
    """Rows with a time are the same result wherever they appear: a sorted copy, or a file that repeats some of
    them beside new ones; identical timed rows inside one file still all count."""
    rows = ["A,2026-11-20T09:00:00Z,300,6", "A,2026-11-20T09:00:00Z,300,6", "B,2026-11-20T09:00:00Z,900,31"]
    path = tmp_path / "results.csv"
    assert "3 recorded" in record_text(capsys, exp, path, "arm,at,impressions,clicks\n" + "\n".join(rows) + "\n")[1]
    code, text = record_text(capsys, exp, tmp_path / "export-sorted.csv",
                             "at,arm,clicks,impressions\n2026-11-20 10:00+01:00,B,31,900\n2026-11-20T09:00:00Z,A,6,300\n"
                             "2026-11-20T09:00:00Z,A,6,300\n2026-11-21T09:00:00Z,A,5,250\n")
    assert code == 0 and "1 recorded" in text and "3 already recorded" in text
    assert totals(exp) == (1750, 48)


def test_files_recorded_before_row_ids_are_still_known(exp, tmp_path, capsys):
    """Workspaces made by earlier versions hold file rows under the digest of the file's bytes and the row
    (the rule before ids came from rows); the identical file again must still change nothing."""
    import hashlib

    from contentlab.readers import file_digest

    path = tmp_path / "results.csv"
    raw = b"arm,impressions,clicks\nA,200,3\nB,300,8\n"
    path.write_bytes(raw)
    digest = file_digest(raw)
    with Workspace.open(exp, create=False) as ws:
        for arm, n, k, row in (("A", 200, 3, 2), ("B", 300, 8, 3)):
            old_id = "c-" + hashlib.blake2b(f"{digest}\x1e{row}".encode(), digest_size=10).hexdigest()
            ws.conn.execute("INSERT INTO observations (experiment, event_id, arm, at, impressions, clicks) "
                            "VALUES ('laser', ?, ?, '2026-11-20T09:00:00+00:00', ?, ?)", (old_id, arm, n, k))
        ws.conn.commit()
    code, out, _ = run(capsys, "record", "laser", "--input", path, "--workspace", exp)
    assert code == 0 and "0 recorded" in out
    assert totals(exp) == (500, 11)


def test_single_call_without_id_or_time_says_a_repeat_counts_twice(exp, capsys):
    argv = ["record", "laser", "--arm", "A", "--impressions", "300", "--clicks", "5", "--workspace", exp]
    code, out, _ = run(capsys, *argv)
    assert code == 0 and "would count it twice" in " ".join(out.split())
    assert "changes nothing" not in out
    run(capsys, *argv)
    assert totals(exp) == (600, 10)  # it did count twice, as it said


def test_single_call_with_event_id_or_time_is_replay_safe(exp, capsys):
    for extra in (["--event-id", "monday-batch"], ["--at", "2026-12-03T09:00+01"]):
        argv = ["record", "laser", "--arm", "B", "--impressions", "300", "--clicks", "5", *extra, "--workspace", exp]
        assert run(capsys, *argv)[0] == 0
        code, out, _ = run(capsys, *argv)
        assert code == 0 and "0 recorded" in out and "Skipped" in out
    assert totals(exp) == (600, 10)


def test_event_id_reused_with_other_values_is_refused(exp, tmp_path, capsys):
    path = tmp_path / "r.csv"
    path.write_text("arm,impressions,clicks,event_id\nA,100,3,mon\n", encoding="utf-8")
    assert run(capsys, "record", "laser", "--input", path, "--workspace", exp)[0] == 0
    path.write_text("arm,impressions,clicks,event_id\nA,100,4,mon\n", encoding="utf-8")
    before = workspace_digest(exp)
    code, _, err = run(capsys, "record", "laser", "--input", path, "--workspace", exp)
    assert code == 2 and "event id 'mon' is already recorded with different values" in err
    assert workspace_digest(exp) == before


def test_python_api_frame_from_read_results_is_identified_by_content(exp, tmp_path):
    path = tmp_path / "r.csv"
    path.write_text("arm,impressions,clicks\nA,50,1\n", encoding="utf-8")
    with Workspace.open(exp, create=False) as ws:
        first = record_results(ws, "laser", read_results(path), source_file=str(path))
        again = record_results(ws, "laser", read_results(path), source_file=str(path))
    assert (first.added, again.added, again.duplicates) == (1, 0, 1)


# ------------------------------------------------------------------ 2. the demo never deletes a user's work

def test_demo_replaces_only_a_workspace_it_marked(tmp_path):
    from contentlab.demo import fresh_workspace
    from contentlab.workspace import DEMO_MARK

    mine = tmp_path / "mine"
    with Workspace.open(mine) as ws:
        ws.set_setting("timezone", "UTC")
    with pytest.raises(ContentlabError, match="the demo did not create"):
        fresh_workspace(mine)
    assert (mine / "workspace.sqlite").exists()
    demo = tmp_path / "demo"
    with Workspace.open(demo) as ws:
        ws.set_setting(*DEMO_MARK)
    assert fresh_workspace(demo) == demo and not demo.exists()
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("keep me")
    with pytest.raises(ContentlabError, match="not a contentlab workspace"):
        fresh_workspace(other)
    assert (other / "notes.txt").read_text() == "keep me"


# ------------------------------------------------------------------ 3. one workspace rule

def test_score_finds_the_default_workspace_and_the_environment_variable(learned, capsys, monkeypatch):
    monkeypatch.chdir(learned.parent)  # ./contentlab-workspace
    monkeypatch.delenv("CONTENTLAB_WORKSPACE", raising=False)
    code, out, err = run(capsys, "score", "Inside the makerspace laser cutter", "--channel", "newsletter")
    assert code == 0, err
    monkeypatch.chdir(REPO)
    monkeypatch.setenv("CONTENTLAB_WORKSPACE", str(learned))
    code2, out2, err2 = run(capsys, "score", "Inside the makerspace laser cutter", "--channel", "newsletter")
    assert code2 == 0, err2
    assert out2.split("\n")[3:6] == out.split("\n")[3:6]


def test_common_options_before_the_command(tmp_path, capsys):
    target = tmp_path / "front"
    code, out, _ = run(capsys, "--workspace", target, "import", CORPUS / "posts.csv", "--quiet")
    assert code == 0 and (target / "workspace.sqlite").exists()
    code, out, _ = run(capsys, "--workspace", target, "settings")
    assert code == 0 and f"workspace: {target}" in out and "posts:     2000" in out
    # After the command wins over before it, as each option's last word.
    code, out, _ = run(capsys, "--workspace", tmp_path / "elsewhere", "settings", "--workspace", target)
    assert code == 0 and f"workspace: {target}" in out


def test_workspace_between_experiment_and_its_action(tmp_path, capsys):
    target = tmp_path / "mid"
    assert run(capsys, "experiment", "--workspace", target, "new", "t1", "Draft one here", "Draft two here",
               "--flat-prior")[0] == 0
    code, out, _ = run(capsys, "--workspace", target, "experiment", "list")
    assert code == 0 and "t1" in out


def test_top_level_help_shows_the_common_options(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    out = capsys.readouterr().out
    assert "--workspace DIR" in out and "CONTENTLAB_WORKSPACE" in out


def test_python_dash_m_contentlab():
    proc = subprocess.run([sys.executable, "-m", "contentlab", "--help"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and "usage: contentlab" in proc.stdout


# ------------------------------------------------------------------ 4. one reader per kind of input

def test_time_column_gives_the_same_prediction_in_score_and_experiment_new(learned, tmp_path, capsys):
    """The same drafts with a 'time' column: score and experiment new read it alike (was 7.55% vs 5.96%)."""
    drafts = tmp_path / "drafts.csv"
    drafts.write_text("headline,channel,time\n5 things to know about the makerspace laser cutter,newsletter,2026-12-03 18:00\n"
                      "Inside the makerspace laser cutter,newsletter,2026-12-03 18:00\n", encoding="utf-8")
    ws = tmp_path / "ws"
    import shutil

    shutil.copytree(learned, ws)
    code, out, err = run(capsys, "score", "--input", drafts, "--format", "csv", "--no-suggest", "--workspace", ws)
    assert code == 0, err
    scored = pd.read_csv(io.StringIO(out))
    code, out, err = run(capsys, "experiment", "new", "evening", "--drafts", drafts, "--format", "csv",
                         "--workspace", ws)
    assert code == 0, err
    arms = pd.read_csv(io.StringIO(out))
    np.testing.assert_allclose(arms["predicted_rate"], scored["predicted_rate"], rtol=1e-9)
    morning = drafts.read_text().replace("18:00", "07:00")
    drafts.write_text(morning)
    code, out, _ = run(capsys, "score", "--input", drafts, "--format", "csv", "--no-suggest", "--workspace", ws)
    assert not np.allclose(pd.read_csv(io.StringIO(out))["predicted_rate"], scored["predicted_rate"])


def test_drafts_reader_row_numbers_and_aliases(tmp_path):
    path = tmp_path / "d.csv"
    path.write_text('Headline,Time\n"A headline\nover two lines",2026-12-03 09:00\nSecond,2026-12-03 10:00\n', encoding="utf-8")
    frame = read_drafts(path)
    assert list(frame.columns[:2]) == ["headline", "publish_at"]
    assert frame["row"].tolist() == [2, 4]
    both = tmp_path / "both.csv"
    both.write_text("headline,time,publish_at\nA,2026-12-03 09:00,2026-12-03 09:00\n", encoding="utf-8")
    with pytest.raises(ContentlabError, match="all give publish_at; keep one"):
        read_drafts(both)


def test_corpus_results_example_is_read_and_recorded(tmp_path, capsys):
    """corpus/results.csv, the README's example, records into the demo's experiment as documented."""
    frame = read_results_file(CORPUS / "results.csv")
    assert {"arm", "impressions", "clicks", "at", "event_id"} <= set(frame.columns)
    drafts = pd.read_csv(CORPUS / "drafts.csv", dtype=str)
    ws = tmp_path / "ws"
    code, _, err = run(capsys, "experiment", "new", "winter-reading", "--drafts", CORPUS / "drafts.csv",
                       "--group", "winter-reading", "--flat-prior", "--workspace", ws)
    assert code == 0, err
    code, out, err = run(capsys, "record", "winter-reading", "--input", CORPUS / "results.csv", "--workspace", ws)
    assert code == 0, err
    assert f"{len(frame)} recorded" in out
    assert len(drafts[drafts["group"] == "winter-reading"]) >= frame["arm"].nunique()


def test_readme_documents_both_formats():
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    assert "## Drafts format" in readme and "## Results format" in readme
    assert "corpus/results.csv" in readme and "corpus/drafts.csv" in readme


# ------------------------------------------------------------------ 5. one date-time parser

@pytest.mark.parametrize("text", ["2026-03-14T09:30+01:00", "2026-03-14T09:30+0100", "2026-03-14T09:30+01",
                                  "2026-03-14T08:30Z", "2026-03-14 08:30:00z", "2026-03-14T08:30:00.000+00:00"])
def test_every_iso_offset_form_gives_the_same_instant(text):
    # ISO 8601-1:2019, 4.3.13: the offset may be written ±hh, ±hhmm or ±hh:mm; Z is UTC.
    parsed = parse_datetimes([text], "Europe/Berlin")
    assert parsed.errors[0] is None and parsed.stored[0] == "2026-03-14T08:30:00+00:00"


@pytest.mark.parametrize("text, words", [
    ("03/12/2026", "is a day/month form"),
    ("3.12.2026 09:00", "is a day/month form"),
    ("2026-03-14T09:30+1", "has the UTC offset '+1'"),
    ("2026-03-14T09:30-5:00", "has the UTC offset '-5:00'"),
    (f"{YEAR_MAX + 1}-01-01", f"year {YEAR_MAX + 1} is outside"),
    (f"{YEAR_MIN - 1}-12-31T23:00Z", f"year {YEAR_MIN - 1} is outside"),
    ("2026-02-29", "no such calendar date"),
    ("next tuesday", "is not an ISO 8601 date or date-time"),
])
def test_refusals_have_one_wording_everywhere(text, words):
    assert words in parse_datetimes([text], "UTC").errors[0]
    with pytest.raises(ContentlabError) as caught:
        parse_datetime(text, "UTC", "--at")
    assert str(caught.value).startswith("--at: ") and words in str(caught.value)


def test_no_accepted_year_breaks_the_tools_arithmetic():
    """Both ends of the window fit pandas' nanosecond timestamps (1677-09-21 to 2262-04-11, pandas docs)."""
    for text in (f"{YEAR_MIN}-01-01T00:00Z", f"{YEAR_MAX}-12-31T23:59Z"):
        stored = parse_datetimes([text], "Pacific/Kiritimati").stored[0]
        assert pd.Timestamp(stored) - pd.Timestamp("2000-01-01T00:00Z") is not pd.NaT
    assert pd.Timestamp.min.year < YEAR_MIN and YEAR_MAX < pd.Timestamp.max.year


def test_naive_times_are_local_and_dst_gaps_resolve():
    # Europe/London: clocks go forward at 01:00 UTC on 29 March 2026 and back at 01:00 UTC on 25 October 2026
    # (EU summer-time rule, Directive 2000/84/EC: the last Sundays of March and October).
    parsed = parse_datetimes(["2026-07-01 09:00", "2026-10-25 01:30", "2026-03-29 01:30"], "Europe/London")
    assert parsed.stored.tolist() == ["2026-07-01T08:00:00+00:00", "2026-10-25T00:30:00+00:00",
                                      "2026-03-29T01:00:00+00:00"]


def test_report_week_and_days_use_the_same_parser():
    from contentlab.report import parse_day, parse_iso_week

    assert parse_iso_week("2026-W48")[0].isoformat() == "2026-11-23"
    with pytest.raises(ContentlabError, match="is a day/month form"):
        parse_day("23/11/2026", "--from")


# ------------------------------------------------------------------ 11. words that mean what the trade means

def test_readme_defines_impressions_and_names_the_vader_lexicon():
    readme = " ".join((REPO / "README.md").read_text(encoding="utf-8").split())
    assert "how many people were shown" not in readme
    assert re.search(r"`impressions` \| yes \| how many times the post was shown", readme)
    assert "reach" in readme and "stand-in" in readme
    assert "emotional words" not in readme
    assert "positive and negative words of the VADER lexicon" in readme


def _concurrent_writer(args):
    root, proc, shared = args
    own = Path(root).parent / f"own-{proc}.csv"
    own.write_text(f"arm,impressions,clicks\nA,{100 + proc},1\nB,{200 + proc},2\n", encoding="utf-8")
    with Workspace.open(root, create=False) as ws:  # each process has its own connection
        for path in (shared, own, shared):
            record_results(ws, "laser", read_results(path), source_file=str(path))
    return proc


def test_eight_concurrent_writers_lose_nothing_and_replay_nothing(exp, tmp_path):
    """8 processes each record one shared file (twice) and their own file: the shared one lands once, all own ones land."""
    import multiprocessing as mp

    shared = tmp_path / "shared.csv"
    shared.write_text("arm,impressions,clicks\nA,1000,10\nB,1000,20\n", encoding="utf-8")
    method = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
    with mp.get_context(method).Pool(8) as pool:
        assert sorted(pool.map(_concurrent_writer, [(str(exp), p, str(shared)) for p in range(8)])) == list(range(8))
    n, k = totals(exp)
    assert n == 2000 + sum(300 + 2 * p for p in range(8))
    assert k == 30 + 8 * 3
