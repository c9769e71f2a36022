"""A plain-text summary of a post history and its features."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .features import DENSE_COLUMNS, HeadlineFeaturizer

# Features that are flags (0/1): summarised as a share of posts.
_FLAGS = {"is_question", "has_exclamation", "leading_number", "has_digit", "list_form", "second_person",
          "has_quote", "split_colon_dash", "time_known"}
_SKIP = {"hour_sin", "hour_cos", "hour_sin2", "hour_cos2", "weekday_sin", "weekday_cos"}


def feature_summary(posts: pd.DataFrame, min_df: int = 3, progress: bool = False) -> str:
    """Posts per channel, date range, and each feature's spread, as a table."""
    if posts.empty:
        return "The workspace has no posts yet. Import an export: contentlab import FILE"
    fs = HeadlineFeaturizer(min_df=min_df).fit_transform(posts, progress=progress)
    lines = [f"{len(posts)} posts from {posts['local_date'].min():%Y-%m-%d} to {posts['local_date'].max():%Y-%m-%d}"]
    by_channel = posts.groupby(fs.channel.values).agg(
        posts=("post_id", "size"), impressions=("impressions", "sum"), clicks=("clicks", "sum")
    )
    lines.append("")
    lines.append(f"{'channel':<16}{'posts':>7}{'impressions':>14}{'click rate':>12}")
    for name, row in by_channel.iterrows():
        rate = row.clicks / row.impressions if row.impressions and not np.isnan(row.clicks) else float("nan")
        lines.append(f"{name:<16}{int(row.posts):>7}{int(row.impressions):>14,}{rate:>11.2%} ")
    lines.append("")
    lines.append(f"{'feature':<24}{'mean':>9}{'p10':>9}{'median':>9}{'p90':>9}")
    for column in DENSE_COLUMNS:
        if column in _SKIP:
            continue
        values = fs.dense[column].to_numpy()
        if column in _FLAGS:
            lines.append(f"{column:<24}{values.mean():>8.0%} of posts")
            continue
        p10, p50, p90 = np.percentile(values, [10, 50, 90])
        lines.append(f"{column:<24}{values.mean():>9.2f}{p10:>9.2f}{p50:>9.2f}{p90:>9.2f}")
    top = np.asarray(fs.terms.sum(axis=0)).ravel()
    order = np.argsort(-top)[:12]
    lines.append("")
    lines.append(f"{fs.terms.shape[1]} topic terms in at least {min_df} headlines; most common: "
                 + ", ".join(f"{fs.term_names[i]} ({int(top[i])})" for i in order))
    return "\n".join(lines)
