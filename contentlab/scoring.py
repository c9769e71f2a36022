"""Score draft headlines before publishing: predicted rate, reasons, edits, ranking.

The editor's moment of use: a few drafts for tomorrow and ten minutes. For
each draft this module gives the model's predicted rate with a 90% interval,
where that rate would sit among the user's past posts on the same channel,
the two or three features that move it most (in plain words, as a relative
change against the channel's typical post), how far the draft is from the
history the model learned on, and, when asked, rewrites that score clearly
better and the best posting slots.

Comparisons between drafts use their joint uncertainty (see :mod:`contentlab.draftengine`).

``prepare_drafts`` turns a drafts frame (``headline``, optional ``channel``,
``publish_at``, ``group``) into what the model reads (``local_hour``,
``local_weekday`` in the workspace time zone); :func:`score_drafts` is the
Python API behind ``contentlab score``.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache
from typing import Iterable

import numpy as np
import pandas as pd

from .draftengine import DraftDesign, DraftEngine, engine_for, joint_logits, logistic, prob_better, rate_lift
from .errors import ContentlabError
from .percentages import probability, signed_percent

__all__ = [
    "score_drafts",
    "prepare_drafts",
    "read_drafts",
    "prob_better",
    "rate_lift",
    "joint_logits",
    "CAUTIONS",
    "MAX_DRAFT_CHARS",
]

# A headline, not body text: longer drafts are refused (our limit; the longest headlines
# in the demo and in the Upworthy archive are far below it).
from .readers import MAX_DRAFT_CHARS  # noqa: E402  (one limit for every drafts reader)
# "Clearly ahead": the model's probability that the top draft is truly better than the next
# is at least this (the same 90% the intervals use; our choice).
# From this P(truly better than the next draft) on, a group's leader is called "likely better" (our choice);
# below it the lead is a close call, which is what an experiment is for.
LIKELY_AHEAD = 0.8
# Past posts with fewer impressions than this are left out of percentiles: their observed
# rates are mostly binomial noise (common practice; the threshold is ours).
MIN_PERCENTILE_IMPRESSIONS = 100
# Fewer past posts than this on a channel make its percentile a rough guide only.
THIN_CHANNEL_POSTS = 30
# Contributions smaller than this on the log-odds (about 1%) are not worth a reason line.
MIN_REASON_LOGIT = 0.01

CAUTIONS = [
    "These predictions come from associations in your past posts, not proven causes: a feature that went "
    "with more clicks before may not cause them, and audiences change.",
    "Headlines must stay truthful: advertising and consumer-protection rules where you publish apply to "
    "them too. The rules differ from place to place; follow your local rules, and never add a number, "
    "claim or detail that is not true.",
]


# ------------------------------------------------------------------ drafts in

def read_drafts(path) -> pd.DataFrame:
    """A drafts CSV, read by the one drafts reader (:func:`contentlab.readers.read_drafts`)."""
    from .readers import read_drafts as read

    return read(path)


def _where(source: str | None, i: int) -> str:
    # Row numbers as in the file (header is line 1) when the drafts came from a CSV.
    return f"{source}: row {i + 2}" if source else f"draft {i + 1}"


def prepare_drafts(frame: pd.DataFrame, timezone: str = "UTC", **kwargs) -> pd.DataFrame:
    """Check drafts and add their local publish hour and weekday: :func:`contentlab.readers.prepare_drafts`."""
    from .readers import prepare_drafts as prepare

    return prepare(frame, timezone, **kwargs)


# ------------------------------------------------------------------ reasons

_PRESENT_ABSENT = {
    "is_question": ("is a question", "not a question"),
    "has_exclamation": ("has an exclamation mark", "no exclamation mark"),
    "leading_number": ("starts with a number", "does not start with a number"),
    "has_digit": ("has a number", "no number"),
    "list_form": ("reads as a list (\"N ways ...\")", "not a list"),
    "second_person": ("speaks to the reader (you)", "does not say 'you'"),
    "has_quote": ("has a quotation", "no quotation"),
    "split_colon_dash": ("has a colon or dash", "no colon or dash"),
}


def _plural(n: float, word: str) -> str:
    n = int(round(n))
    return f"{'no' if n == 0 else n} {word}{'' if n == 1 else 's'}"


def _feature_phrase(name: str, value: float | None, when: str | None) -> str:
    if name in _PRESENT_ABSENT:
        yes, no = _PRESENT_ABSENT[name]
        return yes if (value or 0) >= 0.5 else no
    if name == "posting time":
        return f"posting time ({when})" if when else "posting time (the channel's usual time)"
    if value is None:
        from .features import FEATURE_LABELS

        return FEATURE_LABELS.get(name, name)
    if name == "n_chars":
        return f"length ({int(round(value))} characters)"
    if name == "n_words":
        return f"{_plural(value, 'word')}"
    if name == "mean_word_length":
        return f"word length ({value:.1f} letters on average)"
    if name == "flesch_reading_ease":
        return f"readability (Flesch reading ease {value:.0f})"
    if name == "flesch_kincaid_grade":
        return f"reading grade {value:.1f}"
    if name == "n_negative_words":
        return _plural(value, "negative word")
    if name == "n_positive_words":
        return _plural(value, "positive word")
    if name == "n_allcaps_words":
        return _plural(value, "word") + " in capitals"
    if name == "n_emoji":
        return _plural(value, "emoji").replace("emojis", "emoji")
    if name == "posting time":
        return f"posting time ({when})" if when else "posting time (the channel's usual time)"
    from .features import FEATURE_LABELS

    return FEATURE_LABELS.get(name, name)


@lru_cache(maxsize=4096)
def _stems_of(text: str) -> dict[str, str]:
    from .features import _stem

    stems: dict[str, str] = {}
    for w in re.findall(r"[A-Za-z][A-Za-z']+", text):
        stems.setdefault(_stem(w.lower().replace("'s", "")), w.lower())
    return stems


def _word_for_term(term: str, text: str) -> str:
    """The headline's own words behind a stemmed term ('makerspac' -> 'makerspace')."""
    stems = _stems_of(text)
    parts = term.split(" ")
    shown = [stems.get(p, "a number" if p == "<num>" else p) for p in parts]
    return " ".join(shown)


