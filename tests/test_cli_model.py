"""CLI: learn, drivers, evaluate and the simplest score — exit codes, formats and messages."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pandas as pd
import pytest

from contentlab.cli import main

ROOT = Path(__file__).resolve().parent.parent
CORPUS = ROOT / "corpus"


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def workspace(tmp_path_factory) -> Path:
    ws = tmp_path_factory.mktemp("ws")
    assert main(["import", str(CORPUS / "posts.csv"), "--timezone", "Europe/London", "--workspace", str(ws),
                 "--quiet"]) == 0
    assert main(["learn", "--workspace", str(ws), "--bootstrap", "5", "--quiet"]) == 0
    return ws


def test_learn_prints_validation_and_drivers(workspace, capsys):
    code, out, err = run(capsys, "learn", "--workspace", str(workspace), "--bootstrap", "3", "--quiet")
    assert code == 0, err
    assert "Validation on held-out later posts" in out
    for baseline in ("overall rate", "per-channel rate", "per-channel and hour-block rate"):
        assert baseline in out
    assert "Top drivers" in out and "not proof of cause" in out


def test_learn_says_whether_headline_meaning_was_used(workspace, capsys):
    # The demo's 100 small tests hold too few clearly different held-out pairs to weigh it by.
    code, out, err = run(capsys, "learn", "--workspace", str(workspace), "--bootstrap", "0", "--quiet")
    assert code == 0, err
    assert "Headline meaning: not used: the held-out time folds hold fewer than 300" in out
    code, out, err = run(capsys, "learn", "--workspace", str(workspace), "--bootstrap", "0", "--quiet",
                         "--no-meaning", "--format", "json")
    assert code == 0, err
    assert json.loads(out)["meaning"] == "not used (meaning=False)"


def test_learn_json_and_saved_summary(workspace, capsys):
    code, out, _ = run(capsys, "learn", "--workspace", str(workspace), "--bootstrap", "0", "--quiet",
                       "--format", "json")
    assert code == 0
    summary = json.loads(out)
    assert summary["validation"]["n_held_out"] > 0 and summary["drivers"]


def test_drivers_formats(workspace, capsys):
    code, out, _ = run(capsys, "drivers", "--workspace", str(workspace))
    assert code == 0 and "In words:" in out and "interval" in out
    code, out, _ = run(capsys, "drivers", "--workspace", str(workspace), "--format", "json")
    data = json.loads(out)
    assert code == 0 and {"driver", "relative_change", "low", "high", "uncertain", "evidence"} <= set(data["drivers"][0])
    assert data["cautions"]
    code, out, _ = run(capsys, "drivers", "--workspace", str(workspace), "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(out)))
    assert code == 0 and rows and "sentence" in rows[0]
    # CSV cells that a spreadsheet would run as formulas are neutralised (OWASP CSV injection).
    assert not any(v.startswith(("=", "+", "@")) for r in rows for k, v in r.items() if k in ("driver", "step", "sentence"))


def test_score_csv_keeps_input_columns(workspace, capsys):
    code, out, err = run(capsys, "score", "--workspace", str(workspace), "--input", str(CORPUS / "drafts.csv"),
                         "--format", "csv")
    assert code == 0, err
    scored = pd.read_csv(io.StringIO(out))
    drafts = pd.read_csv(CORPUS / "drafts.csv")
    assert len(scored) == len(drafts)
    # The input columns first, unchanged, then at least the three score columns.
    assert list(scored.columns[: len(drafts.columns)]) == list(drafts.columns)
    assert {"predicted_rate", "rate_low", "rate_high"} <= set(scored.columns)
    assert (scored["rate_low"] < scored["predicted_rate"]).all() and (scored["predicted_rate"] < scored["rate_high"]).all()
    assert (scored["headline"] == drafts["headline"]).all()


def test_score_arguments(workspace, capsys):
    code, out, err = run(capsys, "score", "Ten quiet study rooms open late", "--channel", "blog",
                         "--at", "2026-12-07 08:00", "--workspace", str(workspace))
    assert code == 0, err
    assert "%" in out and "truthful" in out


@pytest.mark.parametrize("argv, message", [
    (["score", "A draft", "--channel", "tiktok"], "tiktok"),
    (["score", "A draft", "--channel", "blog", "--at", "next tuesday"], "--at: 'next tuesday' is not an ISO 8601"),
    (["score"], "at least one headline"),
    (["drivers", "--top", "-1"], "--top"),
])
def test_score_and_drivers_errors(workspace, capsys, argv, message):
    code, _, err = run(capsys, *argv, "--workspace", str(workspace))
    assert code == 2
    assert message in err and "Traceback" not in err


def test_no_model_exit_2(tmp_path, capsys):
    ws = tmp_path / "empty"
    assert main(["import", str(CORPUS / "posts.csv"), "--workspace", str(ws), "--quiet"]) == 0
    capsys.readouterr()
    for argv in (["drivers"], ["score", "A draft", "--channel", "blog"]):
        code, _, err = run(capsys, *argv, "--workspace", str(ws))
        assert code == 2 and "No model" in err and "contentlab learn" in err


def test_learn_refuses_small_history(tmp_path, capsys):
    small = tmp_path / "small.csv"
    pd.read_csv(CORPUS / "posts.csv").head(30).to_csv(small, index=False)
    ws = tmp_path / "ws"
    assert main(["import", str(small), "--workspace", str(ws), "--quiet"]) == 0
    capsys.readouterr()
    code, _, err = run(capsys, "learn", "--workspace", str(ws), "--quiet")
    assert code == 2 and "too small" in err and "at least 60 posts" in err
    code, _, err = run(capsys, "learn", "--workspace", str(tmp_path / "nowhere"))
    assert code == 2 and "No workspace" in err


def test_evaluate_cli(tmp_path, capsys):
    posts = pd.read_csv(CORPUS / "posts.csv", dtype=str, keep_default_na=False).sort_values("published_at")
    cut = int(len(posts) * 0.75)
    train, test = tmp_path / "train.csv", tmp_path / "test.csv"
    early = posts.iloc[:cut]
    late = posts.iloc[cut:]
    late = late[~late["experiment_id"].isin(set(early["experiment_id"]) - {""})]
    early.to_csv(train, index=False)
    late.to_csv(test, index=False)
    code, out, err = run(capsys, "evaluate", "--train", str(train), "--test", str(test), "--timezone",
                         "Europe/London", "--format", "json", "--quiet")
    assert code == 0, err
    res = json.loads(out)
    assert res["n_test_posts"] == len(late) and len(res["calibration"]) == 10
    code, out, _ = run(capsys, "evaluate", "--train", str(train), "--test", str(test), "--quiet")
    assert code == 0 and "Calibration" in out
    code, _, err = run(capsys, "evaluate", "--train", str(tmp_path / "missing.csv"), "--test", str(test))
    assert code == 2 and "missing.csv" in err


@pytest.mark.parametrize("fmt", ["table", "json", "csv"])
def test_drivers_from_the_saved_summary_match_the_model(workspace, capsys, monkeypatch, fmt):
    """`drivers` answers from the table `learn` saved with the model; it must print exactly what the model gives."""
    from contentlab.cli import modelling

    code, fast, err = run(capsys, "drivers", "--workspace", str(workspace), "--format", fmt)
    assert code == 0, err
    monkeypatch.setattr(modelling, "_saved_drivers", lambda ws, outcome, top: (None, None))
    code, slow, err = run(capsys, "drivers", "--workspace", str(workspace), "--format", fmt)
    assert code == 0, err
    assert fast == slow


def test_drivers_with_another_top_comes_from_the_model(workspace, capsys, monkeypatch):
    from contentlab.cli import modelling

    calls = []
    real = modelling._saved_drivers
    monkeypatch.setattr(modelling, "_saved_drivers", lambda ws, o, top: calls.append(top) or real(ws, o, top))
    code, out, err = run(capsys, "drivers", "--workspace", str(workspace), "--top", "3", "--format", "json")
    assert code == 0, err
    assert calls == [3]
    topics = [d for d in json.loads(out)["drivers"] if d["kind"] == "topic term"]
    assert len(topics) <= 3


def _history(headline, clicks) -> str:
    rows = ["post_id,published_at,headline,impressions,clicks,channel"]
    for i in range(240):
        rows.append(f"p{i},2026-{1 + i % 11:02d}-{1 + i % 27:02d}T09:00Z,{headline(i)},1000,{clicks(i)},blog")
    return "\n".join(rows) + "\n"


@pytest.mark.parametrize("kind, headline, clicks, code, words", [
    # CountVectorizer raised "empty vocabulary" on a history without one word: an "unexpected error".
    ("no headline has a word (emoji only)", lambda i: "📚" * (1 + i % 4), lambda i: 10 + i % 30, 0, "Validation"),
    ("every headline the same", lambda i: "Opening hours this week", lambda i: 10 + i % 30, 0, "Validation"),
    ("no clicks at all", lambda i: f"Opening hours for branch {i}", lambda i: 0, 2, "too small to learn from"),
])
def test_learn_on_a_degenerate_history_fits_or_says_why(tmp_path, capsys, kind, headline, clicks, code, words):
    export = tmp_path / "h.csv"
    export.write_text(_history(headline, clicks), encoding="utf-8")
    ws = tmp_path / "ws"
    assert main(["import", str(export), "--quiet", "--workspace", str(ws)]) == 0
    got, out, err = run(capsys, "learn", "--bootstrap", "0", "--no-meaning", "--quiet", "--workspace", str(ws))
    assert got == code, err
    assert words in out + err and "unexpected error" not in err
    if code == 0:
        got, out, err = run(capsys, "score", "📚📚", "Opening hours", "--channel", "blog", "--workspace", str(ws))
        assert got == 0, err
