"""Tests of contentlab.stats.

Outside references named beside each check: statsmodels'
``proportions_ztest`` and binomial GLM deviance (reference library), the
beta-binomial moment relations of Kleinman (1973), and hand-computed examples.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.proportion import proportions_ztest

from contentlab.errors import ContentlabError
from contentlab.stats import (
    beta_binomial_moments,
    binomial_deviance,
    calibration_table,
    pairwise_accuracy,
    shrunken_rates,
    two_proportion_ztest,
)


# ------------------------------------------------------------------- z-test
@pytest.mark.parametrize("k1, n1, k2, n2", [(30, 1000, 45, 1000), (12, 340, 3, 410), (0, 50, 5, 60), (500, 5000, 480, 5100)])
def test_ztest_matches_statsmodels(k1, n1, k2, n2):
    # Reference: statsmodels.stats.proportion.proportions_ztest (pooled variance, two-sided).
    z_ref, p_ref = proportions_ztest([k1, k2], [n1, n2])
    z, p = two_proportion_ztest(k1, n1, k2, n2)
    assert z == pytest.approx(z_ref, rel=1e-12)
    assert p == pytest.approx(p_ref, rel=1e-10)


@settings(max_examples=60, deadline=None)
@given(
    n1=st.integers(1, 100_000), n2=st.integers(1, 100_000),
    f1=st.floats(0, 1), f2=st.floats(0, 1),
)
def test_ztest_matches_statsmodels_property(n1, n2, f1, f2):
    # Reference: statsmodels proportions_ztest, wherever its standard error is non-zero.
    k1, k2 = int(f1 * n1), int(f2 * n2)
    q = (k1 + k2) / (n1 + n2)
    z, p = two_proportion_ztest(k1, n1, k2, n2)
    assert 0.0 <= p <= 1.0
    if 0 < q < 1:
        with np.errstate(all="ignore"):
            z_ref, p_ref = proportions_ztest([k1, k2], [n1, n2])
        assert z == pytest.approx(z_ref, rel=1e-9, abs=1e-12)
        assert p == pytest.approx(p_ref, rel=1e-9, abs=1e-300)
    else:
        assert (z, p) == (0.0, 1.0)
    z_swap, _ = two_proportion_ztest(k2, n2, k1, n1)
    assert z_swap == pytest.approx(-z)


def test_ztest_vectorised_and_validated():
    z, p = two_proportion_ztest([30, 12], [1000, 340], [45, 3], [1000, 410])
    assert z.shape == (2,)
    assert z[0] == pytest.approx(proportions_ztest([30, 45], [1000, 1000])[0])
    with pytest.raises(ContentlabError, match="clicks1 must not exceed n1"):
        two_proportion_ztest(11, 10, 1, 10)
    with pytest.raises(ContentlabError, match="n1 and n2 must be > 0"):
        two_proportion_ztest(0, 0, 1, 10)


# ----------------------------------------------------------------- deviance
def test_binomial_deviance_matches_statsmodels():
    # Reference: statsmodels GLM(family=Binomial()) deviance with endog [successes, failures].
    rng = np.random.default_rng(0)
    n = rng.integers(1, 3000, size=500)
    x = rng.normal(size=500)
    k = rng.binomial(n, 1 / (1 + np.exp(-(-2.5 + 0.4 * x))))
    k[:5] = 0  # 0 * log 0 terms
    res = sm.GLM(np.column_stack([k, n - k]), sm.add_constant(x), family=sm.families.Binomial()).fit()
    assert binomial_deviance(k, n, res.mu) == pytest.approx(res.deviance, rel=1e-10)


def test_binomial_deviance_edges():
    # Hand-computed: saturated fit has deviance 0; 0 clicks at rate q gives -2 n log(1 - q).
    assert binomial_deviance([0, 5, 10], [10, 10, 10], [0.0, 0.5, 1.0]) == 0.0
    assert binomial_deviance(0, 100, 0.1) == pytest.approx(-200 * np.log(0.9))
    assert binomial_deviance(3, 100, 0.0) == np.inf
    with pytest.raises(ContentlabError, match=r"predicted_rate must be within \[0, 1\]"):
        binomial_deviance(1, 10, 1.2)


# --------------------------------------------------------- pairwise accuracy
def hand_example():
    # Experiment A, image 1: arms a1 (2.0%), a2 (1.0%), a3 (1.05%) with 10,000 impressions each.
    #   a1-a2: z ~ 5.8 significant, a1 better, score ranks a1 higher -> 1
    #   a1-a3: significant, a1 better, score ranks a3 higher        -> 0
    #   a2-a3: |z| ~ 0.35, not significant                            -> excluded
    # Experiment A, image 2: one arm only -> no pair (same experiment, different image).
    # Experiment B, image 1: b1 (3%) vs b2 (1%), equal scores        -> 0.5
    # A row without experiment_id is ignored.
    return pd.DataFrame(
        {
            "experiment_id": ["A", "A", "A", "A", "B", "B", None],
            "image_id": [1, 1, 1, 2, 1, 1, 1],
            "clicks": [200, 100, 105, 50, 300, 100, 999],
            "impressions": [10_000] * 6 + [1000],
            "score": [0.9, 0.1, 0.95, 0.0, 0.4, 0.4, 0.0],
        }
    )


def test_pairwise_accuracy_hand_example():
    out = pairwise_accuracy(hand_example(), "score", n_boot=500)
    assert out["n_pairs"] == 3
    assert out["n_clusters"] == 2
    assert out["accuracy"] == pytest.approx((1 + 0 + 0.5) / 3)
    # Cluster bootstrap over two experiments: replicates are A only (1/2), B only (1/1) or both (1.5/3).
    assert out["ci_low"] >= 0.5 - 1e-12 and out["ci_high"] <= 1.0
    # Without the image in the group key, a4 (0.5%, score 0.0) pairs with a1..a3 as well: all three
    # significant (z >= 4.1), each time the other arm is better and scored higher -> 1, 1, 1.
    out2 = pairwise_accuracy(hand_example(), "score", group_cols=("experiment_id",), n_boot=200)
    assert out2["n_pairs"] == 6
    assert out2["accuracy"] == pytest.approx((1 + 0 + 0.5 + 1 + 1 + 1) / 6)


def test_pairwise_accuracy_threshold_and_empty():
    df = hand_example()
    strict = pairwise_accuracy(df, "score", z_threshold=50.0)
    assert strict["n_pairs"] == 0 and np.isnan(strict["accuracy"])
    loose = pairwise_accuracy(df, "score", z_threshold=0.0)
    assert loose["n_pairs"] == 4  # a2-a3 now counts: a3 better, a3 scored higher -> 1
    assert loose["accuracy"] == pytest.approx((1 + 0 + 1 + 0.5) / 4)
    with pytest.raises(ContentlabError, match="needs columns"):
        pairwise_accuracy(df.drop(columns="image_id"), "score")


def test_pairwise_accuracy_perfect_score_and_scale():
    # ~3,400 experiments, ~15,000 arms (archive size): the observed rate itself as the score is
    # always right; the call must be vectorised (it finishes in well under a second).
    rng = np.random.default_rng(1)
    arms = rng.integers(2, 8, size=3400)
    exp = np.repeat(np.arange(3400), arms)
    n = rng.integers(1000, 20000, size=exp.size)
    k = rng.binomial(n, rng.uniform(0.005, 0.03, size=exp.size))
    df = pd.DataFrame({"experiment_id": exp, "image_id": 0, "clicks": k, "impressions": n, "score": k / n})
    out = pairwise_accuracy(df, "score")
    assert out["accuracy"] == 1.0 and out["ci_low"] == 1.0 and out["n_pairs"] > 10_000
    df["score"] = rng.random(len(df))
    rnd = pairwise_accuracy(df, "score")
    assert rnd["ci_low"] < 0.5 < rnd["ci_high"]


# -------------------------------------------------------------- calibration
def test_calibration_table():
    rng = np.random.default_rng(2)
    p = rng.uniform(0.005, 0.05, size=20_000)
    n = rng.integers(500, 5000, size=p.size)
    k = rng.binomial(n, p)
    tab = calibration_table(p, k, n)
    assert list(tab["bin"]) == list(range(10))
    assert tab["n_posts"].sum() == p.size and tab["clicks"].sum() == k.sum()
    assert set(tab["n_posts"]) == {2000}
    assert np.all(np.diff(tab["mean_predicted"]) > 0)
    # Simulated from p itself, so observed and predicted agree within sampling noise.
    np.testing.assert_allclose(tab["observed_rate"], tab["mean_predicted"], rtol=0.03)
    with pytest.raises(ContentlabError, match="n_bins must be an integer >= 1"):
        calibration_table(p, k, n, n_bins=0)


# ----------------------------------------------------------- beta-binomial
@pytest.mark.parametrize("method", ["kleinman", "unweighted"])
def test_beta_binomial_moments_recovers_known_prior(method):
    # Simulated beta-binomial with known mean 0.02 and strength 400; moment relations of Kleinman (1973).
    rng = np.random.default_rng(3)
    m, s = 0.02, 400.0
    r = rng.beta(m * s, (1 - m) * s, size=20_000)
    n = rng.integers(200, 20_000, size=r.size)
    k = rng.binomial(n, r)
    mean, strength = beta_binomial_moments(k, n, method=method)
    assert mean == pytest.approx(m, rel=0.02)
    assert strength == pytest.approx(s, rel=0.1)


def test_beta_binomial_moments_without_overdispersion():
    rng = np.random.default_rng(4)
    n = rng.integers(100, 1000, size=5000)
    k = rng.binomial(n, 0.1)  # pure binomial: no spread between posts
    mean, strength = beta_binomial_moments(k, n)
    assert mean == pytest.approx(0.1, rel=0.02)
    assert strength > 5000 or np.isinf(strength)
    with pytest.raises(ContentlabError, match="at least 2 posts"):
        beta_binomial_moments([1], [10])
    with pytest.raises(ContentlabError, match="method must be"):
        beta_binomial_moments(k, n, method="mle")


def test_shrunken_rates():
    # Hand-computed posterior means (k + m s) / (n + s).
    out = shrunken_rates([0, 10, 500], [10, 100, 10_000], 0.02, 100.0)
    np.testing.assert_allclose(out, [2 / 110, 12 / 200, 502 / 10_100])
    np.testing.assert_allclose(shrunken_rates([1, 2], [10, 20], 0.3, np.inf), [0.3, 0.3])
    np.testing.assert_allclose(shrunken_rates([1, 2], [10, 20], 0.3, 0.0), [0.1, 0.1])
    with pytest.raises(ContentlabError, match="strength must be >= 0"):
        shrunken_rates(1, 10, 0.1, -1.0)
