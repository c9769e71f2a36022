"""Channel levels that follow drift, and how far a later week's level strays (issue 10, item 5).

Rates drift (on the Upworthy archive they fell from about 2.1% to 1.0% over 2014, after a jump
from 1.5% to 3% and back in 2013), so a model whose level is the history's average predicts
later posts too high or too low. The model's features say how a post compares with its
channel's typical post; this module says where the channel's typical post is heading:

* :func:`weekly_levels`: each (channel, week)'s pooled rate on the log-odds;
* :func:`level_path`: a level and a slope per channel from those weeks, each week weighted by
  its impressions times ``0.5 ** (age / half_life)``; the slope only when ``damping > 0``;
* :func:`damped_steps`: how much of the slope a post ``h`` weeks ahead gets (a damped trend,
  ``sum_{j=1..h} damping ** j``; Gardner and McKenzie, Management Science 1985);
* :func:`fold_forecasts`: the same forecast made on forward time folds from the blocks before
  each fold, relative to the fold model's typical prediction;
* :func:`recent_levels`: the half-life and damping with the smallest held-out deviance
  (``inf`` half-life and no slope are candidates, so a flat level is kept when nothing drifts),
  then each channel's level and slope at the history's end;
* :func:`level_error_variance`: the held-out post-to-post spread and the level's error variance
  ``a + b * weeks_ahead``;
* :func:`interval_scale`: the factor on the predictive variance that gives the time folds'
  held-out posts the nominal coverage.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import pandas as pd
from scipy.special import expit, logit

__all__ = [
    "LEVEL_HALF_LIVES",
    "LEVEL_DAMPINGS",
    "week_number",
    "weekly_levels",
    "level_path",
    "damped_steps",
    "fold_forecasts",
    "recent_levels",
    "level_error_variance",
    "interval_scale",
]

# Candidate half-lives (weeks) of the channel level; inf = the whole history weighs alike.
LEVEL_HALF_LIVES = (2.0, 4.0, 8.0, 16.0, 32.0, np.inf)
# Candidate dampings of the level's slope: 0 = no trend (a level only); damped-trend forecasting
# usually keeps the damping between 0.8 and 0.98 (Gardner and McKenzie 1985), 0.5 fades in ~2 weeks.
LEVEL_DAMPINGS = (0.0, 0.5, 0.8, 0.9, 0.98)


def week_number(periods) -> np.ndarray:
    """Weeks since 1970 of each period (a Monday as 'YYYY-MM-DD')."""
    return pd.to_datetime(pd.Series(periods)).to_numpy().astype("datetime64[D]").astype(np.int64) / 7.0


def weekly_levels(k, n, channel, week, rows=None) -> pd.DataFrame:
    """One row per (channel, week) of ``rows``: ``channel, week, level`` (log-odds of the pooled rate)
    and ``impressions``."""
    rows = np.arange(len(k)) if rows is None else rows
    frame = pd.DataFrame({"channel": np.asarray(channel, dtype=object)[rows], "week": np.asarray(week, float)[rows],
                          "k": np.asarray(k, float)[rows], "n": np.asarray(n, float)[rows]})
    per = frame.groupby(["channel", "week"], sort=True).sum().reset_index()
    per["level"] = logit(np.clip(per["k"] / per["n"], 0.5 / per["n"], 1 - 0.5 / per["n"]))
    return per.rename(columns={"n": "impressions"})[["channel", "week", "level", "impressions"]]


def level_path(weekly: pd.DataFrame, now: float, half_life: float, damping: float) -> dict[str, tuple[float, float]]:
    """Per channel ``(level, slope)`` at week ``now`` on the log-odds.

    Weighted least squares of the weekly levels on ``week - now``, each week weighted by its
    impressions times ``0.5 ** (age / half_life)``; with ``damping == 0`` only the weighted mean
    (slope 0), and a channel seen in a single week has no slope either.
    """
    out = {}
    for c, g in weekly.groupby("channel", sort=False):
        x = g["week"].to_numpy(float) - now
        w = g["impressions"].to_numpy(float) * (0.5 ** (-x / half_life) if np.isfinite(half_life) else 1.0)
        y = g["level"].to_numpy(float)
        if damping <= 0 or len(g) < 2:
            out[c] = (float(np.sum(w * y) / np.sum(w)), 0.0)
            continue
        sw = np.sqrt(w)
        level, slope = np.linalg.lstsq(np.column_stack([sw, sw * x]), sw * y, rcond=None)[0]
        out[c] = (float(level), float(slope))
    return out


def damped_steps(damping: float, weeks_ahead) -> np.ndarray:
    """``sum_{j=1..h} damping ** j`` for ``h`` weeks ahead: the share of the slope a damped trend adds."""
    h = np.asarray(weeks_ahead, dtype=float)
    if damping <= 0:
        return np.zeros(h.shape)
    if damping >= 1:
        return h.copy()
    return damping * (1 - damping ** h) / (1 - damping)


def _typical_logit(eta, n, channel, rows) -> dict[str, float]:
    """Per channel, the log-odds of the model's impression-weighted mean predicted rate over ``rows``."""
    p = pd.DataFrame({"c": channel[rows], "pn": n[rows] * expit(eta[rows]), "n": n[rows]}).groupby("c").sum()
    return dict(zip(p.index, logit(np.clip(p["pn"] / p["n"], 1e-12, 1 - 1e-12))))


