"""Turn headlines and posting times into model features.

Pure functions compute each family of features from clean text; the
:class:`HeadlineFeaturizer` estimator learns the topic-term vocabulary from
history (``fit``) and then turns any headlines, past or draft, into the same
columns (``transform``). Everything is deterministic.

Speed matters because scoring thousands of drafts and importing a million
posts both go through here, so the per-headline work is kept small, and every
shortcut gives exactly what the reference libraries give (the tests and
benchmarks/bench_features.py compare them value for value):

* text is de-duplicated before the expensive parts run;
* textstat's counting rules run on precompiled patterns, with syllables
  counted once per distinct word from a table read straight from the CMU file;
* VADER's tokens are found without its all-pairs punctuation table, its
  analyser is skipped for headlines without a lexicon token (their scores are
  exactly zero), and its valence rules for one word run inline;
* structure flags are Python regular expressions (never pandas' engine, which
  changes with pyarrow);
* on large batches everything per headline, topic terms included, is spread
  over the cores by a process pool (``PARALLEL_MIN_ROWS``).
"""

from __future__ import annotations

import html
import math
import os
import re
import string
import sys
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Sequence

import numpy as np
import pandas as pd
from scipy import sparse

from .errors import ContentlabError

# ---------------------------------------------------------------- cleaning

# A tag is "<" then a tag name (or "/name", "!--" comment, "!DOCTYPE"), so that
# "3 < 5 and 7 > 2" is left alone.
_TAG = re.compile(r"<!--.*?-->|</?[A-Za-z][A-Za-z0-9:-]*(?:\s[^<>]{0,200})?/?>|<![A-Za-z][^<>]{0,200}>", re.DOTALL)


def clean_headline(raw: object) -> str:
    """Strip HTML tags and entities (real exports carry ``<br>``, ``&amp;``)."""
    if raw is None or (isinstance(raw, float) and math.isnan(raw)):
        return ""
    text = str(raw)
    if "<" in text or "&" in text:
        text = _TAG.sub(" ", text)
        text = html.unescape(text)
        # A second pass catches tags that were entity-encoded (``&lt;br&gt;``).
        text = _TAG.sub(" ", text)
    # str.split() splits on exactly the characters regex \s matches (Py_UNICODE_ISSPACE).
    return " ".join(text.split())


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


# textstat's own tokenisation, precompiled (textstat.backend: remove_punctuation,
# list_words, count_sentences). textstat calls ``re.sub`` with pattern strings on
# every text; compiling once and caching syllables per word is where the speed
# comes from. tests/test_features.py checks equality with textstat on many texts.
_TS_NONCONTRACTION_APOSTROPHE = re.compile(r"\'(?!" + r"[tsd]|ve|ll|re" + ")")
_TS_PUNCTUATION = re.compile(r"[^\w\s\']")
_TS_SENTENCE = re.compile(r"\b[^.!?]+[.!?]*", re.UNICODE)


def _textstat_words(text: str) -> list[str]:
    """textstat's ``list_words(text)``: punctuation removed, contraction apostrophes kept."""
    return _TS_PUNCTUATION.sub("", _TS_NONCONTRACTION_APOSTROPHE.sub("", text)).split()


def _textstat_sentences(text: str) -> int:
    """textstat's ``count_sentences``: fragments of two words or fewer are not sentences."""
    if not text:
        return 0
    sentences = _TS_SENTENCE.findall(text)
    ignored = sum(1 for s in sentences if len(_textstat_words(s)) <= 2)
    return max(1, len(sentences) - ignored)


def readability(text: str) -> tuple[float, float]:
    """Flesch Reading Ease and Flesch-Kincaid grade, as textstat computes them.

    Same counts as ``textstat.flesch_reading_ease`` / ``flesch_kincaid_grade``
    (its word list, its sentence count, CMU-dictionary syllables with a
    hyphenation fallback) but syllables are cached per word rather than per
    text, which matters when every headline is new. The tests and the
    benchmark check the two agree.
    """
    stripped = _TS_PUNCTUATION.sub("", _TS_NONCONTRACTION_APOSTROPHE.sub("", text))
    n_words = len(stripped.split())
    n_sentences = _textstat_sentences(text)
    if n_words == 0 or n_sentences == 0:
        return 0.0, 0.0
    # textstat: count_syllables() over list_words(lowercase=True), then / count_words
    syllables = sum(map(_word_syllables_raw, stripped.lower().split()))
    words_per_sentence = n_words / n_sentences
    syllables_per_word = syllables / n_words
    if words_per_sentence == 0 or syllables_per_word == 0:
        return 0.0, 0.0
    # Flesch (1948): 206.835 - 1.015 (words/sentence) - 84.6 (syllables/word)
    fre = 206.835 - 1.015 * words_per_sentence - 84.6 * syllables_per_word
    # Kincaid et al. (1975): 0.39 (words/sentence) + 11.8 (syllables/word) - 15.59
    fkg = (0.39 * words_per_sentence) + (11.8 * syllables_per_word) - 15.59
    return fre, fkg


