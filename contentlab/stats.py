"""Small statistical helpers shared by the model, the evaluation and the report.

Pure functions on numpy arrays / pandas frames; no state, no I/O. Every check
raises :class:`contentlab.errors.ContentlabError` with a message naming the
argument, the allowed range and the value received.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import special

from contentlab.errors import ContentlabError

__all__ = [
    "two_proportion_ztest",
    "binomial_deviance",
    "pairwise_accuracy",
    "calibration_table",
    "beta_binomial_moments",
    "shrunken_rates",
]


def _counts(clicks: ArrayLike, impressions: ArrayLike, *, names=("clicks", "impressions")):
    """Validate a pair of count arrays (broadcast together) and return them as float arrays."""
    k = np.asarray(clicks, dtype=float)
    n = np.asarray(impressions, dtype=float)
    try:
        k, n = np.broadcast_arrays(k, n)
    except ValueError:
        raise ContentlabError(
            f"{names[0]} and {names[1]} must have the same length; got shapes {k.shape} and {n.shape}"
        ) from None
    if not (np.all(np.isfinite(k)) and np.all(np.isfinite(n))):
        raise ContentlabError(f"{names[0]} and {names[1]} must be finite numbers; found NaN or infinity")
    if np.any(k < 0):
        raise ContentlabError(f"{names[0]} must be >= 0; got minimum {float(k.min())!r}")
    if np.any(n < k):
        i = int(np.argmax(n < k))
        raise ContentlabError(
            f"{names[0]} must not exceed {names[1]}; got {names[0]}={float(k.flat[i])!r} > {names[1]}={float(n.flat[i])!r}"
        )
    return k, n


def two_proportion_ztest(
    clicks1: ArrayLike, n1: ArrayLike, clicks2: ArrayLike, n2: ArrayLike
) -> tuple[np.ndarray | float, np.ndarray | float]:
    """Two-sided z-test that two click rates are equal, with the pooled variance.

    ``z = (k1/n1 - k2/n2) / sqrt(q (1 - q) (1/n1 + 1/n2))`` with the pooled rate
    ``q = (k1 + k2) / (n1 + n2)``, and ``p = 2 * (1 - Phi(|z|))``. This is the
    test of ``statsmodels.stats.proportion.proportions_ztest(count=[k1, k2],
    nobs=[n1, n2])`` (default ``prop_var=False``), vectorised over arrays.

    When both arms have rate 0 (or both rate 1) the standard error is zero;
    we return ``z = 0, p = 1`` there (statsmodels returns NaN): no evidence of a
    difference.

    Returns ``(z, p)``; floats for scalar input, arrays otherwise. ``z > 0``
    means arm 1 has the higher rate.
    """
    k1, m1 = _counts(clicks1, n1, names=("clicks1", "n1"))
    k2, m2 = _counts(clicks2, n2, names=("clicks2", "n2"))
    if np.any(m1 <= 0) or np.any(m2 <= 0):
        raise ContentlabError(
            f"n1 and n2 must be > 0; got minimum n1={float(m1.min())!r}, n2={float(m2.min())!r}"
        )
    q = (k1 + k2) / (m1 + m2)
    se = np.sqrt(q * (1.0 - q) * (1.0 / m1 + 1.0 / m2))
    diff = k1 / m1 - k2 / m2
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(se > 0, diff / np.where(se > 0, se, 1.0), 0.0)
    p = 2.0 * special.ndtr(-np.abs(z))   # the normal upper tail, as scipy.stats.norm.sf
    if z.ndim == 0:
        return float(z), float(p)
    return z, p


def binomial_deviance(clicks: ArrayLike, impressions: ArrayLike, predicted_rate: ArrayLike) -> float:
    """Total binomial deviance of predicted rates against observed counts.

    ``D = 2 * sum_i [ k_i log(k_i / (n_i p_i)) + (n_i - k_i) log((n_i - k_i) / (n_i (1 - p_i))) ]``
    with ``0 * log 0 = 0`` (scipy.special.xlogy). Infinite when a rate of
    exactly 0 or 1 is contradicted by the counts. Same figure as statsmodels'
    ``GLM(..., family=Binomial()).fit().deviance`` for two-column endog.
    """
    k, n = _counts(clicks, impressions)
    p = np.asarray(predicted_rate, dtype=float)
    try:
        k, n, p = np.broadcast_arrays(k, n, p)
    except ValueError:
        raise ContentlabError(
            f"predicted_rate must have the same length as clicks; got shapes {p.shape} and {k.shape}"
        ) from None
    if not np.all(np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise ContentlabError("predicted_rate must be within [0, 1]; found values outside or NaN")
    # xlogy(k, k / (n p)) is 0 when k == 0 whatever p is; the divisions may hit 0/0 only there.
    with np.errstate(divide="ignore", invalid="ignore"):
        a = special.xlogy(k, k / (n * p))
        b = special.xlogy(n - k, (n - k) / (n * (1.0 - p)))
    a = np.where(k > 0, a, 0.0)
    b = np.where(n - k > 0, b, 0.0)
    return float(2.0 * np.sum(a + b))


def pairwise_accuracy(
    df: pd.DataFrame,
    score_col: str,
    group_cols: Sequence[str] = ("experiment_id", "image_id"),
    z_threshold: float = 1.96,
    *,
    clicks_col: str = "clicks",
    impressions_col: str = "impressions",
    cluster_col: str | None = None,
    n_boot: int = 2000,
    ci: float = 0.95,
    random_state: int | None = 0,
) -> dict:
    """Share of significantly different arm pairs that the score ranks the right way round.

    Pairs: every two arms (rows) sharing all ``group_cols`` (by default the same
    experiment and the same image) whose click rates differ with
    ``|z| >= z_threshold`` in :func:`two_proportion_ztest`. A pair counts 1 when
    the arm with the higher observed rate has the higher score, 0.5 on a tied
    score, 0 otherwise; ``accuracy`` is the mean over pairs (chance = 0.5).

    Interval: percentile bootstrap over clusters (``cluster_col``, default the
    first of ``group_cols``, i.e. whole experiments), resampling clusters with
    replacement ``n_boot`` times. Pairs inside one experiment share arms and are
    not independent, so a Wilson interval over pairs would be too narrow.

    Rows with a missing group key are not in any experiment and are ignored.

    Returns ``dict(accuracy, n_pairs, n_clusters, ci_low, ci_high)``; NaN
    accuracy and interval when there are no qualifying pairs.
    """
    group_cols = [group_cols] if isinstance(group_cols, str) else list(group_cols)
    needed = [score_col, clicks_col, impressions_col, *group_cols]
    missing = [c for c in needed if c not in df.columns]
    if missing:
        raise ContentlabError(f"pairwise_accuracy needs columns {missing} that are not in the table")
    if not (np.isfinite(z_threshold) and z_threshold >= 0):
        raise ContentlabError(f"z_threshold must be a finite number >= 0; got {z_threshold!r}")
    if not (0 < ci < 1):
        raise ContentlabError(f"ci must be in (0, 1); got {ci!r}")
    if int(n_boot) < 1:
        raise ContentlabError(f"n_boot must be an integer >= 1; got {n_boot!r}")
    cluster_col = group_cols[0] if cluster_col is None else cluster_col
    if cluster_col not in df.columns:
        raise ContentlabError(f"cluster_col {cluster_col!r} is not a column of the table")

    cols = list(dict.fromkeys([*group_cols, cluster_col, score_col, clicks_col, impressions_col]))
    d = df[cols].dropna(subset=list(dict.fromkeys([*group_cols, cluster_col]))).reset_index(drop=True)
    nan_result = dict(accuracy=float("nan"), n_pairs=0, n_clusters=0, ci_low=float("nan"), ci_high=float("nan"))
    if d.empty:
        return nan_result
    if d[score_col].isna().any():
        raise ContentlabError(
            f"score column {score_col!r} has {int(d[score_col].isna().sum())} missing values among experiment arms"
        )
    _counts(d[clicks_col].to_numpy(), d[impressions_col].to_numpy(), names=(clicks_col, impressions_col))
    if (d[impressions_col] <= 0).any():
        raise ContentlabError(f"{impressions_col} must be > 0 for experiment arms")

    # Vectorised pair enumeration: self-merge on the group keys, keep each unordered pair once.
    d["_row"] = np.arange(len(d))
    pairs = d.merge(d, on=group_cols, suffixes=("_a", "_b"))
    pairs = pairs[pairs["_row_a"] < pairs["_row_b"]]
    if pairs.empty:
        return nan_result
    z, _ = two_proportion_ztest(
        pairs[f"{clicks_col}_a"].to_numpy(float),
        pairs[f"{impressions_col}_a"].to_numpy(float),
        pairs[f"{clicks_col}_b"].to_numpy(float),
        pairs[f"{impressions_col}_b"].to_numpy(float),
    )
    keep = np.abs(z) >= z_threshold
    if not keep.any():
        return nan_result
    z = z[keep]
    pairs = pairs[keep]
    ds = pairs[f"{score_col}_a"].to_numpy(float) - pairs[f"{score_col}_b"].to_numpy(float)
    # z > 0: arm a has the higher rate, so the score is right when ds > 0.
    correct = np.where(ds == 0, 0.5, (np.sign(ds) == np.sign(z)).astype(float))
    ccol = cluster_col if cluster_col in group_cols else f"{cluster_col}_a"
    codes, _ = pd.factorize(pairs[ccol])
    n_clusters = int(codes.max()) + 1
    sums = np.bincount(codes, weights=correct, minlength=n_clusters)
    counts = np.bincount(codes, minlength=n_clusters).astype(float)

    rng = np.random.default_rng(random_state)
    # Cluster bootstrap as multinomial resampling weights: a (n_boot, n_clusters) count matrix,
    # so every replicate is two dot products instead of a Python loop over replicates.
    w = rng.multinomial(n_clusters, np.full(n_clusters, 1.0 / n_clusters), size=int(n_boot)).astype(float)
    tot = w @ counts
    with np.errstate(invalid="ignore", divide="ignore"):
        boot = (w @ sums) / tot
    boot = boot[tot > 0]
    lo, hi = np.quantile(boot, [(1 - ci) / 2, 1 - (1 - ci) / 2])
    return dict(
        accuracy=float(correct.mean()),
        n_pairs=int(correct.size),
        n_clusters=n_clusters,
        ci_low=float(lo),
        ci_high=float(hi),
    )


def calibration_table(
    predicted: ArrayLike, clicks: ArrayLike, impressions: ArrayLike, n_bins: int = 10
) -> pd.DataFrame:
    """Predicted against observed rate in quantile bins of the prediction (deciles by default).

    Posts are sorted by predicted rate and cut into ``n_bins`` bins of (nearly)
    equal numbers of posts (ties broken by order). Per bin: ``n_posts``,
    ``impressions``, ``clicks``, ``mean_predicted`` (impression-weighted, i.e. the
    expected clicks over impressions, directly comparable with the next column),
    ``observed_rate`` (pooled clicks / impressions), and the bin's
    ``predicted_min`` / ``predicted_max``.
    """
    k, n = _counts(clicks, impressions)
    p = np.asarray(predicted, dtype=float)
    if p.shape != k.shape or p.ndim != 1:
        raise ContentlabError(
            f"predicted, clicks and impressions must be 1-D of the same length; got shapes {p.shape} and {k.shape}"
        )
    if not np.all(np.isfinite(p)):
        raise ContentlabError("predicted must be finite; found NaN or infinity")
    if int(n_bins) != n_bins or n_bins < 1:
        raise ContentlabError(f"n_bins must be an integer >= 1; got {n_bins!r}")
    if p.size == 0:
        raise ContentlabError("calibration_table needs at least one post; got none")
    n_bins = int(min(n_bins, p.size))
    order = np.argsort(p, kind="stable")
    bins = np.empty(p.size, dtype=int)
    bins[order] = (np.arange(p.size) * n_bins) // p.size
    frame = pd.DataFrame({"bin": bins, "p": p, "k": k, "n": n, "pn": p * n})
    g = frame.groupby("bin")
    out = pd.DataFrame(
        {
            "n_posts": g.size(),
            "impressions": g["n"].sum(),
            "clicks": g["k"].sum(),
            "predicted_min": g["p"].min(),
            "predicted_max": g["p"].max(),
        }
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        out["mean_predicted"] = np.where(out["impressions"] > 0, g["pn"].sum() / out["impressions"], g["p"].mean())
        out["observed_rate"] = out["clicks"] / out["impressions"]
    out = out.reset_index()
    return out[["bin", "n_posts", "impressions", "clicks", "mean_predicted", "observed_rate",
                "predicted_min", "predicted_max"]]


def beta_binomial_moments(
    clicks: ArrayLike, impressions: ArrayLike, *, method: str = "kleinman", max_iter: int = 50
) -> tuple[float, float]:
    """Method-of-moments fit of a beta-binomial: post rates ~ Beta(mean * s, (1 - mean) * s).

    Model: ``k_i ~ Binomial(n_i, r_i)``, ``r_i ~ Beta(m s, (1 - m) s)``, so
    ``Var(k_i / n_i) = m (1 - m) [1/n_i + rho (1 - 1/n_i)]`` with
    ``rho = 1 / (s + 1)``. With weights ``w_i`` (``W = sum w_i``),
    ``m_hat = sum w_i r_i / W`` and ``S = sum w_i (r_i - m_hat)^2`` has expectation
    ``sum w_i (1 - w_i / W) Var(r_i)``; equating S to it gives ``rho``:

    ``rho = (S / (m (1-m)) - sum w_i (1 - w_i/W) / n_i) / sum w_i (1 - w_i/W) (1 - 1/n_i)``.

    ``method="kleinman"`` (Kleinman 1973, "Proportions with extraneous variance:
    single and independent samples", JASA 68:46-54): start with ``w_i = n_i``, then
    re-weight with the inverse-variance weights ``w_i = n_i / (1 + (n_i - 1) rho)``
    until ``rho`` settles. ``method="unweighted"``: ``w_i = 1`` (the simple moment
    estimator). Posts with zero impressions are ignored.

    Returns ``(mean, strength)`` with ``strength = s = 1/rho - 1``; ``strength`` is
    ``inf`` when the rates show no extra-binomial spread (``rho <= 0``).
    """
    k, n = _counts(clicks, impressions)
    k, n = k.ravel(), n.ravel()
    if method not in ("kleinman", "unweighted"):
        raise ContentlabError(f"method must be 'kleinman' or 'unweighted'; got {method!r}")
    use = n > 0
    k, n = k[use], n[use]
    if k.size < 2:
        raise ContentlabError(f"beta_binomial_moments needs at least 2 posts with impressions; got {k.size}")
    r = k / n

    def solve(w: np.ndarray) -> tuple[float, float]:
        W = w.sum()
        m = float(np.sum(w * r) / W)
        if m <= 0.0 or m >= 1.0:
            return m, 0.0
        S = np.sum(w * (r - m) ** 2)
        c = w * (1.0 - w / W)
        denom = np.sum(c * (1.0 - 1.0 / n))
        if denom <= 0:  # every post has a single impression: spread is not identifiable
            return m, 0.0
        rho = (S / (m * (1.0 - m)) - np.sum(c / n)) / denom
        return m, float(np.clip(rho, 0.0, 1.0))

    if method == "unweighted":
        m, rho = solve(np.ones_like(n))
    else:
        m, rho = solve(n.copy())
        for _ in range(int(max_iter)):
            m_new, rho_new = solve(n / (1.0 + (n - 1.0) * rho))
            done = abs(rho_new - rho) <= 1e-10 + 1e-6 * rho
            m, rho = m_new, rho_new
            if done:
                break
    strength = float("inf") if rho <= 0.0 else 1.0 / rho - 1.0
    return float(m), strength


def shrunken_rates(
    clicks: ArrayLike, impressions: ArrayLike, mean: float, strength: float
) -> np.ndarray:
    """Empirical-Bayes (posterior-mean) rates under a Beta(mean * strength, (1 - mean) * strength) prior.

    ``r_i = (k_i + mean * strength) / (n_i + strength)``: posts with few
    impressions are pulled towards ``mean``, large posts keep their own rate.
    ``strength = inf`` returns ``mean`` everywhere; ``strength = 0`` the raw rate.
    """
    k, n = _counts(clicks, impressions)
    if not (np.isfinite(mean) and 0.0 <= mean <= 1.0):
        raise ContentlabError(f"mean must be within [0, 1]; got {mean!r}")
    if np.isnan(strength) or strength < 0:
        raise ContentlabError(f"strength must be >= 0 (inf allowed); got {strength!r}")
    if np.isinf(strength):
        return np.full(k.shape, float(mean))
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (k + mean * strength) / (n + strength)
    return np.where(n + strength > 0, out, mean)
