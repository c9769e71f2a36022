"""Turn headlines and posting times into model features.

Pure functions compute each family of features from clean text; the
:class:`HeadlineFeaturizer` estimator learns the topic-term vocabulary from
history (``fit``) and then turns any headlines, past or draft, into the same
columns (``transform``). Everything is deterministic.

Speed matters because scoring thousands of drafts and importing a million
posts both go through here, so the per-headline work is kept small:

* text is de-duplicated before the expensive parts run;
* syllables are counted once per distinct word (textstat, cached);
* VADER runs only on headlines that contain at least one lexicon token — for
  the rest its result is known exactly (see :func:`vader_scores`);
* structure features are vectorised regular expressions over the whole column;
* on large batches the per-headline part is spread over both cores.
"""

from __future__ import annotations

import html
import math
import os
import re
import string
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Iterable, Sequence

import numpy as np
import pandas as pd
from scipy import sparse

from .errors import ContentlabError

# ---------------------------------------------------------------- cleaning

_TAG = re.compile(r"<[^>]{0,200}>")
_SPACE = re.compile(r"\s+")


def clean_headline(raw: object) -> str:
    """Strip HTML tags and entities (real exports carry ``<br>``, ``&amp;``)."""
    if raw is None or (isinstance(raw, float) and math.isnan(raw)):
        return ""
    text = str(raw)
    text = _TAG.sub(" ", text)
    text = html.unescape(text)
    # A second pass catches tags that were entity-encoded (``&lt;br&gt;``).
    text = _TAG.sub(" ", text)
    return _SPACE.sub(" ", text).strip()


# ------------------------------------------------------------ text analysis

_WORD = re.compile(r"[^\W_]+(?:['’][^\W_]+)*", re.UNICODE)


def words_of(text: str) -> list[str]:
    """Words for length counts: runs of letters/digits, apostrophes kept inside."""
    return _WORD.findall(text)


def length_features(text: str) -> tuple[int, int, float]:
    """Characters, words and mean word length (letters per word)."""
    words = words_of(text)
    n_words = len(words)
    mean_len = sum(len(w) for w in words) / n_words if n_words else 0.0
    return len(text), n_words, mean_len


def readability(text: str) -> tuple[float, float]:
    """Flesch Reading Ease and Flesch-Kincaid grade, as textstat computes them.

    Same counts as ``textstat.flesch_reading_ease`` / ``flesch_kincaid_grade``
    (its word list, its sentence count, CMU-dictionary syllables with a
    hyphenation fallback) but syllables are cached per word rather than per
    text, which matters when every headline is new. The benchmark checks the
    two agree on every headline.
    """
    from textstat.backend.counts._count_sentences import count_sentences
    from textstat.backend.selections._list_words import list_words

    words = list_words(text, lowercase=True)
    n_words = len(words)
    n_sentences = count_sentences(text)
    if n_words == 0 or n_sentences == 0:
        return 0.0, 0.0
    # textstat: count_syllables() over list_words(lowercase) then / count_words
    syllables = sum(_word_syllables_raw(w) for w in words)
    words_per_sentence = n_words / n_sentences
    syllables_per_word = syllables / n_words
    if words_per_sentence == 0 or syllables_per_word == 0:
        return 0.0, 0.0
    # Flesch (1948): 206.835 - 1.015 (words/sentence) - 84.6 (syllables/word)
    fre = 206.835 - 1.015 * words_per_sentence - 84.6 * syllables_per_word
    # Kincaid et al. (1975): 0.39 (words/sentence) + 11.8 (syllables/word) - 15.59
    fkg = (0.39 * words_per_sentence) + (11.8 * syllables_per_word) - 15.59
    return fre, fkg


@lru_cache(maxsize=200_000)
def _word_syllables_raw(word: str) -> int:
    """Syllables of one already-listed word, by textstat's own rule."""
    from .langdata import ensure_language_data
    from textstat.backend.utils._get_cmudict import get_cmudict

    ensure_language_data()
    from textstat.backend.utils._get_pyphen import get_pyphen

    try:
        phones = get_cmudict("en_US")[word][0]
        return sum(1 for p in phones if p[-1].isdigit())
    except (TypeError, IndexError, KeyError):
        return len(get_pyphen("en_US").positions(word)) + 1