_WEEKDAY_NAMES = ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"]


def _reason_rows(eng: DraftEngine, d: DraftDesign, frame: pd.DataFrame, top: int = 3) -> list[list[dict]]:
    """Per draft, the ``top`` feature groups with the largest contributions, in plain words."""
    contrib = eng.contributions(d)
    if contrib is None or contrib.empty:
        return [[] for _ in range(len(frame))]
    groups = [c for c in contrib.columns if c != "typical_logit"]
    C = contrib[groups].to_numpy(float)
    order = np.argsort(-np.abs(C), axis=1)[:, :top]
    # Plain Python values from here on: the per-draft loop runs 10,000 times for a large batch.
    top_c = np.take_along_axis(C, order, axis=1).tolist()
    order = order.tolist()
    raw_values = eng.raw_dense(d)
    raw_cols = {c: j for j, c in enumerate(eng.model.dense_columns_)} if raw_values is not None else {}
    raw_rows = raw_values.tolist() if raw_values is not None else None
    hours = frame["local_hour"].tolist() if "local_hour" in frame else [math.nan] * len(frame)
    wdays = frame["local_weekday"].tolist() if "local_weekday" in frame else [math.nan] * len(frame)
    text_groups = {g for g, name in enumerate(groups) if name in ("topic terms", "wording")}
    out: list[list[dict]] = []
    for i in range(len(frame)):
        rows = []
        for g, c in zip(order[i], top_c[i]):
            if abs(c) < MIN_REASON_LOGIT:
                continue
            name = groups[g]
            if g in text_groups:
                label = _text_group_label(eng, d, i, name)
            else:
                value = raw_rows[i][raw_cols[name]] if name in raw_cols else None
                when = None
                h = hours[i]
                if name == "posting time" and h == h:
                    hh = int(h)
                    mm = int(round((h - hh) * 60))
                    w = wdays[i]
                    day = _WEEKDAY_NAMES[int(w)] + " " if w == w else ""
                    when = f"{day}{hh:02d}:{mm:02d}"
                label = _feature_phrase(name, value, when)
            change = math.exp(c) - 1.0
            rows.append({"feature": name, "label": label, "logit": c, "change": change,
                         "text": f"{label}: {signed_percent(change)}"})
        out.append(rows)
    return out


