"""Validation figures: held-out deviance against simple baselines, within-test ranking, calibration.

The model is only worth listening to when it predicts held-out posts better
than the obvious guesses a user could make without it: the overall rate, the
channel's rate, and the channel's rate at that time of day. These functions
compute those baselines from training posts only and compare them with the
model's predictions on later posts. Nothing here fits a model: checking a
fitted one on another file is :mod:`contentlab.holdout` (so that the model can
use these functions without the two modules importing each other).

For A/B-test data the model cannot know how well a *new* experiment will do
overall (its topic, its image, the week's news), but it is used to choose
between headlines inside one test. So experiment posts are also judged
"within experiment": each test's level is refitted as an offset and only the
model's differences between arms are scored (:func:`within_experiment_deviance`),
against the per-experiment mean rate.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import expit, logit

from .stats import binomial_deviance, pairwise_accuracy

__all__ = [
    "HOUR_BLOCKS",
    "hour_block",
    "smoothed_group_rates",
    "baseline_rates",
    "recenter_logits",
    "within_experiment_deviance",
    "deviance_table",
    "pair_accuracy",
]

# Posting-hour blocks for the "channel and hour" baseline: edges in local hours.
HOUR_BLOCKS = (0.0, 6.0, 10.0, 14.0, 18.0, 24.0)
HOUR_BLOCK_NAMES = ("night", "morning", "midday", "afternoon", "evening")
# Baseline rates are smoothed towards the parent rate with this many impressions' weight, so a
# channel-hour cell seen once does not predict exactly its one observed rate (additive smoothing,
# common practice; the value is ours).
SMOOTHING_IMPRESSIONS = 1000.0
_EPS = 1e-9


def hour_block(local_hour: np.ndarray) -> np.ndarray:
    """Block name per post; ``"unknown"`` where only the date is known."""
    h = np.asarray(local_hour, dtype=float)
    out = np.full(h.shape, "unknown", dtype=object)
    known = ~np.isnan(h)
    idx = np.clip(np.searchsorted(HOUR_BLOCKS, h[known], side="right") - 1, 0, len(HOUR_BLOCK_NAMES) - 1)
    out[known] = np.asarray(HOUR_BLOCK_NAMES, dtype=object)[idx]
    return out


def smoothed_group_rates(
    keys_train: pd.Series, k_train: np.ndarray, n_train: np.ndarray, keys_test: pd.Series,
    parent_test: np.ndarray, strength: float = SMOOTHING_IMPRESSIONS,
) -> np.ndarray:
    """Per-group rate from training posts, shrunk to ``parent_test``; unseen groups get the parent."""
    frame = pd.DataFrame({"key": keys_train.to_numpy(), "k": k_train, "n": n_train})
    sums = frame.groupby("key", sort=False)[["k", "n"]].sum()
    k = keys_test.map(sums["k"]).fillna(0.0).to_numpy(float)
    n = keys_test.map(sums["n"]).fillna(0.0).to_numpy(float)
    return (k + strength * parent_test) / (n + strength)


def baseline_rates(train: pd.DataFrame, test: pd.DataFrame, outcome: str) -> dict[str, np.ndarray]:
    """The three baselines of issue 3 for ``test`` posts, estimated on ``train`` posts only.

    Frames need ``impressions``, the outcome column, ``channel`` (missing ->
    ``(none)``) and ``local_hour`` (NaN when unknown).
    """
    k = train[outcome].to_numpy(float)
    n = train["impressions"].to_numpy(float)
    overall = float(np.clip(k.sum() / max(n.sum(), 1.0), _EPS, 1 - _EPS))
    ch_train = _channel(train)
    ch_test = _channel(test)
    overall_t = np.full(len(test), overall)
    channel = smoothed_group_rates(ch_train, k, n, ch_test, overall_t)
    key_train = ch_train + "|" + pd.Series(hour_block(train["local_hour"].to_numpy(float)), index=train.index)
    key_test = ch_test + "|" + pd.Series(hour_block(test["local_hour"].to_numpy(float)), index=test.index)
    channel_hour = smoothed_group_rates(key_train, k, n, key_test, channel)
    clip = lambda p: np.clip(p, _EPS, 1 - _EPS)  # noqa: E731
    return {
        "overall rate": clip(overall_t),
        "per-channel rate": clip(channel),
        "per-channel and hour-block rate": clip(channel_hour),
    }


def _channel(frame: pd.DataFrame) -> pd.Series:
    if "channel" not in frame:
        return pd.Series("(none)", index=frame.index, dtype=object)
    return frame["channel"].fillna("(none)").astype(str).replace("", "(none)")


def recenter_logits(eta: np.ndarray, clicks: np.ndarray, impressions: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Shift each group's logits by one constant so its expected clicks equal its observed clicks.

    Solves ``sum_i n_i expit(eta_i + c_g) = sum_i k_i`` per group by Newton's
    method, vectorised over groups (the maximum-likelihood offset of a
    binomial GLM with the model's logits as a fixed offset). A group with no
    clicks gets the offset that puts its expected clicks at 1e-6 of its
    impressions, not minus infinity.
    """
    eta = np.asarray(eta, float)
    k = np.asarray(clicks, float)
    n = np.asarray(impressions, float)
    codes, _ = pd.factorize(pd.Series(groups))
    G = int(codes.max()) + 1 if codes.size else 0
    kg = np.bincount(codes, weights=k, minlength=G)
    ng = np.bincount(codes, weights=n, minlength=G)
    target = np.clip(kg, 1e-6 * ng, ng * (1 - 1e-6))
    p0 = np.bincount(codes, weights=n * expit(eta), minlength=G) / np.maximum(ng, 1e-300)
    c = logit(np.clip(target / np.maximum(ng, 1e-300), 1e-9, 1 - 1e-9)) - logit(np.clip(p0, 1e-9, 1 - 1e-9))
    for _ in range(50):
        p = expit(eta + c[codes])
        f = np.bincount(codes, weights=n * p, minlength=G) - target
        fp = np.bincount(codes, weights=n * p * (1 - p), minlength=G)
        step = f / np.maximum(fp, 1e-300)
        c -= np.clip(step, -5, 5)
        if np.max(np.abs(step)) < 1e-10:
            break
    return eta + c[codes]