_VADER = None
_VADER_TOKENS: frozenset[str] | None = None
_PUNCT = string.punctuation


def _vader():
    global _VADER, _VADER_TOKENS
    if _VADER is None:
        from .langdata import ensure_language_data

        ensure_language_data()
        from nltk.sentiment.vader import SentimentIntensityAnalyzer

        _VADER = SentimentIntensityAnalyzer()
        _VADER_TOKENS = frozenset(_VADER.lexicon)
    return _VADER


def lexicon() -> dict[str, float]:
    """The VADER valence lexicon (token -> mean rated valence, -4..4)."""
    return _vader().lexicon


def vader_scores(text: str) -> tuple[float, float, float]:
    """VADER compound, positive and negative proportions (Hutto and Gilbert, 2014).

    VADER scores come only from tokens in its lexicon: a text with none of
    them scores compound 0, pos 0, neg 0 whatever else it holds. So we test
    for lexicon tokens first (a superset of VADER's own tokenisation: each
    whitespace token lower-cased, with and without edge punctuation) and run
    the full analyser only when there is one.
    """
    analyser = _vader()
    has_candidate = False
    for token in text.split():
        low = token.lower()
        if low in _VADER_TOKENS or low.strip(_PUNCT) in _VADER_TOKENS:
            has_candidate = True
            break
    if not has_candidate:
        return 0.0, 0.0, 0.0
    scores = analyser.polarity_scores(text)
    return scores["compound"], scores["pos"], scores["neg"]


@lru_cache(maxsize=1)
def _polar_words() -> tuple[frozenset[str], frozenset[str]]:
    """Positive and negative words of the VADER lexicon (alphabetic entries only).

    A word counts when its mean rated valence is at least 1 in size, so
    near-neutral entries ("okay", 0.9) do not dilute the counts (common
    practice; the threshold is ours).
    """
    lex = lexicon()
    positive = frozenset(w for w, v in lex.items() if v >= 1.0 and w.isalpha())
    negative = frozenset(w for w, v in lex.items() if v <= -1.0 and w.isalpha())
    return positive, negative


def emotion_counts(text: str) -> tuple[int, int]:
    """How many positive and negative lexicon words a headline holds."""
    positive, negative = _polar_words()
    n_pos = n_neg = 0
    for w in words_of(text.lower()):
        if w in positive:
            n_pos += 1
        elif w in negative:
            n_neg += 1
    return n_pos, n_neg


# ------------------------------------------------------- structure (vector)

_NUMBER_WORDS = (
    "one|two|three|four|five|six|seven|eight|nine|ten|eleven|twelve|fifteen|twenty|fifty|hundred"
)
STRUCTURE_PATTERNS: dict[str, str] = {
    "is_question": r"\?",
    "has_exclamation": r"!",
    "leading_number": rf"^\W*(?:\d|(?:{_NUMBER_WORDS})\b)",
    "has_digit": r"\d",
    # "7 ways to ...", "Ten things we ...": a count then a plural noun within two words
    "list_form": rf"^\W*(?:\d+|{_NUMBER_WORDS})\s+(?:[\w'-]+\s+)?[a-z'-]+s\b",
    "second_person": r"\b(?:you|your|yours|yourself|yourselves|you'?re|you'?ll|you'?ve|you'?d)\b",
    "has_quote": r"[\"“”‘]|(?:^|\s)'\w[^']*'(?:\s|$|[.,!?:;])",
    "split_colon_dash": r":|\s[-–—]\s|—",
}
_ALLCAPS = re.compile(r"\b[A-Z][A-Z0-9]{1,}\b")
_EMOJI = re.compile(
    "[\U0001F000-\U0001FAFF\U00002600-\U000027BF\U0001F1E6-\U0001F1FF\U00002B00-\U00002BFF]",
    re.UNICODE,
)


