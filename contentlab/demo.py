"""The end-to-end demo on the invented corpus, in a fresh workspace."""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

from .errors import ContentlabError
from .percentages import probability


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
    """A place for the demo's workspace; an old one is replaced only if the demo made it (its marker says so).

    A user's own workspace, or a folder holding anything else, is refused: the
    demo never deletes anyone's work.
    """
    from .workspace import DB_NAME, DEMO_MARK, Workspace

    path = Path(directory)
    if not path.exists():
        return path
    if not path.is_dir():
        raise ContentlabError(f"{path} is a file; choose another --workspace for the demo.")
    if (path / DB_NAME).exists():
        with Workspace.open(path, create=False) as ws:
            made_by_demo = ws.setting(DEMO_MARK[0]) == DEMO_MARK[1]
        if not made_by_demo:
            raise ContentlabError(
                f"{path} holds a contentlab workspace that the demo did not create; the demo replaces only its own. "
                "Choose another --workspace for the demo, e.g. --workspace demo-workspace."
            )
        shutil.rmtree(path)
    elif any(path.iterdir()):
        raise ContentlabError(
            f"{path} exists and is not a contentlab workspace; choose another --workspace for the demo."
        )
    return path


def say(text: str = "") -> None:
    print(text, flush=True)


def _step(number: int, text: str) -> None:
    say()
    say(f"{number}. {text}")
    say("-" * (len(text) + 3))


def _cli(args: list[str]) -> None:
    """Run one contentlab command as a user would type it, and stop the demo if it fails."""
    from .cli import main

    say(f"$ contentlab {' '.join(_quote(a) for a in args)}")
    code = main(args)
    if code:
        raise ContentlabError(f"the demo step 'contentlab {' '.join(args)}' failed (exit {code})")


def _quote(arg: str) -> str:
    return f'"{arg}"' if (" " in arg or not arg) else arg


DEMO_TEST_DAYS, DEMO_BATCHES_PER_DAY, DEMO_BATCH_IMPRESSIONS = 7, 2, 900
DEMO_TEST_IMPRESSIONS = DEMO_TEST_DAYS * DEMO_BATCHES_PER_DAY * DEMO_BATCH_IMPRESSIONS


def simulate_experiment(ws, name: str, drafts, channel: str, hour: float, *, days: int = DEMO_TEST_DAYS,
                        batches_per_day: int = DEMO_BATCHES_PER_DAY,
                        impressions_per_batch: int = DEMO_BATCH_IMPRESSIONS, seed: int = 7):
    """A simulated week of a live test: allocate, let the invented audience click, record; repeat.

    The audience behaves as the demo's ground truth says, so the demo shows the
    bandit finding the draft that is truly best, not one chosen by hand.
    """
    import numpy as np
    import pandas as pd

    from .demo_corpus import true_rates
    from .experiments import next_allocation, record_results

    rng = np.random.default_rng(seed)
    truth = dict(zip(drafts["headline"], true_rates(drafts["headline"].tolist(), channel, hour)))
    start = pd.Timestamp(drafts["publish_at"].iloc[0]) if "publish_at" in drafts else pd.Timestamp("2026-12-06 09:00")
    for day in range(days):
        for batch in range(batches_per_day):
            alloc = next_allocation(ws, name, impressions_per_batch)
            at = start + pd.Timedelta(days=day, hours=6 * batch)
            rows = []
            for arm in alloc.arms.itertuples():
                n = int(arm.impressions)
                k = int(rng.binomial(n, truth[arm.headline])) if n else 0
                rows.append({"arm": arm.arm, "impressions": n, "clicks": k, "at": at.strftime("%Y-%m-%dT%H:%M"),
                             "event_id": f"demo-{name}-d{day}-b{batch}-{arm.arm}"})
            record_results(ws, name, pd.DataFrame(rows), source_file=None)
    return truth