def _top_text_columns(eng: DraftEngine, d: DraftDesign, group: str, k: int = 2) -> tuple[list, int]:
    """Per draft, the (up to ``k``) columns of a text block with the largest |effect|, vectorised."""
    start = eng.n_dense + (0 if group == "topic terms" else eng.n_terms)
    size = eng.n_terms if group == "topic terms" else eng.n_words
    sub = eng.own_text_columns(d, start, size)
    counts = np.diff(sub.indptr)
    rows = np.repeat(np.arange(sub.shape[0]), counts)
    order = np.lexsort((-np.abs(eng.coef[start + sub.indices]), rows))
    cols = sub.indices[order]
    out: list = [()] * sub.shape[0]
    for i in np.flatnonzero(counts).tolist():
        a = sub.indptr[i]
        out[i] = tuple(cols[a:a + min(k, counts[i])].tolist())
    return out, start


def _text_group_label(eng: DraftEngine, d: DraftDesign, i: int, group: str) -> str:
    """'topic words (makerspace, budget)': the draft's terms with the largest effects."""
    head = "topic words" if group == "topic terms" else "wording"
    if not eng.fast:
        return head
    if d.blocks is None:
        d.blocks = {}
    if group not in d.blocks:
        d.blocks[group] = _top_text_columns(eng, d, group)
    top, _ = d.blocks[group]
    cols = top[i]
    if not cols:
        return "no topic word your history knows" if group == "topic terms" else head
    names = eng.term_names if group == "topic terms" else eng.wording_names
    shown = [(_word_for_term(names[j], d.texts[i]) if group == "topic terms" else names[j].replace("<num>", "N"))
             for j in cols if j < len(names)]
    return f"{head} ({', '.join(repr(s) for s in shown)})" if shown else head


# --------------------------------------------------------------- percentiles

_RATES_CACHE: dict[tuple[int, int], tuple] = {}


def _history_rates(model, history: pd.DataFrame | None) -> dict[str, np.ndarray]:
    """Sorted observed rates of past posts per channel (cached per model and history frame)."""
    key = (id(model), id(history))
    hit = _RATES_CACHE.get(key)
    if hit is not None and hit[0] is model and hit[1] is history:
        return hit[2]
    rates = _compute_history_rates(model, history)
    _RATES_CACHE.clear()
    _RATES_CACHE[key] = (model, history, rates)
    return rates


def _compute_history_rates(model, history: pd.DataFrame | None) -> dict[str, np.ndarray]:
    """Sorted observed rates of past posts per channel (posts with enough impressions)."""
    outcome = getattr(model, "outcome_", "clicks")
    src = history
    if src is None or outcome not in src or "impressions" not in src:
        src = getattr(model, "training_posts_summary_", None)
    if src is None or outcome not in src:
        return {}
    n = pd.to_numeric(src["impressions"], errors="coerce").to_numpy(float)
    k = pd.to_numeric(src[outcome], errors="coerce").to_numpy(float)
    ch = src["channel"].fillna("(none)").astype(str).replace("", "(none)").to_numpy(object) if "channel" in src else \
        np.full(len(src), "(none)", dtype=object)
    ok = np.isfinite(n) & np.isfinite(k) & (n >= MIN_PERCENTILE_IMPRESSIONS)
    out = {}
    for c in pd.unique(ch[ok]):
        sel = ok & (ch == c)
        out[str(c)] = np.sort(k[sel] / n[sel])
    return out