def structure_features(texts: pd.Series) -> pd.DataFrame:
    """Binary structure flags and counts, vectorised over a column of clean text."""
    out = {}
    lower = texts.str.lower()
    for name, pattern in STRUCTURE_PATTERNS.items():
        source = texts if name in {"has_quote", "split_colon_dash"} else lower
        out[name] = source.str.contains(pattern, regex=True).astype(np.float64).to_numpy()
    out["n_allcaps_words"] = texts.str.count(_ALLCAPS.pattern).astype(np.float64).to_numpy()
    out["n_emoji"] = texts.str.count(_EMOJI.pattern).astype(np.float64).to_numpy()
    return pd.DataFrame(out, index=texts.index)


# ------------------------------------------------------------ topic terms

_STOP: frozenset[str] | None = None
_TERM_TOKEN = re.compile(r"[a-z][a-z']+|\d+")


@lru_cache(maxsize=200_000)
def _stem(word: str) -> str:
    return _stemmer().stem(word)


@lru_cache(maxsize=1)
def _stemmer():
    from nltk.stem.snowball import SnowballStemmer

    return SnowballStemmer("english")


def topic_tokens(text: str) -> list[str]:
    """Stemmed unigrams and bigrams of a headline, stop words removed.

    Bigrams join neighbouring kept words, so "the price of bread" gives
    "price", "bread" and "price bread". Digits become one token ``<num>`` so
    that "7 ways" and "9 ways" share a term.
    """
    global _STOP
    if _STOP is None:
        from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

        _STOP = frozenset(ENGLISH_STOP_WORDS) | {"s", "t", "ll", "re", "ve", "d"}
    kept = []
    for tok in _TERM_TOKEN.findall(text.lower().replace("’", "'")):
        tok = tok.strip("'")
        if tok.isdigit():
            kept.append("<num>")
            continue
        if tok.endswith("'s"):
            tok = tok[:-2]
        if len(tok) < 2 or tok in _STOP:
            continue
        kept.append(_stem(tok))
    bigrams = [f"{a} {b}" for a, b in zip(kept, kept[1:])]
    return kept + bigrams


# ------------------------------------------------------------- time

def time_features(local_hour: np.ndarray, local_weekday: np.ndarray) -> pd.DataFrame:
    """Cyclic hour and weekday; rows with an unknown hour (NaN) get zeros.

    Sine and cosine of the first two daily harmonics let a smooth curve peak
    at any hour; ``time_known`` separates date-only posts from midnight ones.
    """
    hour = np.asarray(local_hour, dtype=float)
    weekday = np.asarray(local_weekday, dtype=float)
    known = ~np.isnan(hour)
    h = np.where(known, hour, 0.0)
    w_known = ~np.isnan(weekday)
    w = np.where(w_known, weekday, 0.0)
    angle = 2 * np.pi * h / 24.0
    wangle = 2 * np.pi * w / 7.0
    return pd.DataFrame(
        {
            "hour_sin": np.where(known, np.sin(angle), 0.0),
            "hour_cos": np.where(known, np.cos(angle), 0.0),
            "hour_sin2": np.where(known, np.sin(2 * angle), 0.0),
            "hour_cos2": np.where(known, np.cos(2 * angle), 0.0),
            "weekday_sin": np.where(w_known, np.sin(wangle), 0.0),
            "weekday_cos": np.where(w_known, np.cos(wangle), 0.0),
            "time_known": known.astype(float),
        }
    )


# ---------------------------------------------------------- per headline

TEXT_COLUMNS = [
    "n_chars",
    "n_words",
    "mean_word_length",
    "flesch_reading_ease",
    "flesch_kincaid_grade",
    "vader_compound",
    "vader_positive",
    "vader_negative",
    "n_positive_words",
    "n_negative_words",
]
STRUCTURE_COLUMNS = list(STRUCTURE_PATTERNS) + ["n_allcaps_words", "n_emoji"]
TIME_COLUMNS = ["hour_sin", "hour_cos", "hour_sin2", "hour_cos2", "weekday_sin", "weekday_cos", "time_known"]
DENSE_COLUMNS = TEXT_COLUMNS + STRUCTURE_COLUMNS + TIME_COLUMNS


