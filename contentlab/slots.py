"""Best posting slots for a draft: predicted rate per weekday and hour block.

For one draft and channel the model scores the coming week in blocks of a few
hours. Only slots the history covers count: a block with fewer than
``min_posts`` past posts on that channel is listed as too thin, never ranked,
because the model's smooth hour and weekday curves say little where the user
never posted. Each ranked slot is compared with the user's usual slot (the
most common block in the channel's history): the two predictions differ only
in the time features, so the lift's interval comes from the uncertainty of
that difference alone (see :func:`contentlab.draftengine.joint_logits`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import ContentlabError

WEEKDAYS = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"]
DEFAULT_BLOCK_HOURS = 3
# Common practice (our choice): fewer than five past posts in a block is too thin to
# say how that block does for this channel.
DEFAULT_MIN_POSTS = 5


@dataclass
class SlotPlan:
    """The week's slots for one draft, the best covered ones, and the usual slot."""

    table: pd.DataFrame
    best: pd.DataFrame
    usual: dict | None
    notes: list[str] = field(default_factory=list)


def block_of(hour: np.ndarray | pd.Series, block_hours: int = DEFAULT_BLOCK_HOURS) -> np.ndarray:
    """Index of the hour block (0 = midnight to block_hours) of each local hour; -1 when unknown."""
    h = np.asarray(hour, dtype=float)
    out = np.full(h.shape, -1, dtype=int)
    ok = np.isfinite(h)
    out[ok] = (np.floor(h[ok]) // block_hours).astype(int) % (24 // block_hours)
    return out


def block_label(block: int, block_hours: int = DEFAULT_BLOCK_HOURS) -> str:
    start = block * block_hours
    return f"{start:02d}:00-{(start + block_hours) % 24:02d}:00"


def slot_coverage(history: pd.DataFrame, channel: str | None, block_hours: int = DEFAULT_BLOCK_HOURS) -> pd.DataFrame:
    """Past posts with a known time per (weekday, block) on ``channel``; columns weekday, block, n_posts."""
    if 24 % block_hours:
        raise ContentlabError(f"block_hours must divide 24 (1, 2, 3, 4, 6, 8 or 12); got {block_hours}")
    posts = history
    if channel is not None and "channel" in posts:
        posts = posts[posts["channel"].fillna("(none)").astype(str) == channel]
    hours = posts["local_hour"] if "local_hour" in posts else pd.Series(dtype=float)
    blocks = block_of(hours.to_numpy(dtype=float), block_hours)
    weekdays = posts["local_weekday"].to_numpy(dtype=float) if "local_weekday" in posts else np.full(len(posts), np.nan)
    known = (blocks >= 0) & np.isfinite(weekdays)
    counts = (
        pd.DataFrame({"weekday": weekdays[known].astype(int), "block": blocks[known]})
        .value_counts()
        .rename("n_posts")
        .reset_index()
    )
    grid = pd.MultiIndex.from_product([range(7), range(24 // block_hours)], names=["weekday", "block"]).to_frame(
        index=False
    )
    out = grid.merge(counts, on=["weekday", "block"], how="left")
    out["n_posts"] = out["n_posts"].fillna(0).astype(int)
    return out


def usual_slot(coverage: pd.DataFrame) -> dict | None:
    """The modal (weekday, block) of the history; None when no post has a time."""
    if coverage["n_posts"].sum() == 0:
        return None
    row = coverage.sort_values(["n_posts", "weekday", "block"], ascending=[False, True, True]).iloc[0]
    return {"weekday": int(row["weekday"]), "block": int(row["block"]), "n_posts": int(row["n_posts"])}


def week_grid(start: pd.Timestamp, block_hours: int = DEFAULT_BLOCK_HOURS) -> pd.DataFrame:
    """Every hour block of the seven days from ``start`` (a local date): date, weekday, block, local_hour."""
    day0 = pd.Timestamp(start).normalize()
    if day0.tzinfo is not None:
        day0 = day0.tz_localize(None)
    rows = []
    for d in range(7):
        day = day0 + pd.Timedelta(days=d)
        for b in range(24 // block_hours):
            rows.append({
                "date": day.date().isoformat(),
                "weekday": int(day.weekday()),
                "block": b,
                # the block's midpoint: the model's hour curve is smooth, so its middle is representative
                "local_hour": b * block_hours + block_hours / 2.0,
            })
    out = pd.DataFrame(rows)
    out["local_weekday"] = out["weekday"].astype(float)
    return out


def plan_slots(
    model,
    headline: str,
    channel: str | None,
    history: pd.DataFrame,
    *,
    start: pd.Timestamp | str | None = None,
    timezone: str = "UTC",
    block_hours: int = DEFAULT_BLOCK_HOURS,
    min_posts: int = DEFAULT_MIN_POSTS,
    n_best: int = 3,
    level: float = 0.9,
) -> SlotPlan:
    """Predicted rate of ``headline`` in every slot of the coming week, best covered slots first.

    ``start`` is the first local day (default: tomorrow in ``timezone``).
    The table has one row per slot with ``n_posts`` (history in that weekday
    and block), ``covered``, ``predicted_rate``, ``rate_low``, ``rate_high``;
    ``best`` adds ``lift_vs_usual`` with its interval and ``p_better_than_usual``.
    """
    from .draftengine import joint_logits, logistic, prob_better, rate_lift

    if not isinstance(min_posts, (int, np.integer)) or min_posts < 1:
        raise ContentlabError(f"min_posts must be a whole number >= 1; got {min_posts!r}")
    if start is None:
        start = pd.Timestamp.now(tz=timezone).normalize() + pd.Timedelta(days=1)
    else:
        try:
            start = pd.Timestamp(start)
        except (ValueError, TypeError):
            raise ContentlabError(f"start {start!r} is not a date; use YYYY-MM-DD") from None
    coverage = slot_coverage(history, channel, block_hours)
    grid = week_grid(start, block_hours).merge(coverage, on=["weekday", "block"], how="left")
    grid["covered"] = grid["n_posts"] >= min_posts
    usual = usual_slot(coverage)
    notes: list[str] = []

    frame = grid[["local_hour", "local_weekday"]].copy()
    frame.insert(0, "headline", headline)
    frame.insert(1, "channel", channel)
    if usual is not None:
        frame = pd.concat([frame, pd.DataFrame([{
            "headline": headline, "channel": channel,
            "local_hour": usual["block"] * block_hours + block_hours / 2.0,
            "local_weekday": float(usual["weekday"]),
        }])], ignore_index=True)
    logit, cov = joint_logits(model, frame)
    z = _z(level)
    se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    n = len(grid)
    grid["predicted_rate"] = logistic(logit[:n])
    grid["rate_low"] = logistic(logit[:n] - z * se[:n])
    grid["rate_high"] = logistic(logit[:n] + z * se[:n])
    grid["slot"] = [f"{WEEKDAYS[w]} {d} {block_label(b, block_hours)}" for w, d, b in
                    zip(grid["weekday"], grid["date"], grid["block"])]

    covered = grid[grid["covered"]]
    thin = int((~grid["covered"]).sum())
    if covered.empty:
        notes.append(
            f"No slot of the week has {min_posts} or more past posts on {channel or 'this channel'} with a known "
            "time, so no slot is recommended: the history is too thin to say when to post."
        )
        return SlotPlan(grid, grid.iloc[0:0].assign(lift_vs_usual=[], lift_low=[], lift_high=[],
                                                   p_better_than_usual=[]), usual, notes)
    if thin:
        notes.append(
            f"{thin} of {len(grid)} slots have fewer than {min_posts} past posts on {channel or 'this channel'}; "
            "they are shown as too thin and never recommended."
        )
    best_idx = covered.sort_values("predicted_rate", ascending=False).index[:n_best]
    best = grid.loc[best_idx].copy()
    if usual is not None:
        u = n  # the appended usual-slot row
        usual["label"] = f"{WEEKDAYS[usual['weekday']]} {block_label(usual['block'], block_hours)}"
        usual["predicted_rate"] = float(logistic(logit[u]))
        lifts, lows, highs, probs = [], [], [], []
        for i in best_idx:
            diff = logit[i] - logit[u]
            var = cov[i, i] + cov[u, u] - 2 * cov[i, u]
            lift, low, high = rate_lift(logit[u], diff, np.sqrt(max(var, 0.0)), level)
            lifts.append(lift)
            lows.append(low)
            highs.append(high)
            probs.append(prob_better(logit[i], logit[u], cov[i, i], cov[u, u], cov[i, u]))
        best["lift_vs_usual"] = lifts
        best["lift_low"] = lows
        best["lift_high"] = highs
        best["p_better_than_usual"] = probs
    else:
        notes.append("No past post on this channel has a posting time, so there is no usual slot to compare with.")
        for c in ("lift_vs_usual", "lift_low", "lift_high", "p_better_than_usual"):
            best[c] = np.nan
    return SlotPlan(grid, best.reset_index(drop=True), usual, notes)


def _z(level: float) -> float:
    from scipy.stats import norm

    if not 0 < level < 1:
        raise ContentlabError(f"level must be between 0 and 1; got {level!r}")
    return float(norm.ppf(0.5 + level / 2))
