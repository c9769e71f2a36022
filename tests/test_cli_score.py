"""``contentlab score`` end to end on the demo corpus: table, CSV, JSON, slots, and exit code 2 on bad input."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from contentlab.cli import main

CORPUS = Path(__file__).resolve().parent.parent / "corpus"


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    """The demo corpus imported and learned through the CLI, once for this module."""
    path = tmp_path_factory.mktemp("cli-ws")
    assert main(["import", str(CORPUS / "posts.csv"), "--timezone", "Europe/London", "--quiet",
                 "--workspace", str(path)]) == 0
    assert main(["learn", "--bootstrap", "20", "--quiet", "--workspace", str(path)]) == 0
    return path


def run(capsys, *argv) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_table_for_drafts_given_as_arguments(workspace, capsys):
    code, out, _ = run(capsys, "score", "Inside the makerspace laser cutter",
                       "Is the makerspace laser cutter right for you?", "--channel", "newsletter", "--at", "2026-12-03 09:00", "--workspace", str(workspace))
    assert code == 0
    assert "Thu 2026-12-03 09:00" in out
    lines = out.splitlines()
    first = next(i for i, l in enumerate(lines) if l.strip().startswith("1 "))
    assert "Inside the makerspace laser cutter" in lines[first]  # ranked first: no question (ground truth)
    assert "why:" in out and "is a question: -" in out
    assert "history:" in out
    assert "edit 1:" in out  # a few drafts: suggestions are on by default
    assert "top draft: " in out and "P(truly better)" in out
    assert "caution: These predictions come from associations" in out
    assert "consumer-protection" in out


def test_csv_keeps_input_columns_one_row_per_draft(workspace, capsys):
    code, out, err = run(capsys, "score", "--input", str(CORPUS / "drafts.csv"), "--format", "csv",
                         "--no-suggest", "--workspace", str(workspace))
    assert code == 0
    scored = pd.read_csv(io.StringIO(out), dtype={"publish_at": str})
    drafts = pd.read_csv(CORPUS / "drafts.csv", dtype=str)
    assert len(scored) == len(drafts)
    pd.testing.assert_frame_equal(scored[drafts.columns].astype(str), drafts.astype(str))
    for column in ("predicted_rate", "rate_low", "rate_high", "percentile", "group_rank", "p_better_than_next"):
        assert column in scored
    assert ((scored["rate_low"] <= scored["predicted_rate"]) & (scored["predicted_rate"] <= scored["rate_high"])).all()
    assert scored.groupby("group")["group_rank"].apply(lambda r: sorted(r) == list(range(1, len(r) + 1))).all()
    assert "association" in err  # the caution goes to stderr, the CSV stays clean


def test_json_with_suggestions_and_slots(workspace, capsys):
    code, out, _ = run(capsys, "score", "Have you tried the makerspace laser cutter yet?", "--channel", "newsletter",
                       "--format", "json", "--slots", "--workspace", str(workspace))
    assert code == 0
    doc = json.loads(out)
    (draft,) = doc["drafts"]
    assert draft["headline"] == "Have you tried the makerspace laser cutter yet?"
    assert draft["reasons"] and {"feature", "label", "change"} <= set(draft["reasons"][0])
    assert draft["suggestions"][0]["text"] == "Try the makerspace laser cutter"
    assert draft["suggestions"][0]["lift_low"] > 0
    assert doc["cautions"] and doc["slots"][0]["best"]
    assert all(row["n_posts"] >= 5 for row in doc["slots"][0]["best"])


def test_slots_table(workspace, capsys):
    code, out, _ = run(capsys, "score", "6 books to start the winter reading challenge", "--channel", "social_visual",
                       "--slots", "--no-suggest", "--workspace", str(workspace))
    assert code == 0
    assert "best slots for the top draft" in out and "your usual slot:" in out
    assert "predicted rate by day and block" in out and "too thin" in out


@pytest.mark.parametrize(
    "args, message",
    [
        (["   ", "--channel", "blog"], "empty"),
        (["x" * 2000, "--channel", "blog"], "2000 characters"),
        (["Inside the makerspace", "--channel", "podcast"], "'podcast' is not a channel"),
        (["Inside the makerspace", "--channel", "blog", "--at", "31/31/2026 25:99"], "is a day/month form"),
        ([], "give at least one headline"),
    ],
)
def test_bad_input_exits_2_with_one_line(workspace, capsys, args, message):
    code, out, err = run(capsys, "score", *args, "--workspace", str(workspace))
    assert code == 2
    assert out == ""
    assert message in err and len(err.strip().splitlines()) == 1


def test_bad_csv_row_is_named(workspace, capsys, tmp_path):
    bad = tmp_path / "drafts.csv"
    bad.write_text("headline,channel,publish_at\nInside the makerspace,blog,2026-12-03 09:00\n,blog,\n",
                   encoding="utf-8")
    code, _, err = run(capsys, "score", "--input", str(bad), "--workspace", str(workspace))
    assert code == 2 and "row 3" in err and "'headline'" in err


def test_workspace_without_model_exits_2(tmp_path, capsys):
    assert main(["import", str(CORPUS / "posts.csv"), "--quiet", "--workspace", str(tmp_path)]) == 0
    code, _, err = run(capsys, "score", "Inside the makerspace", "--channel", "blog", "--workspace", str(tmp_path))
    assert code == 2 and "No model" in err and "contentlab learn" in err


def test_missing_workspace_exits_2(tmp_path, capsys):
    code, _, err = run(capsys, "score", "Inside the makerspace", "--workspace", str(tmp_path / "nowhere"))
    assert code == 2 and "No workspace" in err
    assert not (tmp_path / "nowhere").exists()


def test_help_has_an_example():
    proc = subprocess.run([sys.executable, "-m", "contentlab.cli", "score", "--help"], capture_output=True, text=True)
    if proc.returncode != 0 and "No module named contentlab.cli.__main__" in proc.stderr:
        proc = subprocess.run([sys.executable, "-c", "from contentlab.cli import run; run()", "score", "--help"],
                              capture_output=True, text=True)
    assert proc.returncode == 0
    assert "example:" in proc.stdout and "contentlab score" in proc.stdout


@pytest.mark.parametrize("encoding", ["latin-1", "cp1252", "ascii"])
def test_terminal_that_cannot_show_the_headline_still_gets_the_scores(workspace, monkeypatch, encoding):
    """A Windows console or a latin-1 locale: an emoji or another script used to crash the output half-way
    ("unexpected error", exit code 1); now the characters it cannot show are '?' and the scores are all there."""
    out = io.TextIOWrapper(io.BytesIO(), encoding=encoding, newline="\n")
    err = io.TextIOWrapper(io.BytesIO(), encoding=encoding, newline="\n")
    monkeypatch.setattr(sys, "stdout", out)
    monkeypatch.setattr(sys, "stderr", err)
    code = main(["score", "📚 Winter reading: книги для зимы", "--channel", "newsletter", "--no-suggest",
                 "--workspace", str(workspace)])
    out.flush()
    err.flush()
    shown = out.buffer.getvalue().decode(encoding)
    assert code == 0, err.buffer.getvalue().decode(encoding)
    assert "? Winter reading:" in shown and "predicted" in shown
