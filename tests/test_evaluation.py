"""Validation figures: baselines, within-experiment deviance, log-loss, and evaluate on demo files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit

from contentlab.errors import ContentlabError
from contentlab.evaluation import (
    baseline_rates,
    deviance_table,
    hour_block,
    recenter_logits,
    smoothed_group_rates,
    within_experiment_deviance,
)
from contentlab.holdout import evaluate_files
from contentlab.stats import binomial_deviance

ROOT = Path(__file__).resolve().parent.parent


def test_recenter_matches_observed_clicks_per_group():
    rng = np.random.default_rng(0)
    groups = np.repeat(np.arange(30), 4)
    n = rng.integers(100, 5000, groups.size).astype(float)
    k = rng.binomial(n.astype(int), 0.03).astype(float)
    k[groups == 0] = 0.0  # a test with no clicks stays finite
    eta = rng.normal(-3, 0.5, groups.size)
    out = recenter_logits(eta, k, n, groups)
    exp_clicks = np.bincount(groups, weights=n * expit(out))
    obs = np.bincount(groups, weights=k)
    np.testing.assert_allclose(exp_clicks[1:], obs[1:], rtol=1e-8)
    assert np.all(np.isfinite(out))
    # Differences inside a group are kept.
    np.testing.assert_allclose(np.diff(out[groups == 3]), np.diff(eta[groups == 3]), atol=1e-12)


def test_recenter_is_the_glm_offset_fit():
    """Reference: statsmodels GLM(Binomial) with the logits as offset and one intercept."""
    import statsmodels.api as sm

    rng = np.random.default_rng(1)
    n = rng.integers(200, 3000, 6).astype(float)
    k = rng.binomial(n.astype(int), 0.05).astype(float)
    eta = rng.normal(-2.5, 0.3, 6)
    ref = sm.GLM(np.column_stack([k, n - k]), np.ones((6, 1)), family=sm.families.Binomial(), offset=eta).fit()
    out = recenter_logits(eta, k, n, np.zeros(6))
    np.testing.assert_allclose(out - eta, ref.params[0], atol=1e-8)


def test_within_experiment_deviance_of_a_flat_model_equals_the_mean_baseline():
    rng = np.random.default_rng(2)
    groups = np.repeat(np.arange(20), 3)
    n = rng.integers(500, 3000, groups.size).astype(float)
    k = rng.binomial(n.astype(int), 0.02).astype(float)
    d_model, d_base = within_experiment_deviance(np.zeros(groups.size), k, n, groups)
    assert d_model == pytest.approx(d_base, rel=1e-9)
    # The true differences do better than the per-experiment mean on data generated from them.
    eta = rng.normal(-4, 0.4, groups.size)
    k2 = rng.binomial(n.astype(int) * 20, expit(eta)).astype(float)
    d_model, d_base = within_experiment_deviance(eta, k2, n * 20, groups)
    assert d_model < d_base


def test_log_loss_matches_sklearn():
    """Reference: sklearn.metrics.log_loss on the impressions expanded as weighted 0/1 outcomes."""
    from sklearn.metrics import log_loss

    k = np.array([3.0, 10.0, 0.0, 25.0])
    n = np.array([100.0, 400.0, 50.0, 1000.0])
    p = np.array([0.02, 0.03, 0.01, 0.025])
    table = deviance_table(k, n, p, {"flat": np.full(4, k.sum() / n.sum())})
    y = np.r_[np.ones(4), np.zeros(4)]
    w = np.r_[k, n - k]
    ref = log_loss(y, np.r_[p, p], sample_weight=w, labels=[0, 1])
    assert table.loc[0, "model_log_loss"] == pytest.approx(ref, rel=1e-12)
    assert table.loc[0, "model_deviance"] == pytest.approx(binomial_deviance(k, n, p))
    assert table.loc[0, "gain"] == pytest.approx(1 - table.loc[0, "model_deviance"] / table.loc[0, "baseline_deviance"])


def test_baselines_are_smoothed_training_rates():
    train = pd.DataFrame({"channel": ["a", "a", "b", None], "local_hour": [9.0, 19.0, 9.0, np.nan],
                          "impressions": [1000.0, 3000.0, 2000.0, 500.0], "clicks": [10.0, 60.0, 20.0, 5.0]})
    test = pd.DataFrame({"channel": ["a", "c", None], "local_hour": [19.5, 9.0, np.nan],
                         "impressions": [100.0] * 3, "clicks": [1.0] * 3})
    base = baseline_rates(train, test, "clicks")
    overall = 95 / 6500
    np.testing.assert_allclose(base["overall rate"], overall)
    ch_a = (70 + 1000 * overall) / (4000 + 1000)
    assert base["per-channel rate"][0] == pytest.approx(ch_a)
    assert base["per-channel rate"][1] == pytest.approx(overall)  # unseen channel -> overall
    assert base["per-channel and hour-block rate"][0] == pytest.approx((60 + 1000 * ch_a) / (3000 + 1000))
    assert list(hour_block(np.array([0.0, 5.9, 6.0, 13.99, 18.0, 23.5, np.nan]))) == [
        "night", "night", "morning", "midday", "evening", "evening", "unknown"]
    got = smoothed_group_rates(pd.Series(["x"]), np.array([5.0]), np.array([100.0]), pd.Series(["x", "y"]),
                               np.array([0.1, 0.2]), strength=100.0)
    np.testing.assert_allclose(got, [(5 + 10) / 200, 0.2])


@pytest.fixture(scope="module")
def demo_split(tmp_path_factory) -> tuple[Path, Path]:
    posts = pd.read_csv(ROOT / "corpus" / "posts.csv", dtype=str, keep_default_na=False)
    posts = posts.sort_values("published_at")
    cut = int(len(posts) * 0.7)
    folder = tmp_path_factory.mktemp("split")
    train, test = folder / "train.csv", folder / "test.csv"
    # Keep every experiment on one side.
    exp_side = posts.iloc[:cut]["experiment_id"]
    late = posts.iloc[cut:]
    late = late[~late["experiment_id"].isin(set(exp_side[exp_side != ""]))]
    posts.iloc[:cut].to_csv(train, index=False)
    late.to_csv(test, index=False)
    return train, test


def test_evaluate_files_on_demo(demo_split):
    train, test = demo_split
    res = evaluate_files(train, test, timezone="Europe/London", n_boot=200)
    assert res["pairwise"]["n_pairs"] >= 0
    assert set(res) >= {"deviance", "calibration", "within_experiment", "interval_coverage", "validation"}
    assert len(res["calibration"]) == 10
    assert all(row["beats_baseline"] for row in res["deviance"])
    with pytest.raises(ContentlabError, match="also in"):
        evaluate_files(train, train, timezone="Europe/London")
