"""``make demo`` (``contentlab demo`` in a checkout) changes no tracked file.

The check the issue names: ``git status --porcelain`` is empty after the demo runs in a fresh
clone, because the demo writes its workspace and its report only inside ``demo-workspace/``
(git-ignored). Skipped with a reason where git or the repository's history is not available.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from contentlab.cli import main

REPO = Path(__file__).resolve().parent.parent


def _git(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True, timeout=120)


@pytest.fixture
def clone(tmp_path):
    if shutil.which("git") is None:
        pytest.skip("git is not installed")
    if _git("rev-parse", "--is-inside-work-tree", cwd=REPO).returncode != 0:
        pytest.skip("not running from a git checkout, so there are no tracked files to protect")
    target = tmp_path / "clone"
    done = _git("clone", "--quiet", "--no-hardlinks", str(REPO), str(target), cwd=tmp_path)
    if done.returncode != 0:
        pytest.skip(f"could not clone the checkout: {done.stderr.strip()[:200]}")
    if not (target / "reports").exists():
        pytest.skip("this checkout has no committed example report to protect")
    return target


def test_demo_in_a_checkout_changes_no_tracked_file(clone, monkeypatch, capsys):
    monkeypatch.chdir(clone)
    assert _git("status", "--porcelain", cwd=clone).stdout == ""
    assert main(["demo"]) == 0
    out = capsys.readouterr().out
    assert _git("status", "--porcelain", "--untracked-files=all", cwd=clone).stdout == ""
    reports = list((clone / "demo-workspace" / "reports").glob("contentlab-report-*.html"))
    assert len(reports) == 1 and f"Report: {Path('demo-workspace') / 'reports' / reports[0].name}" in out
