"""Benchmark draft scoring (issue 4, item 7).

Figures printed (no timed assertions; the targets in the issue are in brackets):

* 10,000 distinct drafts in one ``score_drafts`` call, suggestions off  [>= 5,000 drafts/s]
* one draft through the Python API in a warm process, suggestions off   [< 20 ms]
* one draft with edit suggestions on (every rewrite scored)              [no target; reported]
* the 20 demo drafts as the editor would run them (suggestions and slots on)
* ``contentlab --help`` start-up time in a fresh interpreter              [< 1 s]

The model is learned once on the demo corpus (Alderbank Libraries, invented)
in a temporary workspace, unless --workspace points at one with a model. The
machine is shared: the script prints the load average beside the figures,
because on a busy 2-core machine they can be several times slower.

Run:  .venv/bin/python benchmarks/bench_score.py [--drafts 10000] [--repeats 30]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def distinct_drafts(n: int, seed: int = 1):
    """``n`` distinct invented headlines in the demo's style, spread over its channels."""
    import numpy as np
    import pandas as pd

    from contentlab.demo_corpus import make_headline

    rng = np.random.default_rng(seed)
    seen: dict[str, None] = {}
    tries = 0
    while len(seen) < n and tries < 50 * n:
        seen.setdefault(make_headline(rng)[0], None)
        tries += 1
    heads = list(seen)
    k = 0
    while len(heads) < n:  # the generator's phrase space is finite: vary by branch and week
        heads.append(f"{heads[k % len(seen)]} (week {k // len(seen) + 2})")
        k += 1
    channels = rng.choice(["blog", "newsletter", "social_short", "social_visual"], n)
    return pd.DataFrame({"headline": heads[:n], "channel": channels, "publish_at": "2026-12-03 09:00"})


def load(workspace: str | None, n_bootstrap: int):
    from contentlab.demo_corpus import TIMEZONE
    from contentlab.history import import_history
    from contentlab.model import EngagementModel
    from contentlab.workspace import Workspace

    if workspace:
        with Workspace.open(workspace, create=False) as ws:
            model, _ = ws.load_model()
            return model, ws.posts(), ws.timezone, 0.0
    path = Path(tempfile.mkdtemp(prefix="contentlab-bench-score-"))
    with Workspace.open(path, timezone=TIMEZONE) as ws:
        import_history(ws, ROOT / "corpus" / "posts.csv")
        posts = ws.posts()
    t = time.perf_counter()
    model = EngagementModel(n_bootstrap=n_bootstrap).fit(posts)
    return model, posts, TIMEZONE, time.perf_counter() - t


def timed(fn, repeats: int) -> tuple[float, float]:
    times = []
    for i in range(repeats):
        t = time.perf_counter()
        fn(i)
        times.append(time.perf_counter() - t)
    return statistics.median(times), max(times)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description="Time draft scoring: a 10,000-draft batch, one warm draft with and without suggestions, "
                    "and contentlab --help start-up.",
        epilog="example: .venv/bin/python benchmarks/bench_score.py --drafts 10000 --repeats 30",
    )
    parser.add_argument("--drafts", type=int, default=10_000, help="drafts in the batch (default: %(default)s)")
    parser.add_argument("--repeats", type=int, default=30, help="single-draft repeats (default: %(default)s)")
    parser.add_argument("--bootstrap", type=int, default=100,
                        help="bootstrap refits of the model learned for the benchmark (default: %(default)s, as learn)")
    parser.add_argument("--workspace", help="use this workspace's model and history instead of the demo")
    args = parser.parse_args(argv)

    import numpy as np

    from contentlab.scoring import score_drafts

    model, history, tz, fit_s = load(args.workspace, args.bootstrap)
    if fit_s:
        print(f"model learned on the demo corpus in {fit_s:.1f} s ({len(history)} posts, "
              f"{args.bootstrap} bootstrap refits)")
    print(f"load average before timing: {', '.join(f'{x:.1f}' for x in os.getloadavg())} on {os.cpu_count()} cores")

    def score(drafts, **kw):
        return score_drafts(drafts, model=model, history=history, timezone=tz, **kw)

    from contentlab import scoring

    batch = distinct_drafts(args.drafts)
    score(batch.head(200), suggest=False)  # warm: lexicon, syllables, caches
    # Time the model's part (featurising, design rows, predictions) inside the call separately.
    inner = {"design": 0.0}
    design = scoring._Engine.design

    def timed_design(self, *a, **kw):
        t0 = time.perf_counter()
        try:
            return design(self, *a, **kw)
        finally:
            inner["design"] += time.perf_counter() - t0

    scoring._Engine.design = timed_design
    try:
        cpu0 = os.times()
        t = time.perf_counter()
        result = score(batch, suggest=False)
        batch_s = time.perf_counter() - t
        cpu1 = os.times()
    finally:
        scoring._Engine.design = design
    # CPU seconds of this process and its (featurizer) workers: steadier than wall time on a shared machine.
    cpu_s = sum(cpu1[k] - cpu0[k] for k in range(4))
    assert len(result) == len(batch)
    print(f"batch: {len(batch):,} distinct drafts in {batch_s:.2f} s = {len(batch) / batch_s:,.0f} drafts/s "
          f"(target >= 5,000/s; suggestions off)")
    print(f"  CPU time {cpu_s:.2f} s (this process and its workers): {len(batch) / cpu_s:,.0f} drafts per CPU-second")
    d = inner["design"]
    print(f"  featurising + design rows + predictions: {d:.2f} s; reasons, percentiles, ranking, output: "
          f"{batch_s - d:.2f} s")

    singles = distinct_drafts(2 * args.repeats + 2, seed=7)
    heads = singles["headline"].tolist()
    channels = singles["channel"].tolist()
    score(heads[0], channel=channels[0], suggest=False)
    score(heads[1], channel=channels[1], suggest=True)
    med, worst = timed(lambda i: score(heads[2 + i], channel=channels[2 + i], suggest=False), args.repeats)
    print(f"one draft, Python API, warm, suggestions off: median {med * 1000:.1f} ms, max {worst * 1000:.1f} ms "
          f"over {args.repeats} different drafts (target < 20 ms)")
    off = 2 + args.repeats
    n_rewrites = []

    def with_suggestions(i):
        r = score(heads[off + i], channel=channels[off + i], suggest=True)
        n_rewrites.append(r.attrs["suggestions"][0]["n_rewrites"])

    med, worst = timed(with_suggestions, args.repeats)
    print(f"one draft, suggestions on: median {med * 1000:.1f} ms, max {worst * 1000:.1f} ms "
          f"({np.mean(n_rewrites):.1f} rewrites scored per draft on average)")

    from contentlab.demo_corpus import drafts_frame

    demo = drafts_frame()
    t = time.perf_counter()
    score(demo, suggest=True, slots=True)
    print(f"the {len(demo)} demo drafts with suggestions and best slots: {time.perf_counter() - t:.2f} s")

    exe = Path(sys.executable).with_name("contentlab")
    cmd = [str(exe), "--help"] if exe.exists() else [sys.executable, "-c", "from contentlab.cli import run; run()",
                                                     "--help"]
    subprocess.run(cmd, capture_output=True, check=True)
    med, worst = timed(lambda i: subprocess.run(cmd, capture_output=True, check=True), 5)
    print(f"contentlab --help: median {med:.2f} s, max {worst:.2f} s over 5 runs (target < 1 s)")
    print(f"load average after timing: {', '.join(f'{x:.1f}' for x in os.getloadavg())}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