@lru_cache(maxsize=400_000)
def _word_syllables_raw(word: str) -> int:
    """Syllables of one already-listed word, by textstat's own rule.

    textstat: the first CMU pronunciation's stressed phones; for a word the
    dictionary lacks, pyphen's hyphenation points plus one.
    """
    from .langdata import syllable_table

    count = syllable_table().get(word)
    if count is not None:
        return count
    return len(_pyphen().positions(word)) + 1


@lru_cache(maxsize=1)
def _pyphen():
    """pyphen's US English hyphenation dictionary (what textstat uses for words CMU lacks)."""
    from pyphen import Pyphen

    return Pyphen(lang="en_US")


_VADER = None
_VADER_TOKENS: frozenset[str] | None = None
_PUNCT = string.punctuation
_PUNCT_CHARS = frozenset(string.punctuation)
_DELETE_PUNCT = str.maketrans("", "", string.punctuation)
_VADER_PUNC_LIST: frozenset[str] = frozenset()


def _vader():
    global _VADER, _VADER_TOKENS, _VADER_PUNC_LIST
    if _VADER is None:
        # contentlab's own copy of NLTK's VADER rules (contentlab/vader.py): importing nltk
        # itself takes seconds, too slow for scoring one draft.
        from .vader import analyzer

        analyser = analyzer()
        _VADER_TOKENS = frozenset(analyser.lexicon)
        _VADER_PUNC_LIST = frozenset(analyser.constants.PUNC_LIST)
        _VADER = analyser
    return _VADER


def lexicon() -> dict[str, float]:
    """The VADER valence lexicon (token -> mean rated valence, -4..4)."""
    return _vader().lexicon


def vader_tokens(text: str) -> list[str]:
    """VADER's ``words_and_emoticons`` of a text, computed directly.

    NLTK's ``SentiText`` builds a dictionary of every (punctuation, word) pair
    of the text to strip one punctuation mark from the edge of a token; that
    is two thirds of VADER's time on a headline. The rule it implements is: a
    token longer than one character that is a ``PUNC_LIST`` entry followed (or
    preceded) by a punctuation-free word of the text is replaced by that
    word. Since the word holds no punctuation, the mark must be the token's
    whole leading (or trailing) run of punctuation, so one look-up decides.
    """
    _vader()
    words_only = None  # built on the first token with punctuation at an edge
    out = []
    for token in text.split():
        if len(token) <= 1:
            continue
        if (token[0] in _PUNCT_CHARS or token[-1] in _PUNCT_CHARS) and words_only is None:
            words_only = {w for w in text.translate(_DELETE_PUNCT).split() if len(w) > 1}
        if token[0] in _PUNCT_CHARS:
            core = token.lstrip(_PUNCT)
            if core in words_only and token[: len(token) - len(core)] in _VADER_PUNC_LIST:
                token = core
        elif token[-1] in _PUNCT_CHARS:
            core = token.rstrip(_PUNCT)
            if core in words_only and token[len(core):] in _VADER_PUNC_LIST:
                token = core
        out.append(token)
    return out


class _SentiTokens:
    """What NLTK's ``sentiment_valence`` reads from a ``SentiText``."""

    __slots__ = ("words_and_emoticons", "is_cap_diff")

    def __init__(self, words: list[str]):
        self.words_and_emoticons = words
        n_caps = sum(1 for w in words if w.isupper())
        self.is_cap_diff = 0 < len(words) - n_caps < len(words)


