"""The experiment and record commands end to end, in-process through contentlab.cli.main."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pandas as pd
import pytest

from contentlab.cli import main
from contentlab.workspace import Workspace

CORPUS = Path(__file__).resolve().parents[1] / "corpus"


@pytest.fixture
def wsdir(tmp_path):
    path = tmp_path / "ws"
    Workspace.open(path).close()
    return str(path)


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def db_state(wsdir):
    conn = sqlite3.connect(Path(wsdir) / "workspace.sqlite")
    try:
        return (
            conn.execute("SELECT * FROM observations ORDER BY event_id").fetchall(),
            conn.execute("SELECT post_id, impressions, clicks FROM posts ORDER BY post_id").fetchall(),
            conn.execute("SELECT name, status FROM experiments ORDER BY name").fetchall(),
        )
    finally:
        conn.close()


@pytest.mark.parametrize(
    "argv", [["experiment"], ["experiment", "new"], ["experiment", "next"], ["experiment", "status"],
             ["experiment", "list"], ["experiment", "stop"], ["record"]]
)
def test_every_command_has_help_with_an_example(capsys, argv):
    with pytest.raises(SystemExit) as exit_info:
        main(argv + ["--help"])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    assert "example:" in out and "contentlab" in out


def test_next_help_explains_thompson_against_top_two(capsys):
    with pytest.raises(SystemExit):
        main(["experiment", "next", "--help"])
    out = " ".join(capsys.readouterr().out.split())
    assert "most clicks during the test" in out
    assert "closest challenger" in out and "fewer impressions" in out


def test_demo_drafts_end_to_end(capsys, wsdir, tmp_path):
    drafts = str(CORPUS / "drafts.csv")
    code, out, err = run(capsys, "experiment", "new", "mk", "--drafts", drafts, "--workspace", wsdir)
    assert code == 2 and "--group" in err and err.count("\n") == 1  # one line, exit 2
    code, out, _ = run(capsys, "experiment", "new", "mk", "--drafts", drafts, "--group", "makerspace-launch",
                       "--seed", "3", "--workspace", wsdir)
    assert code == 0 and "90% prior interval" in out and "flat" in out
    code, out, _ = run(capsys, "experiment", "next", "mk", "--impressions", "4000", "--format", "json",
                       "--workspace", wsdir)
    split = json.loads(out)
    assert sum(a["impressions"] for a in split["arms"]) == 4000 and len(split["arms"]) == 4
    # Feed back increments for two rounds, from a file, and one single result.
    results = tmp_path / "results.csv"
    rows = ["arm,impressions,clicks,at"]
    for arm, rate in zip("ABCD", [0.02, 0.03, 0.02, 0.06]):
        rows.append(f"{arm},1000,{int(1000 * rate)},2026-12-03T09:00")
        rows.append(f"{arm},1000,{int(1000 * rate)},2026-12-03T15:00")
    results.write_text("\n".join(rows) + "\n", encoding="utf-8")
    code, out, _ = run(capsys, "record", "mk", "--input", str(results), "--workspace", wsdir)
    assert code == 0 and "8 recorded" in out
    code, out, _ = run(capsys, "record", "mk", "--input", str(results), "--workspace", wsdir)
    assert code == 0 and "0 recorded" in out and "8 already recorded" in out
    # The file may also come as a plain argument after the name, as with import: the same replay rule.
    code, out, _ = run(capsys, "record", "mk", str(results), "--workspace", wsdir)
    assert code == 0 and "0 recorded" in out and "8 already recorded" in out
    code, out, _ = run(capsys, "record", "mk", "--arm", "D", "--impressions", "500", "--clicks", "31",
                       "--at", "2026-12-04T09:00", "--workspace", wsdir)
    assert code == 0 and "identified by its arm, --at and figures" in " ".join(out.split())
    code, out, _ = run(capsys, "experiment", "status", "mk", "--format", "json", "--workspace", wsdir)
    status = json.loads(out)
    by_arm = {a["arm"]: a for a in status["arms"]}
    assert by_arm["D"]["impressions"] == 2500 and by_arm["D"]["clicks"] == 151
    assert status["decision"]["leader"] == "D" and status["decision"]["stop"] is True
    code, out, _ = run(capsys, "experiment", "status", "mk", "--workspace", wsdir)
    assert "Stop:" in out and "Wilson" in out and "equal split" in out
    code, out, _ = run(capsys, "experiment", "status", "mk", "--format", "csv", "--workspace", wsdir)
    frame = pd.read_csv(pd.io.common.StringIO(out))
    assert list(frame["arm"]) == ["A", "B", "C", "D"] and "prob_best" in frame.columns
    code, out, _ = run(capsys, "experiment", "stop", "mk", "--workspace", wsdir)
    assert code == 0 and "winner: D" in out
    code, _, err = run(capsys, "experiment", "next", "mk", "--workspace", wsdir)
    assert code == 2 and "stopped" in err
    code, out, _ = run(capsys, "experiment", "list", "--format", "json", "--workspace", wsdir)
    listed = json.loads(out)
    assert listed[0]["experiment"] == "mk" and listed[0]["status"] == "stopped" and listed[0]["leader"] == "D"
    # The arms joined the post history, so the next learn learns from them.
    with Workspace.open(wsdir, create=False) as ws:
        posts = ws.posts()
    arms = posts[posts["experiment_id"] == "mk"]
    assert sorted(arms["post_id"]) == ["mk:A", "mk:B", "mk:C", "mk:D"]
    assert set(arms["source"]) == {"experiment"} and set(arms["channel"]) == {"newsletter"}


def test_headlines_as_arguments_and_single(capsys, wsdir):
    code, out, _ = run(capsys, "experiment", "new", "args", "First draft", "Second draft", "--channel", "blog",
                       "--flat-prior", "--workspace", wsdir)
    assert code == 0
    code, out, _ = run(capsys, "experiment", "next", "args", "--single", "--workspace", wsdir)
    assert code == 0 and "Post next" in out and "not a randomised split" in " ".join(out.split())


@pytest.mark.parametrize(
    "content, message",
    [
        ("arm,impressions,clicks\nA,100,3\nB,10,11\n", "row 3, column 'clicks': 11 clicks is more than its 10 impressions"),
        ("arm,impressions,clicks\nA,100,3\nZ,10,1\n", "row 3, column 'arm': 'Z' is not an arm"),
        ("arm,impressions,clicks\nA,-1,0\n", "row 2, column 'impressions'"),
        ("arm,impressions,clicks\nA,1.5,0\n", "row 2, column 'impressions'"),
        ("arm,impressions,clicks,at\nA,10,0,soon\n", "row 2, column 'at'"),
        ("arm,impressions\nA,10\n", "missing column(s): clicks"),
    ],
)
def test_bad_results_exit_2_one_line_nothing_written(capsys, wsdir, tmp_path, content, message):
    run(capsys, "experiment", "new", "v", "One", "Two", "--flat-prior", "--workspace", wsdir)
    run(capsys, "record", "v", "--arm", "A", "--impressions", "10", "--clicks", "1", "--event-id", "ok",
        "--workspace", wsdir)
    before = db_state(wsdir)
    path = tmp_path / "bad.csv"
    path.write_text(content, encoding="utf-8")
    code, out, err = run(capsys, "record", "v", "--input", str(path), "--workspace", wsdir)
    assert code == 2 and message in err and err.count("\n") == 1 and str(path) in err
    assert db_state(wsdir) == before


def test_cumulative_decrease_exits_2(capsys, wsdir):
    run(capsys, "experiment", "new", "c", "One", "Two", "--flat-prior", "--workspace", wsdir)
    code, _, _ = run(capsys, "record", "c", "--arm", "A", "--impressions", "500", "--clicks", "9", "--cumulative",
                     "--workspace", wsdir)
    assert code == 0
    before = db_state(wsdir)
    code, _, err = run(capsys, "record", "c", "--arm", "A", "--impressions", "400", "--clicks", "9", "--cumulative",
                       "--workspace", wsdir)
    assert code == 2 and "goes down" in err
    assert db_state(wsdir) == before


def test_record_argument_errors(capsys, wsdir, tmp_path):
    run(capsys, "experiment", "new", "e", "One", "Two", "--flat-prior", "--workspace", wsdir)
    code, _, err = run(capsys, "record", "e", "--arm", "A", "--workspace", wsdir)
    assert code == 2 and "--impressions" in err
    code, _, err = run(capsys, "record", "e", "--input", str(tmp_path / "x.csv"), "--arm", "A", "--workspace", wsdir)
    assert code == 2 and "not both" in err
    code, _, err = run(capsys, "record", "e", str(tmp_path / "a.csv"), "--input", str(tmp_path / "b.csv"),
                       "--workspace", wsdir)
    assert code == 2 and "two results files" in err
    code, _, err = run(capsys, "record", "nope", "--arm", "A", "--impressions", "1", "--clicks", "0",
                       "--workspace", wsdir)
    assert code == 2 and "No experiment named 'nope'" in err
    code, _, err = run(capsys, "experiment", "new", "e", "One", "Two", "--workspace", wsdir)
    assert code == 2 and "exists already" in err
