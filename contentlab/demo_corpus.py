"""The invented demo scenario: two years of posts by a fictional library network.

Everything here is made up. "Alderbank Libraries" does not exist; its posts,
branches and numbers are generated from a seeded random source so that the
same seed always gives the same corpus. Engagement follows a documented
ground-truth model (:data:`GROUND_TRUTH`) on the features contentlab itself
computes, with post-to-post noise and binomial sampling on top, so tests can
check that ``learn`` recovers what was put in.

Run ``python -m contentlab.demo_corpus corpus/`` to regenerate the files.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import pandas as pd

ORGANISATION = "Alderbank Libraries (fictional)"
TIMEZONE = "Europe/London"
START = pd.Timestamp("2024-12-02", tz=TIMEZONE)
END = pd.Timestamp("2026-11-29", tz=TIMEZONE)

# Ground truth, on the log-odds of a click per impression. Effects are per
# unit of the named feature as contentlab.features computes it.
GROUND_TRUTH: dict = {
    "description": (
        "Invented ground truth for the Alderbank Libraries demo corpus. logit(click rate) = "
        "channel baseline + sum(effect * feature) + hour curve + topic effects + N(0, post_noise_sd) noise; "
        "clicks ~ Binomial(impressions, rate)."
    ),
    "channel_baseline_logit": {"blog": -3.55, "newsletter": -2.85, "social_short": -4.35, "social_visual": -3.95},
    "effects": {
        "n_negative_words": 0.10,
        "n_positive_words": -0.05,
        "is_question": -0.16,
        "has_digit": 0.18,
        "n_chars": -0.006,
        "flesch_reading_ease": 0.004,
        "second_person": 0.0,
        "has_exclamation": -0.08,
    },
    "hour_effect": {"amplitude": 0.15, "peak_hour": 19.0, "form": "amplitude * cos(2*pi*(hour - peak_hour)/24)"},
    "topic_effects": {"makerspac": 0.25, "author": 0.15, "budget": -0.20, "park": -0.12},
    "post_noise_sd": 0.12,
    "engagement_multiplier": {"blog": 0.5, "newsletter": 0.3, "social_short": 1.6, "social_visual": 2.2},
}

BRANCHES = ["Millbrook", "Eastgate", "Harrow Lane", "Quayside", "Fenwick", "Old Market", "Brackley Hill"]
TOPICS = {
    "makerspace": ["the makerspace", "our makerspace", "the makerspace laser cutter", "makerspace open nights"],
    "author": ["a local author", "our author evenings", "a visiting author", "the author series"],
    "budget": ["the library budget", "next year's budget", "the budget consultation", "budget plans"],
    "parking": ["parking at the central library", "the new parking rules", "parking near the branches"],
    "storytime": ["storytime for toddlers", "weekend storytime", "bilingual storytime"],
    "digital": ["digital skills classes", "the laptop loan scheme", "online card sign-up", "the e-book app"],
    "history": ["the local history archive", "old maps of the valley", "the photo archive"],
    "reading": ["the summer reading challenge", "our book clubs", "the new fiction shelves", "large-print books"],
    "study": ["quiet study rooms", "homework clubs", "exam-season opening hours"],
}
NEGATIVE_CLAUSES = [
    ("after a difficult year", 1),
    ("as costs hurt families", 1),
    ("despite painful cuts", 2),
    ("when loneliness and worry strike", 2),
    ("after the flood damage", 1),
    ("amid a staffing crisis", 1),
]
POSITIVE_CLAUSES = [
    ("with wonderful volunteers", 1),
    ("for a happy weekend", 1),
    ("and we love it", 1),
    ("with brilliant, kind staff", 2),
    ("for a great start", 1),
]
PADDING = ["this spring", "at every branch", "for readers of every age", "across the valley", "starting next month",
           "in plain words", "from our team at the library"]
NUMBERS = [3, 4, 5, 6, 7, 8, 10, 12, 15]


def _topic_phrase(rng: np.random.Generator) -> tuple[str, str]:
    key = rng.choice(list(TOPICS))
    return key, str(rng.choice(TOPICS[key]))


def make_headline(rng: np.random.Generator) -> tuple[str, str]:
    """One invented headline and its topic key."""
    key, phrase = _topic_phrase(rng)
    branch = str(rng.choice(BRANCHES))
    style = rng.choice(["statement", "question", "number", "howto", "news"], p=[0.3, 0.18, 0.2, 0.12, 0.2])
    n = int(rng.choice(NUMBERS))
    if style == "statement":
        core = str(rng.choice([
            f"What is new with {phrase} at {branch}",
            f"Inside {phrase}",
            f"Meet the people behind {phrase}",
            f"Everything changing with {phrase}",
        ]))
    elif style == "question":
        core = str(rng.choice([
            f"Have you tried {phrase} yet?",
            f"Is {phrase} right for you?",
            f"Could {phrase} change how {branch} reads?",
            f"Why does {phrase} matter to {branch}?",
        ]))
    elif style == "number":
        core = str(rng.choice([
            f"{n} things to know about {phrase}",
            f"{n} reasons to visit {phrase}",
            f"{n} changes to {phrase} at {branch}",
            f"{phrase.capitalize()}: {n} dates for your diary",
        ]))
    elif style == "howto":
        core = str(rng.choice([
            f"How to get the most from {phrase}",
            f"How {phrase} works, step by step",
            f"A short guide to {phrase}",
        ]))
    else:
        core = str(rng.choice([
            f"{branch} opens {phrase} to everyone",
            f"Updates on {phrase} from {branch}",
            f"{branch} consults readers on {phrase}",
        ]))
    extras = []
    if rng.random() < 0.35:
        extras.append(NEGATIVE_CLAUSES[rng.integers(len(NEGATIVE_CLAUSES))][0])
    if rng.random() < 0.3:
        extras.append(POSITIVE_CLAUSES[rng.integers(len(POSITIVE_CLAUSES))][0])
    if rng.random() < 0.4:
        extras.append(str(rng.choice(PADDING)))
    if rng.random() < 0.08 and not core.endswith("?"):
        core += "!"
    question = core.endswith("?")
    exclaim = core.endswith("!")
    body = core.rstrip("?!")
    if extras:
        body = body + " " + " ".join(extras)
    text = body + ("?" if question else "") + ("!" if exclaim else "")
    return text[0].upper() + text[1:], key


def true_logit(features: pd.DataFrame, terms_present: dict[str, np.ndarray], channel: pd.Series,
               hour: np.ndarray, truth: dict = GROUND_TRUTH) -> np.ndarray:
    """The ground-truth log-odds of a click, before post-level noise."""
    eta = channel.map(truth["channel_baseline_logit"]).to_numpy(dtype=float)
    for name, effect in truth["effects"].items():
        eta = eta + effect * features[name].to_numpy(dtype=float)
    he = truth["hour_effect"]
    eta = eta + he["amplitude"] * np.cos(2 * np.pi * (hour - he["peak_hour"]) / 24.0)
    for term, effect in truth["topic_effects"].items():
        eta = eta + effect * terms_present[term]
    return eta


def generate(seed: int = 20261201, n_posts: int = 2000) -> tuple[pd.DataFrame, dict]:
    """The demo post history (as an export would look) and its ground truth."""
    from .features import HeadlineFeaturizer, topic_tokens

    rng = np.random.default_rng(seed)
    channels = np.array(["blog", "newsletter", "social_short", "social_visual"])
    channel_p = np.array([0.2, 0.15, 0.4, 0.25])
    usual_hour = {"blog": (8.0, 3.0), "newsletter": (7.5, 1.5), "social_short": (14.0, 4.5), "social_visual": (17.0, 4.0)}
    impressions_median = {"blog": 2600, "newsletter": 9000, "social_short": 4200, "social_visual": 3200}

    span = (END - START).total_seconds()
    rows = []
    n_experiments = 0
    while len(rows) < n_posts:
        channel = str(rng.choice(channels, p=channel_p))
        day = START + pd.Timedelta(seconds=float(rng.random() * span))
        mu, sd = usual_hour[channel]
        hour = float(np.clip(rng.normal(mu, sd), 6.0, 22.75))
        when = day.normalize() + pd.Timedelta(minutes=int(round(hour * 4)) * 15)
        median = impressions_median[channel] * (1 + 0.25 * (day - START).days / 730)
        # A few tiny posts (a test upload, a deleted story) are part of real exports.
        tiny = rng.random() < 0.02
        base_impr = int(max(20, rng.lognormal(np.log(median), 0.55))) if not tiny else int(rng.integers(15, 60))
        n_arms = 1
        if channel in ("newsletter", "blog") and rng.random() < 0.12:
            n_arms = int(rng.choice([2, 3]))
        experiment = f"ALB-T{n_experiments + 1:03d}" if n_arms > 1 else ""
        n_experiments += n_arms > 1
        headline, key = make_headline(rng)
        image = f"img-{rng.integers(1, 400):04d}"
        cost = round(float(rng.gamma(2.0, 12.0)), 2) if channel == "social_visual" and rng.random() < 0.4 else None
        for arm in range(n_arms):
            if arm > 0:
                # Arms of a test: a new headline on the same topic, same slot and image.
                for _ in range(20):
                    headline, key2 = make_headline(rng)
                    if key2 == key:
                        break
            rows.append({
                "post_id": f"ALB-{len(rows) + 1:05d}",
                "published_at": when.isoformat(),
                "channel": channel,
                "headline": headline,
                "impressions": base_impr if n_arms == 1 else max(20, base_impr // n_arms),
                "experiment_id": experiment,
                "image_id": image,
                "cost": cost if arm == 0 else None,
                "_hour": hour,
            })
    frame = pd.DataFrame(rows[:n_posts])
    frame = frame.sort_values(["published_at", "post_id"]).reset_index(drop=True)
    featurizer = HeadlineFeaturizer(min_df=1, n_jobs=1).fit(frame)
    fs = featurizer.transform(frame)
    token_sets = [set(topic_tokens(t)) for t in fs.text]
    terms = {t: np.array([t in s for s in token_sets], dtype=float) for t in GROUND_TRUTH["topic_effects"]}
    eta = true_logit(fs.dense, terms, frame["channel"], frame["_hour"].to_numpy())
    eta = eta + rng.normal(0.0, GROUND_TRUTH["post_noise_sd"], len(frame))
    rate = 1.0 / (1.0 + np.exp(-eta))
    frame["clicks"] = rng.binomial(frame["impressions"].to_numpy(), rate)
    mult = frame["channel"].map(GROUND_TRUTH["engagement_multiplier"]).to_numpy()
    engage_rate = np.clip(rate * mult, 0, 0.5)
    engagements = rng.binomial(frame["impressions"].to_numpy(), engage_rate)
    split = rng.dirichlet([6, 2, 1.5], len(frame))
    likes = np.floor(engagements * split[:, 0]).astype(int)
    comments = np.floor(engagements * split[:, 1]).astype(int)
    frame["likes"] = likes
    frame["comments"] = comments
    frame["shares"] = engagements - likes - comments
    frame = frame.drop(columns="_hour")
    truth = dict(GROUND_TRUTH)
    truth.update({
        "organisation": ORGANISATION,
        "timezone": TIMEZONE,
        "seed": seed,
        "n_posts": int(len(frame)),
        "invented": True,
    })
    columns = ["post_id", "published_at", "channel", "headline", "impressions", "clicks", "likes", "comments",
               "shares", "experiment_id", "image_id", "cost"]
    return frame[columns], truth


DRAFTS = [
    # group, channel, publish_at, headline
    ("makerspace-launch", "newsletter", "2026-12-03 07:30", "Have you tried the makerspace laser cutter yet?"),
    ("makerspace-launch", "newsletter", "2026-12-03 07:30", "5 things to know about the makerspace laser cutter"),
    ("makerspace-launch", "newsletter", "2026-12-03 07:30", "Inside the makerspace laser cutter"),
    ("makerspace-launch", "newsletter", "2026-12-03 07:30", "The makerspace laser cutter is here and we love it!"),
    ("budget-consultation", "blog", "2026-12-04 09:00", "Is the library budget right for you?"),
    ("budget-consultation", "blog", "2026-12-04 09:00", "4 changes to the library budget after a difficult year"),
    ("budget-consultation", "blog", "2026-12-04 09:00", "Updates on the library budget from Eastgate"),
    ("budget-consultation", "blog", "2026-12-04 09:00", "How the library budget works, step by step, in plain words for readers of every age"),
    ("author-evening", "social_short", "2026-12-05 18:00", "A visiting author comes to Quayside this Friday"),
    ("author-evening", "social_short", "2026-12-05 18:00", "Why does a visiting author matter to Quayside?"),
    ("author-evening", "social_short", "2026-12-05 18:00", "3 reasons to meet a visiting author at Quayside"),
    ("author-evening", "social_short", "2026-12-05 18:00", "Meet a visiting author at Quayside with wonderful volunteers"),
    ("winter-reading", "social_visual", "2026-12-06 17:00", "The winter reading challenge starts at every branch"),
    ("winter-reading", "social_visual", "2026-12-06 17:00", "Could the winter reading challenge beat the January gloom?"),
    ("winter-reading", "social_visual", "2026-12-06 17:00", "6 books to start the winter reading challenge"),
    ("winter-reading", "social_visual", "2026-12-06 17:00", "Winter reading challenge: a happy, great start to the year!"),
    ("study-rooms", "blog", "2026-12-07 08:00", "Quiet study rooms open late for exam season"),
    ("study-rooms", "blog", "2026-12-07 08:00", "Worried about exams? Quiet study rooms open late"),
    ("study-rooms", "blog", "2026-12-07 08:00", "10 late-night quiet study rooms across the valley"),
    ("study-rooms", "blog", "2026-12-07 08:00", "Are quiet study rooms the answer to exam stress?"),
]


def drafts_frame() -> pd.DataFrame:
    return pd.DataFrame(DRAFTS, columns=["group", "channel", "publish_at", "headline"])[
        ["headline", "channel", "publish_at", "group"]
    ]


def write_corpus(directory: Path, seed: int = 20261201, n_posts: int = 2000) -> dict[str, Path]:
    """Write posts.csv, ground_truth.json and drafts.csv into ``directory``."""
    directory.mkdir(parents=True, exist_ok=True)
    posts, truth = generate(seed=seed, n_posts=n_posts)
    paths = {
        "posts": directory / "posts.csv",
        "truth": directory / "ground_truth.json",
        "drafts": directory / "drafts.csv",
    }
    posts.to_csv(paths["posts"], index=False)
    paths["truth"].write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
    drafts_frame().to_csv(paths["drafts"], index=False)
    return paths


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(
        description="Regenerate the invented demo corpus (Alderbank Libraries, a fictional organisation).",
        epilog="example: python -m contentlab.demo_corpus corpus/ --seed 20261201",
    )
    parser.add_argument("directory", type=Path)
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--posts", type=int, default=2000)
    args = parser.parse_args(argv)
    for name, path in write_corpus(args.directory, args.seed, args.posts).items():
        print(f"wrote {name}: {path}")


if __name__ == "__main__":
    main()


def true_rates(headlines: list[str], channel: str, hour: float, truth: dict = GROUND_TRUTH) -> np.ndarray:
    """Ground-truth click rates of invented headlines (no post noise): the demo's simulated audience."""
    from .features import HeadlineFeaturizer, topic_tokens

    frame = pd.DataFrame({"headline": headlines, "channel": channel})
    fs = HeadlineFeaturizer(min_df=1, n_jobs=1).fit(frame).transform(frame)
    token_sets = [set(topic_tokens(t)) for t in fs.text]
    terms = {t: np.array([t in s for s in token_sets], dtype=float) for t in truth["topic_effects"]}
    eta = true_logit(fs.dense, terms, frame["channel"], np.full(len(frame), float(hour)), truth)
    return 1.0 / (1.0 + np.exp(-eta))
