"""Evaluate EngagementModel on real headline A/B tests, split by time (issue 3, item 5).

Data: the exploratory release of the Upworthy Research Archive (J. N. Matias,
K. Munger, M. Aubin Le Quere and C. Ebersole, Scientific Data, 2021), as
converted in ../shared/data/ab-archive-dev.csv.gz (see ../shared/README.md).

The experiments are ordered by the week they were created; the model learns on
the earlier ones and is scored on the later ones (by default the last 25% of
weeks). Printed: pairwise accuracy on significant same-image pairs (|z| >=
1.96) with the number of pairs and a 95% cluster-bootstrap interval, the
within-experiment deviance gain over the per-experiment mean, the fitted
negative/positive-word effects, calibration in deciles, and the time taken.
Target in the issue: pairwise accuracy >= 0.68 (chance 0.50; about 0.61 for a
10-feature pairwise logistic model and 0.66 with regularised word terms).

Example::

    .venv/bin/python benchmarks/evaluate_archive.py
    .venv/bin/python benchmarks/evaluate_archive.py --test-share 0.3 --set wording=function_words
"""

from __future__ import annotations

import argparse
import ast
import json
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))


def archive_path() -> Path | None:
    env = os.environ.get("CONTENTLAB_SHARED_DATA")
    if env:
        p = Path(env)
        return p if p.exists() else None
    p = Path(__file__).resolve().parent.parent.parent / "shared" / "data" / "ab-archive-dev.csv.gz"
    return p if p.exists() else None


def split_by_time(posts, test_share: float):
    """(train, test): experiments created in the last ``test_share`` of weeks are the test."""
    import numpy as np

    weeks = np.sort(posts["published_at"].astype(str).str.slice(0, 10).unique())
    cut = weeks[int(round(len(weeks) * (1 - test_share)))]
    created = posts.groupby("experiment_id")["published_at"].transform("min").astype(str).str.slice(0, 10)
    test = created >= cut
    return posts[~test].reset_index(drop=True), posts[test].reset_index(drop=True), cut


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                     epilog="example: .venv/bin/python benchmarks/evaluate_archive.py --json")
    parser.add_argument("--data", type=Path, default=None, help="archive file (default: ../shared/data/...)")
    parser.add_argument("--test-share", type=float, default=0.25, help="share of the latest weeks held out")
    parser.add_argument("--set", action="append", default=[], metavar="PARAM=VALUE",
                        help="EngagementModel parameter (repeatable), e.g. --set term_penalty=0.3")
    parser.add_argument("--json", action="store_true", help="print the full result as JSON")
    args = parser.parse_args(argv)

    path = args.data or archive_path()
    if path is None or not Path(path).exists():
        print("archive not found: set CONTENTLAB_SHARED_DATA or put it at ../shared/data/ab-archive-dev.csv.gz")
        return 1
    from contentlab.evaluation import evaluate_frames
    from contentlab.ingest import read_history
    from contentlab.model import EngagementModel
    from contentlab.workspace import add_local_time

    params = {"n_bootstrap": 0}
    for item in args.set:
        key, _, value = item.partition("=")
        try:
            params[key] = ast.literal_eval(value)
        except (ValueError, SyntaxError):
            params[key] = value
    t0 = time.perf_counter()
    posts = add_local_time(read_history(path).posts.drop(columns="row"), "UTC")
    train, test, cut = split_by_time(posts, args.test_share)
    t1 = time.perf_counter()
    model = EngagementModel(progress=sys.stderr.isatty(), **params).fit(train, outcome="clicks")
    t2 = time.perf_counter()
    res = evaluate_frames(model, test, "clicks", n_boot=2000)
    t3 = time.perf_counter()
    dr = model.drivers(top_terms=0).set_index("driver")
    res["effects"] = {k: float(dr.loc[k, "effect_logit"]) for k in ("n_negative_words", "n_positive_words") if k in dr.index}
    res["alpha"] = model.alpha_
    res["cv"] = model.cv_results_.to_dict(orient="records")
    if args.json:
        print(json.dumps(res, indent=2, default=float))
        return 0
    pw = res["pairwise"]
    we = res["within_experiment"]
    print("Upworthy Research Archive (Matias et al., Scientific Data 2021), exploratory release, split by time")
    print(f"  train: {len(train)} arms in {train['experiment_id'].nunique()} experiments created before {cut}")
    print(f"  test:  {len(test)} arms in {test['experiment_id'].nunique()} experiments created from {cut}")
    print(f"  params: {params}; chosen alpha {model.alpha_:.3g}")
    print(f"pairwise accuracy, significant same-image pairs: {pw['accuracy']:.3f} "
          f"(n pairs {pw['n_pairs']} in {pw['n_clusters']} experiments, 95% interval {pw['ci_low']:.3f}-{pw['ci_high']:.3f})")
    print(f"within-experiment deviance gain over the per-experiment mean: {we['gain']:+.2%} "
          f"({we['model_deviance']:.0f} vs {we['per_experiment_mean_deviance']:.0f})")
    for row in res["deviance"]:
        print(f"held-out deviance gain over {row['baseline']}: {row['gain']:+.2%}")
    print("effects on the log-odds per word: " + ", ".join(f"{k} {v:+.4f}" for k, v in res["effects"].items()))
    print(f"interval coverage of test arms (nominal {model.interval:.0%}, no bootstrap): {res['interval_coverage']:.3f}")
    print("calibration (deciles of predicted rate): predicted -> observed")
    for row in res["calibration"]:
        print(f"  {row['mean_predicted']:.4f} -> {row['observed_rate']:.4f}  ({row['n_posts']} arms)")
    print(f"time: read {t1 - t0:.1f} s, learn {t2 - t1:.1f} s, evaluate {t3 - t2:.1f} s "
          "(2 shared cores; figures are noisy)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
