"""Drivers: what raised and what lowered engagement, as relative changes for meaningful steps.

A coefficient on a standardised column means nothing to an editor. Each
effect is turned into the change of the rate for a step they can picture
(one more negative word, ten more characters, 18:00 rather than 09:00, a
topic word present), evaluated at the history's typical rate, with a 90%
interval from the spread of the same quantity across the model's bootstrap
refits (which resample whole experiments, or weeks outside experiments):
estimate +- 1.645 bootstrap standard errors on the log-odds. Effects whose
interval includes zero are marked uncertain.

A topic word's effect is "the word and the phrases built on it": its own
column plus, weighted by how often they come with it, the bigram and wording
columns that contain it. Ridge penalties share one effect among columns that
always appear together, so the word's column alone would understate it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.special import expit, logit

from .features import FEATURE_LABELS, TIME_COLUMNS, time_features
from .percentages import adaptive_percent

if TYPE_CHECKING:  # pragma: no cover
    from .model import EngagementModel

__all__ = ["driver_table", "driver_sentences", "driver_cautions", "STEPS"]

BINARY = {
    "is_question": "are questions",
    "has_exclamation": "have an exclamation mark",
    "leading_number": "start with a number",
    "has_digit": "have a number",
    "list_form": "are lists (\"7 ways ...\")",
    "second_person": "speak to the reader (you, your)",
    "has_quote": "have a quotation",
    "split_colon_dash": "have a colon or dash",
    "starts_with_question_word": "start with what, why, how, who, when, where or which",
}
# feature: (step in its own units, what the step is, phrase for a sentence)
STEPS: dict[str, tuple[float, str, str]] = {
    "n_chars": (10.0, "+10 characters", "Ten more characters"),
    "n_words": (2.0, "+2 words", "Two more words"),
    "mean_word_length": (1.0, "+1 letter per word", "Words one letter longer on average"),
    "flesch_reading_ease": (10.0, "+10 reading-ease points", "Ten points easier to read (Flesch reading ease)"),
    "flesch_kincaid_grade": (1.0, "+1 grade", "One reading grade higher"),
    "n_negative_words": (1.0, "+1 negative word", "Each extra negative word"),
    "n_positive_words": (1.0, "+1 positive word", "Each extra positive word"),
    "n_allcaps_words": (1.0, "+1 word in capitals", "Each extra word in capitals"),
    "n_emoji": (1.0, "+1 emoji", "Each extra emoji"),
    "n_first_singular": (1.0, "+1 of I, me, my", "Each extra I, me or my"),
    "n_first_plural": (1.0, "+1 of we, us, our", "Each extra we, us or our"),
    "n_third_person": (1.0, "+1 of he, she, they", "Each extra he, she or they"),
    "n_this_here": (1.0, "+1 of this, these, here", "Each extra this, these or here"),
    "n_negations": (1.0, "+1 negation", "Each extra negation (not, no, never)"),
    "n_superlatives": (1.0, "+1 superlative", "Each extra superlative (best, most ...)"),
    "vader_compound": (0.5, "+0.5 sentiment", "A sentiment score 0.5 higher"),
    "vader_positive": (0.1, "+0.1 positive share", "A 10-point larger positive share"),
    "vader_negative": (0.1, "+0.1 negative share", "A 10-point larger negative share"),
}
HOUR_CONTRAST = (18.0, 9.0)
# A topic word is listed only with support (our threshold, stated in every listing): it must
# have varied inside at least MIN_TERM_TESTS A/B tests (some arms with it, some without) --
# only there does a test say what the word did, and ten arms of one test are one piece of
# evidence, not ten -- or appeared in ordinary posts (outside tests) of at least
# MIN_TERM_CLUSTERS different weeks. And in at least ``min_term_posts`` posts either way.
MIN_TERM_TESTS = 5
MIN_TERM_CLUSTERS = 5
GROUPS = ("writing style", "posting time", "topic words")
SUPPORT_RULE = (
    f"A topic word is listed only when it varied inside at least {MIN_TERM_TESTS} A/B tests (some arms with it, "
    f"some without) or appeared in ordinary posts of at least {MIN_TERM_CLUSTERS} different weeks; words that "
    "always occur together are one driver."
)


def _evidence(share: float, has_experiments: bool) -> str:
    if not has_experiments or share <= 0.2:
        return "observational"
    if share >= 0.8:
        return "within experiments"
    return f"mixed ({share:.0%} within experiments)"


def _surface_words(model: "EngagementModel") -> dict[str, str]:
    """Stem -> the most frequent history word with that stem (for readable term names)."""
    from .features import _stem

    out: dict[str, str] = {}
    for name in model.wording_names_:
        if " " not in name and name.isalpha():
            stem = _stem(name)
            out.setdefault(stem, name)
    return out


def driver_table(model: "EngagementModel", *, top_terms: int = 15, min_term_posts: int = 10) -> pd.DataFrame:
    """One row per driver: writing style first, then posting time, then topic words; surest first in each.

    Columns: ``rank, driver, kind, step, effect_logit, relative_change, low, high,
    uncertain, evidence, within_experiment_share, n_posts, label, group, sureness,
    sentence``. ``driver`` is the stable key (a column name, or ``term: word``);
    ``label`` is what tables show; ``group`` is "writing style", "posting time" or
    "topic words"; ``sureness`` is |effect| over its bootstrap standard error. At
    most ``top_terms`` topic words, each with support (``SUPPORT_RULE``). The
    cautions that go with the table are in ``frame.attrs["cautions"]``.
    """
    st = model.state_
    coef = model.glm_.coef_[: model.n_shared_]
    boot = model.boot_coef_[:, :-1].astype(float)
    has_boot = boot.shape[0] >= 2
    scale = st["scale"]
    share = model.within_share_
    has_exp = model.n_experiment_posts_ > 0
    records = []

    def add(driver, kind, step, vec, n_posts, sentence_head, share_value):
        effect = float(vec @ coef)
        bvals = boot @ vec if has_boot else np.array([np.nan])
        records.append((driver, kind, step, effect, bvals, n_posts, sentence_head, share_value))

    names = model.dense_columns_
    for j, name in enumerate(names):
        if name in TIME_COLUMNS:
            continue
        vec = np.zeros(model.n_shared_)
        if name in BINARY:
            vec[j] = 1.0 / scale[j]
            add(name, "feature", "present vs absent", vec, None, f"Headlines that {BINARY[name]}", share[j])
        else:
            step, step_text, head = STEPS.get(name, (1.0, "+1", f"One more unit of {name}"))
            vec[j] = step / scale[j]
            add(name, "feature", step_text, vec, None, head, share[j])

    hour_idx = [j for j, c in enumerate(names) if c in ("hour_sin", "hour_cos", "hour_sin2", "hour_cos2")]
    if hour_idx:
        tf = time_features(np.array(HOUR_CONTRAST), np.array([np.nan, np.nan]))
        vec = np.zeros(model.n_shared_)
        for j in hour_idx:
            vec[j] = (tf[names[j]].iloc[0] - tf[names[j]].iloc[1]) / scale[j]
        a, b = HOUR_CONTRAST
        add("posting hour", "time", f"{a:02.0f}:00 vs {b:02.0f}:00", vec, None,
            f"Posts at {a:02.0f}:00 rather than {b:02.0f}:00", float(np.mean(share[hour_idx])))
    wd_idx = [j for j, c in enumerate(names) if c in ("weekday_sin", "weekday_cos")]
    if wd_idx:
        days = np.arange(7, dtype=float)
        tf = time_features(np.full(7, np.nan), days)
        vec = np.zeros(model.n_shared_)
        for j in wd_idx:
            col = tf[names[j]].to_numpy()
            vec[j] = (col[5:].mean() - col[:5].mean()) / scale[j]
        add("weekend", "time", "Sat/Sun vs Mon-Fri", vec, None, "Posts at the weekend rather than on weekdays",
            float(np.mean(share[wd_idx])))

    d = len(st["dense_idx"])
    A = sp.csr_matrix(model.term_groups_)
    eligible = model.term_group_index_
    keep = supported_terms(model, min_term_posts)
    if keep.size and top_terms > 0:
        words = _surface_words(model)
        phrases = frozenset(n for n in model.wording_names_ if " " in n)
        for r, members in _merged_terms(A, eligible, keep, d, model.term_df_):
            i = eligible[r]
            shown = _reading_order([words.get(model.term_names_[eligible[m]], model.term_names_[eligible[m]])
                                    for m in members], phrases)
            word = " ".join(shown)
            vec = np.asarray(A[r].toarray()).ravel()
            head = f"Headlines with the word '{word}'" if len(shown) == 1 else \
                f"Headlines with the words '{word}' (always together)"
            add(f"term: {word}", "topic term", "present vs absent", vec, int(model.term_df_[i]), head,
                float(share[d + i]))

    r0 = model.typical_rate_
    base = logit(r0)
    rel = lambda e: expit(base + e) / r0 - 1.0  # noqa: E731
    from scipy.special import ndtri

    z = float(ndtri(0.5 + model.interval / 2))
    rows = []
    sds: list[float] = []
    for driver, kind, step, effect, bvals, n_posts, head, sh in records:
        if has_boot:
            # Normal interval with the bootstrap standard error, centred on the estimate: with
            # ~100 refits the tails' percentiles are unsteady, and for rare words the refits
            # that miss the word pile up at zero and would put the estimate outside its own
            # percentile interval.
            sd = float(np.std(bvals, ddof=1))
            sds.append(sd)
            lo_e, hi_e = effect - z * sd, effect + z * sd
            low, high = rel(lo_e), rel(hi_e)
            uncertain = bool(lo_e <= 0 <= hi_e)
        else:
            low = high = float("nan")
            uncertain = True
            sds.append(float("nan"))
        rows.append({
            "driver": driver,
            "kind": kind,
            "step": step,
            "effect_logit": effect,
            "relative_change": rel(effect),
            "low": low,
            "high": high,
            "uncertain": uncertain,
            "evidence": _evidence(sh, has_exp),
            "within_experiment_share": float(sh),
            "n_posts": n_posts,
            "head_phrase": head,
            "_sd": sds[-1],
        })
    frame = pd.DataFrame(rows)
    if frame.empty:
        frame = pd.DataFrame(columns=["driver", "kind", "step", "effect_logit", "relative_change", "low", "high",
                                      "uncertain", "evidence", "within_experiment_share", "n_posts", "head_phrase",
                                      "_sd"])
    frame["label"] = [_label(r.driver, r.kind) for r in frame.itertuples()]
    frame["group"] = frame["kind"].map({"feature": GROUPS[0], "time": GROUPS[1], "topic term": GROUPS[2]})
    frame["sureness"] = np.abs(frame["effect_logit"]) / np.maximum(frame.pop("_sd"), 1e-12)
    # How a headline is written first, then when it is posted, then what it is about; inside each,
    # the surest effects first (|effect| / bootstrap standard error), not the biggest.
    order = frame.assign(_g=frame["group"].map({g: i for i, g in enumerate(GROUPS)}),
                         _u=frame["uncertain"].astype(bool), _s=-frame["sureness"].fillna(0.0))
    frame = frame.loc[order.sort_values(["_g", "_u", "_s"], kind="stable").index].reset_index(drop=True)
    is_term = (frame["kind"] == "topic term").to_numpy()
    frame = frame[~is_term | (np.cumsum(is_term) <= top_terms)].reset_index(drop=True)
    frame.insert(0, "rank", np.arange(1, len(frame) + 1))
    outcome = model.outcome_
    frame["sentence"] = [_sentence(r, outcome, model.interval) for r in frame.itertuples()]
    frame = frame.drop(columns="head_phrase")
    frame.attrs["cautions"] = driver_cautions(model, frame["evidence"].tolist(),
                                              has_terms=bool((frame["kind"] == "topic term").any()))
    return frame


def _label(driver: str, kind: str) -> str:
    """The plain name every table shows: "has a number", "the word 'makerspace'"."""
    if kind == "topic term":
        word = driver[len("term: "):]
        return f"the words '{word}'" if " " in word else f"the word '{word}'"
    return FEATURE_LABELS.get(driver, driver.replace("_", " "))


def _reading_order(words: list[str], phrases: frozenset[str]) -> list[str]:
    """Merged words in the order headlines use them ("laser cutter", not "cutter laser")."""
    from itertools import permutations

    if len(words) < 2 or len(words) > 4:
        return words
    best = max(permutations(words), key=lambda p: sum(f"{a} {b}" in phrases for a, b in zip(p, p[1:])))
    return list(best)


def supported_terms(model: "EngagementModel", min_term_posts: int = 10) -> np.ndarray:
    """Rows of ``model.term_groups_`` whose word has enough support (see ``SUPPORT_RULE``)."""
    eligible = model.term_group_index_
    if eligible.size == 0:
        return eligible
    enough_posts = model.term_df_[eligible] >= min_term_posts
    tests = getattr(model, "term_varied_tests_", np.zeros(len(eligible)))
    weeks = getattr(model, "term_weeks_outside_tests_", getattr(model, "term_clusters_", np.zeros(len(eligible))))
    support = (tests >= MIN_TERM_TESTS) | (weeks >= MIN_TERM_CLUSTERS)
    return np.flatnonzero(enough_posts & support)


def _merged_terms(A, eligible: np.ndarray, keep: np.ndarray, d: int, df: np.ndarray) -> list[tuple[int, list[int]]]:
    """Supported words grouped when each (almost) only occurs with the other ('laser' + 'cutter').

    Two words are merged when each one's column is tied to the other's row of ``term_groups_``
    (P(a | b) and P(b | a) both >= 0.9). Returns (row to report, member rows in reading order),
    the most frequent member reporting for the group.
    """
    keep_set = set(int(r) for r in keep)
    col_of = {int(r): d + int(eligible[r]) for r in keep}
    parent = {r: r for r in keep_set}

    def find(r):
        while parent[r] != r:
            parent[r] = parent[parent[r]]
            r = parent[r]
        return r

    rows = sorted(keep_set)
    for a in rows:
        for b in rows:
            if a < b and A[a, col_of[b]] > 0 and A[b, col_of[a]] > 0:
                parent[find(b)] = find(a)
    groups: dict[int, list[int]] = {}
    for r in rows:
        groups.setdefault(find(r), []).append(r)
    out = []
    for members in groups.values():
        lead = max(members, key=lambda m: (df[eligible[m]], -m))
        out.append((lead, members))
    return out


def _sentence(row, outcome: str, interval: float) -> str:
    pct = row.relative_change
    more = "more" if pct >= 0 else "fewer"
    size = adaptive_percent(abs(pct))
    text = f"{row.head_phrase} went with about {size} {more} {outcome}"
    if row.kind == "feature" and row.step == "present vs absent":
        text = f"{row.head_phrase} got about {size} {more} {outcome} than those that do not"
    elif row.kind == "topic term":
        text = f"{row.head_phrase} got about {size} {more} {outcome} than those without it"
    elif row.kind == "time":
        text = f"{row.head_phrase} got about {size} {more} {outcome}"
    if np.isfinite(row.low):
        text += (f" ({interval:.0%} interval {adaptive_percent(row.low, signed=True)} "
                 f"to {adaptive_percent(row.high, signed=True)})")
    if row.uncertain:
        text += "; uncertain: the interval includes no effect"
    return text + "."


def driver_sentences(frame: pd.DataFrame, n: int = 5) -> list[str]:
    """Plain sentences for the ``n`` largest drivers, the clear ones first."""
    clear = frame[~frame["uncertain"]]
    rest = frame[frame["uncertain"]]
    return pd.concat([clear, rest])["sentence"].head(n).tolist()


def driver_cautions(model: "EngagementModel", evidence: list[str] | None = None, has_terms: bool = False) -> list[str]:
    """The cautions every drivers listing carries; the note on tests names only marks that are shown."""
    out = [
        "These are associations in your own post history, not proof of cause: topics, seasons and "
        "audiences that changed together with a feature can produce or hide an effect.",
    ]
    marks = set(evidence or [])
    within = "within experiments" in marks
    mixed = any(str(m).startswith("mixed") for m in marks)
    if model.n_experiment_posts_ > 0 and (within or mixed):
        which = ("Effects marked 'within experiments'" if within and not mixed else
                 "Effects marked 'mixed (N% within experiments)'" if mixed and not within else
                 "Effects marked 'within experiments' (and, in part, those marked 'mixed')")
        out.append(
            f"{which} rest on {model.n_experiments_} A/B tests whose arms were shown "
            "to randomly split audiences; they are causal only for what those tests varied, on those audiences."
        )
    if has_terms:
        out.append(SUPPORT_RULE)
    if model.boot_coef_.shape[0] < 2:
        out.append("No bootstrap was run, so there are no intervals; every effect is marked uncertain.")
    if not model.validation_.get("trustworthy", True):
        out.append(
            "The model did not beat a simple baseline on held-out later posts (see learn's validation); "
            "do not act on these drivers."
        )
    if model.n_posts_ < 300:
        out.append(f"Evidence is thin: only {model.n_posts_} posts. Expect wide intervals and effects that change "
                   "as history grows.")
    out.append(
        "Headlines must stay truthful: advertising and consumer-protection rules, which vary by place, apply "
        "whatever the history says; follow your local rules."
    )
    return out