def text_features(text: str) -> tuple[float, ...]:
    """All per-headline scalar text features, in ``TEXT_COLUMNS`` order."""
    n_chars, n_words, mean_len = length_features(text)
    fre, fkg = readability(text)
    compound, pos, neg = vader_scores(text)
    n_pos, n_neg = emotion_counts(text)
    return (n_chars, n_words, mean_len, fre, fkg, compound, pos, neg, n_pos, n_neg)


def _text_feature_rows(texts: Sequence[str]) -> list[tuple[float, ...]]:
    return [text_features(t) for t in texts]


def _warm() -> None:
    _vader()
    readability("warm up the syllable dictionary")


PARALLEL_MIN_ROWS = 20_000


def text_feature_matrix(texts: Sequence[str], n_jobs: int | None = None, progress: bool = False) -> np.ndarray:
    """Text features for many headlines: de-duplicated, parallel on large batches."""
    uniques, inverse = np.unique(np.asarray(texts, dtype=object).astype(str), return_inverse=True)
    n_jobs = n_jobs if n_jobs is not None else (os.cpu_count() or 1)
    rows: list[tuple[float, ...]]
    if n_jobs > 1 and len(uniques) >= PARALLEL_MIN_ROWS:
        from concurrent.futures import ProcessPoolExecutor
        import multiprocessing as mp

        chunks = np.array_split(uniques, max(n_jobs * 8, 1))
        ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
        rows = []
        with ProcessPoolExecutor(max_workers=n_jobs, mp_context=ctx, initializer=_warm) as pool:
            results = pool.map(_text_feature_rows, [list(c) for c in chunks])
            if progress:
                from tqdm import tqdm

                results = tqdm(results, total=len(chunks), desc="features", unit="chunk", leave=False)
            for part in results:
                rows.extend(part)
    else:
        _warm()
        it: Iterable[str] = uniques
        if progress and len(uniques) > 5000:
            from tqdm import tqdm

            it = tqdm(uniques, desc="features", unit="headline", leave=False)
        rows = [text_features(t) for t in it]
    matrix = np.asarray(rows, dtype=np.float64).reshape(len(uniques), len(TEXT_COLUMNS))
    return matrix[inverse.reshape(-1)]


# ------------------------------------------------------------- estimator

@dataclass
class FeatureSet:
    """Features of a batch of posts: named dense columns plus a sparse term matrix."""

    dense: pd.DataFrame
    terms: sparse.csr_matrix
    term_names: list[str]
    channel: pd.Series
    text: pd.Series = field(repr=False)

    def __len__(self) -> int:
        return len(self.dense)