def vader_scores(text: str) -> tuple[float, float, float]:
    """VADER compound, positive and negative proportions (Hutto and Gilbert, 2014).

    Equal to NLTK's ``SentimentIntensityAnalyzer.polarity_scores`` (the tests
    check it on many texts), with two shortcuts. The tokens come from
    :func:`vader_tokens`. And VADER scores come only from tokens in its
    lexicon: a text with none of them scores compound 0, pos 0, neg 0
    whatever else it holds, so those texts skip the analyser. The valence
    rules themselves (boosters, negation, "but", idioms, capitals,
    punctuation emphasis) are NLTK's own methods.
    """
    analyser = _vader()
    words = vader_tokens(text)
    lex = _VADER_TOKENS
    lowered = [w.lower() for w in words]
    if lex.isdisjoint(lowered):
        return 0.0, 0.0, 0.0
    # The loop of NLTK's polarity_scores, on the same tokens.
    senti = _SentiTokens(words)
    boosters = analyser.constants.BOOSTER_DICT
    first_index: dict[str, int] = {}
    for idx, token in enumerate(words):
        first_index.setdefault(token, idx)
    sentiments: list[float] = []
    last = len(words) - 1
    for item, low in zip(words, lowered):
        i = first_index[item]
        if (i < last and low == "kind" and words[i + 1].lower() == "of") or low in boosters:
            sentiments.append(0)
        elif low not in lex:
            sentiments.append(0)  # sentiment_valence appends 0 for these
        else:
            sentiments.append(_valence(analyser, words, lowered, i, senti.is_cap_diff))
    sentiments = _but_check(words, sentiments)
    scores = analyser.score_valence(sentiments, text)
    return scores["compound"], scores["pos"], scores["neg"]


def _valence(analyser, words: list[str], lowered: list[str], i: int, is_cap_diff: bool) -> float:
    """NLTK's ``sentiment_valence`` for the lexicon word at ``i``, step for step.

    The same operations in the same order (so the same floating-point
    result), with ``scalar_inc_dec``, ``_never_check`` and ``negated`` written
    inline for one word; the idiom and "least" rules stay NLTK's own methods.
    The tests compare the outcome with ``polarity_scores`` on many texts.
    """
    c = analyser.constants
    lex = analyser.lexicon
    boosters = c.BOOSTER_DICT
    negate = c.NEGATE
    item = words[i]
    valence = lex[lowered[i]]
    if item.isupper() and is_cap_diff:
        if valence > 0:
            valence += c.C_INCR
        else:
            valence -= c.C_INCR
    for start_i in range(0, 3):
        if i > start_i and lowered[i - (start_i + 1)] not in lex:
            before = words[i - (start_i + 1)]
            before_low = lowered[i - (start_i + 1)]
            scalar = c.scalar_inc_dec(before, valence, is_cap_diff) if before_low in boosters else 0.0
            if start_i == 1 and scalar != 0:
                scalar = scalar * 0.95
            if start_i == 2 and scalar != 0:
                scalar = scalar * 0.9
            valence = valence + scalar
            # _never_check(valence, words, start_i, i); negated() of one word
            if start_i == 0:
                w = lowered[i - 1]
                if w in negate or "n't" in w:
                    valence = valence * c.N_SCALAR
            elif start_i == 1:
                if words[i - 2] == "never" and (words[i - 1] == "so" or words[i - 1] == "this"):
                    valence = valence * 1.5
                else:
                    w = lowered[i - 2]
                    if w in negate or "n't" in w:
                        valence = valence * c.N_SCALAR
            else:
                if (words[i - 3] == "never" and (words[i - 2] == "so" or words[i - 2] == "this")) or (
                    words[i - 1] == "so" or words[i - 1] == "this"
                ):
                    valence = valence * 1.25
                else:
                    w = lowered[i - 3]
                    if w in negate or "n't" in w:
                        valence = valence * c.N_SCALAR
                valence = _idioms_check(c, valence, words, i)
    return _least_check(c, lex, valence, words, i)


# The three rules below are NLTK's VADER helpers (SentimentIntensityAnalyzer._but_check,
# _idioms_check and _least_check in nltk/sentiment/vader.py, NLTK 3.8-3.10), copied so that
# contentlab calls no private method of another package. NLTK is distributed under the Apache
# License 2.0 (Copyright (C) 2001-2024 NLTK Project); VADER itself is by C.J. Hutto and
# E. Gilbert (2014), MIT licence. Same operations in the same order; the tests compare the
# features with NLTK's public polarity_scores on many texts.

