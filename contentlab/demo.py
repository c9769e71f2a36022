"""The end-to-end demo on the invented corpus, in a fresh workspace."""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

from .errors import ContentlabError


def corpus_dir() -> Path:
    """The repository's corpus/ folder, or a freshly generated copy when installed elsewhere."""
    here = Path(__file__).resolve().parent.parent / "corpus"
    if (here / "posts.csv").exists():
        return here
    from .demo_corpus import write_corpus

    target = Path(tempfile.gettempdir()) / "contentlab-demo-corpus"
    if not (target / "posts.csv").exists():
        write_corpus(target)
    return target


def fresh_workspace(directory: str | Path) -> Path:
    path = Path(directory)
    if path.exists():
        if not (path / "workspace.sqlite").exists() and any(path.iterdir()):
            raise ContentlabError(
                f"{path} exists and is not a contentlab workspace; choose another --workspace for the demo."
            )
        shutil.rmtree(path)
    return path


def say(text: str = "") -> None:
    print(text, flush=True)


def run_demo(workspace_dir: str | Path, out_dir: str | Path) -> None:
    from .history import import_history
    from .summary import feature_summary
    from .workspace import Workspace
    from .demo_corpus import TIMEZONE

    corpus = corpus_dir()
    path = fresh_workspace(workspace_dir)
    say("contentlab demo: Alderbank Libraries, an invented organisation with invented posts.")
    say(f"1. import {corpus / 'posts.csv'} into a fresh workspace at {path}")
    with Workspace.open(path, timezone=TIMEZONE) as ws:
        summary = import_history(ws, corpus / "posts.csv", progress=sys.stderr.isatty())
        say("   " + summary.line())
        say()
        say("2. what the posts look like, as features")
        say(feature_summary(ws.posts()))