def _fold_bases(oof, k, n, channel, week, blocks, n_folds: int) -> list[dict]:
    """Per forward fold what every candidate's forecast needs: held-out rows, weeks ahead, the
    earlier blocks' weekly levels, and the fold model's typical logit per held-out post."""
    bases = []
    for f in range(1, n_folds + 1):
        tr = np.flatnonzero(blocks < f)
        te = np.flatnonzero((blocks == f) & np.isfinite(oof))
        if tr.size == 0 or te.size == 0:
            continue
        now = float(week[tr].max())
        typical = _typical_logit(oof, n, channel, te)
        bases.append({"rows": te, "now": now, "ahead": np.maximum(week[te] - now, 1.0), "channel": channel[te],
                      "weekly": weekly_levels(k, n, channel, week, tr),
                      "typical": np.array([typical[c] for c in channel[te]])})
    return bases


def _forecast_folds(bases: list[dict], n_rows: int, half_life: float, damping: float):
    offset = np.full(n_rows, np.nan)
    ahead = np.full(n_rows, np.nan)
    for b in bases:
        path = level_path(b["weekly"], b["now"], half_life, damping)
        lev = np.array([path.get(c, (np.nan, 0.0))[0] for c in b["channel"]])
        slope = np.array([path.get(c, (np.nan, 0.0))[1] for c in b["channel"]])
        forecast = lev + slope * damped_steps(damping, b["ahead"]) - b["typical"]
        offset[b["rows"]] = np.where(np.isfinite(lev), forecast, 0.0)
        ahead[b["rows"]] = b["ahead"]
    return offset, ahead


def fold_forecasts(oof, k, n, channel, week, blocks, n_folds: int, half_life: float, damping: float):
    """Per history post, the level forecast for it made on forward folds: ``(offset, weeks_ahead)``.

    For fold ``f`` the level and slope come from the blocks before it; a held-out post ``h`` weeks
    after their last week gets ``level + slope * damped_steps(h)`` minus the fold model's typical
    logit (its mean predicted rate on the fold's posts of that channel; no outcome of the fold is
    used), so ``oof + offset`` is the held-out prediction at the forecast level. NaN outside folds.
    """
    oof = np.asarray(oof, float)
    bases = _fold_bases(oof, k, n, np.asarray(channel, dtype=object), week, blocks, n_folds)
    return _forecast_folds(bases, len(oof), half_life, damping)


