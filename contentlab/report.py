"""The weekly report: what happened, why, what works, and what to do next.

The computation lives here as small pure functions on the posts frame
(:meth:`contentlab.workspace.Workspace.posts`), so every figure in the report
can be checked alone:

* :func:`resolve_period` picks the week (or date range) and names why;
* :func:`period_blocks` / :func:`noise_check` compare the period with the four
  before it and with the same week last year, and judge the change against the
  spread of the same comparison over the past year (not a binomial test, which
  ignores that posts differ far more than binomial sampling says);
* :func:`shift_share` splits the change into channel mix and performance within
  channels (Kitagawa 1955), in exact rational arithmetic so the parts add up;
* :func:`channel_priors` / :func:`shrink_posts` rank posts by an empirical-Bayes
  shrunken rate (beta-binomial, method of moments) so a post with 30
  impressions cannot top the list;
* :func:`standardised_residuals` flags posts and days far from the model's
  prediction, with beta-binomial (overdispersed) variance.

:func:`build_report` gathers those, plus the model's drivers, experiments,
best slots and draft scores where those parts of contentlab are available, into
a :class:`WeeklyReport`; :func:`render_html` and :func:`write_report` turn it
into one self-contained HTML file and the CSV tables behind it.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from fractions import Fraction
from functools import partial
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from .errors import ContentlabError
from .percentages import TRUE_MINUS, percent, percentage_points, probability, signed_number, signed_percent

# ------------------------------------------------------------------ settings
BASELINE_BLOCKS = 4          # "the previous four weeks"
NOISE_REF_BLOCKS = 52        # past changes the current one is judged against
MIN_BASE_BLOCKS = 2          # a past comparison needs posts in at least 2 of its 4 previous blocks
MIN_NOISE_REF = 8            # fewer past changes than this: too little history to judge noise
NOISE_Z = 2.0                # |z| >= 2 counts as beyond normal noise (common practice)
TREND_BLOCKS = 26            # weeks shown in the trend chart
MAX_RANGE_DAYS = 731         # longest --from/--to range: two years (its 56 earlier blocks stay on the calendar)
PRIOR_BLOCKS = 52            # history used for the empirical-Bayes prior of each channel
RESIDUAL_BLOCKS = 26         # history used for the no-model fallback prediction and its spread
RESIDUAL_Z = 2.5             # |z| >= 2.5 flags a post or day as unusual (common practice: 2 to 3)
INTERVAL = 0.90              # every interval in the report is a 90% interval
THIN_IMPRESSIONS = 1000      # fewer impressions than this in a group: evidence flagged as thin
THIN_SLOT_POSTS = 10         # fewer past posts than this in a slot: flagged as thin (common practice, our choice)
NO_CHANNEL = "(none)"        # what a missing channel is called (as in the featurizer)

RATE_NAMES = {"clicks": "click-through rate", "engagements": "engagement rate"}
UNIT_NAMES = {"clicks": "clicks", "engagements": "engagements"}

DAYPARTS = [(0, 6, "night (0-6h)"), (6, 12, "morning (6-12h)"), (12, 18, "afternoon (12-18h)"),
            (18, 24, "evening (18-24h)")]

CAUTIONS = [
    "Correlation is not causation: the drivers and the decomposition describe what went with higher "
    "rates in your own history, not what caused them. Test a change (an experiment) before relying on it.",
    "Thin evidence is flagged where a figure rests on few posts or impressions; treat those as hints.",
    "Headlines must stay truthful. Advertising and consumer-protection rules, which vary by place, "
    "forbid misleading claims; defer to the rules where you publish, whatever a score says.",
]


# ------------------------------------------------------------------ periods
@dataclass(frozen=True)
class Period:
    """The report's period: ``start`` to ``end`` inclusive, in local dates."""

    start: date
    end: date
    label: str            # "2026-W48" or "2026-11-01_to_2026-11-14"
    kind: str             # "week" or "range"
    why: str              # how it was chosen, said in the report and by the CLI

    @property
    def days(self) -> int:
        return (self.end - self.start).days + 1

    @property
    def title(self) -> str:
        if self.kind == "week":
            return f"week {self.label} ({_day(self.start)} to {_day(self.end)})"
        return f"{_day(self.start)} to {_day(self.end)}"

    @property
    def short(self) -> str:
        """How sentences name the period: "week 2026-W48" or "1 Nov 2026 to 14 Nov 2026"."""
        return f"week {self.label}" if self.kind == "week" else f"{_day(self.start)} to {_day(self.end)}"

    @property
    def during(self) -> str:
        """The period after a verb: "in week 2026-W48", "from Mon 9 Nov 2026 to Sun 22 Nov 2026"."""
        return f"in week {self.label}" if self.kind == "week" else f"from {_day(self.start)} to {_day(self.end)}"

    @property
    def dates(self) -> str:
        return f"{_day(self.start)} to {_day(self.end)}"

    @property
    def noun(self) -> str:
        return "week" if self.kind == "week" and self.days == 7 else "period"




def parse_iso_week(text: str) -> tuple[date, date]:
    """Monday and Sunday of an ISO week written like 2026-W48 (the one parser: :mod:`contentlab.timeparse`)."""
    from .timeparse import parse_iso_week as parse

    return parse(text, "--week")


def parse_day(text: str, option: str) -> date:
    """A date like 2026-11-23 (the one parser: :mod:`contentlab.timeparse`)."""
    from .timeparse import parse_date

    return parse_date(text, option)


def iso_label(day: date) -> str:
    year, week, _ = day.isocalendar()
    return f"{year}-W{week:02d}"


def resolve_period(
    posts: pd.DataFrame,
    *,
    week: str | None = None,
    start: str | date | None = None,
    end: str | date | None = None,
    today: date | None = None,
) -> Period:
    """The period to report on, and a sentence saying why it was chosen.

    Without ``week``/``start``/``end`` the default is the last complete ISO
    week in the history: the latest ISO week that has posts and has ended
    before ``today`` (the local date now, unless given).
    """
    if week and (start or end):
        raise ContentlabError("Give either --week or --from/--to, not both.")
    if week:
        monday, sunday = parse_iso_week(week)
        return Period(monday, sunday, iso_label(monday), "week", "the week you asked for")
    if start or end:
        if not (start and end):
            raise ContentlabError("--from and --to go together: give both dates (inclusive).")
        a = start if isinstance(start, date) else parse_day(start, "--from")
        b = end if isinstance(end, date) else parse_day(end, "--to")
        if b < a:
            raise ContentlabError(f"--to {b} is before --from {a}; swap them.")
        if (b - a).days + 1 > MAX_RANGE_DAYS:  # the period is compared with up to 56 like it before it
            raise ContentlabError(
                f"--from {a} --to {b} spans {(b - a).days + 1:,} days; a report covers at most {MAX_RANGE_DAYS} days "
                "(two years), because it compares the period with the ones before it. Choose a shorter range.")
        if a.isoweekday() == 1 and (b - a).days == 6:
            return Period(a, b, iso_label(a), "week", "the dates you asked for (one ISO week)")
        return Period(a, b, f"{a.isoformat()}_to_{b.isoformat()}", "range", "the dates you asked for")
    today = today or date.today()
    this_monday = today - timedelta(days=today.weekday())
    days = _local_days(posts)
    days = days[days < this_monday]
    if len(days):
        last = max(days)
        monday = last - timedelta(days=last.weekday())
        why = (f"the last complete ISO week in the history (latest post before this week: {_day(last)}; "
               f"choose another with --week)")
    else:
        monday = this_monday - timedelta(days=7)
        why = "last week (the history has no posts in a complete week before today)"
    return Period(monday, monday + timedelta(days=6), iso_label(monday), "week", why)


def last_year_start(period: Period) -> date | None:
    """Start of the same period a year earlier: the same ISO week, or 52 weeks back for a range."""
    if period.kind == "week":
        year, week, _ = period.start.isocalendar()
        if week > _iso_weeks_in(year - 1):
            return None
        return date.fromisocalendar(year - 1, week, 1)
    return period.start - timedelta(days=364)


def _iso_weeks_in(year: int) -> int:
    return date(year, 12, 28).isocalendar()[1]


def _local_days(posts: pd.DataFrame) -> np.ndarray:
    if posts is None or posts.empty:
        return np.array([], dtype=object)
    return np.array([d.date() for d in pd.to_datetime(posts["local_date"]).dropna()], dtype=object)


def _day(d: date) -> str:
    return f"{d.strftime('%a')} {d.day} {d.strftime('%b %Y')}"


# ---------------------------------------------------------- rates by block
def usable(posts: pd.DataFrame, outcome: str) -> pd.DataFrame:
    """Posts that can enter a rate: a known outcome count and a local date."""
    if outcome not in ("clicks", "engagements"):
        raise ContentlabError(f"outcome must be 'clicks' or 'engagements'; got {outcome!r}")
    if posts is None or posts.empty:
        return _empty_posts()
    keep = posts[outcome].notna() & posts["local_date"].notna() & posts["impressions"].notna()
    out = posts.loc[keep].copy()
    out["channel"] = out["channel"].astype(object).where(out["channel"].notna(), NO_CHANNEL).astype(str)
    out["k"] = out[outcome].astype(float)
    out["n"] = out["impressions"].astype(float)
    out["day"] = [d.date() for d in pd.to_datetime(out["local_date"])]
    return out


def _empty_posts() -> pd.DataFrame:
    cols = ["post_id", "published_at", "has_time", "headline", "impressions", "clicks", "engagements",
            "channel", "body", "experiment_id", "image_id", "cost", "source", "local_date", "local_hour",
            "local_weekday", "k", "n", "day"]
    return pd.DataFrame({c: pd.Series(dtype=object) for c in cols})


def period_blocks(frame: pd.DataFrame, period: Period) -> pd.Series:
    """Block number of each post: 0 is the period, -1 the one before it, and so on.

    Blocks have the period's length and are anchored at its start, so for an
    ISO week they are ISO weeks.
    """
    if frame.empty:
        return pd.Series(dtype=int)
    offsets = np.array([(d - period.start).days for d in frame["day"]], dtype=int)
    return pd.Series(np.floor_divide(offsets, period.days), index=frame.index)


def block_start(period: Period, block: int) -> date:
    return period.start + timedelta(days=block * period.days)


def _rate(k: float, n: float) -> float:
    return float(k) / float(n) if n and n > 0 else float("nan")


def pooled(frame: pd.DataFrame) -> dict:
    k, n = float(frame["k"].sum()) if len(frame) else 0.0, float(frame["n"].sum()) if len(frame) else 0.0
    return {"posts": int(len(frame)), "k": k, "n": n, "rate": _rate(k, n)}


def block_table(frame: pd.DataFrame, period: Period, first: int, last: int = 0) -> pd.DataFrame:
    """Pooled rate of every block from ``first`` to ``last`` (inclusive), empty blocks kept."""
    blocks = period_blocks(frame, period)
    rows = []
    grouped = {b: g for b, g in frame.groupby(blocks)} if len(frame) else {}
    for b in range(first, last + 1):
        g = grouped.get(b)
        start = block_start(period, b)
        rows.append({
            "block": b,
            "start": start,
            "label": iso_label(start) if period.kind == "week" else start.isoformat(),
            "posts": 0 if g is None else int(len(g)),
            "impressions": 0.0 if g is None else float(g["n"].sum()),
            "outcome": 0.0 if g is None else float(g["k"].sum()),
        })
    out = pd.DataFrame(rows)
    out["rate"] = [_rate(k, n) for k, n in zip(out["outcome"], out["impressions"])]
    return out


def noise_check(frame: pd.DataFrame, period: Period) -> dict:
    """Is the change against the previous four blocks beyond normal block-to-block noise?

    For every past block b (up to :data:`NOISE_REF_BLOCKS`) take the same
    comparison the headline makes, ``d_b = rate_b - pooled rate of b-4..b-1``;
    the standard deviation of those past ``d_b`` is the normal noise of that
    comparison, including the channel-mix swings and post-to-post spread a
    binomial test would ignore (a past block counts when at least
    :data:`MIN_BASE_BLOCKS` of its four previous blocks have posts). ``z = d_0 / sd``; ``share`` is the fraction of
    past blocks that moved at least as much. With fewer than
    :data:`MIN_NOISE_REF` past comparisons the verdict is "too little history".
    """
    lo = -(NOISE_REF_BLOCKS + BASELINE_BLOCKS)
    table = block_table(frame, period, lo, 0).set_index("block")
    diffs = {}
    for b in range(-NOISE_REF_BLOCKS, 1):
        row = table.loc[b]
        base = table.loc[b - BASELINE_BLOCKS:b - 1]
        n0 = base["impressions"].sum()
        if row["impressions"] > 0 and (base["impressions"] > 0).sum() >= MIN_BASE_BLOCKS:
            diffs[b] = row["rate"] - base["outcome"].sum() / n0
    current = diffs.pop(0, None)
    ref = np.array(list(diffs.values()), dtype=float)
    out = {"method": "empirical", "change": current, "n_ref": int(ref.size), "sd": float("nan"),
           "z": float("nan"), "share": float("nan"), "beyond": None, "threshold": NOISE_Z}
    if current is None:
        out["verdict"] = "no change to judge"
        return out
    if ref.size < MIN_NOISE_REF:
        out["verdict"] = (f"too little history to judge noise ({ref.size} earlier comparable "
                          f"{period.noun}s; {MIN_NOISE_REF} needed)")
        return out
    sd = float(np.std(ref, ddof=1))
    out["sd"] = sd
    # No spread at all: any change is beyond it, no change is not (inf * 0 would be NaN and a RuntimeWarning).
    out["z"] = float(current / sd) if sd > 0 else (float(np.sign(current)) * float("inf") if current else 0.0)
    out["share"] = float(np.mean(np.abs(ref) >= abs(current)))
    out["beyond"] = bool(abs(out["z"]) >= NOISE_Z)
    out["verdict"] = "beyond normal noise" if out["beyond"] else "within normal noise"
    return out