def run_demo(workspace_dir: str | Path, out_dir: str | Path | None = None, *, bootstrap: int = 60) -> dict:
    """Import, learn, drivers, score, a simulated week of a test, the report. Returns what it made.

    The report goes to ``out_dir``, by default ``<workspace>/reports``: the demo writes nothing outside
    its own workspace, so running it in a checkout changes no tracked file (the committed example in
    ``reports/`` is rewritten only by ``make example-report``).
    """
    import time

    import pandas as pd

    from .demo_corpus import TIMEZONE
    from .experiments import create_experiment, experiment_status
    from .report import build_report, write_report
    from .workspace import Workspace

    started = time.perf_counter()
    corpus = corpus_dir()
    path = fresh_workspace(workspace_dir)
    out_dir = path / "reports" if out_dir is None else Path(out_dir)
    ws_arg = ["--workspace", str(path)]
    say("contentlab demo: Alderbank Libraries, an invented library network with two years of invented posts.")
    say(f"Workspace: {path} (fresh). Corpus: {corpus}")

    from .workspace import DEMO_MARK

    with Workspace.open(path) as ws:  # marked, so that the next demo may replace it (and nothing else)
        ws.set_setting(*DEMO_MARK)
    _step(1, "Import the post history")
    _cli(["import", str(corpus / "posts.csv"), "--timezone", TIMEZONE, "--quiet", *ws_arg])

    _step(2, "Learn what drove clicks (validation against baselines is printed every time)")
    _cli(["learn", "--bootstrap", str(bootstrap), "--quiet", *ws_arg])

    _step(3, "The drivers, with 90% intervals")
    _cli(["drivers", "--top", "6", *ws_arg])

    _step(4, "Score next week's draft headlines, with edit suggestions")
    _cli(["score", "--input", str(corpus / "drafts.csv"), "--suggest", *ws_arg])

    drafts = pd.read_csv(corpus / "drafts.csv", dtype=str)
    group = "winter-reading"
    chosen = drafts[drafts["group"] == group].reset_index(drop=True)
    channel = chosen["channel"].iloc[0]
    hour = pd.Timestamp(chosen["publish_at"].iloc[0]).hour
    _step(5, f"A simulated week of an A/B test of the four '{group}' drafts on {channel}")
    with Workspace.open(path, create=False) as ws:
        # The demo plans the test for the week's traffic it simulates (twice a day, 900 impressions each).
        created = create_experiment(ws, group, chosen, channel=channel, seed=11, budget=DEMO_TEST_IMPRESSIONS)
        say(f"Experiment {created.name}: {len(created.arms)} arms, prior: {created.prior.source}.")
        for note in created.notes:
            say(f"  note: {note}")
        truth = simulate_experiment(ws, group, chosen, channel, hour)
    say("Results were fed back in 14 batches (twice a day for a week); the invented audience clicked as the")
    say("demo's ground truth says. The bandit's view now:")
    _cli(["experiment", "status", group, *ws_arg])

    _step(6, "Write the weekly report")
    with Workspace.open(path, create=False) as ws:
        report = build_report(ws, drafts=corpus / "drafts.csv")
        files = write_report(report, out_dir)
        status = experiment_status(ws, group)
    elapsed = time.perf_counter() - started

    best_true = max(truth, key=truth.get)
    leader_headline = status.arms.set_index("arm").loc[status.decision.leader, "headline"]
    say(f"Report: {files.html}")
    say(f"Tables behind it: {files.tables[0].parent if files.tables else out_dir}")
    say()
    say("Three things worth looking at:")
    say(f"  1. The week in one sentence: {report.headline.get('idea', '')}")
    recs = report.next_week.get("recommendations", [])
    say(f"  2. What to do next week: {recs[0]['text'] if recs else 'see the report'}")
    say(f"  3. The test: the bandit leads with \"{leader_headline}\" at P(best) "
        f"{probability(status.decision.prob_best)};"
        f" the demo's ground truth says the best draft is \"{best_true}\"."
        f" Estimated clicks gained against an equal split so far: {int(round(status.clicks_gained)):+d}.")
    say()
    say(f"Demo finished in {elapsed:.0f} s. Try: contentlab score \"Your headline\" --channel newsletter --workspace {path}")
    say(f"Open it in the browser: contentlab serve --workspace {path}   (then http://127.0.0.1:8765/)")
    return {"report": files.html, "seconds": elapsed, "workspace": path}
