"""SIGTERM (``kill``, a service manager, a container stop) and SIGHUP (a closed terminal) stop a command the way
Ctrl-C does: the open transaction rolls back, no half-written file stays, one true line, exit code 128 + signal.

The signal is sent by the process to itself from inside the write (no timing involved): the handler
``contentlab.cli`` installs turns it into an exception at that point.
"""

from __future__ import annotations

import importlib
import os
import signal
from pathlib import Path

import pytest

from contentlab.cli import main

from conftest import run_cli as run, workspace_digest

pytestmark = pytest.mark.skipif(
    not hasattr(signal, "SIGTERM") or signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL,
    reason="needs SIGTERM with its default handler in the test process (the CLI only installs its own over that)",
)


def send_after(monkeypatch, target: str, signum: int) -> None:
    """Make ``target`` (module.function or module.Class.method) do its work, then signal this process."""
    module_name, _, attr = target.rpartition(".")
    try:
        owner = importlib.import_module(module_name)
    except ModuleNotFoundError:
        module_name, _, cls = module_name.rpartition(".")
        owner = getattr(importlib.import_module(module_name), cls)
    real = getattr(owner, attr)

    def then_signal(*args, **kwargs):
        result = real(*args, **kwargs)
        os.kill(os.getpid(), signum)
        return result

    monkeypatch.setattr(owner, attr, then_signal)


HEAD = "post_id,published_at,headline,impressions,clicks,channel\n"
ROW = "new1,2026-03-02T09:15:00+00:00,Seven ways to use the library,1000,25,blog\n"


@pytest.mark.parametrize("signum", [signal.SIGTERM, getattr(signal, "SIGHUP", signal.SIGTERM)])
@pytest.mark.parametrize("target, argv", [
    ("contentlab.workspace.Workspace.upsert_posts", ["import", "{tmp}/f.csv", "--quiet"]),
    ("contentlab.experiments._sync_posts", ["record", "laser", "--arm", "A", "--impressions", "9", "--clicks", "1",
                                            "--event-id", "s1"]),
    ("contentlab.modelfile.dumps", ["learn", "--bootstrap", "0", "--no-meaning", "--quiet"]),
    ("contentlab.workspace.Workspace.record_import", ["import", "{tmp}/f.csv", "--quiet"]),
])
def test_stop_signal_inside_a_write_rolls_it_back(laser_ws, tmp_path, capsys, monkeypatch, target, argv, signum):
    send_after(monkeypatch, target, signum)
    (tmp_path / "f.csv").write_text(HEAD + ROW, encoding="utf-8")
    before = workspace_digest(laser_ws)
    args = [a.replace("{tmp}", str(tmp_path)) for a in argv] + ["--workspace", str(laser_ws)]
    code, _, err = run(capsys, args)
    assert code == 128 + signum, err
    assert f"stopped by {signal.Signals(signum).name}" in err and "nothing more was written" in err
    assert "Traceback" not in err
    assert workspace_digest(laser_ws) == before
    monkeypatch.undo()
    assert main(args) == 0  # and the same command finishes when run again
    assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL  # the handler is the caller's again


def test_stop_signal_while_the_report_is_written_keeps_the_earlier_page(laser_ws, tmp_path, capsys, monkeypatch):
    out = tmp_path / "reports"
    assert main(["report", "--out", str(out), "--workspace", str(laser_ws)]) == 0
    before = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    import contentlab.safety as safety

    real_replace = safety.os.replace

    def signal_then_replace(src, dst):
        if str(dst).endswith(".html"):
            os.kill(os.getpid(), signal.SIGTERM)
        return real_replace(src, dst)

    monkeypatch.setattr(safety.os, "replace", signal_then_replace)
    code, _, err = run(capsys, ["report", "--out", str(out), "--workspace", str(laser_ws)])
    assert code == 128 + signal.SIGTERM and "stopped by SIGTERM" in err
    after = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    assert not [p for p in after if p.name.endswith(".tmp")]
    page = [p for p in before if p.suffix == ".html"]
    assert page and all(after[p] == before[p] for p in page)


def test_ctrl_c_names_itself(laser_ws, capsys, monkeypatch):
    send_after(monkeypatch, "contentlab.experiments._sync_posts", signal.SIGINT)
    before = workspace_digest(laser_ws)
    code, _, err = run(capsys, ["record", "laser", "--arm", "A", "--impressions", "9", "--clicks", "1",
                                "--event-id", "c1", "--workspace", str(laser_ws)])
    assert code == 130 and "interrupted (Ctrl-C)" in err
    assert workspace_digest(laser_ws) == before
