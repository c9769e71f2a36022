"""Shared fixtures: small CSV files, workspace digests, the demo corpus, the real archive."""

from __future__ import annotations

import gzip
import hashlib
import os
import sqlite3
from pathlib import Path

import pytest
from hypothesis import settings

# CI replays the same examples every run (a property failure there is reproducible, not luck);
# local runs keep exploring new examples.
settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")

REPO = Path(__file__).resolve().parents[1]
CORPUS = REPO / "corpus"


def learned_demo_workspace(path: Path, bootstrap: int) -> Path:
    """The demo corpus imported and learned through the CLI, as a user would (``bootstrap`` refits)."""
    from contentlab.cli import main

    assert main(["import", str(CORPUS / "posts.csv"), "--timezone", "Europe/London", "--quiet",
                 "--workspace", str(path)]) == 0
    assert main(["learn", "--bootstrap", str(bootstrap), "--quiet", "--workspace", str(path)]) == 0
    return path


def laser_test_workspace(path: Path) -> Path:
    """A learned demo workspace (no bootstrap) with one flat-prior experiment, 'laser', and no results yet."""
    from contentlab.cli import main

    learned_demo_workspace(path, bootstrap=0)
    assert main(["experiment", "new", "laser", "Inside the makerspace laser cutter",
                 "5 things to know about the makerspace laser cutter", "--channel", "newsletter", "--flat-prior",
                 "--seed", "3", "--workspace", str(path)]) == 0
    return path


def copy_workspace(base: Path, tmp_path: Path) -> Path:
    """A fresh copy of a module's prepared workspace, so each test may change or break its own."""
    import shutil

    target = tmp_path / "ws"
    shutil.copytree(base, target)
    return target


@pytest.fixture(scope="module")
def laser_base(tmp_path_factory) -> Path:
    """One module's learned demo workspace with the 'laser' experiment (see :func:`laser_test_workspace`)."""
    return laser_test_workspace(tmp_path_factory.mktemp("laser") / "ws")


@pytest.fixture
def laser_ws(laser_base, tmp_path) -> Path:
    """A fresh copy of ``laser_base`` for one test to change or break."""
    return copy_workspace(laser_base, tmp_path)


def run_cli(capsys, argv: list[str]) -> tuple[int, str, str]:
    """Exit code, stdout and stderr of one command, as the shell would see them."""
    from contentlab.cli import main

    capsys.readouterr()
    try:
        code = main(argv)
    except SystemExit as exc:  # a mistyped option: argparse exits (code 2) before the command runs
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


GOOD_ROWS = [
    # post_id, published_at, headline, impressions, clicks, channel
    ("p1", "2026-03-02T09:15:00+00:00", "Seven ways to use the library", "1000", "25", "blog"),
    ("p2", "2026-03-03T18:30:00+01:00", "Is the reading room open late?", "800", "12", "newsletter"),
    ("p3", "2026-03-04", '"New <strong>makerspace</strong> hours &amp; prices"', "1200", "30", "social_short"),
]
HEADER = ["post_id", "published_at", "headline", "impressions", "clicks", "channel"]


def csv_text(rows, header=HEADER, delimiter=",") -> str:
    """A small export as text; cells are written as given (quote them yourself when needed)."""
    lines = [delimiter.join(header)] + [delimiter.join(r) for r in rows]
    return "\n".join(lines) + "\n"


@pytest.fixture
def write_csv(tmp_path):
    """write_csv(rows, name=..., header=..., delimiter=..., encoding=..., gz=...) -> Path."""

    def write(rows=GOOD_ROWS, name="posts.csv", header=HEADER, delimiter=",", encoding="utf-8", gz=False,
              bom=False) -> Path:
        data = csv_text(rows, header, delimiter).encode(encoding)
        if bom:
            data = b"\xef\xbb\xbf" + data
        path = tmp_path / name
        path.write_bytes(gzip.compress(data) if gz else data)
        return path

    return write


def workspace_digest(directory: Path) -> tuple[int, str]:
    """(number of posts, SHA-256 of a full SQL dump): equal before and after means nothing changed."""
    conn = sqlite3.connect(Path(directory) / "workspace.sqlite")
    try:
        count = conn.execute("SELECT COUNT(*) FROM posts").fetchone()[0]
        dump = "\n".join(conn.iterdump())
    finally:
        conn.close()
    return count, hashlib.sha256(dump.encode("utf-8")).hexdigest()


@pytest.fixture
def digest():
    return workspace_digest


@pytest.fixture
def demo_posts() -> Path:
    return CORPUS / "posts.csv"


@pytest.fixture
def archive_path() -> Path:
    """The Upworthy Research Archive extract (Matias et al., Scientific Data 2021), or skip."""
    env = os.environ.get("CONTENTLAB_SHARED_DATA")
    path = Path(env) if env else REPO.parent / "shared" / "data" / "ab-archive-dev.csv.gz"
    if not path.exists():
        pytest.skip(f"real archive not found at {path} (set CONTENTLAB_SHARED_DATA to ab-archive-dev.csv.gz)")
    return path


def row_with(row: tuple, **changes) -> tuple:
    """A copy of a GOOD_ROWS row with some cells replaced by name."""
    cells = list(row)
    for name, value in changes.items():
        cells[HEADER.index(name)] = value
    return tuple(cells)