# ---------------------------------------------------------------- suggestions

def _length_target(eng: DraftEngine, history: pd.DataFrame | None, channel: str) -> tuple[float, float] | None:
    """Where longer did best: the upper quartile of past lengths, when the model favours length."""
    if not eng.fast or "n_chars" not in eng.model.dense_columns_:
        return None
    j = eng.model.dense_columns_.index("n_chars")
    if eng.coef[j] <= 0:
        return None
    if history is None or "headline" not in history:
        return None
    sel = history
    if "channel" in history:
        same = history["channel"].fillna("(none)").astype(str) == channel
        if same.sum() >= 20:
            sel = history[same]
    lengths = sel["headline"].astype(str).str.len().to_numpy(float)
    if len(lengths) < 20:
        return None
    return float(np.percentile(lengths, 75)), float(np.percentile(lengths, 90))


def _casing_words(history: pd.DataFrame | None) -> frozenset[str]:
    """Words the history writes in lower case inside a headline (so not names)."""
    if history is None or "headline" not in history:
        return frozenset()
    key = id(history)
    hit = _CASING_CACHE.get(key)
    if hit is not None and hit[0] is history:
        return hit[1]
    words: set[str] = set()
    for text in history["headline"].astype(str).head(20000):
        for w in text.split()[1:]:
            w = w.strip(".,:;!?\"'()")
            if w.isalpha() and w.islower():
                words.add(w)
    result = frozenset(words)
    _CASING_CACHE.clear()
    _CASING_CACHE[key] = (history, result)
    return result


_CASING_CACHE: dict[int, tuple] = {}


def _suggestions(eng: DraftEngine, d: DraftDesign, prepared: pd.DataFrame, history: pd.DataFrame | None,
                 level: float, n_best: int) -> list[dict]:
    """Score every rewrite of every draft in one batch; keep the best whose lift interval excludes zero."""
    from . import edits

    lower = _casing_words(history)
    candidates: list[tuple[int, edits.Rewrite]] = []
    targets: dict[str, tuple | None] = {}
    for i, text in enumerate(d.texts):
        ch = str(d.channel[i])
        if ch not in targets:
            targets[ch] = _length_target(eng, history, ch)
        for r in edits.rewrites(text, length_range=targets[ch], lowercase_words=lower):
            candidates.append((i, r))
    results = [{"suggestions": [], "n_rewrites": 0, "note": ""} for _ in range(len(d.texts))]
    if candidates:
        src = np.array([i for i, _ in candidates])
        base = prepared.iloc[src].copy()
        base["headline"] = [r.scored_text for _, r in candidates]
        base.index = range(len(base))
        dr = eng.design(base)
        diff = dr.eta - d.eta[src]
        var = eng.diff_var(dr, np.arange(len(base)), d, src)
        sd = np.sqrt(np.maximum(var, 0.0))
        lift, low, high = rate_lift(d.eta[src], diff, sd, level)
        p = prob_better(dr.eta, d.eta[src], var, 0.0, 0.0)
        for k, (i, r) in enumerate(candidates):
            results[i]["n_rewrites"] += 1
            if low[k] > 0:  # the whole interval above zero: clearly better
                results[i]["suggestions"].append({
                    "kind": r.kind, "text": r.text, "scored_text": r.scored_text, "description": r.description,
                    "instruction": r.instruction,
                    "lift": float(lift[k]), "lift_low": float(low[k]), "lift_high": float(high[k]),
                    "p_better": float(p[k]), "predicted_rate": float(logistic(dr.eta[k])),
                })
    for res in results:
        res["suggestions"].sort(key=lambda s: -s["lift_low"])
        res["suggestions"] = res["suggestions"][:n_best]
        if not res["suggestions"]:
            n_r = res["n_rewrites"]
            plural = "" if n_r == 1 else "s"
            res["note"] = (
                f"no edit is clearly better ({n_r} rewrite{plural} scored; none has a lift whose "
                f"{int(level * 100)}% interval is above zero)" if n_r else "no safe rewrite applies to this draft"
            )
    return results