# ------------------------------------------------------------- shift-share
@dataclass(frozen=True)
class ShiftShareRow:
    group: str
    base_impressions: int
    base_outcome: int
    impressions: int
    outcome: int
    mix: Fraction
    within: Fraction

    @property
    def total(self) -> Fraction:
        return self.mix + self.within


def _as_int(value: float, what: str) -> int:
    if value is None or not np.isfinite(value) or float(value) != int(value):
        raise ContentlabError(f"shift_share needs whole-number {what}; got {value!r}")
    return int(value)


def shift_share_exact(base: pd.DataFrame, current: pd.DataFrame, by: str | list[str]) -> list[ShiftShareRow]:
    """Kitagawa's (1955) symmetric decomposition of a change in a pooled rate, exactly.

    With impression shares ``w_g`` and rates ``r_g`` of group ``g`` in the base
    (0) and current (1) period, the pooled rate is ``R = sum_g w_g r_g`` and

    ``R1 - R0 = sum_g (w1_g - w0_g)(r0_g + r1_g)/2   [mix]
              + sum_g (r1_g - r0_g)(w0_g + w1_g)/2   [within-group performance]``

    an identity, so the parts add up to the total. A group present in only one
    period has no rate in the other; its missing rate is set equal to the one it
    has, so its whole contribution counts as mix (the identity still holds, since
    it enters with weight 0 there). Computed in :class:`fractions.Fraction` from the
    integer counts, so the sum is exact, not merely close.

    ``base`` and ``current`` are post frames with ``n`` (impressions) and ``k``
    (outcome) columns and the ``by`` column(s).
    """
    cols = [by] if isinstance(by, str) else list(by)

    def sums(frame: pd.DataFrame) -> dict[str, tuple[int, int]]:
        if frame.empty:
            return {}
        keys = frame[cols].astype(str).agg(" / ".join, axis=1)
        g = frame.groupby(keys)[["n", "k"]].sum()
        return {str(i): (_as_int(r.n, "impressions"), _as_int(r.k, "counts")) for i, r in g.iterrows()}

    s0, s1 = sums(base), sums(current)
    N0 = sum(n for n, _ in s0.values())
    N1 = sum(n for n, _ in s1.values())
    if N0 == 0 or N1 == 0:
        return []
    rows = []
    for g in sorted(set(s0) | set(s1)):
        n0, k0 = s0.get(g, (0, 0))
        n1, k1 = s1.get(g, (0, 0))
        w0, w1 = Fraction(n0, N0), Fraction(n1, N1)
        r0 = Fraction(k0, n0) if n0 else None
        r1 = Fraction(k1, n1) if n1 else None
        if r0 is None and r1 is None:
            r0 = r1 = Fraction(0)
        elif r0 is None:
            r0 = r1
        elif r1 is None:
            r1 = r0
        mix = (w1 - w0) * (r0 + r1) / 2
        within = (r1 - r0) * (w0 + w1) / 2
        rows.append(ShiftShareRow(g, n0, k0, n1, k1, mix, within))
    return rows


def shift_share(base: pd.DataFrame, current: pd.DataFrame, by: str | list[str]) -> pd.DataFrame:
    """:func:`shift_share_exact` as a table (floats, rate points), largest contributions first.

    Columns: group, base/current impressions, outcome and rate, their impression
    shares, ``mix``, ``within``, ``total`` (as rates; multiply by 100 for
    percentage points). ``attrs["total_change"]`` is the exact change of the
    pooled rate as a Fraction; ``attrs["mix"]``/``attrs["within"]`` its parts.
    """
    rows = shift_share_exact(base, current, by)
    N0 = sum(r.base_impressions for r in rows)
    N1 = sum(r.impressions for r in rows)
    out = pd.DataFrame([{
        "group": r.group,
        "base_impressions": r.base_impressions,
        "base_outcome": r.base_outcome,
        "base_rate": _rate(r.base_outcome, r.base_impressions),
        "base_share": _rate(r.base_impressions, N0),
        "impressions": r.impressions,
        "outcome": r.outcome,
        "rate": _rate(r.outcome, r.impressions),
        "share": _rate(r.impressions, N1),
        "mix": float(r.mix),
        "within": float(r.within),
        "total": float(r.total),
    } for r in rows], columns=["group", "base_impressions", "base_outcome", "base_rate", "base_share",
                               "impressions", "outcome", "rate", "share", "mix", "within", "total"])
    if len(out):
        out = out.iloc[np.argsort(-np.abs(out["total"].to_numpy()), kind="stable")].reset_index(drop=True)
    out.attrs["mix"] = sum((r.mix for r in rows), Fraction(0))
    out.attrs["within"] = sum((r.within for r in rows), Fraction(0))
    out.attrs["total_change"] = out.attrs["mix"] + out.attrs["within"]
    return out


def round_preserving_sum(values: Iterable[float], decimals: int, total: float | None = None) -> list[float]:
    """Round so the rounded parts add up to the rounded total (largest-remainder method).

    Used for display only: a table of parts whose printed figures do not add up
    to the printed total invites distrust.
    """
    vals = np.asarray(list(values), dtype=float)
    if vals.size == 0:
        return []
    scale = 10 ** decimals
    target = int(round((vals.sum() if total is None else total) * scale))
    floors = np.floor(vals * scale)
    remainder = vals * scale - floors
    short = target - int(floors.sum())
    order = np.argsort(-remainder, kind="stable") if short >= 0 else np.argsort(remainder, kind="stable")
    if abs(short) > vals.size:  # a total far from the parts' sum: plain rounding is all we can do
        return [round(float(v), decimals) for v in vals]
    adj = np.zeros_like(floors)
    for i in order[: abs(short)]:
        adj[i] = 1 if short > 0 else -1
    return [float(v) / scale for v in floors + adj]


def daypart(hour: float) -> str:
    if hour is None or not np.isfinite(hour):
        return "time not known"
    for lo, hi, name in DAYPARTS:
        if lo <= hour < hi:
            return name
    return DAYPARTS[-1][2]


# --------------------------------------------------- empirical-Bayes ranking
def channel_priors(history: pd.DataFrame, current: pd.DataFrame | None = None) -> pd.DataFrame:
    """Beta prior of each channel's post rates, fitted by moments on its history.

    :func:`contentlab.stats.beta_binomial_moments` (Kleinman 1973 weights) per
    channel on ``history`` (the weeks before the report's, so one freak post this
    week cannot loosen its own prior). A channel of ``current`` with fewer than
    two earlier posts is fitted on its earlier and current posts together, and
    failing that borrows the prior of all channels (``pooled=True``).
    ``strength`` is the prior's weight in impressions: a post with that many
    impressions is pulled half-way to the mean.
    """
    from .stats import beta_binomial_moments

    cols = ["channel", "mean", "strength", "posts", "pooled"]

    def with_impressions(frame):
        return frame[frame["n"] > 0] if frame is not None and len(frame) else None

    h = with_impressions(history)
    c = with_impressions(current)
    both = pd.concat([f for f in (h, c) if f is not None]) if (h is not None or c is not None) else None
    if both is None or both.empty:
        return pd.DataFrame(columns=cols)
    overall = None
    ref = h if h is not None and len(h) >= 2 else both
    if len(ref) >= 2:
        overall = beta_binomial_moments(ref["k"].to_numpy(float), ref["n"].to_numpy(float))
    rows = []
    for ch in sorted(set(both["channel"])):
        g = h[h["channel"] == ch] if h is not None else both.iloc[0:0]
        if len(g) < 2:
            g = both[both["channel"] == ch]
        if len(g) >= 2:
            m, s = beta_binomial_moments(g["k"].to_numpy(float), g["n"].to_numpy(float))
            rows.append({"channel": ch, "mean": m, "strength": s, "posts": len(g), "pooled": False})
        elif overall is not None:
            rows.append({"channel": ch, "mean": overall[0], "strength": overall[1], "posts": len(g),
                         "pooled": True})
        else:  # a single post in the whole history: no spread to learn from, no shrinkage
            rows.append({"channel": ch, "mean": _rate(g["k"].sum(), g["n"].sum()), "strength": 0.0,
                         "posts": len(g), "pooled": True})
    return pd.DataFrame(rows, columns=cols)


def shrink_posts(posts: pd.DataFrame, priors: pd.DataFrame) -> pd.DataFrame:
    """Posts ranked by shrunken rate against their channel's usual rate.

    ``shrunken = (k + m s) / (n + s)`` (:func:`contentlab.stats.shrunken_rates`)
    with the channel's prior mean ``m`` and strength ``s``, and the 90% interval
    of the Beta(k + m s, n - k + (1 - m) s) posterior. Posts are ranked by
    ``vs_channel = shrunken / m - 1`` so that a newsletter post does not come
    first only because newsletters always do better; with one channel this is
    the same order as the shrunken rate itself.
    """
    from scipy.special import betaincinv

    from .stats import shrunken_rates

    cols = ["rank", "post_id", "headline", "channel", "day", "impressions", "outcome", "rate",
            "prior_mean", "prior_strength", "shrunken_rate", "shrunken_low", "shrunken_high", "vs_channel"]
    p = posts[posts["n"] > 0] if len(posts) else posts
    if p is None or p.empty or priors.empty:
        return pd.DataFrame(columns=cols)
    pr = priors.set_index("channel")
    m = p["channel"].map(pr["mean"]).astype(float).to_numpy()
    s = p["channel"].map(pr["strength"]).astype(float).to_numpy()
    k, n = p["k"].to_numpy(float), p["n"].to_numpy(float)
    shrunk = np.array([float(shrunken_rates(ki, ni, mi, si)) for ki, ni, mi, si in zip(k, n, m, s)])
    a = np.where(np.isinf(s), np.nan, k + m * np.where(np.isinf(s), 0, s))
    b = np.where(np.isinf(s), np.nan, n - k + (1 - m) * np.where(np.isinf(s), 0, s))
    tail = (1 - INTERVAL) / 2
    with np.errstate(invalid="ignore"):
        # Beta quantiles as the inverse regularised incomplete beta function (scipy.special, the function
        # scipy.stats.beta.ppf evaluates, without importing scipy.stats).
        low = np.where(np.isinf(s), m, betaincinv(np.maximum(a, 1e-9), np.maximum(b, 1e-9), tail))
        high = np.where(np.isinf(s), m, betaincinv(np.maximum(a, 1e-9), np.maximum(b, 1e-9), 1 - tail))
    out = pd.DataFrame({
        "post_id": p["post_id"].astype(str).to_numpy(),
        "headline": p["headline"].astype(str).to_numpy(),
        "channel": p["channel"].astype(str).to_numpy(),
        "day": [d.isoformat() for d in p["day"]],
        "impressions": n.astype(int),
        "outcome": k.astype(int),
        "rate": k / n,
        "prior_mean": m,
        "prior_strength": s,
        "shrunken_rate": shrunk,
        "shrunken_low": low,
        "shrunken_high": high,
    })
    with np.errstate(invalid="ignore", divide="ignore"):
        out["vs_channel"] = np.where(m > 0, shrunk / m - 1.0, 0.0)
    # Ties (e.g. a channel with no spread beyond binomial, where every post
    # shrinks to the mean) are broken by the raw rate, then by impressions.
    out = out.sort_values(["vs_channel", "rate", "impressions"], ascending=False, kind="stable")
    out.insert(0, "rank", np.arange(1, len(out) + 1))
    return out.reset_index(drop=True)[cols]


# ------------------------------------------------------------------- costs
def cost_table(current: pd.DataFrame, base: pd.DataFrame) -> pd.DataFrame:
    """Cost per click and per engagement by channel, for posts that carry a cost."""
    cols = ["channel", "posts_with_cost", "cost", "clicks", "engagements", "cost_per_click",
            "cost_per_engagement", "base_cost_per_click", "base_cost_per_engagement"]

    def per_channel(frame: pd.DataFrame) -> pd.DataFrame:
        f = frame[frame["cost"].notna()] if len(frame) else frame
        if f is None or f.empty:
            return pd.DataFrame(columns=["posts_with_cost", "cost", "clicks", "engagements"])
        f = f.assign(clicks=pd.to_numeric(f["clicks"], errors="coerce"),
                     engagements=pd.to_numeric(f["engagements"], errors="coerce"),
                     cost=pd.to_numeric(f["cost"], errors="coerce"))
        return f.groupby("channel").agg(posts_with_cost=("cost", "size"), cost=("cost", "sum"),
                                        clicks=("clicks", "sum"), engagements=("engagements", "sum"))

    cur, old = per_channel(current), per_channel(base)
    if cur.empty and old.empty:
        return pd.DataFrame(columns=cols)
    rows = []
    for ch in sorted(set(cur.index) | set(old.index)):
        c = cur.loc[ch] if ch in cur.index else None
        o = old.loc[ch] if ch in old.index else None
        rows.append({
            "channel": ch,
            "posts_with_cost": 0 if c is None else int(c["posts_with_cost"]),
            "cost": 0.0 if c is None else float(c["cost"]),
            "clicks": 0 if c is None else int(c["clicks"]),
            "engagements": 0 if c is None else int(c["engagements"]),
            "cost_per_click": float("nan") if c is None else _rate(c["cost"], c["clicks"]),
            "cost_per_engagement": float("nan") if c is None else _rate(c["cost"], c["engagements"]),
            "base_cost_per_click": float("nan") if o is None else _rate(o["cost"], o["clicks"]),
            "base_cost_per_engagement": float("nan") if o is None else _rate(o["cost"], o["engagements"]),
        })
    return pd.DataFrame(rows, columns=cols)


