"""Rewrite generators: meaning kept, grammar kept, no invented facts or numbers.

These are rule checks on the pure generators in contentlab.edits (no model);
whether a rewrite scores better is tested in test_scoring.py. Expected
rewrites below were written and checked by hand (English grammar), not
produced by the code under test.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from contentlab import edits
from contentlab.demo_corpus import DRAFTS, make_headline
from contentlab.features import _polar_words, lexicon

# Words a generator may add that were not in the draft: the placeholder N, the
# templates of add_number / lengthen / the question patterns, and the swap table.
TEMPLATE_WORDS = {
    "n", "ways", "to", "things", "know", "may", "be", "is", "are", "does", "do", "why", "how", "have", "you",
    "yet", "try", "see", "meet", "visit", "read", "join", "use", "explore", "book", "tried", "seen", "met",
    "visited", "joined", "used", "explored", "booked", "could", "can", "will", "would", "should", "might",
    "a", "specific", "detail", "about", "characters", "who", "where", "or", "when", "short", "guide",
}
SWAP_WORDS = {w for loaded, plain, _, _ in edits.SWAPS for w in (loaded, plain)}


def word_set(text: str) -> set[str]:
    return {w.lower() for w in re.findall(r"[A-Za-z']+", text)}


def inflections(words: set[str]) -> set[str]:
    """Regular third-person forms and base forms, which the question patterns change."""
    out = set(words)
    for w in words:
        out.add(edits._third_person(w))
        base = edits._base_form(w)
        if base:
            out.add(base)
    return out


def demo_headlines(n: int = 300, seed: int = 7) -> list[str]:
    rng = np.random.default_rng(seed)
    return [make_headline(rng)[0] for _ in range(n)] + [d[3] for d in DRAFTS]


# ----------------------------------------------------------- no invention

@pytest.mark.parametrize("headline", demo_headlines())
def test_rewrites_add_no_words_or_numbers(headline):
    original = word_set(headline)
    original_digits = set(re.findall(r"\d+", headline))
    for r in edits.rewrites(headline, length_range=(60, 90)):
        added = word_set(r.text) - inflections(original)
        assert added <= TEMPLATE_WORDS | SWAP_WORDS, (r.kind, r.text, added)
        # A number in a rewrite is either already in the draft or the placeholder N.
        assert set(re.findall(r"\d+", r.text)) <= original_digits, (r.kind, r.text)
        if r.instruction:
            assert r.scored_text != r.text
            assert "N" in r.text.split() or "[" in r.text
        else:
            assert r.scored_text == r.text


@given(st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=200))
@settings(max_examples=200, deadline=None)
def test_rewrites_never_crash_and_never_return_the_draft(text):
    for r in edits.rewrites(text, length_range=(40, 80)):
        assert r.text.strip() != text.strip()
        assert r.text.strip()


def test_add_number_uses_a_placeholder_never_a_value():
    (r,) = edits.add_number("How to get the most from the makerspace")
    assert r.text == "N ways to get the most from the makerspace"
    assert r.instruction and "never an invented one" in r.description
    # The model scores a neutral stand-in digit, which the editor never sees as a suggestion.
    assert r.scored_text == f"{edits.STAND_IN_DIGIT} ways to get the most from the makerspace"
    assert edits.add_number("5 reasons to visit the makerspace") == []  # already has a number
    assert edits.add_number("Is the makerspace right for you?") == []  # no safe pattern for questions


def test_lengthen_is_an_instruction_with_stop_word_stand_in():
    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

    (r,) = edits.lengthen("Inside the makerspace", (50, 70))
    assert r.instruction and "[+ a specific detail" in r.text
    stand_in = r.scored_text[len("Inside the makerspace"):].split()
    assert stand_in and all(w in ENGLISH_STOP_WORDS for w in stand_in)
    assert not any(w in lexicon() for w in stand_in)  # no emotional weight either
    assert edits.lengthen("A headline that is long enough already for this range", (20, 40)) == []


# ------------------------------------------------------ safe patterns, by hand

@pytest.mark.parametrize(
    "question, statement",
    [
        ("Is the library budget right for you?", "The library budget may be right for you"),
        ("Are quiet study rooms the answer to exam stress?", "Quiet study rooms may be the answer to exam stress"),
        ("Could the winter reading challenge beat the January gloom?",
         "The winter reading challenge could beat the January gloom"),
        ("Why does a visiting author matter to Quayside?", "Why a visiting author matters to Quayside"),
        ("How does the laptop loan scheme work?", "How the laptop loan scheme works"),
        ("Have you tried the makerspace laser cutter yet?", "Try the makerspace laser cutter"),
        ("Worried about exams? Quiet study rooms open late", "Quiet study rooms open late"),
    ],
)
def test_question_to_statement_patterns(question, statement):
    (r,) = edits.question_to_statement(question)
    assert r.text == statement
    assert "?" not in r.text


@pytest.mark.parametrize(
    "statement, question",
    [
        ("The library budget may be right for you", "Is the library budget right for you?"),
        ("The winter reading challenge could beat the January gloom",
         "Could the winter reading challenge beat the January gloom?"),
        ("Why a visiting author matters to Quayside", "Why does a visiting author matter to Quayside?"),
        ("The makerspace is open late", "Is the makerspace open late?"),
        ("Quayside is open late", "Is Quayside open late?"),  # a name keeps its capital
    ],
)
def test_statement_to_question_patterns(statement, question):
    (r,) = edits.statement_to_question(statement)
    assert r.text == question


@pytest.mark.parametrize(
    "headline",
    [
        "What is new with the author series at Harrow Lane",  # no subject/verb split is certain
        "The makerspace laser cutter is here and we love it!",
        "Inside the makerspace laser cutter",
    ],
)
def test_no_question_when_no_safe_pattern(headline):
    assert edits.statement_to_question(headline) == []


def test_no_statement_when_no_safe_pattern():
    assert edits.question_to_statement("What would you ask our librarians?") == []
    assert edits.question_to_statement("Have you tried the new parking rules yet and we love it?") == []


def test_round_trip_question_statement_question():
    q = "Could the photo archive change how Eastgate reads?"
    (s,) = edits.question_to_statement(q)
    (back,) = edits.statement_to_question(s.text)
    assert back.text == q


@pytest.mark.parametrize(
    "headline, expected",
    [
        ("4 changes to the library budget after a difficult year", "4 changes to the library budget"),
        ("Meet a visiting author at Quayside with wonderful volunteers", "Meet a visiting author at Quayside"),
        ("The makerspace laser cutter is here and we love it!", "The makerspace laser cutter is here!"),
        ("Inside the makerspace (now open late) for everyone", None),
    ],
)
def test_shorten_drops_trailing_qualifiers(headline, expected):
    texts = [r.text for r in edits.shorten(headline)]
    if expected is not None:
        assert expected in texts
    assert all(len(t) < len(headline) for t in texts)


def test_shorten_keeps_adjective_lists_whole():
    texts = [r.text for r in edits.shorten("What is new with digital skills at Quayside with brilliant, kind staff")]
    assert "What is new with digital skills at Quayside" in texts
    assert not any(t.endswith("with brilliant") or ", kind staff" in t and "brilliant" not in t for t in texts)


def test_shorten_drops_parentheticals_and_filler():
    texts = [r.text for r in edits.shorten("Our makerspace is really just open late (for now) in plain words")]
    assert "Our makerspace is open late (for now)" in texts or "Our makerspace is open late (for now)" in [
        t.replace("  ", " ") for t in texts]
    assert any("(for now)" not in t for t in texts)


def test_numbers_dropped_only_when_they_are_counts():
    (r,) = edits.drop_number("10 late-night quiet study rooms across the valley")
    assert r.text == "Late-night quiet study rooms across the valley"
    (r,) = edits.drop_number("The makerspace laser cutter: 12 dates for your diary")
    assert r.text == "The makerspace laser cutter: dates for your diary"
    assert edits.drop_number("Storytime at 10 am in Millbrook") == []  # a time, not a count
    assert edits.drop_number("Open from 2026 at Quayside") == []  # a year after 'from'


def test_exclamation_dropped():
    (r,) = edits.drop_exclamation("Winter reading starts! Join us today!")
    assert r.text == "Winter reading starts. Join us today"
    assert edits.drop_exclamation("No exclamation here") == []


def test_move_topic_forward():
    (r,) = edits.move_topic_forward("Updates on weekend storytime from Millbrook")
    assert r.text == "Weekend storytime: updates from Millbrook"
    assert edits.move_topic_forward("Updates on weekend storytime from Millbrook", topic_words={"budget"}) == []


# ----------------------------------------------------------- emotional words

def test_swap_table_plain_words_are_not_polar_in_vader():
    # Reference: the VADER lexicon (Hutto and Gilbert, 2014), as contentlab.features loads it;
    # a 'plain' word must be outside the polar words contentlab counts (|valence| >= 1).
    positive, negative = _polar_words()
    lex = lexicon()
    for loaded, plain, _, _ in edits.SWAPS:
        assert loaded in positive or loaded in negative, loaded
        assert plain not in positive and plain not in negative, plain
        assert abs(lex.get(plain, 0.0)) < abs(lex[loaded])


def test_swap_respects_context():
    texts = [r.text for r in edits.swap_loaded_word("Despite painful cuts, storytime stays")]
    assert "Despite deep cuts, storytime stays" in texts
    # 'painful' without 'cuts' after it has no safe plain synonym in the table
    assert not any("deep" in t for t in (r.text for r in edits.swap_loaded_word("A painful week for readers")))
    texts = [r.text for r in edits.swap_loaded_word("A tough year for the branches")]
    assert "A difficult year for the branches" in texts  # the reverse swap, same meaning
    # No reverse swap that exaggerates: a shortfall never becomes a crisis.
    assert not any("crisis" in r.text for r in edits.swap_loaded_word("A staffing shortfall at Quayside"))


def test_swap_drops_loaded_adjective_before_noun():
    texts = [r.text for r in edits.swap_loaded_word("Meet the makerspace with wonderful volunteers")]
    assert "Meet the makerspace with volunteers" in texts


def test_every_demo_draft_gets_at_least_one_rewrite():
    for _, _, _, headline in DRAFTS:
        assert edits.rewrites(headline, length_range=(55, 75)), headline