def _but_check(words: list[str], sentiments: list[float]) -> list[float]:
    """Words before "but" count half, words after it one and a half times."""
    lowered = [w.lower() for w in words]
    if "but" in lowered:
        bi = lowered.index("but")
        for sidx, sentiment in enumerate(sentiments):
            if sidx < bi:
                sentiments[sidx] = sentiment * 0.5
            elif sidx > bi:
                sentiments[sidx] = sentiment * 1.5
    return sentiments


def _idioms_check(c, valence: float, words: list[str], i: int) -> float:
    """Fixed idioms ("the bomb", "cut the mustard") set the valence; "kind of"-style bigrams damp it."""
    idioms = c.SPECIAL_CASE_IDIOMS
    onezero = f"{words[i - 1]} {words[i]}"
    twoonezero = f"{words[i - 2]} {words[i - 1]} {words[i]}"
    twoone = f"{words[i - 2]} {words[i - 1]}"
    threetwoone = f"{words[i - 3]} {words[i - 2]} {words[i - 1]}"
    threetwo = f"{words[i - 3]} {words[i - 2]}"
    for seq in (onezero, twoonezero, twoone, threetwoone, threetwo):
        if seq in idioms:
            valence = idioms[seq]
            break
    if len(words) - 1 > i:
        zeroone = f"{words[i]} {words[i + 1]}"
        if zeroone in idioms:
            valence = idioms[zeroone]
    if len(words) - 1 > i + 1:
        zeroonetwo = f"{words[i]} {words[i + 1]} {words[i + 2]}"
        if zeroonetwo in idioms:
            valence = idioms[zeroonetwo]
    if threetwo in c.BOOSTER_DICT or twoone in c.BOOSTER_DICT:
        valence = valence + c.B_DECR
    return valence