# ------------------------------------------------------------------ the API

def _as_frame(drafts) -> pd.DataFrame:
    if isinstance(drafts, pd.DataFrame):
        return drafts
    if isinstance(drafts, str):
        return pd.DataFrame({"headline": [drafts]})
    if isinstance(drafts, Iterable):
        items = list(drafts)
        if items and all(isinstance(x, dict) for x in items):
            return pd.DataFrame(items)
        if not all(isinstance(x, str) for x in items):
            raise ContentlabError("drafts must be headlines (text), a list of them, or a DataFrame with 'headline'")
        return pd.DataFrame({"headline": items})
    raise ContentlabError("drafts must be headlines (text), a list of them, or a DataFrame with 'headline'")


def _load(workspace, model, history, timezone, outcome):
    notes: list[str] = []
    if model is None and workspace is None:
        raise ContentlabError("give a workspace (folder or Workspace) or a fitted model to score with")
    if model is not None:
        tz = timezone or "UTC"
        if workspace is None:
            return model, history, tz, notes
    from .workspace import Workspace

    ws = workspace if isinstance(workspace, Workspace) else Workspace.open(workspace, create=False)
    try:
        if model is None:
            row = ws.latest_model_row(outcome)
            model, summary = ws.load_model(outcome)
            if row is not None and row[3] != ws.fingerprint(row[2]):
                notes.append("The model was learned before the latest changes to the history; run contentlab learn "
                             "to refresh it.")
        if history is None:
            history = ws.posts()
        tz = timezone or ws.timezone
    finally:
        if ws is not workspace:
            ws.close()
    return model, history, tz, notes


