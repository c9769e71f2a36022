"""Time the workspace side of experiments: ``next`` for a 50-arm experiment and ``record`` of a big CSV.

Targets (issue 5): ``next`` for 50 arms under 50 ms in a warm process (the
library call, with its workspace reads, after a first call has loaded the
libraries); ``record`` of 100,000 events from a CSV under 10 s (reading,
validation, one transaction, the posts update). A replay of the same file
(everything already recorded) is timed too.

Everything runs in a fresh temporary workspace on invented numbers; nothing
else is touched. Figures depend on the machine and on what else runs on it.

Example::

    .venv/bin/python benchmarks/bench_experiments.py
    .venv/bin/python benchmarks/bench_experiments.py --arms 50 --events 100000 --repeat 30
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from contentlab.experiments import (  # noqa: E402
    create_experiment,
    experiment_status,
    next_allocation,
    read_results,
    record_results,
)
from contentlab.workspace import Workspace  # noqa: E402


def write_results(path: Path, arms: list[str], n_events: int, rng: np.random.Generator, with_ids: bool) -> None:
    """``n_events`` increments over a week, one row per arm and round, rates 1-5%."""
    import pandas as pd

    k = len(arms)
    rounds = -(-n_events // k)
    rates = rng.uniform(0.01, 0.05, size=k)
    arm = np.tile(np.arange(k), rounds)[:n_events]
    impressions = rng.integers(20, 400, size=n_events)
    clicks = rng.binomial(impressions, rates[arm])
    start = np.datetime64("2026-12-01T00:00:00")
    at = (start + (np.repeat(np.arange(rounds), k)[:n_events] * 6).astype("timedelta64[s]")).astype(str)
    frame = pd.DataFrame({"arm": np.array(arms)[arm], "impressions": impressions, "clicks": clicks, "at": at})
    if with_ids:
        frame["event_id"] = [f"ev{i}" for i in range(n_events)]
    frame.to_csv(path, index=False)


def bench_next(root: Path, n_arms: int, repeat: int, rng: np.random.Generator) -> None:
    arms = [f"draft{i:02d}" for i in range(n_arms)]
    headlines = [f"Draft headline number {i} for the spring programme" for i in range(n_arms)]
    import pandas as pd

    with Workspace.open(root / "next") as ws:
        frame = pd.DataFrame({"headline": headlines, "arm": arms})
        create_experiment(ws, "fifty", frame, prior_means=list(rng.uniform(0.01, 0.04, n_arms)),
                          prior_strength=200.0, seed=1)
        path = root / "next-results.csv"
        write_results(path, arms, 20 * n_arms, rng, with_ids=True)
        record_results(ws, "fifty", read_results(path), source_file=str(path))
        for label, kwargs in (("next (Thompson)", {}), ("next (top-two)", {"policy": "top-two"}),
                              ("next --single", {"single": True})):
            next_allocation(ws, "fifty", 1000, **kwargs)  # warm: libraries loaded, pages cached
            times = []
            for _ in range(repeat):
                t = time.perf_counter()
                next_allocation(ws, "fifty", 1000, **kwargs)
                times.append(1000 * (time.perf_counter() - t))
            print(f"  {label:<22} {n_arms} arms, {20 * n_arms:,} stored events: median {statistics.median(times):6.1f} ms, "
                  f"min {min(times):6.1f}, max {max(times):6.1f} over {repeat} calls (target < 50 ms)")
        # Where the time goes: the bandit's posterior draws (10,000 x arms) against the workspace reads.
        from contentlab.experiments import _bandit, _load

        bandit = _bandit(ws, _load(ws, "fifty"))
        times = []
        for _ in range(repeat):
            t = time.perf_counter()
            bandit.allocate(1000)
            times.append(1000 * (time.perf_counter() - t))
        print(f"  {'of which the draws':<22} ThompsonBandit.allocate alone: median {statistics.median(times):6.1f} ms")
        t = time.perf_counter()
        experiment_status(ws, "fifty")
        print(f"  {'status':<22} {n_arms} arms: {1000 * (time.perf_counter() - t):6.1f} ms (one call)")


def bench_record(root: Path, n_events: int, rng: np.random.Generator) -> None:
    arms = list("ABCDEF")
    for with_ids in (True, False):
        tag = "with event_id" if with_ids else "ids derived"
        path = root / f"results-{'ids' if with_ids else 'noids'}.csv"
        write_results(path, arms, n_events, rng, with_ids=with_ids)
        with Workspace.open(root / f"record-{'ids' if with_ids else 'noids'}") as ws:
            create_experiment(ws, "big", [f"Headline {a}" for a in arms], flat_prior=True, seed=1)
            t = time.perf_counter()
            first = record_results(ws, "big", read_results(path), source_file=str(path))
            t1 = time.perf_counter() - t
            t = time.perf_counter()
            again = record_results(ws, "big", read_results(path), source_file=str(path))
            t2 = time.perf_counter() - t
            stored = ws.conn.execute("SELECT COUNT(*) FROM observations").fetchone()[0]
        print(f"  record {n_events:,} events ({tag}): {t1:5.2f} s, {first.added:,} recorded (target < 10 s); "
              f"replay {t2:5.2f} s, {again.added} recorded, {stored:,} stored")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(
        description="Time `experiment next` for a many-armed experiment and `record` of a large results CSV.",
        epilog="Example: .venv/bin/python benchmarks/bench_experiments.py --arms 50 --events 100000",
    )
    parser.add_argument("--arms", type=int, default=50, help="arms of the next benchmark (default 50)")
    parser.add_argument("--events", type=int, default=100_000, help="events in the record benchmark (default 100,000)")
    parser.add_argument("--repeat", type=int, default=20, help="timed next calls (default 20)")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory(prefix="contentlab-bench-") as tmp:
        root = Path(tmp)
        print("experiment next (library call in a warm process, including workspace reads):")
        bench_next(root, args.arms, args.repeat, rng)
        print("record (read CSV, validate, one transaction, posts update):")
        bench_record(root, args.events, rng)
    print("Figures are wall-clock on a shared machine; expect noise when other work runs.")


if __name__ == "__main__":
    main()