def recent_levels(oof, eta, k, n, channel, periods, blocks, n_folds: int,
                  half_lives: Sequence[float] = LEVEL_HALF_LIVES,
                  dampings: Sequence[float] = LEVEL_DAMPINGS) -> dict:
    """Each channel's level at the history's end and its slope, by a half-life and damping chosen on
    the time folds.

    Every candidate's fold forecasts (:func:`fold_forecasts`) are judged by the binomial deviance of
    the held-out posts; among equal deviances the longer half-life and the smaller damping (the
    simpler level) win, so a flat history keeps a flat level. The chosen path is then fitted on all
    weeks. Returns ``half_life``, ``damping``, ``offsets`` (per channel, the log-odds to add to the
    model's typical logit ``eta`` for next week's post), ``slopes`` (per week, before damping) and
    ``table`` (deviance per candidate).
    """
    from .stats import binomial_deviance

    oof = np.asarray(oof, float)
    channel = np.asarray(channel, dtype=object)
    week = week_number(periods)
    bases = _fold_bases(oof, k, n, channel, week, blocks, n_folds)
    rows = []
    for h in half_lives:
        for d in dampings:
            off, _ = _forecast_folds(bases, len(oof), h, d)
            use = np.isfinite(off)
            dev = binomial_deviance(k[use], n[use], np.clip(expit(oof[use] + off[use]), 1e-12, 1 - 1e-12))
            rows.append({"half_life_weeks": float(h), "damping": float(d), "deviance": float(dev)})
    table = pd.DataFrame(rows)
    best = table.sort_values(["deviance", "half_life_weeks", "damping"], ascending=[True, False, True]).iloc[0]
    half_life, damping = float(best["half_life_weeks"]), float(best["damping"])
    path = level_path(weekly_levels(k, n, channel, week), float(week.max()), half_life, damping)
    typical = _typical_logit(np.asarray(eta, float), np.asarray(n, float), channel, np.arange(len(channel)))
    next_week = float(damped_steps(damping, 1.0))
    return {
        "half_life": half_life,
        "damping": damping,
        "offsets": {c: lev + slope * next_week - typical[c] for c, (lev, slope) in path.items()},
        "slopes": {c: slope for c, (_, slope) in path.items()},
        "table": table,
    }


def level_error_variance(eta, offset, ahead, k, n, channel, week) -> tuple[float, float, float]:
    """``(post_variance, a, b)`` on the log-odds from held-out posts (those with a finite ``offset``).

    Each held-out (channel, week)'s own level is refitted (``recenter_logits`` of ``eta + offset``), so the
    post-to-post spread beyond binomial noise is measured around it (method of moments:
    ``E[(k - n p)^2] = n p (1 - p) + (n p (1 - p))^2 * tau^2`` by the delta method), apart from the
    level's error. The week's error ``own - forecast`` has variance ``a + b * weeks_ahead`` (a random
    walk's variance grows in proportion to the steps ahead), fitted by non-negative least squares on
    ``err^2 - noise``, ``noise`` being the sampling variance of the week's own level.
    """
    from scipy.optimize import nnls

    from .evaluation import recenter_logits

    use = np.flatnonzero(np.isfinite(offset))
    if use.size == 0:
        return 0.0, 0.0, 0.0
    base = np.asarray(eta, float)[use] + offset[use]
    key = (pd.Series(np.asarray(channel, dtype=object)[use]).astype(str) + "|" + pd.Series(week[use]).astype(str)).to_numpy()
    own = recenter_logits(base, k[use], n[use], key) - base
    p = expit(base + own)
    v = n[use] * p * (1 - p)
    post = max(float(np.sum((k[use] - n[use] * p) ** 2 - v) / np.sum(v ** 2)), 0.0)
    per = pd.DataFrame({"key": key, "err": own, "ahead": ahead[use], "info": v}).groupby("key").agg(
        err=("err", "first"), ahead=("ahead", "first"), info=("info", "sum"), posts=("err", "size"))
    noise = 1.0 / np.maximum(per["info"].to_numpy(float), 1e-12) + post / per["posts"].to_numpy(float)
    y = per["err"].to_numpy(float) ** 2 - noise
    x = per["ahead"].to_numpy(float)
    (a, b), _ = nnls(np.column_stack([np.ones_like(x), x]), y)
    return post, float(a), float(b)


def interval_scale(coverage_at: Callable[[float], float], interval: float,
                   low: float = 0.25, high: float = 4.0) -> float:
    """The factor on the predictive variance whose held-out coverage ``coverage_at(factor)`` is
    ``interval`` (bisection on the log scale; coverage grows with the factor), clipped to ``[low, high]``.

    The moment estimates of the spread weigh posts by their squared information, so the big posts
    decide them; the coverage of the typical post is what a user reads, so the time folds calibrate
    it (calibrating an interval's width on held-out coverage is common practice, e.g. split conformal
    prediction).
    """
    if coverage_at(low) >= interval:
        return low
    if coverage_at(high) <= interval:
        return high
    a, b = np.log(low), np.log(high)
    for _ in range(14):  # the factor to within 0.02% (2^-14 of its log range)
        mid = 0.5 * (a + b)
        if coverage_at(float(np.exp(mid))) < interval:
            a = mid
        else:
            b = mid
    return float(np.exp(b))