def score_drafts(
    drafts,
    workspace=None,
    *,
    model=None,
    history: pd.DataFrame | None = None,
    channel: str | None = None,
    at: str | None = None,
    suggest: bool = True,
    slots: bool = False,
    timezone: str | None = None,
    outcome: str | None = None,
    level: float | None = None,
    n_suggestions: int = 2,
    impressions=None,
    by_option: bool = True,
) -> pd.DataFrame:
    """Score draft headlines against the user's history; one row per draft, input columns kept.

    Parameters
    ----------
    drafts : str, list of str, or DataFrame
        Headlines, or a frame with ``headline`` and optional ``channel``,
        ``publish_at`` (local time in the workspace time zone) and ``group``
        (drafts are ranked within their group; without one, all together).
    workspace : path or Workspace, optional
        Where the model and history live (the latest model is used).
    model : fitted EngagementModel, optional
        Score with this model instead (``history`` then gives percentiles,
        slots and length targets; without it the model's own summary of its
        training posts gives the percentiles).
    channel, at : str, optional
        Channel and planned publish time for drafts that give none.
    suggest : bool
        Score rewrites of each draft and keep the best ``n_suggestions`` whose
        lift interval excludes zero.
    slots : bool
        Add the best posting slots of the coming week (needs a history with times).
    level : float, optional
        Coverage of the lift and slot intervals (default: the model's own
        ``interval``, which also sets ``rate_low``/``rate_high``).
    impressions : number or array, optional
        Impressions the posts are expected to get, for ``rate_low``/``rate_high``
        (default: the channel's median in history).
    by_option : bool
        Problems name the command-line option (``--channel``) where one would fix them; False (the JSON
        API, ``POST /api/score``) names the draft's ``"channel"`` field instead, as ``record_results`` does.

    Returns
    -------
    DataFrame with the input columns plus ``predicted_rate``, ``rate_low``,
    ``rate_high`` (the ``level`` interval of the rate the post will show at the
    channel's typical impressions), ``expected_low``/``expected_high`` (what the
    model knows about the typical rate), ``percentile`` (share of past posts on
    the channel with a lower rate) and ``n_channel_posts``, ``reasons``,
    ``rank``, ``p_better_than_next`` and ``verdict``, ``unseen_term_share``,
    ``far_from_history`` and ``distance_note``, then suggestion and slot
    columns. ``result.attrs`` holds ``cautions``, ``notes``, ``reasons`` (a
    list of dicts per row), ``suggestions`` and ``slot_plans``.
    """
    frame = _as_frame(drafts)
    model, history, tz, notes = _load(workspace, model, history, timezone, outcome)
    if level is None:
        level = float(getattr(model, "interval", 0.9))
    if not 0 < level < 1:
        raise ContentlabError(f"level must be between 0 and 1; got {level!r}")
    eng = engine_for(model)
    known = eng.channels or None
    prepared = prepare_drafts(frame, tz, channel=channel, at=at, known_channels=known)
    notes += prepared.attrs.get("time_notes", [])  # local publish times at a clock change: how they were read
    if (("channel" not in prepared) or prepared["channel"].isna().any()) and known and len(known) > 1 \
            and "(none)" not in known:
        missing = np.flatnonzero(prepared["channel"].isna().to_numpy()) if "channel" in prepared else [0]
        how = "--channel, or a 'channel' column" if by_option else 'its "channel" field'
        raise ContentlabError(
            f"{_where(frame.attrs.get('source'), int(missing[0]))}: give the draft a channel ({how}); "
            f"your history has several: {', '.join(known)}"
        )
    work = prepared.reset_index(drop=True)
    d = eng.design(work, impressions=impressions)
    pred = d.pred
    cols: dict[str, object] = {}
    if "channel" not in frame and "channel" in work:
        cols["channel"] = work["channel"].to_numpy(object)
    cols["planned_time"] = _planned_times(work)
    for c in ("predicted_rate", "rate_low", "rate_high", "expected_low", "expected_high", "logit", "logit_se",
              "impressions_assumed"):
        cols[c] = np.asarray(pred[c])

    # Percentile among past posts on the same channel.
    rates = _history_rates(model, history)
    perc = np.full(len(work), np.nan)
    n_posts = np.zeros(len(work), dtype=int)
    rate = np.asarray(pred["predicted_rate"], dtype=float)
    for c in pd.unique(d.channel):
        r = rates.get(str(c))
        if r is None or len(r) == 0:
            continue
        sel = d.channel == c
        perc[sel] = np.searchsorted(r, rate[sel], side="right") / len(r)
        n_posts[sel] = len(r)
    cols["percentile"] = perc
    cols["n_channel_posts"] = n_posts
    thin = sorted({str(c) for c, n in zip(d.channel, n_posts) if 0 < n < THIN_CHANNEL_POSTS})
    if thin:
        notes.append(f"Few past posts on {', '.join(thin)} (under {THIN_CHANNEL_POSTS}): the percentile there is "
                     "a rough guide.")

    # Reasons.
    reasons = _reason_rows(eng, d, work)
    shrink = np.asarray(pred["shrink_to_typical"], dtype=float) if "shrink_to_typical" in pred else \
        np.zeros(len(work))
    cols["reasons"] = ["; ".join(t for t in [_far_reason(w)] + [r["text"] for r in rows] if t)
                       for w, rows in zip(shrink, reasons)]

    # Distance from history.
    share = np.asarray(pred["unseen_term_share"], dtype=float)
    n_unseen = np.asarray(pred["n_unseen_terms"], dtype=int)
    outside = np.asarray(pred["n_outside_range"], dtype=int)
    far = np.asarray(pred["far_from_history"], dtype=bool)
    cols["unseen_term_share"] = share
    cols["far_from_history"] = far
    cols["distance_note"] = [_distance_note(s_, n_, o_, f_) for s_, n_, o_, f_ in zip(share, n_unseen, outside, far)]

    # Ranking within groups, and how sure the order is.
    cols.update(_rank(eng, d, work))

    attrs_suggestions = None
    if suggest:
        sugg = _suggestions(eng, d, work, history, level, n_suggestions)
        attrs_suggestions = sugg
        for k in range(n_suggestions):
            def pick(field, empty, k=k):
                return [s_["suggestions"][k][field] if len(s_["suggestions"]) > k else empty for s_ in sugg]

            cols[f"suggestion_{k + 1}"] = pick("text", None)
            cols[f"suggestion_{k + 1}_lift"] = pick("lift", np.nan)
            cols[f"suggestion_{k + 1}_low"] = pick("lift_low", np.nan)
            cols[f"suggestion_{k + 1}_high"] = pick("lift_high", np.nan)
            cols[f"suggestion_{k + 1}_how"] = pick("description", None)
        cols["suggestion_note"] = [s_["note"] for s_ in sugg]

    plans = None
    if slots:
        slot_cols, plans = _slot_columns(model, work, history, tz, notes, level)
        cols.update(slot_cols)

    validation = getattr(model, "validation_", None) or {}
    if isinstance(validation, dict) and validation.get("trustworthy") is False:
        notes.append("WARNING: on held-out posts the model did not beat every simple baseline; trust these "
                     "scores only as far as the learn output says.")
    if far.any():
        notes.append(f"{int(far.sum())} draft(s) are far from the history the model learned on (many unseen words "
                     "or a feature outside the history's range): their intervals are wider and less certain.")
    base = frame.reset_index(drop=True)
    data = {c: base[c].array for c in base.columns if c not in cols}
    data.update(cols)
    out = pd.DataFrame(data, index=base.index)
    out.attrs = {
        "cautions": list(CAUTIONS),
        "notes": notes,
        "reasons": reasons,
        "suggestions": attrs_suggestions,
        "slot_plans": plans,
        "level": level,
        "outcome": getattr(model, "outcome_", "clicks"),
        "timezone": tz,
    }
    return out


