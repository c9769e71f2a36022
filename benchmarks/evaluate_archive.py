"""contentlab against a notebook baseline on real headline A/B tests, split by time (issue 10, item 1).

Data: the exploratory release of the Upworthy Research Archive (J. N. Matias,
K. Munger, M. Aubin Le Quere and C. Ebersole, Scientific Data, 2021), as
converted in ../shared/data/ab-archive-dev.csv.gz (see ../shared/README.md).

For each cut point (default: experiments created up to the end of 2014-03, and
up to the end of 2014-06) both models learn on the experiments created up to
the cut and are judged on every later experiment of the file. Nothing is tuned
on the later part: contentlab chooses its penalties on time folds inside the
training period, and the baseline's C is chosen on the last quarter of the
training period's weeks (fitted on the weeks before).

Printed per cut and model:

* pairwise accuracy on significant (|z| >= 1.96) same-image arm pairs, with a
  95% interval from a bootstrap over whole experiments; beside it the same on
  the pairs whose two headlines differ (identical headlines can only tie);
* within-test deviance gain over each test's mean (each test's level refitted);
* calibration of predicted against observed rate by decile of the prediction,
  and the ratio of predicted to observed clicks on the later posts (impression-weighted, the same
  quantity as the model's rate per impression);
* coverage of the 90% predictive intervals of later posts (target 0.88-0.92);
* both again by weeks after the cut (1-4, 5-13, 14+): a user scores drafts for the next weeks;
* the level's half-life and damping and the interval factor that the time folds chose.

The notebook baseline: logistic regression on the difference of two arms'
binary word 1-2-gram vectors plus four structure features (length in
characters, question mark, digit, exclamation mark), trained on the within-test
pairs of the training period, each weighted by the pair's |z|, L2 penalty.
It predicts which arm is better, not a rate, so its "rate" for calibration and
deviance is the training period's last-eight-weeks rate moved by its scaled score
(scale fitted inside the training period), and it has no predictive interval.

Measured (n_bootstrap 0; before = the level relative to the model's in-sample logits, interval widened
only beyond the folds' distance; after = contentlab.levels):

==========  ========  ==============  ==================  ========================
cut         pairwise  pred/obs        90% coverage        level chosen on folds
==========  ========  ==============  ==================  ========================
2014-03-31  0.645     1.55 -> 1.26    0.958 -> 0.920      half-life 2 wk, damping 0.5
2014-06-30  0.657     1.82 -> 1.73    0.847 -> 0.753      half-life 16 wk, no trend
==========  ========  ==============  ==================  ========================

The rate kept falling after the second cut (1.3% in its last week, 1.0% by October) faster than anything
in its training weeks, whose folds hold the 2013 jump and return; the remaining bias there makes the
intervals miss (coverage 0.86 in the first four weeks after the cut, 0.72 later).

Example::

    .venv/bin/python benchmarks/evaluate_archive.py
    .venv/bin/python benchmarks/evaluate_archive.py --cut 2014-06-30 --set n_bootstrap=20
"""

from __future__ import annotations

import argparse
import ast
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

BASELINE_CS = (0.001, 0.003, 0.01, 0.03, 0.1, 0.3, 1.0)


def archive_path() -> Path | None:
    env = os.environ.get("CONTENTLAB_SHARED_DATA")
    if env:
        p = Path(env)
        return p if p.exists() else None
    p = Path(__file__).resolve().parent.parent.parent / "shared" / "data" / "ab-archive-dev.csv.gz"
    return p if p.exists() else None


def created_week(posts):
    """Week each post's experiment was created (its first week), as 'YYYY-MM-DD'."""
    week = posts["published_at"].astype(str).str.slice(0, 10)
    return week.groupby(posts["experiment_id"].to_numpy()).transform("min")


def split_at(posts, cut: str):
    """(train, test): experiments created on or before ``cut`` learn, later ones test."""
    created = created_week(posts)
    test = (created > cut).to_numpy()
    return posts[~test].reset_index(drop=True), posts[test].reset_index(drop=True)


# ----------------------------------------------------------------------------- baseline

def _structure(texts):
    import numpy as np

    return np.column_stack([
        np.array([len(t) for t in texts], float) / 100.0,
        np.array(["?" in t for t in texts], float),
        np.array([any(c.isdigit() for c in t) for t in texts], float),
        np.array(["!" in t for t in texts], float),
    ])