class HeadlineFeaturizer:
    """Learns the topic-term vocabulary from history, then featurises any headlines.

    Parameters
    ----------
    min_df : int, default=3
        A stemmed term (or bigram) becomes a column only when at least this
        many history headlines contain it; rarer terms cannot be estimated.
    max_terms : int, default=20000
        Keep at most this many terms, the most frequent first.
    n_jobs : int or None
        Processes for large batches (None: all cores).

    Attributes
    ----------
    vocabulary_ : dict[str, int]
        Term -> column index of ``terms``.
    term_names_ : list[str]
    channels_ : list[str]
        Channels seen in history.
    term_doc_freq_ : ndarray of shape (n_terms,)
    """

    def __init__(self, *, min_df: int = 3, max_terms: int = 20000, n_jobs: int | None = None):
        self.min_df = min_df
        self.max_terms = max_terms
        self.n_jobs = n_jobs

    def get_params(self, deep: bool = True) -> dict:
        return {"min_df": self.min_df, "max_terms": self.max_terms, "n_jobs": self.n_jobs}

    def set_params(self, **params) -> "HeadlineFeaturizer":
        for key, value in params.items():
            setattr(self, key, value)
        return self

    def fit(self, posts: pd.DataFrame) -> "HeadlineFeaturizer":
        """Learn the term vocabulary and channel list from history posts."""
        if not isinstance(self.min_df, int) or self.min_df < 1:
            raise ContentlabError(f"min_df must be a whole number >= 1, got {self.min_df!r}")
        if not isinstance(self.max_terms, int) or self.max_terms < 0:
            raise ContentlabError(f"max_terms must be a whole number >= 0, got {self.max_terms!r}")
        texts = _texts_of(posts)
        doc_freq: dict[str, int] = {}
        for tokens in _unique_token_sets(texts):
            for tok in tokens:
                doc_freq[tok] = doc_freq.get(tok, 0) + 1
        kept = [(t, c) for t, c in doc_freq.items() if c >= self.min_df]
        # Deterministic order: most frequent first, ties alphabetical.
        kept.sort(key=lambda tc: (-tc[1], tc[0]))
        kept = kept[: self.max_terms]
        self.term_names_ = [t for t, _ in kept]
        self.vocabulary_ = {t: i for i, t in enumerate(self.term_names_)}
        self.term_doc_freq_ = np.array([c for _, c in kept], dtype=np.int64)
        self.channels_ = sorted(_channels_of(posts).unique().tolist())
        self.n_history_ = len(texts)
        return self

    def transform(self, posts: pd.DataFrame, progress: bool = False) -> FeatureSet:
        """Features of ``posts`` (columns headline, optional channel, local_hour, local_weekday)."""
        if not hasattr(self, "vocabulary_"):
            raise ContentlabError("The featurizer is not fitted yet: call fit(history) first.")
        texts = _texts_of(posts)
        index = posts.index
        text_part = pd.DataFrame(
            text_feature_matrix(texts.tolist(), n_jobs=self.n_jobs, progress=progress),
            columns=TEXT_COLUMNS,
            index=index,
        )
        struct_part = structure_features(texts)
        hours = posts["local_hour"].to_numpy(dtype=float) if "local_hour" in posts else np.full(len(posts), np.nan)
        weekdays = (
            posts["local_weekday"].to_numpy(dtype=float) if "local_weekday" in posts else np.full(len(posts), np.nan)
        )
        time_part = time_features(hours, weekdays)
        time_part.index = index
        dense = pd.concat([text_part, struct_part, time_part], axis=1)[DENSE_COLUMNS]
        return FeatureSet(
            dense=dense,
            terms=self.term_matrix(texts),
            term_names=self.term_names_,
            channel=_channels_of(posts),
            text=texts,
        )

    def fit_transform(self, posts: pd.DataFrame, progress: bool = False) -> FeatureSet:
        return self.fit(posts).transform(posts, progress=progress)

    def term_matrix(self, texts: pd.Series) -> sparse.csr_matrix:
        """Binary presence of each vocabulary term, one row per text."""
        vocab = self.vocabulary_
        indptr = [0]
        indices: list[int] = []
        cache: dict[str, list[int]] = {}
        for text in texts:
            cols = cache.get(text)
            if cols is None:
                cols = sorted({vocab[t] for t in topic_tokens(text) if t in vocab})
                cache[text] = cols
            indices.extend(cols)
            indptr.append(len(indices))
        data = np.ones(len(indices), dtype=np.float64)
        return sparse.csr_matrix(
            (data, np.asarray(indices, dtype=np.int32), np.asarray(indptr, dtype=np.int64)),
            shape=(len(indptr) - 1, len(vocab)),
        )

    def unseen_term_share(self, texts: pd.Series) -> np.ndarray:
        """Share of each text's unigram terms that history never showed often enough to learn."""
        out = np.zeros(len(texts))
        for i, text in enumerate(texts):
            unigrams = [t for t in topic_tokens(text) if " " not in t]
            if unigrams:
                out[i] = sum(t not in self.vocabulary_ for t in unigrams) / len(unigrams)
        return out


def _texts_of(posts: pd.DataFrame) -> pd.Series:
    if "headline" not in posts:
        raise ContentlabError("posts need a 'headline' column to be featurised")
    if "clean_headline" in posts:
        return posts["clean_headline"].astype(str)
    return posts["headline"].map(clean_headline)


def _channels_of(posts: pd.DataFrame) -> pd.Series:
    if "channel" not in posts:
        return pd.Series(["(none)"] * len(posts), index=posts.index, dtype=object)
    return posts["channel"].fillna("(none)").astype(str).replace("", "(none)")


def _unique_token_sets(texts: pd.Series) -> Iterable[set[str]]:
    for text in texts:
        yield set(topic_tokens(text))
