"""The demo report in a real browser: headless Chromium opens it with no console errors,
every chart is in the page it builds, no script runs, and a screenshot is taken.

Needs Debian's ``chromium`` package (``.ci/run`` installs it); skipped with a reason
where it is missing. Set ``CONTENTLAB_REPORT_SCREENSHOT=/path/shot.png`` to keep the
screenshot.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from datetime import date
from pathlib import Path

import pandas as pd
import pytest

from contentlab.report import build_report, write_report
from contentlab.workspace import Workspace

REPO = Path(__file__).resolve().parent.parent
CORPUS = REPO / "corpus" / "posts.csv"
HOSTILE = '<script>document.title="pwned"</script><img src=x onerror="document.title=\'pwned\'"> Opening hours'


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


CHROMIUM = _chromium()
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (apt-get install chromium; "
                                                         ".ci/run does this on CI)")


def _run(args: list[str], profile: Path) -> subprocess.CompletedProcess:
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-extensions", "--disable-dev-shm-usage", f"--user-data-dir={profile}"]
    return subprocess.run([CHROMIUM, *flags, *args], capture_output=True, text=True, timeout=120)


@pytest.fixture(scope="module")
def demo_html(tmp_path_factory):
    from contentlab.history import import_history

    if not CORPUS.exists():
        pytest.skip("corpus/posts.csv is not in this checkout")
    root = tmp_path_factory.mktemp("browser")
    ws = Workspace.open(root / "ws", timezone="Europe/London")
    import_history(ws, CORPUS, None, progress=False)
    # One hostile headline in the reported week: if any script ran, the title would change.
    hostile = pd.DataFrame([{
        "post_id": "HOSTILE-1", "published_at": "2026-11-26T10:00:00+00:00", "has_time": 1, "headline": HOSTILE,
        "impressions": 5000, "clicks": 400, "engagements": 500, "channel": "blog", "body": None,
        "experiment_id": None, "image_id": None, "cost": None,
    }])
    with ws.conn:
        ws.upsert_posts(hostile)
    try:  # a quickly fitted model, so the drivers chart is in the page too
        from contentlab.model import EngagementModel

        model = EngagementModel(alphas=[0.03], n_bootstrap=5).fit(ws.posts())
        ws.save_model("clicks", ws.fingerprint("clicks"), model.summary(), model)
    except ImportError:
        pass
    report = build_report(ws, today=date(2026, 12, 1), drafts=REPO / "corpus" / "drafts.csv")
    ws.close()
    files = write_report(report, root / "reports")
    return files.html, report


def test_chromium_opens_the_report_without_console_errors(demo_html, tmp_path):
    html_path, report = demo_html
    url = html_path.resolve().as_uri()
    done = _run(["--enable-logging=stderr", "--v=0", "--virtual-time-budget=3000", "--dump-dom", url],
                tmp_path / "profile")
    assert done.returncode == 0, done.stderr[-2000:]
    dom = done.stdout
    # Console output of the page (Chromium logs it as CONSOLE lines), script errors, refused requests.
    console = [line for line in done.stderr.splitlines()
               if "CONSOLE" in line or "Uncaught" in line or "Refused to" in line]
    assert not console, "\n".join(console[:10])
    # Every chart the report made is in the page the browser built, as an <svg>.
    for name in report.charts:
        key = name.replace("_", "-")
        assert re.search(rf'<svg[^>]*data-chart="{re.escape(key)}"', dom), f"chart {name} missing from the DOM"
    assert len(re.findall(r"<svg[^>]*class=\"chart\"", dom)) == len(report.charts)
    expected = {"trend", "channels", "shift-share"} | ({"drivers"} if report.works.get("status") == "ok" else set())
    assert expected <= set(report.charts)
    # No script ran and the hostile headline is text.
    assert "pwned" not in re.search(r"<title>(.*?)</title>", dom, re.S).group(1)
    assert "&lt;script&gt;document.title" in dom
    assert "<script" not in dom.lower()


def test_chromium_takes_a_screenshot(demo_html, tmp_path):
    html_path, _ = demo_html
    shot = tmp_path / "report.png"
    done = _run([f"--screenshot={shot}", "--window-size=1200,3000", "--hide-scrollbars",
                 html_path.resolve().as_uri()], tmp_path / "profile")
    assert done.returncode == 0, done.stderr[-2000:]
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    # PNG IHDR: width and height as asked.
    assert int.from_bytes(data[16:20], "big") == 1200 and int.from_bytes(data[20:24], "big") == 3000
    keep = os.environ.get("CONTENTLAB_REPORT_SCREENSHOT")
    if keep:
        shutil.copyfile(shot, keep)