def _planned_times(work: pd.DataFrame) -> list[str]:
    """'Thu 2026-12-03 07:30' per draft, or the fallback the model uses when no time is given."""
    out = []
    for date, hour, wd in zip(work["local_date"], work["local_hour"], work["local_weekday"]):
        if pd.isna(date) or not date or pd.isna(wd):  # a draft without a time beside drafts with one
            out.append("no time given: channel's usual time")
            continue
        text = f"{_WEEKDAY_NAMES[int(wd)]} {date}"
        if np.isfinite(hour):
            hh = int(hour)
            text += f" {hh:02d}:{int(round((hour - hh) * 60)):02d}"
        else:
            text += " (no hour given: channel's usual time)"
        out.append(text)
    return out


def _far_reason(shrink: float) -> str:
    """Why a draft unlike the history scores near its channel's typical post."""
    if shrink >= 0.999:
        return ("unlike any headline in your history (length or wording far outside its usual range), so it is "
                "scored as the channel's typical post")
    if shrink > 0:
        return (f"partly outside your history's usual range, so its score is pulled {shrink:.0%} of the way toward "
                "the channel's typical post")
    return ""


def _distance_note(share: float, n_unseen: int, outside: int, far: bool) -> str:
    parts = []
    if n_unseen:
        parts.append(f"{share:.0%} of its words are new to the model ({n_unseen}); the interval is widened for them")
    else:
        parts.append("all its words are known to the model")
    if outside:
        parts.append(f"{outside} feature(s) outside the range of your history")
    text = "; ".join(parts)
    return ("FAR FROM HISTORY: " + text) if far else text