# --------------------------------------------------------------- residuals
def overdispersion_rho(k: np.ndarray, n: np.ndarray, p: np.ndarray) -> float:
    """Intra-post correlation of a beta-binomial, by moments on residuals against predictions.

    ``E[(k - n p)^2] = n p (1 - p) (1 + (n - 1) rho)`` gives
    ``rho = sum[(k - n p)^2 - n p (1 - p)] / sum[n p (1 - p)(n - 1)]``,
    clipped to [0, 1]. 0 means plain binomial spread.
    """
    k, n, p = (np.asarray(v, dtype=float) for v in (k, n, p))
    ok = (n > 1) & np.isfinite(p) & (p > 0) & (p < 1)
    if ok.sum() < 2:
        return 0.0
    k, n, p = k[ok], n[ok], p[ok]
    v = n * p * (1 - p)
    rho = (np.sum((k - n * p) ** 2 - v)) / np.sum(v * (n - 1))
    return float(np.clip(rho, 0.0, 1.0))


def standardised_residuals(k, n, p, rho: float) -> np.ndarray:
    """``z = (k - n p) / sqrt(n p (1 - p) (1 + (n - 1) rho))``: distance from prediction in beta-binomial sds."""
    k, n, p = (np.asarray(v, dtype=float) for v in (k, n, p))
    var = n * p * (1 - p) * (1 + np.maximum(n - 1, 0) * rho)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(var > 0, (k - n * p) / np.sqrt(np.where(var > 0, var, 1)), 0.0)