def within_experiment_deviance(
    eta: np.ndarray, clicks: np.ndarray, impressions: np.ndarray, experiment: np.ndarray
) -> tuple[float, float]:
    """(model, per-experiment mean) deviance after refitting each experiment's level.

    The model keeps only its differences between arms of one test; the
    baseline predicts every arm at its experiment's pooled rate. The gap is
    what the model knows about headlines that the test's own mean does not.
    """
    k = np.asarray(clicks, float)
    n = np.asarray(impressions, float)
    eta_c = recenter_logits(eta, k, n, experiment)
    d_model = binomial_deviance(k, n, np.clip(expit(eta_c), _EPS, 1 - _EPS))
    codes, _ = pd.factorize(pd.Series(experiment))
    kg = np.bincount(codes, weights=k)
    ng = np.bincount(codes, weights=n)
    base = np.clip(kg[codes] / ng[codes], _EPS, 1 - _EPS)
    d_base = binomial_deviance(k, n, base)
    return d_model, d_base


def deviance_table(
    clicks: np.ndarray, impressions: np.ndarray, predicted: np.ndarray, baselines: dict[str, np.ndarray]
) -> pd.DataFrame:
    """Model deviance and log-loss per impression against each baseline, with the gain.

    ``gain`` is the share of the baseline's deviance the model removes,
    ``1 - D_model / D_baseline``; positive means the model predicts better.
    The binomial noise of the clicks puts a floor under every deviance, so
    even a good model shows gains of a few percent on noisy posts.
    """
    k = np.asarray(clicks, float)
    n = np.asarray(impressions, float)
    p = np.clip(np.asarray(predicted, float), _EPS, 1 - _EPS)
    d_model = binomial_deviance(k, n, p)
    ll_model = _log_loss(k, n, p)
    rows = []
    for name, base in baselines.items():
        d_base = binomial_deviance(k, n, base)
        rows.append({
            "baseline": name,
            "model_deviance": d_model,
            "baseline_deviance": d_base,
            "model_log_loss": ll_model,
            "baseline_log_loss": _log_loss(k, n, base),
            "gain": 1.0 - d_model / d_base if d_base > 0 else float("nan"),
            "beats_baseline": bool(d_model < d_base),
        })
    return pd.DataFrame(rows)


def _log_loss(k: np.ndarray, n: np.ndarray, p: np.ndarray) -> float:
    """Mean log-loss per impression (natural log)."""
    return float(-(np.sum(k * np.log(p) + (n - k) * np.log1p(-p))) / max(n.sum(), 1.0))


def pair_accuracy(frame: pd.DataFrame, score: np.ndarray, outcome: str, *, n_boot: int = 2000) -> dict:
    """Pairwise accuracy on significant same-image pairs (same experiment only when no image ids)."""
    if "experiment_id" not in frame or frame["experiment_id"].isna().all():
        return dict(accuracy=float("nan"), n_pairs=0, n_clusters=0, ci_low=float("nan"), ci_high=float("nan"))
    d = frame[["experiment_id", outcome, "impressions"]].copy()
    groups = ["experiment_id"]
    if "image_id" in frame and frame["image_id"].notna().any():
        # Arms without an image id only pair with others without one.
        d["image_id"] = frame["image_id"].fillna("(no image)")
        groups.append("image_id")
    d["score"] = np.asarray(score, float)
    return pairwise_accuracy(d, "score", group_cols=groups, clicks_col=outcome, n_boot=n_boot)
