"""Check a fitted model on posts it never saw: the engine of ``contentlab evaluate``.

Learn on one export, report on another (:func:`evaluate_files`), or score a
test frame with a fitted model (:func:`evaluate_frames`). The figures come from
:mod:`contentlab.evaluation`; this module sits above both it and the model, so
neither imports the other in a circle.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import expit

from .errors import ContentlabError
from .evaluation import baseline_rates, deviance_table, pair_accuracy, within_experiment_deviance
from .stats import calibration_table

__all__ = ["evaluate_frames", "evaluate_files"]


def evaluate_frames(model, test: pd.DataFrame, outcome: str, *, n_boot: int = 2000) -> dict:
    """Figures of a fitted EngagementModel on test posts it never saw.

    Pairwise accuracy (with its 95% cluster-bootstrap interval), the
    within-experiment deviance gain over the per-experiment mean, the
    ordinary held-out deviance against the baselines (fitted on the model's
    training posts), and calibration in deciles of the predicted rate.
    """
    test = test[(test["impressions"] > 0) & test[outcome].notna()].reset_index(drop=True)
    if test.empty:
        raise ContentlabError("the test file has no posts with impressions and an outcome to evaluate on")
    pred = model.predict_frame(test, impressions=test["impressions"].to_numpy(float), allow_unknown_channel=True)
    eta = pred["logit"].to_numpy(float)
    k = test[outcome].to_numpy(float)
    n = test["impressions"].to_numpy(float)
    out: dict = {"outcome": outcome, "n_test_posts": int(len(test))}
    has_exp = "experiment_id" in test and test["experiment_id"].notna().any()
    if has_exp:
        acc = pair_accuracy(test, eta, outcome, n_boot=n_boot)
        out["pairwise"] = acc
        e = test["experiment_id"].notna().to_numpy()
        d_model, d_base = within_experiment_deviance(eta[e], k[e], n[e], test.loc[e, "experiment_id"].to_numpy())
        out["within_experiment"] = {
            "n_posts": int(e.sum()),
            "n_experiments": int(test.loc[e, "experiment_id"].nunique()),
            "model_deviance": d_model,
            "per_experiment_mean_deviance": d_base,
            "gain": 1.0 - d_model / d_base if d_base > 0 else float("nan"),
        }
    train = model.training_posts_summary_
    base = baseline_rates(train, test, outcome)
    out["deviance"] = deviance_table(k, n, expit(eta), base).to_dict(orient="records")
    cal = calibration_table(expit(eta), k, n, n_bins=10)
    out["calibration"] = cal.to_dict(orient="records")
    out["interval_coverage"] = float(np.mean((k / n >= pred["rate_low"]) & (k / n <= pred["rate_high"])))
    return out


def evaluate_files(
    train_path: str | Path, test_path: str | Path, *, outcome: str = "clicks", timezone: str = "UTC",
    model_params: dict | None = None, progress: bool = False, n_boot: int = 2000,
) -> dict:
    """Learn on one post-history file and report on another (``contentlab evaluate``)."""
    from .ingest import format_problems, read_history
    from .model import EngagementModel
    from .workspace import add_local_time

    frames = []
    for path in (train_path, test_path):
        history = read_history(path, timezone=timezone)
        if history.problems:
            raise ContentlabError(
                f"{path}: {len(history.rejected)} of {history.rows_read} rows have problems.\n"
                + format_problems(history.problems)
                + "\nFix these rows first (contentlab import --skip-bad writes them out with reasons)."
            )
        posts = history.posts.drop(columns=["row"])
        if outcome not in posts or posts[outcome].isna().all():
            raise ContentlabError(f"{path}: has no '{outcome}' column to evaluate; choose --outcome")
        frames.append(add_local_time(posts, timezone))
    train, test = frames
    overlap = set(train["post_id"]) & set(test["post_id"])
    if overlap:
        raise ContentlabError(
            f"{test_path}: {len(overlap)} post_id(s) are also in {train_path} (e.g. {sorted(overlap)[0]}); "
            "the test posts must be posts the model never learned from"
        )
    params = {"n_bootstrap": 0, **(model_params or {})}
    model = EngagementModel(progress=progress, **params).fit(train, outcome=outcome)
    result = evaluate_frames(model, test, outcome, n_boot=n_boot)
    result["train"] = {"file": str(train_path), "n_posts": int(model.n_posts_), "alpha": model.alpha_}
    result["test_file"] = str(test_path)
    result["validation"] = model.validation_
    return result