def flag_unusual(current: pd.DataFrame, predicted: np.ndarray, rho: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Posts and days of the period with standardised residuals, largest first, ``flag`` when |z| >= 2.5."""
    post_cols = ["post_id", "headline", "channel", "day", "impressions", "outcome", "rate", "predicted_rate",
                 "z", "flag"]
    day_cols = ["day", "posts", "impressions", "outcome", "rate", "predicted_rate", "z", "flag"]
    if current.empty:
        return pd.DataFrame(columns=post_cols), pd.DataFrame(columns=day_cols)
    p = np.asarray(predicted, dtype=float)
    k, n = current["k"].to_numpy(float), current["n"].to_numpy(float)
    z = standardised_residuals(k, n, p, rho)
    posts = pd.DataFrame({
        "post_id": current["post_id"].astype(str).to_numpy(),
        "headline": current["headline"].astype(str).to_numpy(),
        "channel": current["channel"].astype(str).to_numpy(),
        "day": [d.isoformat() for d in current["day"]],
        "impressions": n.astype(int), "outcome": k.astype(int),
        "rate": np.where(n > 0, k / np.where(n > 0, n, 1), np.nan), "predicted_rate": p, "z": z,
    })
    posts["flag"] = np.abs(posts["z"]) >= RESIDUAL_Z
    posts = posts.iloc[np.argsort(-np.abs(z), kind="stable")].reset_index(drop=True)
    var = n * p * (1 - p) * (1 + np.maximum(n - 1, 0) * rho)
    tmp = pd.DataFrame({"day": posts_day(current), "k": k, "n": n, "e": n * p, "v": var})
    g = tmp.groupby("day").agg(posts=("k", "size"), outcome=("k", "sum"), impressions=("n", "sum"),
                               e=("e", "sum"), v=("v", "sum")).reset_index()
    with np.errstate(invalid="ignore", divide="ignore"):
        g["z"] = np.where(g["v"] > 0, (g["outcome"] - g["e"]) / np.sqrt(g["v"].where(g["v"] > 0, 1)), 0.0)
        g["rate"] = g["outcome"] / g["impressions"].where(g["impressions"] > 0)
        g["predicted_rate"] = g["e"] / g["impressions"].where(g["impressions"] > 0)
    g["flag"] = np.abs(g["z"]) >= RESIDUAL_Z
    g["impressions"] = g["impressions"].astype(int)
    g["outcome"] = g["outcome"].astype(int)
    days = g.iloc[np.argsort(-np.abs(g["z"].to_numpy()), kind="stable")].reset_index(drop=True)[day_cols]
    return posts[post_cols], days


def posts_day(frame: pd.DataFrame) -> list[str]:
    return [d.isoformat() for d in frame["day"]]


def expected_flags(n_items: int) -> float:
    """How many of ``n_items`` would pass |z| >= 2.5 by chance if z were standard normal."""
    from scipy.special import ndtr

    return float(n_items * 2 * ndtr(-RESIDUAL_Z))


# ---------------------------------------------------------------- formatting
# Figures are worded by contentlab.percentages (one rounding and sign rule everywhere); the report writes
# negative figures with the typographic minus sign, like its charts.
signed = partial(signed_number, minus=TRUE_MINUS)
signed_pct = partial(signed_percent, minus=TRUE_MINUS)
points = partial(percentage_points, minus=TRUE_MINUS)


def count(value: float) -> str:
    if value is None or not np.isfinite(value):
        return "n/a"
    return f"{int(round(value)):,}"


def money(value: float) -> str:
    if value is None or not np.isfinite(value):
        return "n/a"
    return f"{value:,.2f}"


# ===================================================================== the report
# Every table the report can write (one CSV each in its folder); a rerun removes only these names from a
# folder written before the manifest existed. tests/test_report.py checks the report writes no other.
REPORT_TABLES = frozenset({
    "headline", "trend", "channels", "posts_ranked", "channel_priors", "costs", "shift_share",
    "shift_share_slots", "residual_posts", "residual_days", "drivers", "driver_changes", "experiment_arms",
    "experiments", "slots", "drafts", "recommendations",
})
# Beside the tables: the names this run wrote, so the next run removes its own leftovers and nothing else.
REPORT_MANIFEST = ".contentlab-tables.json"

@dataclass
class WeeklyReport:
    """Everything the report says, already worded; tables are what the CSV files hold."""

    period: Period
    outcome: str
    rate_name: str
    workspace: str
    generated_at: str
    timezone: str
    headline: dict
    happened: dict
    why: dict
    works: dict
    experiments: dict
    next_week: dict
    cautions: list[str]
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    charts: dict[str, str] = field(default_factory=dict)
    missing: list[str] = field(default_factory=list)

    @property
    def stem(self) -> str:
        return f"contentlab-report-{self.period.label}"


@dataclass
class _Context:
    frame: pd.DataFrame        # usable posts of the whole history
    period: Period
    outcome: str
    blocks: pd.Series
    colours: dict[str, str]
    rate_name: str

    def block(self, lo: int, hi: int) -> pd.DataFrame:
        if self.frame.empty:
            return self.frame
        return self.frame[(self.blocks >= lo) & (self.blocks <= hi)]

    @property
    def current(self) -> pd.DataFrame:
        return self.block(0, 0)

    @property
    def base(self) -> pd.DataFrame:
        return self.block(-BASELINE_BLOCKS, -1)

    def dates(self, start: date, days: int) -> pd.DataFrame:
        if self.frame.empty:
            return self.frame
        end = start + timedelta(days=days - 1)
        return self.frame[[start <= d <= end for d in self.frame["day"]]]

    @property
    def last_year(self) -> pd.DataFrame | None:
        start = last_year_start(self.period)
        return None if start is None else self.dates(start, self.period.days)

    @property
    def this(self) -> str:
        return f"this {self.period.noun}"

    @property
    def base_name(self) -> str:
        return f"the previous {BASELINE_BLOCKS} {self.period.noun}s"


def build_report(
    ws,
    *,
    week: str | None = None,
    start: str | date | None = None,
    end: str | date | None = None,
    outcome: str = "clicks",
    today: date | None = None,
    drafts: pd.DataFrame | str | Path | None = None,
) -> WeeklyReport:
    """Compute every section of the report for one period of the workspace's history.

    ``drafts`` (a frame with ``headline`` and optional ``channel``, ``publish_at``, ``group``, or
    a CSV path) are next week's candidates, scored beside any queued in the workspace.
    """
    import zoneinfo

    if outcome not in RATE_NAMES:
        raise ContentlabError(f"--outcome must be one of {', '.join(RATE_NAMES)}; got {outcome!r}")
    posts = ws.posts()
    tz = ws.timezone
    if today is None:
        today = datetime.now(zoneinfo.ZoneInfo(tz)).date()
    period = resolve_period(posts, week=week, start=start, end=end, today=today)
    frame = usable(posts, outcome)
    ctx = _Context(frame=frame, period=period, outcome=outcome, blocks=period_blocks(frame, period),
                   colours=_colours_for(frame), rate_name=RATE_NAMES[outcome])
    missing: list[str] = []
    model = _load_model(ws, outcome, missing)

    headline, noise = headline_section(ctx)
    happened = happened_section(ctx, noise)
    why = why_section(ctx, model)
    works = works_section(ws, ctx, model, missing)
    experiments = experiments_section(ws, ctx, missing)
    next_week = next_week_section(ws, ctx, model, missing, _read_drafts_arg(drafts))
    next_week["recommendations"] = recommendations(ctx, headline, happened, why, works, experiments, next_week)
    headline["pointer"] = _headline_pointer(why)

    tables: dict[str, pd.DataFrame] = {}
    charts: dict[str, str] = {}
    for sec in (headline, happened, why, works, experiments, next_week):
        tables.update(sec.pop("_tables", {}))
        charts.update(sec.pop("_charts", {}))
    tables["recommendations"] = pd.DataFrame(next_week["recommendations"], columns=["text", "evidence", "section"])
    return WeeklyReport(
        period=period, outcome=outcome, rate_name=RATE_NAMES[outcome], workspace=str(ws.path),
        generated_at=datetime.now(zoneinfo.ZoneInfo(tz)).strftime("%Y-%m-%d %H:%M"), timezone=tz,
        headline=headline, happened=happened, why=why, works=works, experiments=experiments,
        next_week=next_week, cautions=list(CAUTIONS), tables=tables, charts=charts, missing=missing,
    )


def _read_drafts_arg(drafts) -> pd.DataFrame | None:
    if drafts is None:
        return None
    if isinstance(drafts, pd.DataFrame):
        return drafts
    mod = _optional_module("scoring")
    path = Path(drafts)
    if not path.exists():
        raise ContentlabError(f"--drafts {path}: no such file. Give a CSV with a headline column.")
    if mod is not None and hasattr(mod, "read_drafts"):
        frame = mod.read_drafts(path)
    else:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    frame.attrs["source"] = f"drafts file {path.name}"
    return frame


def _headline_pointer(why: dict) -> str:
    """One sentence from the decomposition, so the headline says where the change came from."""
    total = why.get("total")
    if total is None or not np.isfinite(total) or total == 0 or not why.get("rows") or len(why["rows"]) < 2:
        return ""
    mix, within = why["mix"], why["within"]
    if abs(mix) >= abs(within):
        return (f"Most of the change ({points(mix)} of {points(total)}) came from where you posted, not how well: "
                f"{why.get('mix_reason', 'the channel mix moved')}.")
    return (f"Most of the change ({points(within)} of {points(total)}) came from how posts did within their "
            f"channels, led by {why.get('highlight_channel')}.")


def _colours_for(frame: pd.DataFrame) -> dict[str, str]:
    from .charts import channel_colours

    return channel_colours(frame["channel"].unique() if len(frame) else [])


def _optional_module(name: str):
    """A contentlab module, or None while that part of the tool is not installed."""
    import importlib

    try:
        return importlib.import_module(f"contentlab.{name}")
    except ModuleNotFoundError as exc:
        if exc.name == f"contentlab.{name}":
            return None
        raise


def _load_model(ws, outcome: str, missing: list[str]):
    """The newest fitted model as (model, summary, row), or None with the reason noted."""
    try:
        row = ws.latest_model_row(outcome)
    except Exception:  # an old workspace without a models table
        row = None
    if row is None:
        return None
    try:
        model, summary = ws.load_model(outcome)
    except ContentlabError:
        return None
    except Exception as exc:  # the saved model needs code this install does not have
        missing.append(f"the saved model could not be loaded ({type(exc).__name__}: {exc}); run contentlab learn")
        return None
    stale = False
    try:
        stale = row[3] != ws.fingerprint(outcome)
    except Exception:
        pass
    return {"model": model, "summary": summary or {}, "created_at": row[1], "id": row[0], "stale": stale}


# ------------------------------------------------------------------ headline
def headline_section(ctx: _Context) -> tuple[dict, dict]:
    cur, base = pooled(ctx.current), pooled(ctx.base)
    ly_frame = ctx.last_year
    ly = pooled(ly_frame) if ly_frame is not None and len(ly_frame) else None
    noise = noise_check(ctx.frame, ctx.period)
    name = ctx.rate_name
    Name = name[0].upper() + name[1:]
    change = cur["rate"] - base["rate"] if cur["n"] > 0 and base["n"] > 0 else float("nan")
    ly_label = "the same week last year" if ctx.period.kind == "week" else "the same dates 52 weeks earlier"
    figures = [
        {"label": ctx.this, "value": percent(cur["rate"]),
         "detail": (f"{cur['posts']} posts · {count(cur['n'])} impressions · "
                    f"{count(cur['k'])} {UNIT_NAMES[ctx.outcome]}")},
        {"label": ctx.base_name, "value": percent(base["rate"]),
         "detail": f"{base['posts']} posts · {count(base['n'])} impressions"},
        {"label": ly_label, "value": percent(ly["rate"]) if ly else "n/a",
         "detail": f"{ly['posts']} posts · {count(ly['n'])} impressions" if ly else "not in the history"},
    ]
    if cur["posts"] == 0 or cur["n"] == 0:
        status = "empty"
        idea = (f"No posts with impressions were published {ctx.period.during}, so there is no "
                f"{name} to report.")
        meaning = ("Check that this period's export has been imported (contentlab import FILE), or pick "
                   "another week with --week.")
    else:
        status = "ok"
        if base["n"] == 0:
            idea = (f"{Name} was {percent(cur['rate'])} {ctx.period.during}; the history has no posts in "
                    f"{ctx.base_name}, so there is nothing recent to compare with.")
        else:
            direction = "above" if change > 0 else "below" if change < 0 else "level with"
            idea = (f"{Name} was {percent(cur['rate'])} {ctx.period.during}, "
                    f"{points(abs(change)).lstrip('+').replace('pts', 'percentage points')} "
                    f"{direction} {ctx.base_name} ({percent(base['rate'])})")
            if change == 0:
                idea = f"{Name} was {percent(cur['rate'])} {ctx.period.during}, level with {ctx.base_name}"
            if ly:
                d2 = cur["rate"] - ly["rate"]
                side = "above" if d2 > 0 else "below" if d2 < 0 else "level with"
                idea += (f" and {points(abs(d2)).lstrip('+')} {side} "
                         f"{ly_label} ({percent(ly['rate'])}).")
            else:
                idea += "; the history does not reach back to the same week last year."
        meaning = noise_sentence(noise, ctx)
    noise_text = noise_method_sentence(noise, ctx)
    out = {"status": status, "idea": idea, "meaning": meaning, "figures": figures, "noise": noise_text,
           "change": change, "current": cur, "base": base, "last_year": ly, "beyond": noise.get("beyond")}
    out["_tables"] = {"headline": pd.DataFrame([
        {"measure": f["label"], "rate": r, "posts": p["posts"] if p else 0, "impressions": p["n"] if p else 0,
         UNIT_NAMES[ctx.outcome]: p["k"] if p else 0}
        for f, p, r in zip(figures, [cur, base, ly], [cur["rate"], base["rate"], ly["rate"] if ly else float("nan")])
    ] + [{"measure": "change vs previous (rate points)", "rate": change},
         {"measure": "z against past changes", "rate": noise.get("z")}])}
    return out, noise


def noise_sentence(noise: dict, ctx: _Context) -> str:
    if noise.get("change") is None:
        return f"There is no earlier {ctx.period.noun} to compare with, so nothing can be said about noise yet."
    if noise.get("beyond") is None:
        return f"Whether that is more than normal noise cannot be told yet: {noise['verdict']}."
    moved = "rise" if noise["change"] > 0 else "fall"
    share = noise["share"]
    times = int(round(share * noise["n_ref"]))
    if noise["beyond"]:
        return (f"That {moved} is beyond normal {ctx.period.noun}-to-{ctx.period.noun} noise "
                f"(z = {signed(noise['z'], 1)}): "
                f"only {times} of the past {noise['n_ref']} {ctx.period.noun}s moved as much. Worth a look below.")
    return (f"That {moved} is within normal {ctx.period.noun}-to-{ctx.period.noun} noise "
            f"(z = {signed(noise['z'], 1)}): "
            f"{times} of the past {noise['n_ref']} {ctx.period.noun}s moved at least as much, so it is no reason to "
            f"change course on its own.")


def noise_method_sentence(noise: dict, ctx: _Context) -> str:
    if not np.isfinite(noise.get("sd", float("nan"))):
        return (f"How noise is judged: each past {ctx.period.noun}'s rate minus its previous {BASELINE_BLOCKS} "
                f"{ctx.period.noun}s, over up to {NOISE_REF_BLOCKS} {ctx.period.noun}s; {noise['verdict']}.")
    return (f"How noise is judged: the same comparison (rate minus the previous {BASELINE_BLOCKS} "
            f"{ctx.period.noun}s, pooled) for each of the {noise['n_ref']} earlier {ctx.period.noun}s has a "
            f"standard deviation of {points(noise['sd']).lstrip('+')}; z is this {ctx.period.noun}'s change in "
            f"those units, and |z| ≥ {NOISE_Z:g} counts as beyond noise (common practice). A binomial test "
            f"would call almost any change significant, because posts differ far more than coin flips.")


# ------------------------------------------------------------- what happened
def happened_section(ctx: _Context, noise: dict) -> dict:
    from . import charts

    out: dict[str, Any] = {"_tables": {}, "_charts": {}, "notes": []}
    name = ctx.rate_name
    noun = ctx.period.noun
    # Trend
    trend = block_table(ctx.frame, ctx.period, -(TREND_BLOCKS - 1), 0)
    ly_rates = []
    for b in trend["block"]:
        s = block_start(ctx.period, int(b))
        ls = _last_year_of(s, ctx.period)
        f = ctx.dates(ls, ctx.period.days) if ls is not None else None
        ly_rates.append(pooled(f)["rate"] if f is not None and len(f) else float("nan"))
    trend["last_year_rate"] = ly_rates
    out["_tables"]["trend"] = trend.drop(columns=["block"]).rename(columns={"outcome": UNIT_NAMES[ctx.outcome]})
    rates = trend["rate"].to_numpy(float)
    cur_rate = rates[-1]
    finite = rates[np.isfinite(rates)]
    base = pooled(ctx.base)
    band = None
    if np.isfinite(noise.get("sd", float("nan"))) and base["n"] > 0:
        band = (max(0.0, base["rate"] - NOISE_Z * noise["sd"]), base["rate"] + NOISE_Z * noise["sd"])
    if np.isfinite(cur_rate) and finite.size > 1:
        rank_high = int(np.sum(finite > cur_rate)) + 1
        lo_i, hi_i = int(np.nanargmin(rates)), int(np.nanargmax(rates))
        if rank_high <= finite.size / 2:
            place = f"the {_ordinal(rank_high)} highest"
        else:
            place = f"the {_ordinal(int(np.sum(finite < cur_rate)) + 1)} lowest"
        out["trend_idea"] = (f"This {noun}'s {percent(cur_rate)} is {place} of the last {finite.size} {noun}s "
                             f"with posts (range {percent(rates[lo_i])} in {trend['label'][lo_i]} to "
                             f"{percent(rates[hi_i])} in {trend['label'][hi_i]}).")
        out["trend_meaning"] = ("The shaded box is the normal range for this week given past noise; a point outside "
                                "it is unusual." if band else
                                "Too little history to draw a normal range yet.")
    elif np.isfinite(cur_rate):
        out["trend_idea"] = (f"This is the only {noun} with posts in the last {TREND_BLOCKS} {noun}s, so there is "
                             "no trend yet.")
        out["trend_meaning"] = "Come back after a few more weeks of history."
    else:
        out["trend_idea"] = f"No posts this {noun}; the line shows the {noun}s before it."
        out["trend_meaning"] = "Gaps in the line are weeks without posts."
    if finite.size:
        ticks = [f"W{s.isocalendar()[1]:02d}" if ctx.period.kind == "week" else s.strftime("%d %b")
                 for s in trend["start"]]
        out["_charts"]["trend"] = charts.trend_chart(
            ticks, rates, last_year=ly_rates, baseline=base["rate"] if base["n"] else None,
            baseline_span=BASELINE_BLOCKS, band=band, rate_name=name, name="trend",
            title=f"{name[0].upper() + name[1:]} per {noun}, last {TREND_BLOCKS} {noun}s")

    # Channels side by side
    cur, old = ctx.current, ctx.base
    chans = sorted(set(cur["channel"]) | set(old["channel"])) if len(cur) + len(old) else []
    rows = []
    for ch in chans:
        c, o = pooled(cur[cur["channel"] == ch]), pooled(old[old["channel"] == ch])
        rows.append({"channel": ch, "posts": c["posts"], "impressions": c["n"], UNIT_NAMES[ctx.outcome]: c["k"],
                     "rate": c["rate"], "base_posts": o["posts"], "base_impressions": o["n"], "base_rate": o["rate"],
                     "change": c["rate"] - o["rate"] if c["n"] and o["n"] else float("nan")})
    ch_table = pd.DataFrame(rows, columns=["channel", "posts", "impressions", UNIT_NAMES[ctx.outcome], "rate",
                                           "base_posts", "base_impressions", "base_rate", "change"])
    out["_tables"]["channels"] = ch_table
    n_channels_history = ctx.frame["channel"].nunique() if len(ctx.frame) else 0
    if len(ch_table) and len(cur):
        movers = ch_table.dropna(subset=["change"])
        weight = movers["change"].abs() * movers["impressions"].clip(lower=0)
        top = movers.loc[weight.idxmax()] if len(movers) else None
        if n_channels_history == 1:
            out["channels_idea"] = (f"All posts are on one channel ({chans[0]}), so there is no channel comparison; "
                                    f"the channel's figures are the totals above.")
            out["channels_meaning"] = "Import posts from other channels to compare them."
        elif top is not None:
            thin = " (thin evidence: few impressions)" if 0 < top["impressions"] < THIN_IMPRESSIONS else ""
            out["channels_idea"] = (f"{top['channel']} moved the most: {percent(top['base_rate'])} in {ctx.base_name} "
                                    f"to {percent(top['rate'])} {ctx.this}{thin}.")
            out["channels_meaning"] = ("Channels differ a lot in their usual rate, so compare each channel with its "
                                       "own past, not with the others.")
            out["highlight_channel"] = str(top["channel"])
        else:
            out["channels_idea"] = f"No channel posted in both {ctx.this} and {ctx.base_name}, so none can be compared."
            out["channels_meaning"] = "The change is all about which channels posted."
        out["channel_rows"] = [{
            "channel": r["channel"], "posts": r["posts"], "impressions": count(r["impressions"]),
            "rate": percent(r["rate"]), "base_rate": percent(r["base_rate"]), "change": points(r["change"]),
            "colour": ctx.colours.get(r["channel"]), "thin": 0 < r["impressions"] < THIN_IMPRESSIONS,
            "absent": r["impressions"] == 0,
        } for _, r in ch_table.iterrows()]
        if n_channels_history > 1:
            out["_charts"]["channels"] = charts.channel_bars(
                list(ch_table["channel"]), ch_table["base_rate"].to_numpy(float), ch_table["rate"].to_numpy(float),
                ctx.colours, highlight=out.get("highlight_channel"), base_label=ctx.base_name,
                current_label=ctx.this, name="channels", title=f"{name} by channel, {ctx.this} against {ctx.base_name}")
    else:
        out["channels_idea"] = f"No posts {ctx.this}, so there is nothing to compare by channel."
        out["channels_meaning"] = ""

    # Posts ranked by shrunken rate
    priors = channel_priors(ctx.block(-PRIOR_BLOCKS, -1), cur)
    ranked = shrink_posts(cur, priors)
    out["_tables"]["posts_ranked"] = ranked
    out["_tables"]["channel_priors"] = priors
    zero = int((cur["n"] <= 0).sum()) if len(cur) else 0
    if zero:
        out["notes"].append(f"{zero} post(s) with no impressions are left out of the ranking.")
    if len(ranked):
        out["ranked_rows"] = [_ranked_row(r, ctx) for _, r in ranked.iterrows()]
        k = min(3, len(ranked) // 2)
        out["best"] = out["ranked_rows"][:k]
        out["worst"] = out["ranked_rows"][::-1][:k] if k else []
        top = ranked.iloc[0]
        if len(ranked) == 1:
            out["posts_idea"] = (f"One post {ctx.this}: “{top['headline']}” on {top['channel']}, "
                                 f"{_vs(top['vs_channel'])} its channel's usual rate after shrinkage.")
            out["posts_meaning"] = "One post says little; best and worst lists need at least two."
        else:
            out["posts_idea"] = (f"The best post {ctx.this}, “{top['headline']}” ({top['channel']}), ran "
                                 f"{_vs(top['vs_channel'])} its channel's usual rate after shrinkage.")
            out["posts_meaning"] = ("Ranked by empirical-Bayes shrunken rate against each channel's usual rate: a "
                                    "post's own rate is pulled towards its channel's typical one, more strongly the "
                                    "fewer impressions it had, so a post with a handful of impressions cannot top "
                                    "the list by luck.")
        out["priors_text"] = _priors_text(priors)
    else:
        out["posts_idea"] = f"No posts with impressions {ctx.this}, so there is nothing to rank."
        out["posts_meaning"] = ""

    # Costs
    costs = cost_table(cur, old)
    if len(costs):
        out["_tables"]["costs"] = costs
        have = costs[costs["posts_with_cost"] > 0]
        if len(have):
            out["cost_idea"] = ("Where posts carry a cost: "
                                + "; ".join(f"{r['channel']} {money(r['cost_per_click'])} per click and "
                                            f"{money(r['cost_per_engagement'])} per engagement "
                                            f"(previously {money(r['base_cost_per_click'])} per click)"
                                            for _, r in have.iterrows()) + ".")
            out["cost_meaning"] = ("Costs are in the units of your export; only posts with a cost count, so "
                                   "channels without costs are left out.")
        else:
            out["cost_idea"] = f"No post {ctx.this} carries a cost (earlier posts did), so there is no cost per click."
            out["cost_meaning"] = ""
        out["cost_rows"] = [{
            "channel": r["channel"], "posts": r["posts_with_cost"], "cost": money(r["cost"]),
            "cpc": money(r["cost_per_click"]), "cpe": money(r["cost_per_engagement"]),
            "base_cpc": money(r["base_cost_per_click"]), "base_cpe": money(r["base_cost_per_engagement"]),
            "colour": ctx.colours.get(r["channel"]),
        } for _, r in costs.iterrows()]
    return out


def _last_year_of(start: date, period: Period) -> date | None:
    if period.kind == "week":
        year, week, _ = start.isocalendar()
        if week > _iso_weeks_in(year - 1):
            return None
        return date.fromisocalendar(year - 1, week, 1)
    return start - timedelta(days=364)


def _ordinal(n: int) -> str:
    if n == 1:
        return ""
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _vs(rel: float) -> str:
    if rel is None or not np.isfinite(rel):
        return "level with"
    if abs(rel) < 0.005:
        return "level with"
    return f"{percent(abs(rel), 0)} {'above' if rel > 0 else 'below'}"


def _ranked_row(r: pd.Series, ctx: _Context) -> dict:
    return {
        "rank": int(r["rank"]), "headline": r["headline"], "channel": r["channel"], "day": r["day"],
        "impressions": count(r["impressions"]), "outcome": count(r["outcome"]), "rate": percent(r["rate"]),
        "shrunken": percent(r["shrunken_rate"]),
        "interval": f"{percent(r['shrunken_low'])}–{percent(r['shrunken_high'])}",
        "vs": signed_pct(r["vs_channel"], 0),
        "colour": ctx.colours.get(r["channel"]),
        "thin": r["impressions"] < THIN_IMPRESSIONS,
    }


def _priors_text(priors: pd.DataFrame) -> str:
    parts = []
    for _, p in priors.iterrows():
        s = p["strength"]
        s_text = "no extra spread, all shrunk to the mean" if not np.isfinite(s) else f"weight {count(s)} impressions"
        borrowed = " (borrowed from all channels)" if p["pooled"] else ""
        parts.append(f"{p['channel']}: usual {percent(p['mean'])}, {s_text}{borrowed}")
    return ("Channel priors (beta-binomial, method of moments over the "
            f"{PRIOR_BLOCKS} weeks before this one): " + "; ".join(parts) + ".")


# ------------------------------------------------------------------------ why
def why_section(ctx: _Context, model: dict | None) -> dict:
    from . import charts

    out: dict[str, Any] = {"_tables": {}, "_charts": {}, "notes": []}
    cur, base = ctx.current, ctx.base
    unit = UNIT_NAMES[ctx.outcome]
    # Shift-share by channel
    table = shift_share(base, cur, "channel")
    if len(table):
        total = float(table.attrs["total_change"])
        mix, within = float(table.attrs["mix"]), float(table.attrs["within"])
        shown = round_preserving_sum([100 * mix, 100 * within], 2, 100 * total)
        out["total"], out["mix"], out["within"] = total, mix, within
        rows = table.sort_values("group", kind="stable")
        n_groups = len(rows)
        lead = "mix" if abs(mix) > abs(within) else "within"
        top_mix = table.iloc[int(np.argmax(np.abs(table["mix"].to_numpy())))]
        top_within = table.iloc[int(np.argmax(np.abs(table["within"].to_numpy())))]
        out["highlight_channel"] = str((top_mix if lead == "mix" else top_within)["group"])
        if n_groups == 1:
            out["idea"] = (f"With one channel there is no mix to shift: the whole change of "
                           f"{points(total)} is performance within {rows.iloc[0]['group']}.")
            out["meaning"] = "Look at the posts and the drivers below for what differed."
        else:
            out["idea"] = (f"Of the {points(total)} change against {ctx.base_name}, {signed(shown[0])} pts came from "
                           f"the mix of channels and {signed(shown[1])} pts from performance within them.")
            out["mix_reason"] = _mix_reason(top_mix, pooled(base)["rate"])
            out["detail"] = (f"Largest mix part: {_mix_reason(top_mix, pooled(base)['rate'])} "
                             f"({points(top_mix['mix'])}). Largest performance part: {top_within['group']} "
                             f"({percent(top_within['base_rate'])} → {percent(top_within['rate'])}, "
                             f"{points(top_within['within'])}).")
            if lead == "mix":
                out["meaning"] = ("Mostly a change in where you posted, not in how well posts did: the channels "
                                  "performed much as before, so the weekly figure moved with the mix.")
            else:
                out["meaning"] = ("Mostly a change in how well posts did within their channels, not in where you "
                                  f"posted: look at {top_within['group']}'s posts and the unusual ones below.")
        out["rows"] = []
        for _, r in rows.iterrows():
            out["rows"].append({
                "group": r["group"], "colour": ctx.colours.get(r["group"]),
                "base_share": percent(r["base_share"], 0), "share": percent(r["share"], 0),
                "base_rate": percent(r["base_rate"]), "rate": percent(r["rate"]),
                "mix": points(r["mix"]), "within": points(r["within"]), "total": points(r["total"]),
                "thin": 0 < min(r["impressions"], r["base_impressions"]) < THIN_IMPRESSIONS,
                "absent": "no posts this " + ctx.period.noun if r["impressions"] == 0 else
                          ("no posts before" if r["base_impressions"] == 0 else ""),
            })
        out["total_row"] = {"mix": f"{signed(shown[0])} pts", "within": f"{signed(shown[1])} pts",
                            "total": points(total)}
        csv = table.copy()
        csv.insert(0, "by", "channel")
        parts = csv.rename(columns={"outcome": unit, "base_outcome": f"base_{unit}"})
        out["_tables"]["shift_share"] = pd.concat([parts, pd.DataFrame([{
            "by": "channel", "group": "TOTAL", "base_impressions": int(table["base_impressions"].sum()),
            f"base_{unit}": int(table["base_outcome"].sum()), "impressions": int(table["impressions"].sum()),
            unit: int(table["outcome"].sum()), "mix": mix, "within": within, "total": total}])],
            ignore_index=True)
        if n_groups > 1:
            out["_charts"]["shift-share"] = charts.shift_share_chart(
                list(rows["group"]), rows["mix"].to_numpy(float), rows["within"].to_numpy(float), ctx.colours,
                highlight=out["highlight_channel"], name="shift-share",
                title=f"The change against {ctx.base_name}, split into mix and performance")
        # The finer split: channel x time of day
        b2, c2 = base.assign(slot=[daypart(h) for h in base["local_hour"]]), \
            cur.assign(slot=[daypart(h) for h in cur["local_hour"]])
        fine = shift_share(b2, c2, ["channel", "slot"])
        if len(fine) > n_groups:
            out["_tables"]["shift_share_slots"] = fine.rename(columns={"outcome": unit, "base_outcome": f"base_{unit}"})
            top = fine.head(6)
            out["slot_rows"] = [{"group": r["group"], "colour": ctx.colours.get(r["group"].split(" / ")[0]),
                                 "mix": points(r["mix"]), "within": points(r["within"]), "total": points(r["total"]),
                                 "base_share": percent(r["base_share"], 0), "share": percent(r["share"], 0)}
                                for _, r in top.iterrows()]
            out["slot_idea"] = (f"Split finer by channel and time of day, the largest single part is "
                                f"{fine.iloc[0]['group']} ({points(fine.iloc[0]['total'])}).")
    else:
        none_now = cur.empty or cur["n"].sum() == 0
        out["idea"] = f"No change to explain: no posts {ctx.this if none_now else 'in ' + ctx.base_name}."
        out["meaning"] = ""

    # Unusual posts and days
    unusual = _unusual(ctx, model)
    out["_tables"].update(unusual.pop("_tables", {}))
    out["notes"].extend(unusual.pop("notes", []))
    out.update(unusual)
    return out


def _mix_reason(row: pd.Series, pooled_rate: float) -> str:
    more = row["share"] > row["base_share"]
    rate = row["base_rate"] if np.isfinite(row["base_rate"]) else row["rate"]
    better = rate > pooled_rate
    return (f"{row['group']}'s share of impressions {'rose' if more else 'fell'} from "
            f"{percent(row['base_share'], 0)} to {percent(row['share'], 0)}, and it usually does "
            f"{'better' if better else 'worse'} than average")


def _unusual(ctx: _Context, model: dict | None) -> dict:
    cur = ctx.current[ctx.current["n"] > 0] if len(ctx.current) else ctx.current
    out: dict[str, Any] = {"_tables": {}}
    if cur.empty:
        out["unusual_idea"] = f"No posts {ctx.this}, so none can be unusual."
        out["unusual_meaning"] = ""
        return out
    predicted, rho, source = None, 0.0, ""
    if model is not None:
        try:
            predicted, rho, source = _model_predictions(model, ctx, cur)
        except Exception as exc:  # a model from another version: fall back, and say so
            out.setdefault("notes", []).append(
                f"The model's predictions could not be used ({type(exc).__name__}: {exc}).")
            predicted = None
    if predicted is None:
        predicted, rho = _channel_predictions(ctx, cur)
        source = (f"each channel's rate over the previous {RESIDUAL_BLOCKS} {ctx.period.noun}s (no fitted model: run "
                  f"contentlab learn for predictions that know each headline)")
    keep = np.isfinite(predicted)
    cur, predicted = cur[keep], predicted[keep]
    posts, days = flag_unusual(cur, predicted, rho)
    out["_tables"]["residual_posts"] = posts
    out["_tables"]["residual_days"] = days
    flagged = posts[posts["flag"]]
    flagged_days = days[days["flag"]]
    expect = expected_flags(len(posts))
    out["unusual_source"] = source
    out["rho"] = rho
    out["unusual_method"] = (f"Standardised residual z = (observed − predicted {UNIT_NAMES[ctx.outcome]}) / sd, "
                             "where the sd "
                             f"allows for posts varying more than binomial sampling (beta-binomial, intra-post "
                             f"correlation {rho:.2g}, estimated by moments); |z| ≥ {RESIDUAL_Z:g} is flagged "
                             f"(common practice).")
    if len(flagged):
        top = flagged.iloc[0]
        out["unusual_idea"] = (f"{len(flagged)} of {len(posts)} posts {ctx.this} were unusual against "
                               f"{_short_source(source)} "
                               f"(about {expect:.1f} would be by chance); the most: “{top['headline']}” "
                               f"({top['channel']}, {percent(top['rate'])} against "
                               f"{percent(top['predicted_rate'])} expected).")
        out["unusual_meaning"] = ("Worth a look: something about these posts (the news, a link, a share by someone "
                                  "big) is not in the headline features; do not copy them without knowing what.")
    else:
        out["unusual_idea"] = (f"None of the {len(posts)} posts {ctx.this} was unusual against {_short_source(source)} "
                               f"(|z| < {RESIDUAL_Z:g}).")
        out["unusual_meaning"] = "Posts did roughly what was expected of them; the change is in the mix or the noise."
    if not len(flagged_days) and len(days) > 1:
        out["unusual_days_idea"] = f"No day stood out either (largest |z| {abs(days['z'].iloc[0]):.1f})."
    if len(flagged_days):
        d = flagged_days.iloc[0]
        out["unusual_days_idea"] = (f"{len(flagged_days)} day(s) stood out; the most: {d['day']} "
                                    f"({percent(d['rate'])} against {percent(d['predicted_rate'])} expected, "
                                    f"z = {signed(d['z'], 1)}).")
    out["unusual_rows"] = [_residual_row(r, ctx) for _, r in posts.head(8).iterrows()]
    out["unusual_day_rows"] = [{"day": r["day"], "posts": int(r["posts"]), "rate": percent(r["rate"]),
                                "predicted": percent(r["predicted_rate"]), "z": signed(r["z"], 1),
                                "flag": bool(r["flag"])}
                               for _, r in days.iterrows()]
    return out


def _short_source(source: str) -> str:
    return source.split(" (", 1)[0]


def _residual_row(r: pd.Series, ctx: _Context) -> dict:
    return {"headline": r["headline"], "channel": r["channel"], "day": r["day"], "impressions": count(r["impressions"]),
            "rate": percent(r["rate"]), "predicted": percent(r["predicted_rate"]), "z": signed(r["z"], 1),
            "flag": bool(r["flag"]), "colour": ctx.colours.get(r["channel"])}


def _channel_predictions(ctx: _Context, cur: pd.DataFrame) -> tuple[np.ndarray, float]:
    """No model: each channel's pooled rate over the previous blocks, and the spread of posts around it."""
    hist = ctx.block(-RESIDUAL_BLOCKS, -1)
    hist = hist[hist["n"] > 0] if len(hist) else hist
    if hist is None or hist.empty:
        return np.full(len(cur), np.nan), 0.0
    g = hist.groupby("channel")[["k", "n"]].sum()
    rates = (g["k"] / g["n"]).to_dict()
    overall = float(hist["k"].sum() / hist["n"].sum())
    hp = hist["channel"].map(rates).to_numpy(float)
    rho = overdispersion_rho(hist["k"].to_numpy(float), hist["n"].to_numpy(float), hp)
    pred = cur["channel"].map(lambda c: rates.get(c, overall)).to_numpy(float)
    return pred, rho


def _model_predictions(model: dict, ctx: _Context, cur: pd.DataFrame) -> tuple[np.ndarray, float, str]:
    """The model's out-of-fold prediction for posts it was fitted on, its current prediction for newer ones."""
    est = model["model"]
    pred = np.full(len(cur), np.nan)
    used_oof = 0
    oof = _oof_by_post(est)
    if oof is not None:
        mapped = np.array(cur["post_id"].astype(str).map(oof).to_numpy(float), dtype=float)  # writable copy
        used_oof = int(np.isfinite(mapped).sum())
        pred = mapped
    need = ~np.isfinite(pred)
    if need.any():
        frame = cur.loc[need]
        try:  # a channel the model has not seen gets the model's typical channel, not an error
            pf = est.predict_frame(frame, allow_unknown_channel=True)
        except TypeError:
            pf = est.predict_frame(frame)
        pred[need] = np.asarray(pf["predicted_rate"], dtype=float)
    # Spread around the model, from its out-of-fold predictions on the history.
    rho = 0.0
    if oof is not None and len(ctx.frame):
        h = ctx.frame[ctx.frame["n"] > 0]
        hp = h["post_id"].astype(str).map(oof).to_numpy(float)
        ok = np.isfinite(hp)
        if ok.sum() >= 10:
            rho = overdispersion_rho(h["k"].to_numpy(float)[ok], h["n"].to_numpy(float)[ok], hp[ok])
    else:
        hist = ctx.block(-RESIDUAL_BLOCKS, -1)
        hist = hist[hist["n"] > 0] if len(hist) else hist
        if len(hist) >= 10:
            hp = np.asarray(est.predict_frame(hist)["predicted_rate"], dtype=float)
            rho = overdispersion_rho(hist["k"].to_numpy(float), hist["n"].to_numpy(float), hp)
    parts = []
    if used_oof:
        parts.append(f"the model's out-of-fold prediction ({used_oof} post(s) it learnt from, predicted without them)")
    if need.any():
        parts.append(f"the model's prediction ({int(need.sum())} post(s) newer than the fit)")
    return pred, rho, " and ".join(parts)


def _oof_by_post(est) -> dict | None:
    """Out-of-fold predicted rates keyed by post_id, whatever container the model keeps them in."""
    oof = getattr(est, "oof_", None)
    if oof is None:
        return None
    if isinstance(oof, pd.DataFrame):
        col = next((c for c in ("predicted_rate", "oof_rate", "rate", "prediction") if c in oof.columns), None)
        if col is None:
            return None
        if "post_id" in oof.columns:
            return dict(zip(oof["post_id"].astype(str), oof[col].astype(float)))
        return dict(zip(oof.index.astype(str), oof[col].astype(float)))
    if isinstance(oof, pd.Series):
        return dict(zip(oof.index.astype(str), oof.astype(float)))
    ids = getattr(est, "post_ids_", None)
    if ids is not None and len(ids) == len(oof):
        return dict(zip(map(str, ids), np.asarray(oof, dtype=float)))
    return None


# ----------------------------------------------------------------- what works
DRIVER_LIMIT = 12
# Drivers a recommendation must never push up: more alarm, shouting or hype in headlines.
SENSATIONAL = {"n_negative_words", "n_allcaps_words", "has_exclamation", "vader_negative", "n_emoji"}


def works_section(ws, ctx: _Context, model: dict | None, missing: list[str]) -> dict:
    """The model's drivers with 90% intervals, its cautions, and what moved since the previous fit."""
    from . import charts

    out: dict[str, Any] = {"_tables": {}, "_charts": {}, "notes": [], "cautions": []}
    if model is None:
        if _optional_module("model") is None:
            missing.append("model drivers (contentlab.model is not installed)")
        out["status"] = "needs_learn"
        learn = "contentlab learn" + ("" if ctx.outcome == "clicks" else f" --outcome {ctx.outcome}")
        out["idea"] = f"No fitted model of {ctx.outcome} in this workspace yet, so there are no drivers to show."
        out["meaning"] = f"Run {learn}, then write the report again."
        return out
    est, summary = model["model"], model["summary"]
    try:
        drivers = _driver_frame(est.drivers())
    except Exception as exc:
        missing.append(f"model drivers ({type(exc).__name__}: {exc})")
        out["status"] = "needs_learn"
        out["idea"] = "The saved model could not list its drivers; run contentlab learn again."
        out["meaning"] = ""
        return out
    out["status"] = "ok"
    out["fitted"] = f"model fitted {model['created_at'][:16].replace('T', ' ')} UTC"
    if model.get("stale"):
        out["notes"].append("The model was fitted before the latest changes to the history: run contentlab learn to "
                            "bring it up to date.")
    out["_tables"]["drivers"] = drivers
    show = drivers.iloc[np.argsort(-np.abs(drivers["effect"].to_numpy()), kind="stable")].head(DRIVER_LIMIT)
    clear = show[show["clear"]]
    if len(clear):
        top = clear.iloc[0]
        out["idea"] = (f"The clearest driver is {top['label']}: it went with a {_effect_text(top)} change in the "
                       f"{ctx.rate_name} (90% interval {_interval_text(top)}), the other features held equal.")
        if len(clear) == len(show):
            out["meaning"] = (f"All {len(show)} largest effects have 90% intervals that exclude no effect. These are "
                              "associations in your history, not proof of cause.")
        else:
            out["meaning"] = (f"{len(clear)} of the {len(show)} largest effects have intervals that exclude no "
                              "effect; the faded bars could be noise. These are associations in your history, not "
                              "proof of cause.")
    else:
        out["idea"] = "No driver is clear yet: every interval includes no effect."
        out["meaning"] = "More posts (or an experiment) are needed before any feature can be trusted."
    highlight_label = clear.iloc[0]["label"] if len(clear) else None
    # Shown from the largest rise to the largest fall, so the chart reads as a ranking.
    show = show.iloc[np.argsort(-show["effect_pct"].to_numpy(), kind="stable")]
    strong = list(show["clear"])
    colours = []
    for _, r in show.iterrows():
        ch = _channel_of_driver(r, ctx)
        if ch is not None:
            colours.append(ctx.colours[ch])
        else:
            colours.append(charts.ACCENT if r["label"] == highlight_label else charts.INK)
    out["_charts"]["drivers"] = charts.interval_bars(
        list(show["label"]), show["effect_pct"].to_numpy(float), show["low_pct"].to_numpy(float),
        show["high_pct"].to_numpy(float), colours=colours, highlight=strong,
        xlabel=f"change in the {ctx.rate_name} for the step named (90% interval)", percent=True,
        name="drivers", title="Model drivers with 90% intervals")
    out["rows"] = [{"label": r["label"], "effect": _effect_text(r), "interval": _interval_text(r),
                    "clear": bool(r["clear"]), "evidence": r["evidence"], "kind": r.get("kind", ""),
                    "feature": r["feature"], "effect_value": float(r["effect_pct"])} for _, r in show.iterrows()]
    out["cautions"] = [str(c) for c in drivers.attrs.get("cautions", [])]
    validation = summary.get("validation") if isinstance(summary, dict) else None
    if isinstance(validation, dict):
        msgs = [str(m) for m in validation.get("messages", [])]
        out["validation"] = msgs
        if not validation.get("trustworthy", True):
            out["notes"].append("The model did not beat a simple baseline on held-out posts: treat every driver "
                                "below as unproven.")
    changes = _driver_changes(ws, ctx, drivers)
    out["_tables"].update(changes.pop("_tables", {}))
    out.update(changes)
    return out


def _driver_frame(raw: pd.DataFrame) -> pd.DataFrame:
    """The model's drivers table (:func:`contentlab.drivers.driver_table`) in the report's terms.

    Columns: ``feature`` (the key to compare fits by), ``label``, ``effect`` (log-odds, for
    comparing fits), ``effect_pct``/``low_pct``/``high_pct`` (relative change of the rate for
    the driver's step, with its 90% interval), ``clear`` (interval excludes no effect),
    ``evidence``. ``attrs["cautions"]`` carries the model's cautions.
    """
    cautions = list(getattr(raw, "attrs", {}).get("cautions", []) or [])
    d = pd.DataFrame(raw).copy()
    if "driver" in d.columns:
        labels = [_driver_label(str(r["driver"]), str(r.get("kind", "")), str(r.get("step", "")))
                  for _, r in d.iterrows()]
        rel = d["relative_change"].astype(float).to_numpy()
        out = pd.DataFrame({
            "feature": d["driver"].astype(str).to_numpy(),
            "label": labels,
            "effect": d["effect_logit"].astype(float).to_numpy() if "effect_logit" in d else np.log1p(rel),
            "effect_pct": rel,
            "low_pct": d["low"].astype(float).to_numpy(),
            "high_pct": d["high"].astype(float).to_numpy(),
            "evidence": d["evidence"].astype(str).to_numpy() if "evidence" in d else "",
            "kind": d["kind"].astype(str).to_numpy() if "kind" in d else "",
            "n_posts": d["n_posts"].to_numpy() if "n_posts" in d else np.nan,
        })
        if "uncertain" in d:
            out["clear"] = ~d["uncertain"].astype(bool).to_numpy()
        else:
            out["clear"] = (out["low_pct"] > 0) | (out["high_pct"] < 0)
    else:  # a plain table of log-odds effects with low/high
        if "feature" not in d.columns:
            d = d.rename(columns={"name": "feature"}) if "name" in d.columns else d.reset_index().rename(
                columns={"index": "feature"})
        effect_col = next(c for c in ("effect", "coef", "log_odds", "estimate") if c in d.columns)
        low = d["low"].astype(float) if "low" in d else pd.Series(np.nan, index=d.index)
        high = d["high"].astype(float) if "high" in d else pd.Series(np.nan, index=d.index)
        out = pd.DataFrame({
            "feature": d["feature"].astype(str),
            "label": d["label"].astype(str) if "label" in d.columns else d["feature"].astype(str),
            "effect": d[effect_col].astype(float),
            "effect_pct": np.expm1(d[effect_col].astype(float)),
            "low_pct": np.expm1(low), "high_pct": np.expm1(high), "evidence": "", "kind": "", "n_posts": np.nan,
        })
        out["clear"] = (out["low_pct"] > 0) | (out["high_pct"] < 0)
    out["clear"] = out["clear"].astype(bool) & np.isfinite(out["low_pct"]) & np.isfinite(out["high_pct"])
    out.attrs["cautions"] = cautions
    return out.reset_index(drop=True)


def _driver_label(driver: str, kind: str, step: str) -> str:
    """Readable driver names: "length (+10 characters)", "is a question", "the word 'makerspace'"."""
    labels = {}
    mod = _optional_module("model")
    if mod is not None:
        labels = getattr(mod, "FEATURE_LABELS", {})
    if driver.startswith("term: "):
        return f"the word '{driver[6:]}'"
    name = labels.get(driver, driver.replace("_", " "))
    if step in ("", "present vs absent", "nan"):
        return name
    return f"{name} ({step})"


def _channel_of_driver(row: pd.Series, ctx: _Context) -> str | None:
    name = str(row["feature"])
    for ch in ctx.colours:
        if name in (ch, f"channel={ch}", f"channel_{ch}", f"channel:{ch}"):
            return ch
    return None


def _effect_text(row: pd.Series) -> str:
    return signed_pct(row["effect_pct"], 1)


def _interval_text(row: pd.Series) -> str:
    if not (np.isfinite(row["low_pct"]) and np.isfinite(row["high_pct"])):
        return "no interval"
    return f"{signed_pct(row['low_pct'], 1)} to {signed_pct(row['high_pct'], 1)}"


def _pct_or_none(v: float) -> str:
    return signed_pct(v, 1, missing="not in that fit")


def _driver_changes(ws, ctx: _Context, drivers: pd.DataFrame) -> dict:
    """Compare with the previous fit in the workspace: effects that moved most, appeared or vanished."""
    out: dict[str, Any] = {}
    try:
        row = ws.latest_model_row(ctx.outcome, offset=1)
    except Exception:
        row = None
    if row is None:
        out["changes_idea"] = "This is the first fit in the workspace, so there is nothing to compare it with yet."
        return out
    prev = None
    try:
        from .modelfile import loads

        prev = _driver_frame(loads(row[5]).drivers())
    except Exception:
        try:
            summary = json.loads(row[4])
            if isinstance(summary.get("drivers"), list):
                prev = _driver_frame(pd.DataFrame(summary["drivers"]))
        except Exception:
            prev = None
    if prev is None:
        out["changes_idea"] = "The previous fit's drivers could not be read, so changes are not shown."
        return out
    joined = drivers.merge(prev, on="feature", how="outer", suffixes=("", "_prev"))
    joined["label"] = joined["label"].fillna(joined["label_prev"])
    joined["delta"] = joined["effect"] - joined["effect_prev"]
    became = joined[(joined["clear"] == True) & (joined["clear_prev"] != True)]  # noqa: E712
    faded = joined[(joined["clear"] != True) & (joined["clear_prev"] == True)]  # noqa: E712
    moved = joined.dropna(subset=["delta"])
    moved = moved.iloc[np.argsort(-np.abs(moved["delta"].to_numpy()), kind="stable")].head(5)
    out["_tables"] = {"driver_changes": joined[["feature", "label", "effect_pct_prev", "effect_pct", "effect_prev",
                                                "effect", "delta", "clear_prev", "clear"]]}
    when = str(row[1])[:10]
    bits = []
    if len(moved):
        m = moved.iloc[0]
        bits.append(f"the largest move: {m['label']} ({_pct_or_none(m['effect_pct_prev'])} → "
                    f"{_pct_or_none(m['effect_pct'])})")
    if len(became):
        bits.append("newly clear: " + ", ".join(became["label"].astype(str).head(4)))
    if len(faded):
        bits.append("no longer clear: " + ", ".join(faded["label"].astype(str).head(4)))
    out["changes_idea"] = (f"Against the previous fit ({when}): " + "; ".join(bits) + "."
                           if bits else f"Against the previous fit ({when}) nothing moved.")
    out["change_rows"] = [{"label": r["label"], "before": _pct_or_none(r["effect_pct_prev"]),
                           "now": _pct_or_none(r["effect_pct"])} for _, r in moved.iterrows()]
    return out


# ---------------------------------------------------------------- experiments
def experiments_section(ws, ctx: _Context, missing: list[str]) -> dict:
    from . import charts

    out: dict[str, Any] = {"_tables": {}, "_charts": {}, "items": [], "cautions": []}
    mod = _optional_module("experiments")
    if mod is None:
        missing.append("experiments (contentlab.experiments is not installed)")
        out["status"] = "unavailable"
        out["idea"] = "Experiments are not available in this installation."
        out["meaning"] = ""
        return out
    listing = mod.list_experiments(ws)
    if listing.empty:
        out["status"] = "none"
        out["idea"] = "No experiments in this workspace yet."
        out["meaning"] = ("Test your next post's drafts against each other: contentlab experiment new NAME "
                          "--drafts drafts.csv, then follow contentlab experiment next.")
        return out
    since = ctx.period.start - timedelta(days=BASELINE_BLOCKS * ctx.period.days)
    arms_rows, summary_rows = [], []
    older = 0
    generic = set()
    for _, e in listing.iterrows():
        st = mod.experiment_status(ws, e["experiment"])
        stopped_at = str(st.settings.get("stopped_at", ""))[:10]
        if st.status == "stopped" and stopped_at and stopped_at < since.isoformat():
            older += 1
            continue
        d = st.decision
        arms = st.arms
        lead_i = int(np.flatnonzero(arms["arm"].to_numpy() == d.leader)[0]) if d.leader in set(arms["arm"]) else None
        colour = ctx.colours.get(st.channel) if st.channel else None
        chart_name = f"experiment-{len(out['items']) + 1}"
        out["_charts"][chart_name] = charts.probability_bars(
            [f"{a}: {h}" for a, h in zip(arms["arm"], arms["headline"])], arms["prob_best"].to_numpy(float),
            highlight=lead_i, colour=colour or charts.INK, name=chart_name,
            title=f"Probability of being best, experiment {st.name}")
        lead = arms.iloc[lead_i] if lead_i is not None else None
        if st.impressions == 0:
            sentence = f"{st.name} has no results yet; its {len(arms)} arms start from their priors."
        elif st.status == "stopped":
            sentence = (f"{st.name} is finished: {st.settings.get('winner', d.leader)} won "
                        f"(P(best) {probability(d.prob_best)} when last computed).")
        elif d.stop:
            sentence = (f"{st.name}: arm {d.leader} leads with P(best) {probability(d.prob_best)}; the decision rule "
                        f"says stop and run it.")
        elif st.settled_on:
            sentence = (f"{st.name}: arm {d.leader} leads with P(best) {probability(d.prob_best)}; the split has "
                        f"settled on arm {st.settled_on} (no other draft is worth more of its impressions).")
        else:
            sentence = (f"{st.name}: arm {d.leader} leads with P(best) {probability(d.prob_best)}, not yet decisive; "
                        f"keep going.")
        gain = st.clicks_gained
        warnings = []
        for w in st.warnings:
            if w in (mod.PEEKING_CAUTION, mod.TRUTH_CAUTION, getattr(mod, "SINGLE_CAUTION", None)):
                generic.add(w)
            else:
                warnings.append(w)
        out["items"].append({
            "name": st.name, "status": st.status, "channel": st.channel or "", "colour": colour,
            "sentence": sentence, "decision": d.reason,
            "gained": (f"{int(round(gain)):+,d} clicks against an equal split so far" if st.impressions else "no results yet"),
            "impressions": count(st.impressions), "clicks": count(st.clicks), "chart": chart_name,
            "leader_headline": lead["headline"] if lead is not None else "",
            "leader": d.leader, "stop": bool(d.stop), "prob_best": d.prob_best, "gain": gain,
            "settled_on": st.settled_on,
            "warnings": warnings,
            "arms": [{"arm": r["arm"], "headline": r["headline"], "impressions": count(r["impressions"]),
                      "clicks": count(r["clicks"]), "rate": percent(r["rate"]),
                      "posterior": percent(r["posterior_mean"]), "prob_best": probability(r["prob_best"]),
                      "leader": r["arm"] == d.leader} for _, r in arms.iterrows()],
        })
        a = arms.copy()
        a.insert(0, "experiment", st.name)
        arms_rows.append(a)
        summary_rows.append({"experiment": st.name, "status": st.status, "channel": st.channel,
                             "impressions": st.impressions, "clicks": st.clicks, "leader": d.leader,
                             "prob_best": d.prob_best, "stop": d.stop, "decision": d.reason,
                             "clicks_gained_vs_equal_split": gain})
    if arms_rows:
        out["_tables"]["experiment_arms"] = pd.concat(arms_rows, ignore_index=True)
        out["_tables"]["experiments"] = pd.DataFrame(summary_rows)
    out["cautions"] = sorted(generic)
    out["older"] = older
    if not out["items"]:
        out["status"] = "none"
        out["idea"] = (f"No experiment ran in the last {BASELINE_BLOCKS + 1} {ctx.period.noun}s ({older} older "
                       "finished ones).")
        out["meaning"] = "Start one for next week's most important post."
        return out
    out["status"] = "ok"
    running = [i for i in out["items"] if i["status"] == "running"]
    ready = [i for i in running if i["stop"]]
    total_gain = sum(i["gain"] for i in out["items"])
    out["idea"] = (f"{len(out['items'])} experiment(s) ({len(running)} running, {len(ready)} ready to stop); "
                   f"together they earned {int(round(total_gain)):+,d} clicks against an equal split so far.")
    out["meaning"] = ("Clicks gained is what the adaptive split earned over showing every draft equally, at the "
                      "posterior rates: the price of learning, recovered.")
    if older:
        out["notes"] = [f"{older} experiment(s) finished before {since.isoformat()} are not shown."]
    return out


# ----------------------------------------------------------------- next week
def next_week_section(ws, ctx: _Context, model: dict | None, missing: list[str],
                      drafts: pd.DataFrame | None = None) -> dict:
    """Best slots per channel and queued drafts with scores (where those parts of contentlab are installed)."""
    out: dict[str, Any] = {"_tables": {}, "_charts": {}, "notes": []}
    for part in (_slots_part(ws, ctx, model, missing, drafts), _drafts_part(ws, ctx, model, missing, drafts)):
        out["_tables"].update(part.pop("_tables", {}))
        out["notes"].extend(part.pop("notes", []))
        out.update(part)
    return out


def _slots_part(ws, ctx, model, missing, drafts: pd.DataFrame | None = None) -> dict:
    mod = _optional_module("slots")
    if mod is None:
        missing.append("best slots (contentlab.slots is not installed)")
        return {"slots_idea": "Best posting slots are not available in this installation.", "slot_rows": []}
    out = _call_slots(mod, ws, ctx, model, drafts)
    if "_missing" in out:
        missing.append(out.pop("_missing"))
    return out


def _drafts_part(ws, ctx, model, missing, given: pd.DataFrame | None = None) -> dict:
    queued = _queued_drafts(ws, given)
    out: dict[str, Any] = {}
    if queued.empty:
        return {"drafts_idea": ("No drafts are queued: none were given (contentlab report --drafts FILE), the "
                                "workspace's drafts table is empty, and no running experiment is waiting for "
                                "results."), "draft_rows": []}
    if model is None:
        out["drafts_idea"] = (f"{len(queued)} draft(s) are queued, but there is no model to score them: run "
                              "contentlab learn.")
        out["draft_rows"] = [{"headline": r["headline"], "channel": r.get("channel") or "", "source": r["source"],
                              "predicted": "n/a", "interval": "", "colour": ctx.colours.get(r.get("channel"))}
                             for _, r in queued.iterrows()]
        return out
    mod = _optional_module("scoring")
    if mod is None:
        missing.append("draft scores (contentlab.scoring is not installed)")
        out["drafts_idea"] = f"{len(queued)} draft(s) are queued; scoring is not available in this installation."
        out["draft_rows"] = []
        return out
    out.update(_call_scoring(mod, ws, ctx, model, queued))
    return out


def _queued_drafts(ws, given: pd.DataFrame | None = None) -> pd.DataFrame:
    """Drafts waiting to run: those given to the report, the drafts table, and arms of running
    experiments that have no results yet."""
    cols = ["headline", "channel", "publish_at", "group", "source"]
    frames = []
    if given is not None and len(given):
        g = given.copy()
        for c in cols:
            if c not in g.columns:
                g[c] = None
        g["source"] = g.attrs.get("source", "drafts file")
        frames.append(g[cols])
    try:
        d = pd.read_sql_query("SELECT headline, channel, publish_at, group_name AS 'group' FROM drafts ORDER BY id",
                              ws.conn)
        d["source"] = "drafts"
        frames.append(d)
    except Exception:
        pass
    try:
        a = pd.read_sql_query(
            """SELECT a.headline, e.channel, NULL AS publish_at, e.name AS 'group', 'experiment ' || e.name AS source
               FROM arms a JOIN experiments e ON e.name = a.experiment
               WHERE e.status = 'running'
                 AND NOT EXISTS (SELECT 1 FROM observations o WHERE o.experiment = e.name)
               ORDER BY e.name, a.rowid""", ws.conn)
        frames.append(a)
    except Exception:
        pass
    if not frames:
        return pd.DataFrame(columns=cols)
    out = pd.concat(frames, ignore_index=True)
    return out[cols].drop_duplicates(subset=["headline", "channel"]).reset_index(drop=True)


def _call_slots(mod, ws, ctx, model, drafts: pd.DataFrame | None = None) -> dict:
    """Best covered slot per channel for the week after the report's, from :func:`contentlab.slots.plan_slots`."""
    out: dict[str, Any] = {"slot_rows": [], "_tables": {}}
    if model is None:
        out["slots_idea"] = "Best posting slots need a fitted model: run contentlab learn."
        return out
    history = ws.posts()
    if history.empty:
        out["slots_idea"] = "No history, so no slot can be recommended."
        return out
    frame = ctx.frame
    share = frame.groupby("channel")["n"].sum().sort_values(ascending=False) if len(frame) else pd.Series(dtype=float)
    start = ctx.period.end + timedelta(days=1)
    queued = _queued_drafts(ws, drafts)
    rows, tables, notes = [], [], []
    for ch in share.index:
        headline = _headline_for_slots(ch, queued, frame)
        try:
            plan = mod.plan_slots(model["model"], headline, None if ch == NO_CHANNEL else ch, history,
                                  start=pd.Timestamp(start), timezone=ws.timezone, n_best=2)
        except ContentlabError as exc:
            notes.append(f"{ch}: {exc}")
            continue
        except ImportError as exc:
            out["slots_idea"] = f"Best posting slots are not available in this installation ({exc})."
            out["_missing"] = f"best slots ({exc})"
            return out
        t = plan.table.copy()
        t.insert(0, "channel", ch)
        t.insert(1, "headline_scored", headline)
        tables.append(t)
        if plan.best.empty:
            rows.append({"channel": ch, "slot": "no slot with enough history", "predicted": "n/a", "interval": "",
                         "evidence": " ".join(plan.notes[:1]), "colour": ctx.colours.get(ch), "lift_low": np.nan})
            continue
        for _, b in plan.best.head(1).iterrows():
            label = str(b["slot"]).split(" ")
            slot_text = f"{label[0]} {' '.join(label[2:])}" if len(label) >= 3 else str(b["slot"])
            ev = f"{int(b['n_posts'])} past posts in that slot"
            if plan.usual is not None and np.isfinite(b.get("lift_vs_usual", np.nan)):
                ev = (f"{signed_pct(b['lift_vs_usual'], 0)} against your usual {plan.usual['label']} (90% "
                      f"interval {signed_pct(b['lift_low'], 0)} to {signed_pct(b['lift_high'], 0)}); " + ev)
            rows.append({"channel": ch, "slot": slot_text, "predicted": percent(b["predicted_rate"]),
                         "interval": f"{percent(b['rate_low'])}–{percent(b['rate_high'])}", "evidence": ev,
                         "colour": ctx.colours.get(ch), "lift_low": float(b.get("lift_low", np.nan)),
                         "lift": float(b.get("lift_vs_usual", np.nan)),
                         "thin": int(b["n_posts"]) < THIN_SLOT_POSTS})
    out["slot_rows"] = rows
    if tables:
        out["_tables"]["slots"] = pd.concat(tables, ignore_index=True)
    good = [r for r in rows if np.isfinite(r.get("lift_low", np.nan)) and r["lift_low"] > 0]
    if good:
        # Prefer a slot the channel has used often enough to trust; a thin one only when nothing else is better.
        best = max(good, key=lambda r: (not r["thin"], r["lift_low"]))
        out["best_slot"] = {"channel": best["channel"], "slot": best["slot"],
                            "evidence": best["evidence"] + ("; thin evidence: few past posts there" if best["thin"]
                                                            else "")}
        out["slots_idea"] = (f"{len(good)} channel(s) have a slot clearly better than their usual one; the "
                             f"strongest: {best['channel']} at {best['slot']} ({best['evidence'].split(';')[0]}).")
    elif rows:
        out["slots_idea"] = ("No slot is clearly better than each channel's usual one (every interval includes no "
                             "gain), so keep your usual times.")
    else:
        out["slots_idea"] = "No channel has enough posts with a known time to rank slots."
    out["slots_meaning"] = ("Slots are ranked only where the channel has at least a few past posts, and compared "
                            "with the channel's usual slot. Timing effects come from your own history, not a test.")
    if notes:
        out["slot_notes"] = notes
    return out


def _headline_for_slots(channel: str, queued: pd.DataFrame, frame: pd.DataFrame) -> str:
    """A queued draft for the channel if there is one, else its latest headline (slots rank the same for any)."""
    if len(queued):
        q = queued[queued["channel"].fillna(NO_CHANNEL).astype(str) == channel]
        if len(q):
            return str(q["headline"].iloc[0])
    f = frame[frame["channel"] == channel]
    return str(f["headline"].iloc[-1]) if len(f) else "A typical post"


def _call_scoring(mod, ws, ctx, model, queued) -> dict:
    """Score the queued drafts with :func:`contentlab.scoring.score_drafts` (ranked within their group)."""
    out: dict[str, Any] = {"_tables": {}, "notes": []}
    frame = queued.copy()
    frame["group"] = frame["group"].where(frame["group"].notna() & (frame["group"].astype(str) != ""), frame["source"])
    no_channel = frame["channel"].isna() | (frame["channel"].astype(str) == "")
    n_channels = ctx.frame["channel"].nunique() if len(ctx.frame) else 0
    if no_channel.any() and n_channels > 1:
        out["notes"].append(f"{int(no_channel.sum())} queued draft(s) have no channel and were not scored; give "
                            "them one (a channel column) to see their scores.")
        frame = frame[~no_channel]
    if frame.empty:
        out["drafts_idea"] = "No queued draft could be scored."
        out["draft_rows"] = []
        return out
    cols = ["headline", "channel", "publish_at", "group"]
    try:
        scored = mod.score_drafts(frame[cols].reset_index(drop=True), model=model["model"], history=ws.posts(),
                                  suggest=False, timezone=ws.timezone)
    except ContentlabError as exc:
        out["drafts_idea"] = f"The queued drafts could not be scored: {exc}"
        out["draft_rows"] = []
        return out
    scored.insert(0, "source", frame["source"].to_numpy())
    out["_tables"]["drafts"] = scored.drop(columns=[c for c in ("logit", "logit_se") if c in scored.columns])
    out["notes"].extend(str(n) for n in scored.attrs.get("notes", []))
    rows = []
    for _, r in scored.iterrows():
        ch = r.get("channel")
        rows.append({
            "headline": r["headline"], "channel": "" if _is_missing(ch) else str(ch), "group": r.get("group") or "",
            "source": r["source"], "predicted": percent(r["predicted_rate"]),
            "interval": f"{percent(r['rate_low'])}–{percent(r['rate_high'])}",
            "percentile": percent(r.get("percentile", np.nan), 0),
            "rank": "" if _is_missing(r.get("group_rank")) else int(r["group_rank"]),
            "verdict": _lead_verdict(r.get("p_better_than_next")) if r.get("group_rank") == 1 else "",
            "colour": ctx.colours.get(str(ch)), "_perc": float(r.get("percentile", np.nan)),
        })
    order = {g: i for i, g in enumerate(dict.fromkeys(r["group"] for r in rows))}
    rows.sort(key=lambda r: (order[r["group"]], r["rank"] if r["rank"] != "" else 10 ** 6))
    out["draft_rows"] = rows
    groups = scored["group"].nunique()
    firsts = [r for r in rows if r["rank"] == 1] or rows
    best = max(firsts, key=lambda r: -1 if not np.isfinite(r["_perc"]) else r["_perc"])
    out["best_draft"] = best
    out["drafts_idea"] = (f"{len(rows)} queued draft(s) in {groups} group(s), scored by the model and ranked within "
                          f"each group. The strongest: “{best['headline']}” ({best['channel']}), predicted "
                          f"{best['predicted']}, above {best['percentile']} of past {best['channel']} posts.")
    out["drafts_meaning"] = ("The 90% interval is where one post's rate is likely to land, post-to-post luck "
                             "included, so the intervals of drafts in a group nearly always overlap. Whether the top "
                             "draft is truly better than the next is read from the probability beside it (from the "
                             f"difference of the two predictions): below {mod.LIKELY_AHEAD:.0%} it is a close call, "
                             "which is what an experiment is for; even above it, the ranking is a prediction, "
                             "not a result.")
    out["drafts_cautions"] = [str(c) for c in scored.attrs.get("cautions", [])]
    return out


def _lead_verdict(p: float | None) -> str:
    """The scoring module's wording of a group leader's lead, so the report and `score` say the same."""
    from .scoring import lead_verdict

    return "" if _is_missing(p) else lead_verdict(float(p))


def _is_missing(v) -> bool:
    return v is None or (isinstance(v, float) and not np.isfinite(v)) or v is pd.NA or v == ""


# ------------------------------------------------------------ recommendations
def recommendations(ctx: _Context, headline: dict, happened: dict, why: dict, works: dict, experiments: dict,
                    next_week: dict) -> list[dict]:
    """Two or three things to do next week, each with the evidence it rests on and where that is in the report."""
    recs: list[dict] = []
    running = [i for i in experiments.get("items", []) if i["status"] == "running"]
    ready = [i for i in running if i["stop"]]
    if ready:
        item = ready[0]
        recs.append({"text": f"Stop experiment {item['name']} and run arm {item['leader']}: "
                             f"“{item['leader_headline']}”.",
                     "evidence": f"P(best) {probability(item['prob_best'])}; {item['decision']}",
                     "section": "experiments"})
    elif running and running[0].get("settled_on"):
        item = running[0]
        settled = next(a["headline"] for a in item["arms"] if a["arm"] == item["settled_on"])
        recs.append({"text": f"Experiment {item['name']} has settled on arm {item['settled_on']}: no other draft is "
                             f"worth more of its impressions. Stop it and run “{settled}”, or keep it running to firm "
                             "up the evidence.",
                     "evidence": f"P(best) {probability(item['prob_best'])}; {item['decision']}",
                     "section": "experiments"})
    elif running and running[0]["impressions"] != "0":
        item = running[0]
        recs.append({"text": f"Keep experiment {item['name']} running; arm {item['leader']} leads but is not "
                             "decisive yet.",
                     "evidence": f"P(best) {probability(item['prob_best'])}; {item['decision']}",
                     "section": "experiments"})
    if next_week.get("best_draft"):
        b = next_week["best_draft"]
        where = f" in {b['group']}" if b.get("group") else ""
        recs.append({"text": f"Run “{b['headline']}” first{where}{' on ' + b['channel'] if b['channel'] else ''}, "
                             "ideally against its runner-up as an experiment.",
                     "evidence": f"top of its group; predicted {b['predicted']} (90% interval {b['interval']}), "
                                 f"above {b['percentile']} of past {b['channel'] or ''} posts. A prediction, not a "
                                 "result",
                     "section": "next-week"})
    if why.get("total") is not None and len(recs) < 3 and np.isfinite(why.get("total", np.nan)):
        mix, within = why["mix"], why["within"]
        ch = why.get("highlight_channel")
        if abs(mix) > abs(within) and ch:
            recs.append({"text": f"Decide on purpose how much goes out on {ch}: the mix of channels moved this "
                                 f"{ctx.period.noun}'s figure more than the posts did.",
                         "evidence": f"shift-share: mix {points(mix)}, within channels {points(within)}",
                         "section": "why"})
        elif ch and abs(within) > 0:
            recs.append({"text": f"Look at what this {ctx.period.noun}'s {ch} posts did differently before "
                                 "repeating or dropping it.",
                         "evidence": f"shift-share: performance within {ch} moved the rate most "
                                     f"(within channels {points(within)} in all)",
                         "section": "why"})
    if next_week.get("best_slot"):
        s = next_week["best_slot"]
        recs.append({"text": f"Schedule {s['channel']} posts for {s['slot']}.",
                     "evidence": s["evidence"], "section": "next-week"})
    if len(recs) < 3 and works.get("status") == "ok" and works.get("rows"):
        # Wording drivers only (slots cover timing), and never a push towards alarm or hype.
        clear = [r for r in works["rows"] if r["clear"] and r.get("kind") in ("feature", "")
                 and not (r.get("feature") in SENSATIONAL and r["effect_value"] > 0)]
        if clear:
            r = clear[0]
            recs.append({"text": f"In next week's experiment, pit a draft that differs in “{r['label']}” against "
                                 f"your usual style, keeping both truthful.",
                         "evidence": f"model driver: {r['effect']} change in the rate (90% interval {r['interval']}, "
                                     f"{r['evidence'] or 'observational'}); an association, so test it before "
                                     "adopting it",
                         "section": "what-works"})
    if len(recs) < 2 and works.get("status") != "ok":
        recs.append({"text": "Run contentlab learn so next week's report can show drivers, score drafts and flag "
                             "posts against their predictions.",
                     "evidence": "no fitted model in the workspace", "section": "what-works"})
    if len(recs) < 2 and experiments.get("status") in ("none",):
        recs.append({"text": "Start an experiment for next week's most important post (two to four truthful drafts).",
                     "evidence": "no experiment is running, so nothing is being learned by testing",
                     "section": "experiments"})
    if len(recs) < 2 and headline.get("status") == "empty":
        recs.append({"text": "Import this week's export before reading anything into the report.",
                     "evidence": "no posts in the period", "section": "headline"})
    return recs[:3]


# ------------------------------------------------------------------- output
TEMPLATE = "report.html.j2"


def render_html(report: WeeklyReport) -> str:
    """The report as one self-contained HTML page (autoescaped; charts are our own inline SVG)."""
    import jinja2
    from markupsafe import Markup

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(Path(__file__).resolve().parent / "templates")),
        autoescape=True,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    from .charts import check_svg

    charts = {}
    for name, svg in report.charts.items():
        # Only SVG made by contentlab.charts is marked safe: it escapes every user string itself, and the parsed
        # markup must hold nothing but the elements and attributes the charts draw with.
        problems = check_svg(svg)
        if problems:
            raise ContentlabError(f"chart {name!r} is not plain SVG ({'; '.join(problems[:3])}); this is a bug in "
                                  "contentlab.charts, please report it")
        charts[name] = Markup(svg)
    return env.get_template(TEMPLATE).render(r=report, charts=charts)