def _pairs(frame):
    """All same-test, same-image arm pairs (i, j) with the z of rate_i - rate_j."""
    import numpy as np
    import pandas as pd

    from contentlab.stats import two_proportion_ztest

    d = pd.DataFrame({"e": frame["experiment_id"].astype(str).to_numpy(),
                      "img": frame["image_id"].fillna("(none)").astype(str).to_numpy(),
                      "row": np.arange(len(frame))})
    m = d.merge(d, on=["e", "img"])
    m = m[m["row_x"] < m["row_y"]]
    i, j = m["row_x"].to_numpy(), m["row_y"].to_numpy()
    k = frame["clicks"].to_numpy(float)
    n = frame["impressions"].to_numpy(float)
    z, _ = two_proportion_ztest(k[i], n[i], k[j], n[j])
    z = np.nan_to_num(np.asarray(z, float))
    return i, j, z


class NotebookBaseline:
    """The analyst's afternoon model: pairwise logistic regression on arm differences."""

    def fit(self, train):
        import numpy as np

        from contentlab.features import clean_headline

        texts = train["headline"].map(clean_headline).tolist()
        weeks = created_week(train).to_numpy()
        uw = np.sort(np.unique(weeks))
        cut = uw[int(len(uw) * 0.75)]
        early = weeks < cut
        # C inside the training period: fit on its first 3/4 of weeks, judge on the last 1/4.
        scores = {}
        for c in BASELINE_CS:
            model = self._fit(train[early].reset_index(drop=True), [t for t, e in zip(texts, early) if e], c)
            late = train[~early].reset_index(drop=True)
            s = model[0](late["headline"].map(clean_headline).tolist())
            scores[c] = (_accuracy(late, s), model, late, s)
        self.C_ = max(BASELINE_CS, key=lambda c: (scores[c][0], -c))
        # Scale of the score to log-odds, fitted on the held-out quarter (within-test deviance).
        _, _, late, s = scores[self.C_]
        self.scale_ = _fit_scale(late, s)
        self.predict_score, self.vectorizer_ = self._fit(train, texts, self.C_)
        recent = weeks >= uw[max(0, len(uw) - 8)]
        self.level_ = float(train["clicks"][recent].sum() / train["impressions"][recent].sum())
        return self

    @staticmethod
    def _fit(frame, texts, C):
        import numpy as np
        import scipy.sparse as sp
        from sklearn.feature_extraction.text import CountVectorizer
        from sklearn.linear_model import LogisticRegression

        vec = CountVectorizer(ngram_range=(1, 2), binary=True, min_df=2)
        W = vec.fit_transform(texts)
        X = sp.hstack([W, sp.csr_matrix(_structure(texts))], format="csr")
        i, j, z = _pairs(frame)
        keep = z != 0
        i, j, z = i[keep], j[keep], z[keep]
        D = X[i] - X[j]
        y = (z > 0).astype(int)
        # Both orientations, so the fit has no preferred side and needs no intercept.
        Xp = sp.vstack([D, -D], format="csr")
        yp = np.r_[y, 1 - y]
        wp = np.r_[np.abs(z), np.abs(z)]
        clf = LogisticRegression(C=C, fit_intercept=False, max_iter=2000, solver="lbfgs")
        clf.fit(Xp, yp, sample_weight=wp)
        coef = clf.coef_.ravel()

        def score(new_texts):
            Xn = sp.hstack([vec.transform(new_texts), sp.csr_matrix(_structure(new_texts))], format="csr")
            return np.asarray(Xn @ coef).ravel()

        return score, vec


def _accuracy(frame, score) -> float:
    from contentlab.evaluation import pair_accuracy

    return float(pair_accuracy(frame, score, "clicks", n_boot=1)["accuracy"])


def _fit_scale(frame, score) -> float:
    """Factor that turns a pairwise score into log-odds differences (within-test deviance)."""
    import numpy as np
    from scipy.optimize import minimize_scalar
    from scipy.special import expit

    from contentlab.evaluation import recenter_logits
    from contentlab.stats import binomial_deviance

    k = frame["clicks"].to_numpy(float)
    n = frame["impressions"].to_numpy(float)
    g = frame["experiment_id"].to_numpy()

    def dev(s):
        eta = recenter_logits(s * np.asarray(score), k, n, g)
        return binomial_deviance(k, n, np.clip(expit(eta), 1e-12, 1 - 1e-12))

    return float(minimize_scalar(dev, bounds=(0.0, 3.0), method="bounded").x)