def _rank(eng: DraftEngine, d: DraftDesign, work: pd.DataFrame) -> dict[str, np.ndarray]:
    """Rank by predicted rate within group; P(truly better than the next one) from the difference."""
    groups = work["group"].fillna("").astype(str).to_numpy() if "group" in work else np.full(len(work), "")
    rank = np.zeros(len(work), dtype=int)
    p_next = np.full(len(work), np.nan)
    next_gap = np.full(len(work), np.nan)
    verdict = np.full(len(work), "", dtype=object)
    for g in pd.unique(groups):
        idx = np.flatnonzero(groups == g)
        order = idx[np.argsort(-d.eta[idx], kind="stable")]
        rank[order] = np.arange(1, len(order) + 1)
        if len(order) < 2:
            continue
        a, b = order[:-1], order[1:]
        var = eng.diff_var(d, a, d, b)
        p_next[a] = prob_better(d.eta[a], d.eta[b], var, 0.0, 0.0)
        next_gap[a] = logistic(d.eta[a]) / logistic(d.eta[b]) - 1.0
        verdict[order[0]] = lead_verdict(p_next[order[0]])
    return {"group_rank": rank, "p_better_than_next": p_next, "gap_to_next": next_gap, "verdict": verdict}


def lead_verdict(p: float | None) -> str:
    """How a group's leader is worded everywhere (score, report, web), from P(truly better than the next) alone.

    The drafts' 90% ranges nearly always overlap (they include post-to-post luck), so the lead is judged on
    the difference of the two predictions, and even a likely lead is a prediction that a test would confirm.
    """
    if p is None or not np.isfinite(p):
        return ""
    shown = probability(p)
    if p >= LIKELY_AHEAD:
        return f"likely better than the next draft (P(truly better) {shown}); a test would confirm it"
    return f"a close call with the next draft (P(truly better) {shown})"


def _slot_columns(model, work: pd.DataFrame, history: pd.DataFrame | None, tz: str,
                  notes: list[str], level: float = 0.9) -> tuple[dict, list]:
    from .slots import plan_slots

    names = ("best_slot", "best_slot_rate", "best_slot_lift", "best_slot_lift_low", "best_slot_lift_high",
             "usual_slot")
    if history is None or "local_weekday" not in history or "local_hour" not in history:
        notes.append("Best slots need the post history with posting times (score with a workspace, or pass history).")
        return {c: [None] * len(work) for c in names}, [None] * len(work)
    cols: dict[str, list] = {c: [] for c in names}
    plans = []
    cache: dict[tuple, object] = {}
    for i in range(len(work)):
        ch = work["channel"].iloc[i] if "channel" in work else None
        start = work["local_date"].iloc[i] if "local_date" in work and work["local_date"].iloc[i] else None
        key = (work["headline"].iloc[i], ch, start)
        if key not in cache:
            cache[key] = plan_slots(model, str(work["headline"].iloc[i]), ch, history, start=start, timezone=tz,
                                    level=level)
        plan = cache[key]
        plans.append(plan)
        b = plan.best.iloc[0] if len(plan.best) else None
        cols["best_slot"].append(b["slot"] if b is not None else None)
        for c, field in (("best_slot_rate", "predicted_rate"), ("best_slot_lift", "lift_vs_usual"),
                         ("best_slot_lift_low", "lift_low"), ("best_slot_lift_high", "lift_high")):
            cols[c].append(float(b[field]) if b is not None else np.nan)
        cols["usual_slot"].append(plan.usual.get("label") if plan.usual else None)
    return cols, plans


def score_frame(model, drafts: pd.DataFrame, timezone: str | None = None, impressions=None) -> pd.DataFrame:
    """The simplest scoring: the input columns plus ``predicted_rate``, ``rate_low``, ``rate_high``.

    What ``contentlab score --input DRAFTS.csv --format csv`` needs at the least,
    and what other modules (experiments, report) can call without the reasons,
    ranking and suggestions of :func:`score_drafts`. ``drafts`` may come from
    :func:`prepare_drafts` already (then ``timezone`` is not needed).
    """
    if timezone is None and "local_hour" in drafts:
        prepared = drafts
    else:
        prepared = prepare_drafts(drafts, timezone or "UTC", known_channels=getattr(model, "channels_", None))
    pred = model.predict_frame(prepared) if impressions is None else model.predict_frame(prepared, impressions)
    out = drafts.copy()
    for c in ("predicted_rate", "rate_low", "rate_high"):
        out[c] = pred[c].to_numpy()
    return out
