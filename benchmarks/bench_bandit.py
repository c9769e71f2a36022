"""Time ThompsonBandit in a warm process: allocate for 50 arms should take under 50 ms (issue 5).

Example::

    .venv/bin/python benchmarks/bench_bandit.py --arms 50 --repeats 50
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from contentlab.bandit import ThompsonBandit  # noqa: E402

TARGET_MS = 50.0


def timed(fn, repeats: int) -> np.ndarray:
    """Milliseconds per call, after five warm-up calls (imports, caches and CPU clocks settle)."""
    for _ in range(5):
        fn()
    out = np.empty(repeats)
    for i in range(repeats):
        start = time.perf_counter()
        fn()
        out[i] = (time.perf_counter() - start) * 1000
    return out


def make_bandit(n_arms: int, policy: str, seed: int) -> ThompsonBandit:
    """A bandit mid-test: every arm has about 3,000 impressions at rates near 1.5%."""
    rng = np.random.default_rng(seed)
    arms = [f"draft-{i:02d}" for i in range(n_arms)]
    bandit = ThompsonBandit(arms=arms, policy=policy, random_state=seed)
    rates = rng.uniform(0.010, 0.020, size=n_arms)
    n = rng.integers(2000, 4000, size=n_arms)
    bandit.update_many({a: (int(x), int(k)) for a, x, k in zip(arms, n, rng.binomial(n, rates))})
    return bandit


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0], epilog="Example: .venv/bin/python benchmarks/bench_bandit.py")
    parser.add_argument("--arms", type=int, default=50, help="number of arms (default 50)")
    parser.add_argument("--repeats", type=int, default=50, help="timed calls per figure (default 50)")
    args = parser.parse_args(argv)

    print(f"ThompsonBandit with {args.arms} arms, default n_draws; ms per call over {args.repeats} warm calls")
    print(f"  {'call':<34} {'median':>8} {'p90':>8} {'min':>8}")
    rows = []
    for policy in ("thompson", "top_two"):
        bandit = make_bandit(args.arms, policy, seed=0)
        rows.append((f"allocate(10_000) [{policy}]", timed(lambda: bandit.allocate(10_000), args.repeats)))
    bandit = make_bandit(args.arms, "thompson", seed=0)
    rows.append(("allocate(1) [thompson]", timed(lambda: bandit.allocate(1), args.repeats)))
    rows.append(("prob_best()", timed(bandit.prob_best, args.repeats)))
    rows.append(("decision()", timed(bandit.decision, args.repeats)))
    rows.append(("update(arm, 200, 3)", timed(lambda: bandit.update("draft-00", 200, 3), args.repeats)))
    for name, ms in rows:
        print(f"  {name:<34} {np.median(ms):8.2f} {np.percentile(ms, 90):8.2f} {ms.min():8.2f}")
    worst = max(np.median(ms) for name, ms in rows if name.startswith("allocate"))
    verdict = "meets" if worst < TARGET_MS else "MISSES"
    print(f"Slowest allocate median {worst:.1f} ms: {verdict} the {TARGET_MS:.0f} ms target.")


if __name__ == "__main__":
    main()