# ----------------------------------------------------------------------------- figures

# Weeks after the cut (the training period's last week) that the later posts are grouped by: a user scores
# drafts for the next weeks, the benchmark's later part runs up to half a year on.
AHEAD_BANDS = ((1, 4), (5, 13), (14, 10_000))


def figures(test, eta, low=None, high=None, rank=None, ahead=None) -> dict:
    """The benchmark's figures for logits ``eta`` of the test arms (``rank``: score to order arms by;
    ``ahead``: weeks after the training period's last week, for the figures by band)."""
    import numpy as np
    from scipy.special import expit

    from contentlab.evaluation import pair_accuracy, within_experiment_deviance
    from contentlab.stats import calibration_table

    k = test["clicks"].to_numpy(float)
    n = test["impressions"].to_numpy(float)
    pw = pair_accuracy(test, eta if rank is None else rank, "clicks", n_boot=2000)
    d_m, d_b = within_experiment_deviance(eta, k, n, test["experiment_id"].to_numpy())
    p = expit(eta)
    cal = calibration_table(p, k, n, n_bins=10)
    out = {
        "pairwise": pw,
        "distinct": distinct_pair_accuracy(test, eta if rank is None else rank),
        "within_gain": 1.0 - d_m / d_b,
        "calibration": cal,
        "pred_over_obs": float((p * n).sum() / k.sum()),
        "coverage": float("nan"),
    }
    inside = None
    if low is not None:
        r = k / n
        inside = (r >= low) & (r <= high)
        out["coverage"] = float(np.mean(inside))
    out["bands"] = []
    if ahead is not None:
        for lo_w, hi_w in AHEAD_BANDS:
            m = (ahead >= lo_w) & (ahead <= hi_w)
            if m.any():
                out["bands"].append({"weeks": (lo_w, hi_w), "n_posts": int(m.sum()),
                                     "pred_over_obs": float((p * n)[m].sum() / k[m].sum()),
                                     "coverage": float(np.mean(inside[m])) if inside is not None else float("nan")})
    return out


def distinct_pair_accuracy(test, score, n_boot: int = 2000, seed: int = 0) -> dict:
    """Pairwise accuracy on significant same-image pairs whose two headlines differ.

    Two arms with the same (cleaned) headline and image can only differ by things outside the
    headline, so no headline model can order them: every model scores 0.5 there. Leaving them
    out shows what the headline explains. Interval: percentile bootstrap over experiments.
    """
    import numpy as np

    from contentlab.features import clean_headline

    i, j, z = _pairs(test)
    text = test["headline"].map(clean_headline).to_numpy()
    keep = (np.abs(z) >= 1.96) & (text[i] != text[j])
    i, j, z = i[keep], j[keep], z[keep]
    s = np.asarray(score, float)
    diff = s[i] - s[j]
    correct = np.where(diff == 0, 0.5, (np.sign(diff) == np.sign(z)).astype(float))
    exp = test["experiment_id"].astype(str).to_numpy()[i]
    codes, uniq = np.unique(exp, return_inverse=True)
    sums = np.bincount(uniq, weights=correct, minlength=len(codes))
    counts = np.bincount(uniq, minlength=len(codes)).astype(float)
    rng = np.random.default_rng(seed)
    draws = rng.integers(0, len(codes), size=(n_boot, len(codes)))
    boot = sums[draws].sum(axis=1) / np.maximum(counts[draws].sum(axis=1), 1.0)
    return {"accuracy": float(correct.mean()), "n_pairs": int(len(correct)), "n_clusters": int(len(codes)),
            "ci_low": float(np.percentile(boot, 2.5)), "ci_high": float(np.percentile(boot, 97.5))}