def report_html(ws, *, week: str | None = None, start: str | date | None = None, end: str | date | None = None,
                outcome: str = "clicks", drafts: pd.DataFrame | str | Path | None = None,
                today: date | None = None) -> str:
    """The weekly report of workspace ``ws`` as one self-contained HTML page, as a string (nothing written).

    The same page :func:`write_report` saves; for a server that shows the report for any week.
    Raises :class:`ContentlabError` for a bad week or date range.
    """
    return render_html(build_report(ws, week=week, start=start, end=end, outcome=outcome, today=today,
                                    drafts=drafts))


@dataclass(frozen=True)
class ReportFiles:
    html: Path
    tables: list[Path]

    @property
    def folder(self) -> Path:
        return self.html.with_suffix("")


def write_report(report: WeeklyReport, out_dir: str | Path = "reports") -> ReportFiles:
    """Write ``<out>/contentlab-report-<period>.html`` and the tables behind it as CSV (neutralised)."""
    from .safety import write_csv, write_text

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ContentlabError(
            f"Cannot create the report folder {out}: {exc.strerror}. Choose another with --out.") from None
    html = render_html(report)
    path = out / f"{report.stem}.html"
    folder = out / report.stem
    folder.mkdir(exist_ok=True)
    names = [f"{name}.csv" for name, table in sorted(report.tables.items()) if table is not None]
    earlier = _tables_written_before(folder)
    # Listed before writing, so an interrupted run still leaves every file it may have written in the manifest.
    _write_manifest(folder, sorted(earlier | set(names)))
    written = []
    for name, table in sorted(report.tables.items()):
        if table is None:
            continue
        target = folder / f"{name}.csv"
        write_csv(_csv_ready(table), target)
        written.append(target)
    for stale in sorted(earlier - set(names)):  # tables of an earlier run that this one did not write
        (folder / stale).unlink(missing_ok=True)
    _write_manifest(folder, names)
    write_text(path, html)  # whole or not at all, also when interrupted
    return ReportFiles(path, written)