def _least_check(c, lex, valence: float, words: list[str], i: int) -> float:
    """ "least" before a word negates it, except in "at least" and "very least"."""
    if i > 1 and words[i - 1].lower() not in lex and words[i - 1].lower() == "least":
        if words[i - 2].lower() != "at" and words[i - 2].lower() != "very":
            valence = valence * c.N_SCALAR
    elif i > 0 and words[i - 1].lower() not in lex and words[i - 1].lower() == "least":
        valence = valence * c.N_SCALAR
    return valence


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
# Counts written as words are numbers too ("Five quiet changes"). "one" is left out: "no one",
# "one of", "the one thing" are rarely counts.
COUNT_WORDS = (
    "two|three|four|five|six|seven|eight|nine|ten|eleven|twelve|thirteen|fourteen|fifteen|sixteen|"
    "seventeen|eighteen|nineteen|twenty|thirty|forty|fifty|sixty|seventy|eighty|ninety|hundred|thousand|"
    "million|billion|dozen"
)
HAS_NUMBER = re.compile(rf"\d|\b(?:{COUNT_WORDS})\b", re.IGNORECASE)
STRUCTURE_PATTERNS: dict[str, str] = {
    "is_question": r"\?",
    "has_exclamation": r"!",
    "leading_number": rf"^\W*(?:\d|(?:{_NUMBER_WORDS})\b)",
    # a digit or a count written as a word; the column keeps its old name for saved models and tables
    "has_digit": rf"\d|\b(?:{COUNT_WORDS})\b",
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


_STRUCTURE_REGEX = [
    (re.compile(pattern), name not in {"has_quote", "split_colon_dash"})
    for name, pattern in STRUCTURE_PATTERNS.items()
]


# Word classes of how a headline addresses its reader (Gligoric et al., PLOS ONE 2023, found
# pronoun classes to matter on headline A/B tests). Closed lists, written here, so no lexicon
# licence is involved.
_FIRST_SINGULAR = frozenset("i me my mine myself i'm i've i'd i'll".split())
_FIRST_PLURAL = frozenset("we us our ours ourselves we're we've we'd we'll".split())
_THIRD_PERSON = frozenset("he she they him her them his hers their theirs himself herself themselves "
                          "he's she's they're they've".split())
_THIS_HERE = frozenset("this these here here's".split())
_NEGATIONS = frozenset("not no never nothing nobody none nor without don't can't won't isn't aren't doesn't "
                       "didn't wasn't weren't shouldn't wouldn't couldn't".split())
_QUESTION_WORDS = frozenset("what why how who when where which".split())
_SUPERLATIVES = frozenset("best worst most least greatest biggest smallest".split())
STYLE_COLUMNS = ["n_first_singular", "n_first_plural", "n_third_person", "n_this_here", "n_negations",
                 "starts_with_question_word", "n_superlatives"]


def style_row(text: str) -> tuple[float, ...]:
    """Pronoun classes and other word-class counts of one clean headline, in ``STYLE_COLUMNS`` order."""
    toks = [w.replace("’", "'") for w in words_of(text.lower())]
    return (
        float(sum(t in _FIRST_SINGULAR for t in toks)),
        float(sum(t in _FIRST_PLURAL for t in toks)),
        float(sum(t in _THIRD_PERSON for t in toks)),
        float(sum(t in _THIS_HERE for t in toks)),
        float(sum(t in _NEGATIONS for t in toks)),
        float(bool(toks) and toks[0] in _QUESTION_WORDS),
        float(sum(t in _SUPERLATIVES for t in toks)),
    )


def structure_row(text: str) -> tuple[float, ...]:
    """Structure flags and counts of one clean headline, in ``STRUCTURE_COLUMNS`` order.

    Python's ``re`` on every text, never pandas' string methods: those switch
    to another regex engine (RE2, ASCII ``\\b``) when pyarrow is installed, and
    the features must not depend on what else is installed.
    """
    lower = text.lower()
    flags = [1.0 if regex.search(lower if on_lower else text) else 0.0 for regex, on_lower in _STRUCTURE_REGEX]
    flags.append(float(len(_ALLCAPS.findall(text))))
    flags.append(float(len(_EMOJI.findall(text))))
    return tuple(flags) + style_row(text)


def structure_features(texts: pd.Series) -> pd.DataFrame:
    """Binary structure flags and counts over a column of clean text (each distinct text once)."""
    values = list(texts)
    uniques, inverse = _distinct(values)
    matrix = np.asarray([structure_row(t) for t in uniques], dtype=np.float64).reshape(len(uniques), len(STRUCTURE_COLUMNS))
    return pd.DataFrame(matrix[inverse], columns=STRUCTURE_COLUMNS, index=texts.index)


# ------------------------------------------------------------ topic terms

_STOP: frozenset[str] | None = None
_TERM_TOKEN = re.compile(r"[a-z][a-z']+|\d+")


@lru_cache(maxsize=200_000)
def _stem(word: str) -> str:
    return _stemmer().stem(word)


class _Stemmer:
    """The Snowball English stemmer of the ``snowballstemmer`` package (BSD-3-Clause), light to import."""

    def __init__(self):
        import snowballstemmer

        self._stemmer = snowballstemmer.stemmer("english")

    def stem(self, word: str) -> str:
        return self._stemmer.stemWord(word)


@lru_cache(maxsize=1)
def _stemmer():
    return _Stemmer()


# scikit-learn's ENGLISH_STOP_WORDS (BSD-3-Clause; the list of the Glasgow Information Retrieval
# Group), copied so that featurising a draft does not import scikit-learn (seconds on a small
# machine). tests/test_features.py checks it still equals scikit-learn's.
ENGLISH_STOP_WORDS = frozenset((
    "a about above across after afterwards again against all almost alone along already also although "
    "always am among amongst amoungst amount an and another any anyhow anyone anything anyway anywhere "
    "are around as at back be became because become becomes becoming been before beforehand behind being "
    "below beside besides between beyond bill both bottom but by call can cannot cant co con could "
    "couldnt cry de describe detail do done down due during each eg eight either eleven else elsewhere "
    "empty enough etc even ever every everyone everything everywhere except few fifteen fifty fill find "
    "fire first five for former formerly forty found four from front full further get give go had has "
    "hasnt have he hence her here hereafter hereby herein hereupon hers herself him himself his how "
    "however hundred i ie if in inc indeed interest into is it its itself keep last latter latterly least "
    "less ltd made many may me meanwhile might mill mine more moreover most mostly move much must my "
    "myself name namely neither never nevertheless next nine no nobody none noone nor not nothing now "
    "nowhere of off often on once one only onto or other others otherwise our ours ourselves out over own "
    "part per perhaps please put rather re same see seem seemed seeming seems serious several she should "
    "show side since sincere six sixty so some somehow someone something sometime sometimes somewhere "
    "still such system take ten than that the their them themselves then thence there thereafter thereby "
    "therefore therein thereupon these they thick thin third this those though three through throughout "
    "thru thus to together too top toward towards twelve twenty two un under until up upon us very via "
    "was we well were what whatever when whence whenever where whereafter whereas whereby wherein "
    "whereupon wherever whether which while whither who whoever whole whom whose why will with within "
    "without would yet you your yours yourself yourselves "
).split())


def _stop_words() -> frozenset[str]:
    global _STOP
    if _STOP is None:
        _STOP = ENGLISH_STOP_WORDS | {"s", "t", "ll", "re", "ve", "d"}
    return _STOP


@lru_cache(maxsize=400_000)
def _term_of(token: str) -> str | None:
    """The term one raw token contributes (stemmed, ``<num>`` for digits), or None for a stop word."""
    token = token.strip("'")
    if token.isdigit():
        return "<num>"
    if token.endswith("'s"):
        token = token[:-2]
    if len(token) < 2 or token in _stop_words():
        return None
    return _stem(token)


def topic_tokens(text: str) -> list[str]:
    """Stemmed unigrams and bigrams of a headline, stop words removed.

    Bigrams join neighbouring kept words, so "the price of bread" gives
    "price", "bread" and "price bread". Digits become one token ``<num>`` so
    that "7 ways" and "9 ways" share a term. Each distinct raw token is
    looked up once (``_term_of`` is cached): stemming is the slow part.
    """
    _stop_words()
    kept = [t for t in map(_term_of, _TERM_TOKEN.findall(text.lower().replace("’", "'"))) if t is not None]
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
STRUCTURE_COLUMNS = list(STRUCTURE_PATTERNS) + ["n_allcaps_words", "n_emoji"] + STYLE_COLUMNS
TIME_COLUMNS = ["hour_sin", "hour_cos", "hour_sin2", "hour_cos2", "weekday_sin", "weekday_cos", "time_known"]
DENSE_COLUMNS = TEXT_COLUMNS + STRUCTURE_COLUMNS + TIME_COLUMNS

# What every table and sentence calls each column (never the column name itself).
FEATURE_LABELS: dict[str, str] = {
    "n_chars": "length",
    "n_words": "number of words",
    "mean_word_length": "word length",
    "flesch_reading_ease": "readability",
    "flesch_kincaid_grade": "reading grade",
    "vader_compound": "overall sentiment",
    "vader_positive": "positive tone",
    "vader_negative": "negative tone",
    "n_positive_words": "positive words",
    "n_negative_words": "negative words",
    "is_question": "is a question",
    "has_exclamation": "has an exclamation mark",
    "leading_number": "starts with a number",
    "has_digit": "has a number (digits or words)",
    "list_form": "is a list (\"7 ways ...\")",
    "second_person": "speaks to the reader (you)",
    "has_quote": "has a quotation",
    "split_colon_dash": "has a colon or dash",
    "n_allcaps_words": "words in capitals",
    "n_emoji": "emoji",
    "n_first_singular": "I, me, my",
    "n_first_plural": "we, us, our",
    "n_third_person": "he, she, they",
    "n_this_here": "this, these, here",
    "n_negations": "negations (not, no, never)",
    "starts_with_question_word": "starts with what, why, how ...",
    "n_superlatives": "superlatives (best, most ...)",
    "posting time": "posting time",
    "topic terms": "topic words",
    "wording": "wording",
    "headline meaning": "what the headline is about (meaning)",
}



def text_features(text: str) -> tuple[float, ...]:
    """All per-headline scalar text features, in ``TEXT_COLUMNS`` order."""
    n_chars, n_words, mean_len = length_features(text)
    fre, fkg = readability(text)
    compound, pos, neg = vader_scores(text)
    n_pos, n_neg = emotion_counts(text)
    return (n_chars, n_words, mean_len, fre, fkg, compound, pos, neg, n_pos, n_neg)


def _text_feature_rows(texts: Sequence[str]) -> np.ndarray:
    return np.asarray([text_features(t) for t in texts], dtype=np.float64).reshape(len(texts), len(TEXT_COLUMNS))


def _text_and_structure_rows(texts: Sequence[str]) -> np.ndarray:
    rows = [text_features(t) + structure_row(t) for t in texts]
    return np.asarray(rows, dtype=np.float64).reshape(len(texts), len(TEXT_COLUMNS) + len(STRUCTURE_COLUMNS))


def _warm() -> None:
    """Load the lexicon, syllable table and hyphenation patterns once (before forking)."""
    _vader()
    _stemmer()
    readability("warm up the syllable dictionary")
    _pyphen()


# Below this many distinct headlines one process is faster than starting a pool
# (measured with benchmarks/bench_features.py: a forked pool costs ~0.1 s,
# one headline ~0.15 ms on one core).
PARALLEL_MIN_ROWS = 2_000


def _distinct(texts: Sequence[str]) -> tuple[list[str], np.ndarray]:
    """Distinct texts in first-seen order and, per input, the position of its text."""
    positions: dict[str, int] = {}
    inverse = np.fromiter((positions.setdefault(t, len(positions)) for t in texts), dtype=np.int64, count=len(texts))
    return list(positions), inverse


def _warm_terms() -> None:
    _stemmer()
    _stop_words()


def _map_chunks(uniques: list, chunk_fn, n_jobs: int | None, progress: bool, warm=_warm) -> list:
    """``chunk_fn`` over chunks of distinct texts, in order; on a process pool when the batch is large."""
    n_jobs = n_jobs if n_jobs is not None else (os.cpu_count() or 1)
    n = len(uniques)
    if n_jobs > 1 and n >= PARALLEL_MIN_ROWS:
        warm()  # in the parent, so forked workers inherit the loaded data
    bar = None
    if progress and n > 5000:
        from tqdm import tqdm

        bar = tqdm(total=n, desc="features", unit="headline", leave=False, file=sys.stderr)
    try:
        parts = []
        if n_jobs > 1 and n >= PARALLEL_MIN_ROWS:
            from concurrent.futures import ProcessPoolExecutor
            import multiprocessing as mp

            # Several chunks per worker keep both busy to the end and the bar moving.
            size = int(min(5000, max(250, math.ceil(n / (n_jobs * 4)))))
            chunks = [uniques[s:s + size] for s in range(0, n, size)]
            # Forked workers start at once with the parent's loaded data; fork is
            # only safe on Linux (macOS system libraries are not fork-safe).
            ctx = mp.get_context("fork") if sys.platform.startswith("linux") else None
            with ProcessPoolExecutor(max_workers=n_jobs, mp_context=ctx, initializer=warm) as pool:
                for chunk, part in zip(chunks, pool.map(chunk_fn, chunks)):
                    parts.append(part)
                    if bar is not None:
                        bar.update(len(chunk))
            return parts
        for s in range(0, n, 2000):
            chunk = uniques[s:s + 2000]
            parts.append(chunk_fn(chunk))
            if bar is not None:
                bar.update(len(chunk))
        return parts
    finally:
        if bar is not None:
            bar.close()


def _rows_for(uniques: list[str], row_fn, width: int, n_jobs: int | None, progress: bool) -> np.ndarray:
    parts = _map_chunks(uniques, row_fn, n_jobs, progress)
    return np.vstack(parts) if parts else np.zeros((0, width))


def text_feature_matrix(texts: Sequence[str], n_jobs: int | None = None, progress: bool = False) -> np.ndarray:
    """Text features for many headlines: de-duplicated, parallel on large batches."""
    uniques, inverse = _distinct([str(t) for t in texts])
    matrix = _rows_for(uniques, _text_feature_rows, len(TEXT_COLUMNS), n_jobs, progress)
    return matrix[inverse]


def text_and_structure_matrix(texts: Sequence[str], n_jobs: int | None = None, progress: bool = False) -> np.ndarray:
    """``TEXT_COLUMNS`` then ``STRUCTURE_COLUMNS`` for many headlines, in one pass."""
    uniques, inverse = _distinct([str(t) for t in texts])
    width = len(TEXT_COLUMNS) + len(STRUCTURE_COLUMNS)
    matrix = _rows_for(uniques, _text_and_structure_rows, width, n_jobs, progress)
    return matrix[inverse]


def _term_columns(texts: Sequence[str], vocabulary: dict[str, int]) -> tuple[np.ndarray, np.ndarray]:
    """Per text, the sorted vocabulary columns of its terms: (lengths, concatenated columns)."""
    lengths = np.zeros(len(texts), dtype=np.int64)
    columns: list[int] = []
    for i, text in enumerate(texts):
        cols = sorted({vocabulary[t] for t in topic_tokens(text) if t in vocabulary})
        lengths[i] = len(cols)
        columns.extend(cols)
    return lengths, np.asarray(columns, dtype=np.int32)


def _csr_from_columns(lengths: np.ndarray, columns: np.ndarray, n_columns: int) -> sparse.csr_matrix:
    indptr = np.zeros(len(lengths) + 1, dtype=np.int64)
    np.cumsum(lengths, out=indptr[1:])
    return sparse.csr_matrix(
        (np.ones(len(columns), dtype=np.float64), columns.astype(np.int32, copy=False), indptr),
        shape=(len(lengths), n_columns),
    )


def _doc_freq_chunk(pairs: Sequence[tuple[str, int]]) -> dict[str, int]:
    """Document frequency of each term over (distinct text, number of posts with it) pairs."""
    counts: dict[str, int] = {}
    for text, n_copies in pairs:
        for tok in set(topic_tokens(text)):
            counts[tok] = counts.get(tok, 0) + n_copies
    return counts


class _TransformChunk:
    """Picklable worker task: text, structure and term columns of a chunk of distinct texts."""

    def __init__(self, vocabulary: dict[str, int]):
        self.vocabulary = vocabulary

    def __call__(self, texts: Sequence[str]):
        return _text_and_structure_rows(texts), _term_columns(texts, self.vocabulary)


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
        # Document frequency counts every post; each distinct text is tokenised once.
        uniques, inverse = _distinct([str(t) for t in texts])
        copies = np.bincount(inverse, minlength=len(uniques))
        doc_freq: dict[str, int] = {}
        pairs = list(zip(uniques, copies.tolist()))
        for part in _map_chunks(pairs, _doc_freq_chunk, self.n_jobs, False, warm=_warm_terms):
            for tok, count in part.items():
                doc_freq[tok] = doc_freq.get(tok, 0) + count
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
        uniques, inverse = _distinct([str(t) for t in texts])
        parts = _map_chunks(uniques, _TransformChunk(self.vocabulary_), self.n_jobs, progress)
        width = len(TEXT_COLUMNS) + len(STRUCTURE_COLUMNS)
        dense_rows = np.vstack([d for d, _ in parts]) if parts else np.zeros((0, width))
        lengths = np.concatenate([t[0] for _, t in parts]) if parts else np.zeros(0, dtype=np.int64)
        columns = np.concatenate([t[1] for _, t in parts]) if parts else np.zeros(0, dtype=np.int32)
        terms = _csr_from_columns(lengths, columns, len(self.vocabulary_))[inverse]
        hours = posts["local_hour"].to_numpy(dtype=float) if "local_hour" in posts else np.full(len(posts), np.nan)
        weekdays = (
            posts["local_weekday"].to_numpy(dtype=float) if "local_weekday" in posts else np.full(len(posts), np.nan)
        )
        time_part = time_features(hours, weekdays)
        time_part.index = index
        text_part = pd.DataFrame(dense_rows[inverse], columns=TEXT_COLUMNS + STRUCTURE_COLUMNS, index=index)
        # Two blocks, as callers expect: to_numpy() of a selection gives a fresh, writeable array.
        dense = pd.concat([text_part, time_part], axis=1)[DENSE_COLUMNS]
        return FeatureSet(
            dense=dense,
            terms=sparse.csr_matrix(terms),
            term_names=self.term_names_,
            channel=_channels_of(posts),
            text=texts,
        )

    def fit_transform(self, posts: pd.DataFrame, progress: bool = False) -> FeatureSet:
        return self.fit(posts).transform(posts, progress=progress)

    def term_matrix(self, texts: pd.Series) -> sparse.csr_matrix:
        """Binary presence of each vocabulary term, one row per text."""
        uniques, inverse = _distinct([str(t) for t in texts])
        lengths, columns = _term_columns(uniques, self.vocabulary_)
        return _csr_from_columns(lengths, columns, len(self.vocabulary_))[inverse]

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