def print_figures(name: str, f: dict) -> None:
    pw = f["pairwise"]
    dp = f["distinct"]
    cov = "n/a (no interval)" if f["coverage"] != f["coverage"] else f"{f['coverage']:.3f} (target 0.88-0.92)"
    pad = " " * 25
    print(f"  {name:<22} pairwise {pw['accuracy']:.3f} [{pw['ci_low']:.3f}, {pw['ci_high']:.3f}] "
          f"({pw['n_pairs']} pairs, {pw['n_clusters']} tests); distinct headlines {dp['accuracy']:.3f} "
          f"[{dp['ci_low']:.3f}, {dp['ci_high']:.3f}] ({dp['n_pairs']} pairs)")
    print(f"{pad}within-test gain {f['within_gain']:+.2%}")
    print(f"{pad}later posts: predicted/observed {f['pred_over_obs']:.2f} (predicted clicks / observed clicks; "
          f"1 = calibrated)  90% coverage {cov}")
    for b in f["bands"]:
        lo_w, hi_w = b["weeks"]
        weeks = f"{lo_w}-{hi_w}" if hi_w < 10_000 else f"{lo_w}+"
        bcov = "n/a" if b["coverage"] != b["coverage"] else f"{b['coverage']:.3f}"
        print(f"{pad}  {weeks:>5} weeks after the cut: predicted/observed {b['pred_over_obs']:.2f}  "
              f"90% coverage {bcov}  ({b['n_posts']} posts)")
    cal = f["calibration"]
    print(f"{pad}deciles of the prediction, mean predicted -> observed rate (%): " + "  ".join(
        f"{p * 100:.2f}->{o * 100:.2f}" for p, o in zip(cal["mean_predicted"], cal["observed_rate"])))
    ratio = cal["mean_predicted"].to_numpy(float) / cal["observed_rate"].to_numpy(float)
    print(f"{pad}deciles predicted/observed: " + " ".join(f"{x:.2f}" for x in ratio))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                     epilog="example: .venv/bin/python benchmarks/evaluate_archive.py "
                                            "--cut 2014-03-31 --cut 2014-06-30")
    parser.add_argument("--data", type=Path, default=None, help="archive file (default: ../shared/data/...)")
    parser.add_argument("--cut", action="append", default=None, metavar="YYYY-MM-DD",
                        help="last creation day of the training experiments (repeatable; "
                             "default 2014-03-31 and 2014-06-30)")
    parser.add_argument("--set", action="append", default=[], metavar="PARAM=VALUE",
                        help="EngagementModel parameter (repeatable), e.g. --set n_bootstrap=20")
    parser.add_argument("--no-baseline", action="store_true", help="skip the notebook baseline")
    args = parser.parse_args(argv)

    path = args.data or archive_path()
    if path is None or not Path(path).exists():
        print("archive not found: set CONTENTLAB_SHARED_DATA or put it at ../shared/data/ab-archive-dev.csv.gz")
        return 1
    import warnings

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
    posts = add_local_time(read_history(path).posts.drop(columns="row"), "UTC")
    print("Upworthy Research Archive (Matias et al., Scientific Data 2021), exploratory release, split by time")
    print(f"contentlab params: {params}")
    for cut in args.cut or ["2014-03-31", "2014-06-30"]:
        train, test = split_at(posts, cut)
        print(f"\ncut {cut}: train {len(train)} arms / {train['experiment_id'].nunique()} tests; "
              f"test {len(test)} arms / {test['experiment_id'].nunique()} later tests "
              f"(to {test['published_at'].astype(str).max()[:10]})")
        t0 = time.perf_counter()
        model = EngagementModel(progress=sys.stderr.isatty(), **params).fit(train, outcome="clicks")
        t1 = time.perf_counter()
        pred = model.predict_frame(test, impressions=test["impressions"].to_numpy(float), allow_unknown_channel=True)
        ahead = model._weeks_ahead(test)
        f = figures(test, pred["logit"].to_numpy(float), pred["rate_low"].to_numpy(), pred["rate_high"].to_numpy(),
                    ahead=ahead)
        print_figures("contentlab", f)
        print(f"  {'':<22} learn {t1 - t0:.1f} s; alpha {model.alpha_:.3g} ({model.cv_metric_})")
        print(f"  {'':<22} level chosen on time folds: half-life {model.level_half_life_:g} weeks, damping "
              f"{model.level_damping_:g}; interval factor {model.interval_scale_:.2f} "
              f"(fold coverage {model.validation_['coverage']['coverage']:.3f})")
        if not args.no_baseline:
            import numpy as np
            from scipy.special import logit

            from contentlab.features import clean_headline

            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                base = NotebookBaseline().fit(train)
            s = base.predict_score(test["headline"].map(clean_headline).tolist())
            eta = logit(base.level_) + base.scale_ * (s - np.mean(s))
            t1 = time.perf_counter()
            print_figures(f"baseline (C={base.C_:g})", figures(test, eta, rank=s, ahead=ahead))
            print(f"  {'':<22} fit {t1 - t0:.1f} s; score scale {base.scale_:.2f}")
    print("\n(2 shared cores; timings are noisy)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
