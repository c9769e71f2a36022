"""What the History and Experiment pages compute beyond the library's tables.

* :func:`trend`: the pooled rate per week (clicks over impressions), per
  channel or all together, within a period.
* :func:`driver_split`: the posts with and without a driver (a flag, a
  topic word, an evening or weekend slot; a count above or below its median)
  and how each side did: a plain comparison of the history, confounded by
  everything else (the driver's own row gives the model's adjusted effect).
* :func:`post_detail`: one post's features, the model's held-out prediction
  and how far the post landed from it (a binomial z-score).
* :func:`prob_best_timeline`: the probability of being best after each
  recording round, replaying the recorded results through the same bandit.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import ContentlabError
from .common import ApiError, finite
from .state import Warm, WorkspaceState

MAX_ROUNDS = 60  # chart points of a long test (evenly spaced rounds)
# Posterior draws per chart point: Monte Carlo error of P(best) at most 0.008 (sd at p = 0.5), finer than
# the chart shows; the status table itself uses the bandit's full count.
TIMELINE_DRAWS = 4_000


def usable_posts(warm: Warm) -> pd.DataFrame:
    """History posts with the model's outcome and impressions (the rows every rate here is about)."""
    outcome = getattr(warm.model, "outcome_", "clicks")
    posts = warm.history
    ok = posts["impressions"].fillna(0).to_numpy(float) > 0
    if outcome in posts:
        ok &= posts[outcome].notna().to_numpy()
    frame = posts[ok].copy()
    frame["outcome"] = frame[outcome].astype(float) if outcome in frame else np.nan
    frame["rate"] = frame["outcome"] / frame["impressions"].astype(float)
    frame["channel"] = frame["channel"].fillna("(none)")
    return frame


def trend(warm: Warm, channel: str | None, start: str | None, end: str | None) -> pd.DataFrame:
    """Weekly pooled rate (ISO weeks, local dates) for one channel or all, between two ISO dates."""
    frame = usable_posts(warm)
    if channel:
        frame = frame[frame["channel"] == channel]
    day = pd.to_datetime(frame["local_date"], errors="coerce")
    if start:
        frame, day = frame[day >= pd.Timestamp(start)], day[day >= pd.Timestamp(start)]
    if end:
        frame, day = frame[day <= pd.Timestamp(end)], day[day <= pd.Timestamp(end)]
    if frame.empty:
        return pd.DataFrame(columns=["week", "posts", "impressions", "outcome", "rate"])
    iso = day.dt.isocalendar()
    week = iso["year"].astype(str) + "-W" + iso["week"].astype(int).map("{:02d}".format)
    out = frame.assign(week=week.to_numpy()).groupby("week").agg(
        posts=("post_id", "size"), impressions=("impressions", "sum"), outcome=("outcome", "sum"))
    out["rate"] = out["outcome"] / out["impressions"]
    return out.reset_index()


def check_date(text: str | None, what: str) -> str | None:
    """An ISO date from a filter field, or a clear refusal (ISO 8601 only)."""
    if not text:
        return None
    import re
    from datetime import date

    if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", text):
        raise ApiError(f"{what}: '{text[:40]}' is not an ISO 8601 date (e.g. 2026-03-14).")
    try:
        date.fromisoformat(text)
    except ValueError:
        raise ApiError(f"{what}: '{text[:40]}' is not a calendar date.") from None
    return text


def _flags(warm: Warm) -> pd.DataFrame:
    """Text and structure features of every usable history post (computed once per warm state)."""
    from ..features import STRUCTURE_COLUMNS, TEXT_COLUMNS, text_and_structure_matrix

    posts = usable_posts(warm)
    matrix = text_and_structure_matrix(posts["headline"].astype(str).tolist())
    return pd.DataFrame(matrix, columns=TEXT_COLUMNS + STRUCTURE_COLUMNS, index=posts.index)


def driver_split(state: WorkspaceState, warm: Warm, row: dict) -> dict:
    """Posts with and without the driver ``row`` (a row of the drivers table) and their pooled rates."""
    from ..features import topic_tokens

    posts = usable_posts(warm)
    name = str(row["driver"])
    kind = str(row.get("kind"))
    label_with, label_without = "with", "without"
    if kind == "topic term" and name.startswith("term: "):
        word = name[len("term: "):]
        stems = topic_tokens(word)
        stem = stems[0] if stems else word.lower()
        has = posts["headline"].astype(str).map(lambda t: stem in topic_tokens(t)).to_numpy(bool)
        label_with, label_without = f"with '{word}'", f"without '{word}'"
    elif name == "posting hour":
        hour = posts["local_hour"].to_numpy(float)
        evening, morning = (hour >= 17) & (hour < 20), (hour >= 8) & (hour < 11)
        keep = evening | morning
        posts, has = posts[keep], evening[keep]
        label_with, label_without = "posted 17:00-19:59", "posted 08:00-10:59"
    elif name == "weekend":
        wd = posts["local_weekday"].to_numpy(float)
        has = wd >= 5
        label_with, label_without = "Saturday or Sunday", "Monday to Friday"
    else:
        flags = state.cached(warm, "flags", lambda: _flags(warm))
        if name not in flags.columns:
            raise ApiError(f"No split of the history is available for the driver '{name}'.", 404)
        values = flags.loc[posts.index, name].to_numpy(float)
        binary = set(np.unique(values)) <= {0.0, 1.0}
        if binary:
            has = values > 0
        else:
            median = float(np.median(values))
            has = values > median
            label_with, label_without = f"above the median ({median:g})", f"at or below the median ({median:g})"
    sides = []
    for label, mask in ((label_with, has), (label_without, ~has)):
        part = posts[mask]
        n = float(part["impressions"].sum())
        k = float(part["outcome"].sum())
        top = part.sort_values("impressions", ascending=False).head(15)
        sides.append({
            "label": label, "posts": int(len(part)), "impressions": n, "outcome": k,
            "rate": k / n if n else None,
            "median_rate": finite(part["rate"].median()) if len(part) else None,
            "examples": [
                {"post_id": r.post_id, "headline": r.headline, "channel": r.channel, "rate": finite(r.rate),
                 "impressions": int(r.impressions), "date": r.local_date}
                for r in top.itertuples()
            ],
        })
    return {"driver": row, "sides": sides}