def _tables_written_before(folder: Path) -> set[str]:
    """The CSV files an earlier run wrote into ``folder``, the only ones a rerun may remove.

    From its manifest; a folder written before there was a manifest gives the files named like a table
    this version writes (:data:`REPORT_TABLES`), so any other file a user put there stays.
    """
    manifest = folder / REPORT_MANIFEST
    try:
        listed = json.loads(manifest.read_text(encoding="utf-8"))["tables"]
    except (OSError, ValueError, KeyError, TypeError):  # missing or damaged: the names contentlab uses
        listed = None
    if not isinstance(listed, list):
        return {f"{name}.csv" for name in REPORT_TABLES if (folder / f"{name}.csv").is_file()}
    # Only bare CSV names: an edited manifest must not reach outside the folder or remove anything else.
    return {n for n in listed if isinstance(n, str) and n.endswith(".csv") and Path(n).name == n
            and not n.startswith(".") and (folder / n).is_file()}


def _write_manifest(folder: Path, names: list[str]) -> None:
    from .safety import write_text

    write_text(folder / REPORT_MANIFEST, json.dumps({
        "written_by": "contentlab report",
        "note": "The tables contentlab wrote here; the next report for this period replaces or removes only "
                "these. Other files in this folder are left alone.",
        "tables": names}, indent=2) + "\n")


def _csv_ready(table: pd.DataFrame) -> pd.DataFrame:
    t = table.copy()
    for c in t.columns:
        if t[c].dtype == object:
            t[c] = t[c].map(lambda v: v.isoformat() if isinstance(v, date) else v)
    return t
