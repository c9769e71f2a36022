"""Rewrite generators for draft headlines: small edits the model can evaluate.

Each generator is a pure function ``headline -> list[Rewrite]``. They keep the
draft's meaning and grammar by working only through a small set of safe
patterns (a generator returns nothing when no pattern applies) and they never
invent facts or numbers:

* an edit that needs content only the editor has (a real count, a specific
  detail) is an *instruction*: ``text`` shows the placeholder (``N``, ``[...]``)
  and ``scored_text`` holds a neutral stand-in (a digit, plain stop words)
  that carries the same model features, so the model can still say what the
  change is worth without anyone reading the stand-in as a suggestion;
* everything else only drops, moves or swaps words already in the draft.

Scoring the rewrites is :mod:`contentlab.scoring`'s job; this module never
looks at a model.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache
from typing import Iterable

__all__ = [
    "Rewrite",
    "rewrites",
    "shorten",
    "lengthen",
    "add_number",
    "drop_number",
    "question_to_statement",
    "statement_to_question",
    "swap_loaded_word",
    "drop_exclamation",
    "move_topic_forward",
    "SWAPS",
    "STAND_IN_DIGIT",
]

# The digit the model scores in place of an editor's real count. Any single digit
# gives the same features (has_digit, leading_number, list_form, the <num> term).
STAND_IN_DIGIT = "5"
# Plain stop words that stand in for an editor's detail when scoring a longer headline:
# no topic terms (all are scikit-learn stop words), no lexicon words, no digits.
_STAND_IN_WORDS = "for all of us who are there and here with them".split()


@dataclass(frozen=True)
class Rewrite:
    """One candidate edit of a headline.

    ``text`` is what the editor would publish (with ``N`` or ``[...]`` where only
    they can fill in the truth); ``scored_text`` is what the model scores;
    ``instruction`` marks edits that need the editor's own facts.
    """

    kind: str
    text: str
    description: str
    scored_text: str = ""
    instruction: bool = False

    def __post_init__(self) -> None:
        if not self.scored_text:
            object.__setattr__(self, "scored_text", self.text)


# ------------------------------------------------------------------ helpers

_TERMINAL = re.compile(r"[\s?!.…]+$")
_WORD = re.compile(r"\S+")
_SPACES = re.compile(r"\s+")

# Words that may be lower-cased when they move away from the start of a headline.
_LOWER_OK = frozenset(
    "a an the our your their its my his her this that these those every all some any each no "
    "new local free quiet late early weekend winter summer spring autumn evening morning "
    "what how why when who which it we you they there here".split()
)


def _split_terminal(text: str) -> tuple[str, str]:
    """Body and trailing punctuation ('?', '!', '.') of a headline."""
    text = text.strip()
    m = _TERMINAL.search(text)
    if not m:
        return text, ""
    tail = m.group(0).replace(" ", "")
    return text[: m.start()].rstrip(), tail


def _tidy(text: str) -> str:
    text = _SPACES.sub(" ", text).strip()
    text = re.sub(r"\s+([,:;?!.])", r"\1", text)
    text = re.sub(r"[,;:]\s*$", "", text)
    text = re.sub(r"^[,;:\s]+", "", text)
    return text


def _cap(text: str) -> str:
    return text[:1].upper() + text[1:] if text else text


def _lower_first(text: str, lowercase_words: frozenset[str] | None = None) -> str:
    """Lower-case the first word only when it is a common word, never a name or an acronym.

    Common: a determiner or pronoun from a fixed list, or a word the user's history
    writes in lower case inside headlines (``lowercase_words``).
    """
    if not text:
        return text
    first = text.split(" ", 1)[0]
    known = _LOWER_OK if lowercase_words is None else (_LOWER_OK | lowercase_words)
    if first.lower() in known and not (first.isupper() and len(first) > 1):
        return first.lower() + text[len(first):]
    return text


def _words(text: str) -> list[str]:
    return _WORD.findall(text)


@lru_cache(maxsize=1)
def _stop_words() -> frozenset[str]:
    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

    return frozenset(ENGLISH_STOP_WORDS)


@lru_cache(maxsize=1)
def _lexicon() -> dict[str, float]:
    from .features import lexicon

    return lexicon()


def _content_words(text: str) -> list[str]:
    stop = _stop_words()
    return [w for w in re.findall(r"[A-Za-z][A-Za-z'-]*", text) if w.lower() not in stop]


def _third_person(verb: str) -> str:
    """'matter' -> 'matters', 'go' -> 'goes', 'carry' -> 'carries' (regular English spelling)."""
    irregular = {"have": "has", "do": "does", "be": "is", "go": "goes"}
    if verb in irregular:
        return irregular[verb]
    if re.search(r"(s|sh|ch|x|z|o)$", verb):
        return verb + "es"
    if re.search(r"[^aeiou]y$", verb):
        return verb[:-1] + "ies"
    return verb + "s"


def _base_form(verb: str) -> str | None:
    """Inverse of :func:`_third_person` for verbs in :data:`_BASE_VERBS`, else None."""
    for base in _BASE_VERBS:
        if _third_person(base) == verb:
            return base
    return None


# Base-form verbs that may follow a subject in the question patterns. A closed list, so a
# pattern fires only where the split between subject and verb is certain.
_BASE_VERBS = frozenset(
    "be beat bring change help make save get give keep open become work fix solve replace boost end win "
    "take turn start stop shape transform improve support reach ease lift matter happen come go run grow "
    "return last raise cost mean teach inspire spark revive protect lead read see affect need want serve "
    "welcome connect reshape brighten shorten".split()
)


# ------------------------------------------------------------------ shorten

_FILLERS = [
    r"in plain (?:words|english|language)",
    r"really", r"just", r"actually", r"basically", r"simply", r"literally", r"truly", r"honestly",
    r"very", r"quite", r"totally",
]
_FILLER_RE = re.compile(r"(?i)(?<![\w'-])(?:" + "|".join(_FILLERS) + r")(?![\w'-])")
_PAREN = re.compile(r"\s*[\(\[][^()\[\]]{1,80}[\)\]]")

# Heads of trailing qualifier clauses (checked on lower-case words). A clause from one of
# these to the next one (or to the end) can go without changing what the headline claims.
_CLAUSE_HEADS = {
    "after", "despite", "amid", "amidst", "when", "while", "although", "though", "because", "following",
    "as", "for", "with", "and", "across", "starting", "from", "this", "at", "in", ",",
}
_TIME_WORDS = frozenset(
    "spring summer autumn fall winter week weekend month year morning evening monday tuesday wednesday "
    "thursday friday saturday sunday".split()
)
_PRONOUNS = frozenset("we you they it i our".split())


def _is_clause_head(words: list[str], i: int) -> bool:
    """Whether words[i] starts a droppable trailing qualifier (a closed set of safe cases)."""
    w = words[i].lower()
    nxt = words[i + 1].lower().strip(",.!?") if i + 1 < len(words) else ""
    if w == ",":
        # not inside a list of adjectives ("brilliant, kind staff", "a happy, great start")
        prev = words[i - 1].lower() if i > 0 else ""
        return abs(_lexicon().get(prev, 0.0)) < 1.0

    if w in {"after", "despite", "amid", "amidst", "when", "while", "although", "though", "because", "following"}:
        return True
    if w == "as":
        return nxt not in {"well", "part", "much", "many", "soon", "long", "good", "a", "an", "the", "if"}
    if w == "for":
        return nxt not in {"you", "me", "us", "them", "everyone", "all", "it"}
    if w == "with":
        # only 'with' + an emotionally loaded word ('with wonderful volunteers'): a decoration, not content
        return abs(_lexicon().get(nxt, 0.0)) >= 1.0
    if w == "and":
        return nxt in _PRONOUNS
    if w == "across":
        return nxt == "the"
    if w == "starting":
        return nxt in {"next", "this", "on", "in", "from", "today", "tomorrow", "soon"}
    if w == "from":
        return nxt in {"our", "your", "the"} and i + 2 < len(words) and words[i + 2].lower() == "team"
    if w == "this":
        return nxt in _TIME_WORDS
    if w == "at":
        return nxt in {"every", "all"}
    if w == "in":
        return nxt == "plain"
    return False


def _tokens_with_commas(body: str) -> list[str]:
    return re.sub(r",", " , ", body).split()


def _join(tokens: list[str]) -> str:
    return _tidy(" ".join(tokens))


def shorten(headline: str) -> list[Rewrite]:
    """Drop trailing qualifier clauses, parentheticals and filler words.

    Each droppable trailing clause gives one candidate, and all of them together
    another; the core that stays must keep at least three words and two content words.
    """
    body, end = _split_terminal(headline)
    out: list[Rewrite] = []
    seen: set[str] = {headline.strip()}

    def add(new_body: str, description: str) -> None:
        new_body = _tidy(new_body)
        if len(_words(new_body)) < 3 or len(_content_words(new_body)) < 2:
            return
        text = _cap(new_body) + end
        if text not in seen:
            seen.add(text)
            out.append(Rewrite("shorten", text, description))

    tokens = _tokens_with_commas(body)
    # Trailing clause boundaries, at least three words into the headline.
    word_positions = [i for i, t in enumerate(tokens) if t != ","]
    min_start = word_positions[3] if len(word_positions) > 3 else len(tokens)
    heads = [i for i in range(min_start, len(tokens)) if _is_clause_head(tokens, i)]
    # Keep only heads of a trailing chain of short clauses (each at most 8 words).
    chain: list[int] = []
    stop = len(tokens)
    for i in reversed(heads):
        if stop - i <= 9:
            if chain and chain[0] == i + 1 and tokens[i] == ",":
                chain[0] = i  # ", in plain words": the comma goes with the clause it opens
            else:
                chain.insert(0, i)
            stop = i
    for k, start in enumerate(chain):
        finish = chain[k + 1] if k + 1 < len(chain) else len(tokens)
        dropped = _join(tokens[start:finish]).strip(", ")
        add(_join(tokens[:start] + tokens[finish:]), f"drop '{dropped}'")
    if len(chain) > 1:
        dropped = _join(tokens[chain[0]:]).strip(", ")
        add(_join(tokens[: chain[0]]), f"drop '{dropped}'")

    if _PAREN.search(body):
        add(_PAREN.sub("", body), "drop the bracketed aside")
    fillers = [m.group(0) for m in _FILLER_RE.finditer(body)]
    if fillers:
        add(_FILLER_RE.sub("", body), "drop the filler " + ", ".join(f"'{f}'" for f in fillers))
    return out


# ------------------------------------------------------------------ lengthen

def lengthen(headline: str, target_chars: tuple[float, float] | None) -> list[Rewrite]:
    """Ask for a specific detail when the draft is shorter than the length range that did best.

    Never writes the detail: ``text`` carries a bracketed instruction and
    ``scored_text`` plain stop words of the missing length, so the model scores
    the length change alone.
    """
    if not target_chars:
        return []
    low, high = target_chars
    body, end = _split_terminal(headline)
    n = len(headline.strip())
    if n >= low:
        return []
    need = int(round((low + high) / 2 - n))
    if need < 8:
        return []
    filler: list[str] = []
    while len(" ".join(filler)) < need - 1:
        filler.append(_STAND_IN_WORDS[len(filler) % len(_STAND_IN_WORDS)])
    text = f"{body} [+ a specific detail: who, where or when]{end}"
    scored = f"{body} {' '.join(filler)}{end}"
    return [Rewrite(
        "lengthen", text,
        f"add a short, true detail (about {need} characters) - headlines of {int(low)}-{int(high)} "
        "characters did best in your history",
        scored_text=scored, instruction=True,
    )]


# ------------------------------------------------------------------ numbers

_NUMBER_WORDS = "one|two|three|four|five|six|seven|eight|nine|ten|eleven|twelve|fifteen|twenty|fifty|hundred"
_LIST_NOUNS = (
    "things|ways|reasons|tips|ideas|changes|dates|books|events|places|questions|facts|steps|rooms|classes|"
    "days|stories|lessons|signs|questions|answers|highlights|picks|favourites|reads|titles"
)
_NUMBER_NOT_COUNT_BEFORE = frozenset("at on in by from until before after since to under over of per no page".split())
_NUMBER_NOT_COUNT_AFTER = re.compile(
    r"^(?:am|pm|a\.m\.|p\.m\.|%|percent|per|minutes?|hours?|years?|months?|weeks?|days?|o'clock|"
    r"january|february|march|april|may|june|july|august|september|october|november|december)\b",
    re.I,
)


_SLOT = "\x00count\x00"  # where the count goes (not str.format: a headline may contain braces)


def add_number(headline: str) -> list[Rewrite]:
    """Suggest leading with the real count (shown as ``N``); never picks a number.

    Fires only where a count fits the sentence ("How to X" -> "N ways to X",
    "Tips for X" -> "N tips for X", a statement -> "X: N things to know" when the
    post really lists them). Questions and drafts with a number (digits or a word such as
    "five") are left alone.
    """
    from .features import HAS_NUMBER  # digits and counts written as words ("Five"), as the model sees them

    body, end = _split_terminal(headline)
    if HAS_NUMBER.search(headline) or re.match(rf"(?i)^\W*(?:{_NUMBER_WORDS})\b", body) or "?" in headline:
        return []
    how_to = re.match(r"(?i)^how to (.+)$", body)
    lead_noun = re.match(rf"(?i)^({_LIST_NOUNS})\b(.*)$", body)
    if how_to:
        template = _SLOT + " ways to " + how_to.group(1)
        said = "say how many ways the post gives"
    elif lead_noun:
        template = _SLOT + " " + lead_noun.group(1).lower() + lead_noun.group(2)
        said = f"say how many {lead_noun.group(1).lower()} the post gives"
    elif (not re.search(r"[:\u2014\u2013!]|\s-\s", headline) and 3 <= len(_words(body)) <= 9
          and not re.search(r"(?i)\b(?:and (?:we|you|they|it)|is|are|was|were)\b", body)):
        template = body + ": " + _SLOT + " things to know"
        said = "only if the post really lists that many points"
    else:
        return []
    text = _cap(template.replace(_SLOT, "N")) + end
    scored = _cap(template.replace(_SLOT, STAND_IN_DIGIT)) + end
    return [Rewrite(
        "add_number", text,
        f"add the real count as N ({said}); never an invented one",
        scored_text=scored, instruction=True,
    )]


def drop_number(headline: str) -> list[Rewrite]:
    """Drop a count ("5 things to know" -> "Things to know"); times, dates and amounts stay."""
    body, end = _split_terminal(headline)
    pattern = re.compile(rf"(?i)(?<![\w.,£$€])(\d+|{_NUMBER_WORDS})\s+(?=[A-Za-z])")
    out = []
    for m in pattern.finditer(body):
        before = body[: m.start()].split()
        prev = before[-1].lower().strip(",:;") if before else ""
        after = body[m.end():]
        if prev in _NUMBER_NOT_COUNT_BEFORE or _NUMBER_NOT_COUNT_AFTER.match(after):
            continue
        # a count is followed by a plural noun within three words ("10 late-night rooms")
        if not re.match(r"^(?:[\w'-]+\s+){0,3}[\w'-]*s\b", after):
            continue
        new_body = body[: m.start()] + after
        if not before:
            new_body = _cap(after)
        elif before[-1].endswith(":"):
            new_body = body[: m.start()] + after[:1].lower() + after[1:]
        text = _tidy(new_body) + end
        out.append(Rewrite("drop_number", text, f"drop the number '{m.group(1)}'"))
        break
    return out


# ------------------------------------------------------- question <-> statement

_PREDICATE_STARTS = (
    "right for", "worth", "the answer", "the best", "the right", "the way", "ready", "open", "back",
    "good for", "still", "here", "coming", "available", "enough", "a good", "the key", "for you", "for everyone",
)
_MODALS = ("could", "can", "will", "would", "should", "might")
_PARTICIPLES = {
    "tried": "Try", "seen": "See", "met": "Meet", "visited": "Visit", "read": "Read", "joined": "Join",
    "used": "Use", "explored": "Explore", "booked": "Book",
}


def _split_subject(rest: str, starts: Iterable[str], max_words: int = 7) -> tuple[str, str] | None:
    """Split 'the budget right for you' into ('the budget', 'right for you') at a known predicate start."""
    low = " " + rest.lower() + " "
    best = None
    for s in starts:
        i = low.find(" " + s + " ")
        if i > 0 and (best is None or i < best[0]):
            best = (i, s)
    if best is None:
        return None
    i = best[0]
    subject, predicate = rest[: i - 1 + 1].strip(), rest[i:].strip()
    if not subject or len(subject.split()) > max_words:
        return None
    return subject, predicate


def _split_at_verb(rest: str, *, inflected: bool = False, max_words: int = 7) -> tuple[str, str, str] | None:
    """Split 'the winter challenge beat the gloom' into subject, verb, remainder at a known verb."""
    words = rest.split()
    for i in range(1, min(len(words), max_words + 1)):
        w = words[i].lower()
        base = _base_form(w) if inflected else (w if w in _BASE_VERBS else None)
        if base:
            return " ".join(words[:i]), words[i], " ".join(words[i + 1:])
    return None


def question_to_statement(headline: str, lowercase_words: frozenset[str] | None = None) -> list[Rewrite]:
    """Turn a question into a statement with one of a few safe patterns; nothing when none applies."""
    text = headline.strip()
    out: list[Rewrite] = []
    if text.count("?") == 1 and not text.endswith("?"):
        lead, rest = text.split("?", 1)
        rest = rest.strip()
        if len(_words(lead)) <= 6 and len(_words(rest)) >= 3:
            out.append(Rewrite("to_statement", _cap(rest), f"drop the opening question '{lead.strip()}?'"))
        return out
    if text.count("?") != 1 or not text.endswith("?"):
        return out
    body = text[:-1].strip().rstrip("!")
    statement: str | None = None
    m = re.match(r"(?i)^(is|are) (.+)$", body)
    if m:
        split = _split_subject(m.group(2), _PREDICATE_STARTS)
        if split:
            statement = f"{_cap(split[0])} may be {split[1]}"
    m = re.match(r"(?i)^(" + "|".join(_MODALS) + r") (.+)$", body)
    if statement is None and m:
        split = _split_at_verb(m.group(2))
        if split:
            subject, verb, rest = split
            statement = f"{_cap(subject)} {m.group(1).lower()} {verb} {rest}".strip()
    m = re.match(r"(?i)^(why|how) (do|does) (.+)$", body)
    if statement is None and m:
        split = _split_at_verb(m.group(3))
        if split:
            subject, verb, rest = split
            verb = _third_person(verb.lower()) if m.group(2).lower() == "does" else verb
            statement = f"{_cap(m.group(1).lower())} {_lower_first(subject, lowercase_words)} {verb} {rest}".strip()
    m = re.match(r"(?i)^have you (" + "|".join(_PARTICIPLES) + r") (.+?)(?: yet)?$", body)
    if statement is None and m and not re.search(r"(?i)\b(?:and|yet|but)\b|,", m.group(2)):
        statement = f"{_PARTICIPLES[m.group(1).lower()]} {m.group(2)}"
    m = re.match(r"(?i)^do you (need|want) (.+)$", body)
    if statement is None and m:
        statement = f"You may {m.group(1).lower()} {m.group(2)}"
    if statement:
        out.append(Rewrite("to_statement", _tidy(statement), "say it as a statement, not a question"))
    return out


def statement_to_question(headline: str, lowercase_words: frozenset[str] | None = None) -> list[Rewrite]:
    """Turn a statement into a question with the reverse of the safe patterns above."""
    body, end = _split_terminal(headline)
    if "?" in headline or "!" in end or re.search(r"[:;,\u2014]", body) or " and " in body.lower():
        return []
    if re.match(r"(?i)^(?:what|how|why|who|where|when|which|everything|nothing|there|here)\b", body) and \
            not re.match(r"(?i)^why ", body):
        return []
    question: str | None = None
    m = re.match(r"(?i)^(.+?) may be (.+)$", body)
    if m and len(m.group(1).split()) <= 7:
        subject = m.group(1)
        aux = "Are" if re.search(r"(?i)[^s]s$", subject.split()[-1]) else "Is"
        question = f"{aux} {_lower_first(subject, lowercase_words)} {m.group(2)}"
    m = re.match(r"(?i)^(.+?) (" + "|".join(_MODALS) + r") (\w+)(.*)$", body)
    if question is None and m and len(m.group(1).split()) <= 7 and m.group(3).lower() in _BASE_VERBS:
        question = f"{_cap(m.group(2).lower())} {_lower_first(m.group(1), lowercase_words)} {m.group(3)}{m.group(4)}"
    m = re.match(r"(?i)^why (.+)$", body)
    if question is None and m:
        split = _split_at_verb(m.group(1), inflected=True)
        if split:
            subject, verb, rest = split
            question = f"Why does {_lower_first(subject, lowercase_words)} {_base_form(verb.lower())} {rest}".strip()
    m = re.match(r"(?i)^(try|visit|explore|join) (.+)$", body)
    if question is None and m:
        participle = {v.lower(): k for k, v in _PARTICIPLES.items()}[m.group(1).lower()]
        question = f"Have you {participle} {m.group(2)} yet"
    if question is None:
        low = " " + body.lower() + " "
        if low.count(" is ") + low.count(" are ") == 1:
            m = re.match(r"(?i)^(.+?) (is|are) (.+)$", body)
            if m and 1 <= len(m.group(1).split()) <= 6:
                question = f"{m.group(2).capitalize()} {_lower_first(m.group(1), lowercase_words)} {m.group(3)}"
    if not question:
        return []
    return [Rewrite("to_question", _tidy(question) + "?", "ask it as a question")]


# ---------------------------------------------------------- emotional words

# Curated swaps of an emotionally loaded word for a plainer one with the same meaning in
# the given context: (loaded, plain, regex the next word must match or None, regex the
# previous word must match or None). Every 'plain' word is outside the VADER lexicon's
# polar words (|valence| < 1), which a test checks. Reverse swaps (plain -> loaded) are
# listed only where both words say the same thing; they never exaggerate.
SWAPS: list[tuple[str, str, str | None, str | None]] = [
    ("painful", "deep", r"cuts?|reductions|losses", None),
    ("difficult", "tough", None, None),
    ("hurt", "squeeze", None, r"costs|prices|bills|cuts"),
    ("hurts", "squeezes", None, r"costs|prices|bills|cuts"),
    ("crisis", "shortfall", None, r"staffing|funding|budget|cash|staff"),
    ("worry", "concern", None, r"and|or|no|of|with|the"),
    ("worried", "concerned", r"about|by", None),
    ("stress", "strain", None, r"exam|work|money|holiday|the|of|and"),
    ("gloom", "blues", None, r"january|winter|february|monday"),
    ("problem", "issue", None, None),
    ("problems", "issues", None, None),
    ("brilliant", "skilled", r"staff|volunteers|team|teachers|librarians|people", None),
    ("great", "solid", r"start", None),
    ("best", "top", r"(?!of\b|to\b|way\b|for\b)[a-z]\w*", r"the|our|your|\d+"),
    ("easy", "simple", None, None),
    ("cuts", "reductions", None, r"budget|funding|spending|service|deep"),
]
# Plain -> loaded, only pairs with the same meaning.
_REVERSE_OK = {"tough", "concerned", "issue", "issues", "simple"}
# Loaded adjectives that can go entirely before a noun ("with wonderful volunteers" -> "with volunteers").
_DROPPABLE_ADJECTIVES = frozenset(
    "wonderful brilliant amazing fantastic awesome lovely beautiful delightful terrible awful painful "
    "happy superb incredible".split()
)


def _match_case(template: str, word: str) -> str:
    if template.isupper() and len(template) > 1:
        return word.upper()
    if template[:1].isupper():
        return word[:1].upper() + word[1:]
    return word


def swap_loaded_word(headline: str) -> list[Rewrite]:
    """Swap an emotionally loaded word for a plain synonym (or back), or drop a loaded adjective."""
    out: list[Rewrite] = []
    tokens = re.findall(r"[A-Za-z']+|[^A-Za-z']+", headline)
    word_idx = [i for i, t in enumerate(tokens) if re.match(r"[A-Za-z']", t)]

    def neighbour(k: int, step: int) -> str:
        j = k + step
        return tokens[word_idx[j]].lower() if 0 <= j < len(word_idx) else ""

    seen = set()
    for k, i in enumerate(word_idx):
        low = tokens[i].lower()
        nxt, prev = neighbour(k, 1), neighbour(k, -1)
        gap_after = tokens[i + 1] if i + 1 < len(tokens) else ""
        for loaded, plain, next_re, prev_re in SWAPS:
            for src, dst, direction in ((loaded, plain, "plainer"), (plain, loaded, "stronger")):
                if low != src or (direction == "stronger" and plain not in _REVERSE_OK):
                    continue
                if next_re and not (gap_after.strip() == "" and re.fullmatch(next_re, nxt)):
                    continue
                if prev_re and not re.fullmatch(prev_re, prev):
                    continue
                new = tokens.copy()
                new[i] = _match_case(tokens[i], dst)
                text = "".join(new)
                if text in seen:
                    continue
                seen.add(text)
                desc = (f"swap '{tokens[i]}' for the plainer '{dst}'" if direction == "plainer"
                        else f"swap '{tokens[i]}' for the stronger '{dst}' (same meaning)")
                out.append(Rewrite("swap_word", text, desc))
        if low in _DROPPABLE_ADJECTIVES and k + 1 < len(word_idx) and k > 0:
            following = tokens[word_idx[k + 1]].lower()
            joiner = "".join(tokens[i + 1: word_idx[k + 1]])
            # before a noun (not a stop word), or in a list of adjectives ("brilliant, kind staff")
            if following not in _stop_words() and joiner.strip() in {"", ","}:
                new = tokens[:i] + tokens[word_idx[k + 1]:]
                text = _tidy("".join(new))
                if text[:1].islower() and headline[:1].isupper():
                    text = _cap(text)
                if text not in seen:
                    seen.add(text)
                    out.append(Rewrite("swap_word", text, f"drop the loaded word '{tokens[i]}'"))
    return out


# ------------------------------------------------------------------ the rest

def drop_exclamation(headline: str) -> list[Rewrite]:
    """Drop exclamation marks (a mid-headline one becomes a full stop)."""
    if "!" not in headline:
        return []
    text = re.sub(r"!+(?=\s+\S)", ".", headline.strip())
    text = re.sub(r"\s*!+", "", text)
    text = _tidy(text)
    return [Rewrite("drop_exclamation", text, "drop the exclamation mark")] if text and text != headline else []


_LABEL_NOUNS = "updates|news|changes|dates|tips|ideas|plans"


def move_topic_forward(headline: str, topic_words: Iterable[str] = ()) -> list[Rewrite]:
    """Put the topic first as a label ("Updates on X from Y" -> "X: updates from Y").

    ``topic_words`` (lower-case words of terms the model knows) limits the move to
    drafts whose topic the history covers; empty means any topic.
    """
    body, end = _split_terminal(headline)
    if re.search(r"[:\u2014]", body) or "?" in headline:
        return []
    moved: str | None = None
    m = re.match(rf"(?i)^({_LABEL_NOUNS}) (on|about|to|for) (.+?)(?: (from|at) ([A-Z].*))?$", body)
    if m:
        tail = f" {m.group(4)} {m.group(5)}" if m.group(4) else ""
        topic = m.group(3)
        moved = f"{_cap(topic)}: {m.group(1).lower()}{tail}"
    m2 = re.match(r"(?i)^(a|an|the|our) ((?:short |quick |new |full )?(?:guide|introduction|look|timetable)) "
                  r"(to|at|on) (.+)$", body)
    if moved is None and m2:
        topic = m2.group(4)
        moved = f"{_cap(topic)}: {m2.group(1).lower()} {m2.group(2)}"
    if moved is None:
        return []
    topic_tokens = _tokens_with_commas(topic)
    if len(topic_tokens) > 6 or any(_is_clause_head(topic_tokens, i) for i in range(1, len(topic_tokens))):
        return []  # the topic would drag its qualifiers to the front
    if topic_words:
        words = {w.lower() for w in re.findall(r"[A-Za-z]+", topic)}
        if not words & set(topic_words):
            return []
    return [Rewrite("move_topic", _tidy(moved) + end, "put the topic first")]


# ------------------------------------------------------------------ all

def rewrites(
    headline: str,
    *,
    length_range: tuple[float, float] | None = None,
    topic_words: Iterable[str] = (),
    lowercase_words: frozenset[str] | None = None,
) -> list[Rewrite]:
    """Every candidate rewrite of ``headline``, de-duplicated, the draft itself excluded.

    ``length_range`` (characters) is where history did best, for :func:`lengthen`;
    ``lowercase_words`` are words the history writes in lower case mid-headline, so
    a word moved off the start is lower-cased only when it is not a name.
    """
    original = headline.strip()
    found: list[Rewrite] = []
    found += shorten(original)
    found += lengthen(original, length_range)
    found += add_number(original)
    found += drop_number(original)
    found += question_to_statement(original, lowercase_words)
    found += statement_to_question(original, lowercase_words)
    found += swap_loaded_word(original)
    found += drop_exclamation(original)
    found += move_topic_forward(original, topic_words)
    unique: dict[str, Rewrite] = {}
    for r in found:
        if r.text != original and r.text not in unique and r.scored_text.strip():
            unique[r.text] = r
    return list(unique.values())