def post_detail(state: WorkspaceState, warm: Warm, post_id: str) -> dict:
    """One post: its values, its features, the model's held-out prediction and the residual."""
    from ..features import STRUCTURE_COLUMNS, TEXT_COLUMNS, text_and_structure_matrix, topic_tokens
    from ..scoring import score_drafts

    posts = usable_posts(warm)
    match = posts[posts["post_id"] == post_id]
    if match.empty:
        raise ApiError(f"No post with id '{post_id[:80]}' in this workspace's history.", 404)
    post = match.iloc[0]
    values = text_and_structure_matrix([str(post["headline"])])[0]
    features = dict(zip(TEXT_COLUMNS + STRUCTURE_COLUMNS, (float(v) for v in values)))
    oof = getattr(warm.model, "oof_", None)
    held_out = None
    if isinstance(oof, pd.DataFrame) and "post_id" in oof and "predicted_rate" in oof:
        hit = oof.loc[oof["post_id"] == post_id, "predicted_rate"]
        if len(hit) and np.isfinite(hit.iloc[0]):
            held_out = float(hit.iloc[0])
    draft = {"headline": post["headline"], "channel": None if post["channel"] == "(none)" else post["channel"]}
    if isinstance(post.get("published_at"), str) and post.get("has_time"):
        draft["publish_at"] = post["published_at"]
    elif post.get("local_date"):
        draft["publish_at"] = post["local_date"]
    view = {
        "post": {key: post.get(key) for key in ("post_id", "headline", "channel", "published_at", "impressions",
                                                 "outcome", "rate", "experiment_id", "local_date")},
        "outcome_name": getattr(warm.model, "outcome_", "clicks"),
        "features": features,
        "terms": topic_tokens(str(post["headline"])),
        "unscored": None,
    }
    try:
        scored = score_drafts(pd.DataFrame([draft]), model=warm.model, history=warm.history, timezone=warm.timezone,
                              suggest=False, impressions=float(post["impressions"]))
    except ContentlabError as exc:
        # A post the model cannot score as a draft (no channel in a history of several): its values and
        # features still show, with the reason, and its held-out prediction when the model kept one.
        scored, view["unscored"] = None, str(exc)
    if scored is None and held_out is None:
        return {**view, "predicted_rate": None}
    fitted = scored.iloc[0] if scored is not None else {}
    predicted = held_out if held_out is not None else float(fitted["predicted_rate"])
    n, k = float(post["impressions"]), float(post["outcome"])
    expected = n * predicted
    sd = float(np.sqrt(max(n * predicted * (1 - predicted), 1e-12)))
    return {
        **view,
        "predicted_rate": predicted,
        "prediction_kind": "held out (the model had not seen this post)" if held_out is not None
        else "in sample (this post was among those the model learned from)",
        "rate_low": finite(fitted.get("rate_low")) if scored is not None else None,
        "rate_high": finite(fitted.get("rate_high")) if scored is not None else None,
        "reasons": (scored.attrs.get("reasons") or [[]])[0] if scored is not None else [],
        "residual": float(post["rate"]) - predicted,
        "relative": float(post["rate"]) / predicted - 1 if predicted > 0 else None,
        "z": (k - expected) / sd,
    }


def prob_best_timeline(state: WorkspaceState, name: str, status) -> dict:
    """P(best) per arm after each recording round (distinct result time), oldest first."""
    from ..bandit import ThompsonBandit
    from ..experiments import experiment_bandit

    names = status.arms["arm"].tolist()
    with state.open() as ws:
        obs = pd.read_sql_query(
            "SELECT arm, at, impressions, clicks FROM observations WHERE experiment=? ORDER BY at, rowid",
            ws.conn, params=(name,))
        # The experiment's own prior (learned from past tests, or the model's), as status uses it.
        start = experiment_bandit(ws, name, with_results=False).to_dict()
    start["params"].update(n_draws=TIMELINE_DRAWS, random_state=20261203)
    bandit = ThompsonBandit.from_dict(start)
    rounds = sorted(obs["at"].unique()) if len(obs) else []
    if len(rounds) > MAX_ROUNDS:
        keep = set(np.linspace(0, len(rounds) - 1, MAX_ROUNDS).round().astype(int))
    else:
        keep = set(range(len(rounds)))
    points = [{"round": 0, "at": None, "impressions": 0, "prob_best": bandit.prob_best()}]
    total = 0
    groups = dict(tuple(obs.groupby("at", sort=False))) if len(obs) else {}
    for i, at in enumerate(rounds):
        part = groups[at]
        for arm, n, k in zip(part["arm"], part["impressions"], part["clicks"]):
            bandit.update(arm, int(n), int(k))
            total += int(n)
        if i in keep:
            points.append({"round": i + 1, "at": at, "impressions": total, "prob_best": bandit.prob_best()})
    return {"arms": names, "points": points}
