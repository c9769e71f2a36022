"""EngagementModel: what drove engagement, learned from the user's own post history.

A penalised binomial GLM (:class:`contentlab.glm.PenalizedBinomialGLM`) of the
outcome per impression, so a post with 40 impressions weighs like 40
impressions, not like a post with 40,000. Design matrix, left to right:

* **dense features**, standardised on the history: length, readability,
  emotion-word counts, structure flags, and the cyclic posting time. Emotion
  enters through the lexicon counts (``n_negative_words``,
  ``n_positive_words``) and not also through VADER's scores, and ``n_words`` /
  ``flesch_kincaid_grade`` are left out beside ``n_chars`` /
  ``flesch_reading_ease``: near-duplicate columns split one effect into two
  half-effects under a ridge penalty and make both look weak.
* **topic terms**: stemmed content words and bigrams from the featurizer,
  0/1, with their own penalty multiplier (``term_penalty``).
* **wording**: word 1-3-grams with the small words kept ("this is why",
  "you"), which the topic terms drop but which carry much of how a headline
  is phrased; own multiplier (``wording_penalty``).
* **channel** one-hot, almost unpenalised: a baseline per channel, so
  channels with different typical rates are compared fairly.
* **headline meaning** (``meaning``): one column, a sentence embedding of the headline
  (:mod:`contentlab.meaning`) times ridge weights learned from the differences between arms of
  the same tests; unlike words, it reaches headlines about topics the history never used. Its
  ridge penalty and weight are chosen on the same forward time folds once alpha is (weight 0:
  left out); the weight is its coefficient, the GLM is not refitted with it.
* **one effect per A/B experiment**, lightly penalised: the arms of a test
  were shown to randomly split audiences at the same time, so once each
  test has its own level, feature effects are learned from the differences
  between arms (caused by the headline) rather than from topic or season.

The penalty strength ``alpha`` is chosen by forward-chaining cross-validation
on publication time: the history is cut into ``n_folds + 1`` consecutive time
blocks, and each block is predicted by a model fitted on the blocks before it
only. The held-out criterion is the binomial deviance, with experiment posts
judged within their experiment (each test's level refitted), because that is
what the model is used for: choosing between headlines. The held-out
predictions are kept (``oof_``) for residuals and for the bandit's prior.

Levels: rates drift, so each channel's baseline is set to its level at the history's end (and,
when the time folds find it helps, a damped slope), see :mod:`contentlab.levels`.

Uncertainty: a bootstrap that resamples whole experiments (and, for posts
outside experiments, whole weeks) refits the model ``n_bootstrap`` times; it
gives the drivers' intervals and the parameter part of a draft's interval.
The post-to-post spread that no feature explains is estimated from the
held-out residuals around each week's own level, the level's own error grows
with the weeks ahead, one factor calibrates both to the nominal coverage on the
time folds, and binomial noise at the post's impressions is added on top, so
``rate_low``/``rate_high`` bound the *observed* rate of a post.
"""

from __future__ import annotations

import numbers
import re
import sys
from collections.abc import Sequence

import inspect
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.special import expit

from .errors import ContentlabError
from .features import DENSE_COLUMNS, FEATURE_LABELS, TIME_COLUMNS, HeadlineFeaturizer, clean_headline, topic_tokens
from .levels import damped_steps, fold_forecasts, interval_scale, level_error_variance, recent_levels, week_number

__all__ = [
    "EngagementModel",
    "DEFAULT_DENSE",
    "FEATURE_LABELS",
    "MIN_POSTS",
    "MIN_EVENTS",
    "check_history_size",
    "wording_ngrams",
    "function_word_ngrams",
]

DEFAULT_DENSE: tuple[str, ...] = (
    "n_chars",
    "mean_word_length",
    "flesch_reading_ease",
    "n_negative_words",
    "n_positive_words",
    "is_question",
    "has_exclamation",
    "has_digit",
    "second_person",
    "has_quote",
    "split_colon_dash",
    "n_allcaps_words",
    "n_emoji",
    "n_first_singular",
    "n_first_plural",
    "n_third_person",
    "n_this_here",
    "n_negations",
    "starts_with_question_word",
    "n_superlatives",
)
HOUR_COLUMNS = ("hour_sin", "hour_cos", "hour_sin2", "hour_cos2")
WEEKDAY_COLUMNS = ("weekday_sin", "weekday_cos")

# Plain labels live beside the features (features.FEATURE_LABELS); kept importable from here.

# Smallest history learn accepts. Forward-chaining CV needs n_folds + 1 time blocks with posts in
# each; below ~60 posts a held-out block has fewer than 15 posts and its deviance says little; and
# with fewer than ~100 clicks the standard error of any effect on the log-odds (about
# 1/sqrt(events) for a balanced binary feature) is larger than the effects worth reporting
# (common practice: the "events per variable" rules of thumb for logistic regression).
MIN_POSTS = 60
MIN_EVENTS = 100
# Channel columns: a tiny ridge only to keep the one-hot plus intercept identifiable.
_CHANNEL_ALPHA = 1e-7
CV_MIN_PAIRS = 300
# 1-3-grams far outnumber stemmed terms: the wording block may keep this many times max_terms
# (on the archive a 20,000 cap dropped a third of the n-grams seen in 3+ headlines, and cost
# about 0.7 points of pairwise accuracy).
WORDING_CAP_FACTOR = 3
# A draft this many standard deviations (summed over the measured dense features: length,
# readability, ...) outside the history's range is scored as its channel's typical post; nearer
# ones are pulled toward it in proportion (our choice: half a standard deviation beyond the
# history's extremes already describes a headline unlike any it holds, e.g. "Hello world").
FAR_DISTANCE = 0.5
# A draft with at least this share of words the history never used is far from it (by its words).
FAR_UNSEEN_SHARE = 0.5
# A draft none of whose words the history used is scored as its channel's typical post: its style alone
# says little (our choice; pulling drafts with fewer new words too cost ranking accuracy on later real tests).
UNKNOWN_WORDS_SHARE = 1.0
DEFAULT_ALPHAS = tuple(float(a) for a in np.geomspace(1e-1, 1e-6, 11))
# Headline meaning (see _add_meaning): ridge penalties in clicks' units and weights of its score
# beside the GLM's logit, all chosen on the forward time folds (our grid: on the archive's inner
# folds the best penalties were 300-3000 and the best weights 1-2).
MEANING_RIDGES = (100.0, 300.0, 1000.0, 3000.0, 10000.0)
MEANING_WEIGHTS = (0.0, 0.5, 1.0, 1.5, 2.0, 3.0)
MEANING_GROUP = "headline meaning"
# At most about this many arms are encoded for the meaning column (whole tests, spread evenly over the
# history so every time fold keeps some): encoding is most of its cost (about 4 ms a headline on one
# core), and a 384-dimension ridge is well fitted by a few thousand arms. Our bound: it keeps learn on
# 100,000 posts near 30 s; the archive's later time cut (about 6,000 arms in varied tests) is under it.
MEANING_MAX_ARMS = 6000
# Gauss-Hermite (probabilists') nodes and weights: the mean and variance of a logit-normal rate.
_GH_NODES, _GH_WEIGHTS = np.polynomial.hermite_e.hermegauss(24)
_GH_WEIGHTS = _GH_WEIGHTS / _GH_WEIGHTS.sum()


# ----------------------------------------------------------------------------- wording tokens

def wording_ngrams(text: str) -> list[str]:
    """Lower-case word 1-3-grams with the small words kept (unstemmed)."""
    toks = re.findall(r"[^\W_][\w']*", text.lower().replace("’", "'"))
    toks = ["<num>" if t.isdigit() else t for t in toks]
    out = list(toks)
    for n in (2, 3):
        out.extend(" ".join(toks[i:i + n]) for i in range(len(toks) - n + 1))
    return out


def function_word_ngrams(text: str) -> list[str]:
    """Only the 1-3-grams made entirely of English stop words ("this is", "what you")."""
    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

    toks = re.findall(r"[^\W_][\w']*", text.lower().replace("’", "'"))
    keep = [t in ENGLISH_STOP_WORDS for t in toks]
    out = []
    for n in (1, 2, 3):
        for i in range(len(toks) - n + 1):
            if all(keep[i:i + n]):
                out.append(" ".join(toks[i:i + n]))
    return out


_WORDING = {"ngrams": wording_ngrams, "function_words": function_word_ngrams}


class WordingVocabulary:
    """The wording block's learned n-grams: turns headlines into 0/1 columns, nothing more.

    ``fit`` learns the vocabulary with scikit-learn's ``CountVectorizer`` (most
    frequent n-grams first, capped); the fitted model then keeps only this
    small object, so scoring a draft needs neither scikit-learn nor pickled
    library objects. ``transform`` gives exactly what the vectorizer's
    ``transform`` gives (binary, columns in vocabulary order).
    """

    def __init__(self, analyzer: str, names: Sequence[str]):
        self.analyzer = analyzer
        self.names = [str(n) for n in names]
        self.vocabulary = {n: i for i, n in enumerate(self.names)}

    @classmethod
    def learn(cls, analyzer: str, texts: Sequence[str], max_features: int | None) -> tuple["WordingVocabulary", sp.csr_matrix]:
        """Learn from ``texts``; return the vocabulary and the texts' 0/1 matrix."""
        from sklearn.feature_extraction.text import CountVectorizer

        vec = CountVectorizer(analyzer=_WORDING[analyzer], binary=True, dtype=np.float64,
                              max_features=max_features or None)
        try:
            matrix = vec.fit_transform(texts).tocsr()
        except ValueError:  # not one word in any headline (emoji only, say): the block has no columns
            if any(_WORDING[analyzer](str(t)) for t in texts):
                raise
            return cls(analyzer, []), sp.csr_matrix((len(texts), 0))
        return cls(analyzer, vec.get_feature_names_out()), matrix

    def get_feature_names_out(self) -> np.ndarray:
        return np.asarray(self.names, dtype=object)

    def transform(self, texts: Sequence[str]) -> sp.csr_matrix:
        analyse = _WORDING[self.analyzer]
        vocab = self.vocabulary
        indptr = [0]
        cols: list[int] = []
        for text in texts:
            row = sorted({vocab[t] for t in analyse(str(text)) if t in vocab})
            cols.extend(row)
            indptr.append(len(cols))
        return sp.csr_matrix((np.ones(len(cols)), np.asarray(cols, dtype=np.int32), np.asarray(indptr, dtype=np.int64)),
                             shape=(len(texts), len(self.names)))

    def __getstate__(self) -> dict:
        return {"analyzer": self.analyzer, "names": self.names}

    def __setstate__(self, state: dict) -> None:
        self.__init__(state["analyzer"], state["names"])


class FittedLinear:
    """The coefficients of the final GLM fit, and the settings it was fitted with.

    What prediction needs from :class:`contentlab.glm.PenalizedBinomialGLM`,
    as plain arrays (the estimator itself stays behind in ``fit``).
    """

    def __init__(self, coef_: np.ndarray, intercept_: float, **params):
        self.coef_ = np.asarray(coef_, dtype=float)
        self.intercept_ = float(intercept_)
        self.params = dict(params)
        for key, value in params.items():
            setattr(self, key, value)

    @classmethod
    def from_glm(cls, glm) -> "FittedLinear":
        params = {k: (np.asarray(v, dtype=float) if k == "penalty_weights" and v is not None else v)
                  for k, v in glm.get_params().items()}
        return cls(glm.coef_.copy(), float(glm.intercept_), **params)

    def __getstate__(self) -> dict:
        return {"coef_": self.coef_, "intercept_": self.intercept_, "params": self.params}

    def __setstate__(self, state: dict) -> None:
        self.__init__(state["coef_"], state["intercept_"], **state["params"])


class _Params:
    """``get_params``/``set_params`` of the constructor's keyword arguments (scikit-learn's convention),
    without importing scikit-learn, so loading a saved model for scoring stays light."""

    @classmethod
    def _param_names(cls) -> list[str]:
        sig = inspect.signature(cls.__init__)
        return [p.name for p in sig.parameters.values() if p.name != "self" and p.kind == p.KEYWORD_ONLY]

    def get_params(self, deep: bool = True) -> dict:
        return {name: getattr(self, name) for name in self._param_names()}

    def set_params(self, **params) -> "_Params":
        valid = self._param_names()
        for key, value in params.items():
            if key not in valid:
                raise ContentlabError(f"{type(self).__name__} has no parameter {key!r}; choose from {valid}")
            setattr(self, key, value)
        return self

    def __repr__(self) -> str:
        sig = inspect.signature(type(self).__init__)
        changed = [f"{k}={v!r}" for k, v in self.get_params().items() if sig.parameters[k].default is not v
                   and not (isinstance(v, (int, float, str, bool)) and sig.parameters[k].default == v)]
        return f"{type(self).__name__}({', '.join(changed)})"


def _check_real(name: str, value, *, low: float = 0.0, low_open: bool = False, high: float | None = None):
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool) and np.isfinite(value)
    ok = ok and (value > low if low_open else value >= low) and (high is None or value <= high)
    if not ok:
        rng = f"{'>' if low_open else '>='} {low}" + (f" and <= {high}" if high is not None else "")
        raise ContentlabError(f"{name} must be a number {rng}; got {value!r}")


def _check_int(name: str, value, low: int) -> None:
    if not isinstance(value, numbers.Integral) or isinstance(value, bool) or value < low:
        raise ContentlabError(f"{name} must be a whole number >= {low}; got {value!r}")


def check_history_size(n_posts: int, n_events: float, n_periods: int, n_folds: int, outcome: str) -> None:
    """Refuse histories too small for the validation to mean anything (see MIN_POSTS)."""
    need_periods = n_folds + 1
    if n_posts < MIN_POSTS or n_events < MIN_EVENTS or n_periods < need_periods:
        raise ContentlabError(
            f"the history is too small to learn from: {n_posts} posts with impressions, "
            f"{int(n_events)} {outcome}, over {n_periods} week(s). contentlab needs at least {MIN_POSTS} posts, "
            f"{MIN_EVENTS} {outcome} and {need_periods} different weeks: the model is checked on later weeks "
            f"it did not learn from ({n_folds} forward time folds), and with fewer {outcome} no effect can be "
            "told apart from noise. Import more history (contentlab import FILE) and run learn again."
        )


# ----------------------------------------------------------------------------- the model

@dataclass
class _FitData:
    """The history as the fit steps see it: counts, design blocks, groups and time blocks."""

    frame: pd.DataFrame
    outcome: str
    k: np.ndarray
    n: np.ndarray
    y: np.ndarray
    periods: np.ndarray
    cols: list
    D: np.ndarray
    T: sp.csr_matrix
    Wm: sp.csr_matrix
    channel: np.ndarray
    experiment: np.ndarray
    in_exp: np.ndarray
    blocks: np.ndarray
    large: bool


class EngagementModel(_Params):
    r"""Exposure-aware, regularised model of clicks (or engagements) per impression.

    For post ``i`` with ``n_i`` impressions and ``k_i`` clicks::

        k_i ~ Binomial(n_i, p_i),   logit p_i = b + c_channel(i) + e_experiment(i) + z_i . beta

    where ``z_i`` holds the standardised dense features, the 0/1 topic terms
    and the 0/1 wording n-grams. The coefficients minimise the binomial
    deviance per impression plus ``0.5 * sum_j a_j theta_j^2``, where the
    penalty per impression ``a_j`` is ``alpha * term_penalty`` (topic terms),
    ``alpha * wording_penalty`` (wording), and the fixed ``dense_alpha``
    (dense features), ``experiment_alpha`` (experiment effects) and 1e-7
    (channels). Only the text blocks follow ``alpha``, which comes from
    ``alphas`` by time-respecting CV; with ``adaptive`` one reweighting step
    then penalises large text effects less than noisy ones (see ``_fit_glm``).

    Parameters
    ----------
    dense_features : sequence of str or None, default None
        Dense columns of :data:`contentlab.features.DENSE_COLUMNS` to use
        (None: :data:`DEFAULT_DENSE`). Time columns are added by ``use_time``.
        ``leading_number`` and ``list_form`` are left out by default: a headline
        that starts with a count nearly always has a digit, and the three
        columns would split one effect.
    use_time : bool, default True
        Add the cyclic hour and weekday columns (dropped when constant, e.g.
        when the history has dates only).
    terms : bool, default True
        Use the featurizer's topic terms.
    wording : {"ngrams", "function_words", "none"}, default "ngrams"
        The wording block: all word 1-3-grams, only those made of stop words, or none.
    min_df : int >= 1, default 3
        A term or n-gram becomes a column only when at least this many training
        posts contain it (checked again inside every CV fold).
    max_terms : int >= 0, default 20000
        Cap on the topic-term vocabulary (most frequent first); the wording block keeps up to
        three times as many n-grams.
    dense_alpha : float > 0, default 1e-4
        Penalty per impression of the standardised dense features: weak, since
        they are few (about 1% of the information a feature carries per
        impression at a 1-2% rate).
    term_penalty, wording_penalty : float > 0, default 1.0
        Multipliers of ``alpha`` for the two text blocks.
    experiment_alpha : float > 0, default 3e-6
        Penalty per impression of the per-experiment effects: tiny, so a test's
        own level is absorbed by its effect and the differences between its
        arms teach the feature effects.
    adaptive : {"auto", True, False}, default "auto"
        One adaptive-ridge reweighting of the text penalties after the first fit
        (see ``_fit_glm``); "auto" lets the time folds choose.
    cv_metric : {"auto", "deviance", "pairwise"}, default "auto"
        What the time folds choose alpha by: held-out deviance (experiment posts
        judged within their test), or pairwise accuracy on significant arm pairs;
        "auto" takes pairwise when the held-out folds have at least 300 such pairs.
    alphas : sequence of float > 0 or None, default None
        Candidate penalty strengths (None: 11 values from 1e-1 to 1e-6, half a decade apart).
        Searched from strong to weak with warm starts; the search stops once
        the held-out criterion has risen twice in a row. From
        ``LARGE_HISTORY_POSTS`` (50,000) posts on, every other candidate is
        searched first and then the two beside the best, and the CV fits stop
        at a looser tolerance (they only rank penalties; the final fit and the
        bootstrap refits keep theirs).
    n_folds : int >= 2, default 3
        Forward-chaining folds (the history is cut into ``n_folds + 1`` blocks).
    n_bootstrap : int >= 0, default 100
        Bootstrap refits for intervals (0: none; drivers then have no interval). Histories of
        more than 5,000 posts run fewer, in proportion, never below 40 (see :func:`bootstrap_refits`).
    interval : float in (0, 1), default 0.9
        Coverage of the intervals.
    random_state : int, default 0
    progress : bool, default False
        Show a progress bar on stderr.
    n_jobs : int or None, default 1
        Processes for featurising large histories (passed to the featurizer); also the sentence
        encoder's threads for the headline-meaning column (None: every core). Other than 1, the
        encoder runs in a child process beside the time folds and bootstrap (where ``fork`` exists).
    meaning : {"auto", True, False}, default "auto"
        The headline-meaning column (sentence embeddings, see :mod:`contentlab.meaning`): its
        weight is chosen on the time folds among ``MEANING_WEIGHTS`` (0 leaves it out). "auto"
        tries it when the folds choose alpha by pairwise accuracy (at least 300 clearly different
        held-out test pairs) and its packages are installed, and says why not in ``meaning_note_``;
        True requires it (weighed by within-test deviance when the pairs are fewer); False never.
    level : {"recent", "history"}, default "recent"
        "recent": each channel's baseline follows its level at the history's end and, when the
        time folds find it helps, a damped slope (half-life and damping chosen on the folds; see
        :mod:`contentlab.levels`); rates drift, and a history-wide level predicts later posts too
        high when they fall. "history": the fitted GLM's own level.

    Attributes
    ----------
    alpha_ : float
        The chosen penalty strength.
    glm_ : PenalizedBinomialGLM
        The final fit on all history.
    featurizer_ : HeadlineFeaturizer
    dense_columns_ : list of str
        Dense columns actually used (constant ones dropped).
    oof_ : DataFrame
        Held-out predictions per history post (``post_id, fold, logit,
        predicted_rate``); NaN for the first time block, which no earlier
        data can predict. ``level_offset`` and ``weeks_ahead``: the level forecast the post's
        fold made for it (added to ``logit`` for the interval checks) and its weeks ahead.
    cv_results_ : DataFrame
        Held-out criterion per alpha.
    level_half_life_, level_damping_ : float
        The level's half-life in weeks (inf: the whole history alike) and the damping of its
        slope (0: no trend), chosen on the time folds; ``level_cv_`` holds each candidate's deviance.
    level_offsets_, level_slopes_ : dict
        Per channel: the log-odds added to the channel's baseline (next week's level against the
        model's typical prediction), and the level's slope per week (a post ``h`` weeks ahead gets
        ``slope * (damped_steps(h) - damped_steps(1))`` on top; see ``interval_columns``).
    post_variance_ : float
        Held-out post-to-post variance of the log-odds around each week's own level.
    level_drift_, week_level_variance_ : float
        How far a later week's channel level strays from the forecast, measured on the time
        folds (see :func:`contentlab.levels.level_error_variance`): variance per week ahead, and
        the part that no distance explains.
    interval_scale_ : float
        Factor on those variances that gives the folds' held-out posts the nominal coverage.
    overdispersion_ : float
        Post-to-post variance added to a draft's parameter variance (the scaled held-out spread
        minus the parameter part it already holds).
    heldout_weeks_ahead_, last_week_ : float
        Mean weeks between a held-out post and its fold's training weeks (for reading), and the
        history's last week (weeks since 1970), from which a draft's weeks ahead are counted.
    boot_coef_ : ndarray of shape (n_bootstrap, n_shared + 1), float32
        Bootstrap coefficients (dense, terms, wording, channels, then the intercept).
    validation_ : dict
        Held-out figures against the baselines (see :mod:`contentlab.evaluation`).
    """

    def __init__(
        self,
        *,
        dense_features: Sequence[str] | None = None,
        use_time: bool = True,
        terms: bool = True,
        wording: str = "ngrams",
        min_df: int = 3,
        max_terms: int = 20000,
        dense_alpha: float = 1e-4,
        term_penalty: float = 1.0,
        wording_penalty: float = 1.0,
        experiment_alpha: float = 3e-6,
        alphas: Sequence[float] | None = None,
        n_folds: int = 3,
        adaptive: bool | str = "auto",
        cv_metric: str = "auto",
        n_bootstrap: int = 100,
        interval: float = 0.9,
        random_state: int = 0,
        progress: bool = False,
        n_jobs: int | None = 1,
        level: str = "recent",
        meaning: bool | str = "auto",
    ) -> None:
        self.dense_features = dense_features
        self.use_time = use_time
        self.terms = terms
        self.wording = wording
        self.min_df = min_df
        self.max_terms = max_terms
        self.dense_alpha = dense_alpha
        self.term_penalty = term_penalty
        self.wording_penalty = wording_penalty
        self.experiment_alpha = experiment_alpha
        self.alphas = alphas
        self.n_folds = n_folds
        self.adaptive = adaptive
        self.cv_metric = cv_metric
        self.n_bootstrap = n_bootstrap
        self.interval = interval
        self.random_state = random_state
        self.progress = progress
        self.n_jobs = n_jobs
        self.level = level
        self.meaning = meaning

    # ------------------------------------------------------------------ checks
    def _check_params(self) -> tuple[list[str], np.ndarray]:
        dense = list(DEFAULT_DENSE if self.dense_features is None else self.dense_features)
        unknown = [c for c in dense if c not in DENSE_COLUMNS]
        if unknown:
            raise ContentlabError(f"dense_features has unknown column(s) {unknown}; choose from {DENSE_COLUMNS}")
        if any(c in TIME_COLUMNS for c in dense):
            raise ContentlabError("dense_features must not list time columns; use use_time=True for those")
        if self.adaptive not in ("auto", True, False):
            raise ContentlabError(f"adaptive must be 'auto', True or False; got {self.adaptive!r}")
        for name in ("use_time", "terms", "progress"):
            if not isinstance(getattr(self, name), (bool, np.bool_)):
                raise ContentlabError(f"{name} must be True or False; got {getattr(self, name)!r}")
        if self.wording not in ("ngrams", "function_words", "none"):
            raise ContentlabError(f"wording must be 'ngrams', 'function_words' or 'none'; got {self.wording!r}")
        if self.meaning not in ("auto", True, False):
            raise ContentlabError(f"meaning must be 'auto', True or False; got {self.meaning!r}")
        if self.level not in ("recent", "history"):
            raise ContentlabError(f"level must be 'recent' or 'history'; got {self.level!r}")
        if self.cv_metric not in ("auto", "deviance", "pairwise"):
            raise ContentlabError(f"cv_metric must be 'auto', 'deviance' or 'pairwise'; got {self.cv_metric!r}")
        _check_int("min_df", self.min_df, 1)
        _check_int("max_terms", self.max_terms, 0)
        _check_int("n_folds", self.n_folds, 2)
        _check_int("n_bootstrap", self.n_bootstrap, 0)
        _check_int("random_state", self.random_state, 0)
        for name in ("dense_alpha", "term_penalty", "wording_penalty", "experiment_alpha"):
            _check_real(name, getattr(self, name), low_open=True)
        _check_real("interval", self.interval, low_open=True, high=0.999)
        alphas = np.asarray(DEFAULT_ALPHAS if self.alphas is None else self.alphas, dtype=float).ravel()
        if alphas.size == 0 or not np.all(np.isfinite(alphas)) or np.any(alphas <= 0):
            raise ContentlabError(f"alphas must be one or more numbers > 0; got {self.alphas!r}")
        return dense, np.sort(alphas)[::-1]

    @staticmethod
    def _check_posts(posts: pd.DataFrame, outcome: str) -> pd.DataFrame:
        if not isinstance(posts, pd.DataFrame):
            raise ContentlabError("posts must be a DataFrame of the workspace's posts (Workspace.posts())")
        if outcome not in ("clicks", "engagements"):
            raise ContentlabError(f"outcome must be 'clicks' or 'engagements'; got {outcome!r}")
        need = ["post_id", "headline", "impressions", outcome]
        missing = [c for c in need if c not in posts]
        if missing:
            raise ContentlabError(f"posts lack column(s) {missing}; learn needs {need}")
        if posts[outcome].isna().all():
            raise ContentlabError(
                f"no post has a value for '{outcome}'; import an export with that column or use "
                f"--outcome {'engagements' if outcome == 'clicks' else 'clicks'}"
            )
        use = posts[outcome].notna() & (pd.to_numeric(posts["impressions"], errors="coerce") > 0)
        frame = posts.loc[use].copy()
        frame["impressions"] = frame["impressions"].astype(float)
        frame[outcome] = frame[outcome].astype(float)
        bad = frame[outcome] > frame["impressions"]
        if bad.any():
            pid = frame.loc[bad, "post_id"].iloc[0]
            raise ContentlabError(f"post {pid}: {outcome} exceed impressions; fix the history and import again")
        for col, default in (("experiment_id", None), ("image_id", None), ("channel", None)):
            if col not in frame:
                frame[col] = default
        if "local_hour" not in frame:
            frame["local_hour"] = np.nan
        if "local_weekday" not in frame:
            frame["local_weekday"] = np.nan
        frame["experiment_id"] = frame["experiment_id"].where(
            frame["experiment_id"].notna() & (frame["experiment_id"].astype(str) != ""), None
        )
        frame["_period"] = _period_of(frame)
        return frame.sort_values(["_period", "post_id"], kind="stable").reset_index(drop=True)

    def _check_fitted(self) -> None:
        if not hasattr(self, "glm_"):
            from .glm import NotFittedError

            raise NotFittedError("This EngagementModel is not fitted yet; run contentlab learn (or call fit) first.")

    # --------------------------------------------------------------- text parts
    def _text_blocks(self, fs, fit: bool = False) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        """Topic-term and wording matrices; ``fit`` learns the wording vocabulary first.

        Histories repeat headlines (re-posts, A/B arms reused), so the n-grams are counted
        once per distinct headline and the rows copied.
        """
        n = len(fs)
        T = fs.terms.tocsr() if self.terms else sp.csr_matrix((n, 0))
        if fit and self.wording == "none":
            self.wording_vec_ = None
        if self.wording == "none" or (not fit and self.wording_vec_ is None):
            Wm = sp.csr_matrix((n, 0))
        else:
            uniq, inverse = np.unique(fs.text.to_numpy(dtype=str), return_inverse=True)
            if fit:
                self.wording_vec_, Wu = WordingVocabulary.learn(self.wording, uniq, WORDING_CAP_FACTOR * self.max_terms)
            else:
                Wu = self.wording_vec_.transform(uniq)
            Wm = Wu[inverse.ravel()]
        return T.astype(np.float64), Wm

    # ---------------------------------------------------------------- design
    def _state(self, D: np.ndarray, T, Wm, channel: np.ndarray, rows: np.ndarray) -> dict:
        """Everything the design needs, learned from training ``rows`` only."""
        Dr = D[rows]
        mean = Dr.mean(axis=0)
        scale = Dr.std(axis=0)
        used = scale > 1e-12
        t_df = np.asarray((T[rows] > 0).sum(axis=0)).ravel() if T.shape[1] else np.zeros(0)
        w_df = np.asarray((Wm[rows] > 0).sum(axis=0)).ravel() if Wm.shape[1] else np.zeros(0)
        channels = sorted(pd.unique(channel[rows]).tolist())
        return {
            "dense_idx": np.flatnonzero(used),
            "mean": mean[used],
            "scale": scale[used],
            "term_idx": np.flatnonzero((t_df >= self.min_df) & ~self._num_only_terms_),
            "word_idx": np.flatnonzero((w_df >= self.min_df) & ~self._num_only_words_),
            "channels": channels,
        }

    @staticmethod
    def _matrix(D, T, Wm, channel, rows, state) -> sp.csr_matrix:
        Ds = (D[np.ix_(rows, state["dense_idx"])] - state["mean"]) / state["scale"]
        chan_index = {c: j for j, c in enumerate(state["channels"])}
        codes = np.array([chan_index.get(c, -1) for c in channel[rows]])
        ok = codes >= 0
        C = sp.csr_matrix(
            (np.ones(ok.sum()), (np.flatnonzero(ok), codes[ok])), shape=(len(rows), len(state["channels"]))
        )
        return sp.hstack(
            [sp.csr_matrix(Ds), T[rows][:, state["term_idx"]], Wm[rows][:, state["word_idx"]], C], format="csr"
        )

    def _penalties(self, state, n_experiments: int, alpha: float) -> np.ndarray:
        """Multipliers of ``alpha`` per column: the text blocks follow alpha, the rest is fixed.

        Dense features, channels and experiment effects get fixed penalties per impression
        (``dense_alpha``, 1e-7, ``experiment_alpha``), whatever alpha the text needs, so a
        strong penalty against thousands of noisy words does not also shrink the length or
        hour effects, nor stop an experiment's effect from absorbing its level.
        """
        return np.r_[
            np.full(len(state["dense_idx"]), float(self.dense_alpha) / alpha),
            np.full(len(state["term_idx"]), float(self.term_penalty)),
            np.full(len(state["word_idx"]), float(self.wording_penalty)),
            np.full(len(state["channels"]), _CHANNEL_ALPHA / alpha),
            np.full(n_experiments, float(self.experiment_alpha) / alpha),
        ]

    def _cv_metric(self, held: pd.DataFrame, outcome: str) -> str:
        """"pairwise" when the held-out folds hold enough clearly different test arms, else "deviance".

        Choosing between headlines is what the model is for, and on A/B-test data the
        within-test deviance (even with the spread calibrated) prefers a penalty about ten
        times stronger than the one that ranks arms best (seen on the archive). With at
        least ``CV_MIN_PAIRS`` significant pairs the pairwise accuracy is stable enough to
        choose alpha by (its standard error is then below about 0.03; our threshold).
        """
        if self.cv_metric != "auto":
            return self.cv_metric
        from .evaluation import pair_accuracy

        if held["experiment_id"].notna().sum() < 2:
            return "deviance"
        res = pair_accuracy(held, np.zeros(len(held)), outcome, n_boot=1)
        return "pairwise" if res["n_pairs"] >= CV_MIN_PAIRS else "deviance"

    def _text_mask(self, state, n_experiments: int) -> np.ndarray:
        d, t, w = len(state["dense_idx"]), len(state["term_idx"]), len(state["word_idx"])
        mask = np.zeros(d + t + w + len(state["channels"]) + n_experiments, dtype=bool)
        mask[d: d + t + w] = True
        return mask

    def _fit_glm(self, glm, X, y, w, base_pw, text_mask, variants=(False,), first_tol=None):
        """Fit; for each requested variant yield ``(adaptive, coef, intercept)``.

        ``False``: the plain ridge fit. ``True``: one more fit with the text penalties
        reweighted by the first: ridge shrinks every term alike, so when a few words matter
        and thousands do not, the few are shrunk hard. One adaptive-ridge step (penalty ~
        1 / (beta_j^2 + eps), scaled so the mean multiplier stays 1, eps = mean beta^2 of the
        text columns) penalises large effects less and noise terms more, a smooth step towards
        a sparse fit (in the spirit of Frommlet and Nuel's adaptive ridge, 2016; from memory).
        Both variants are scored inside every CV fold, so the folds also choose between them.
        The GLM is left holding the last variant's fit. ``first_tol``: tolerance of the plain
        fit when only the adaptive one is wanted (it then only sets the reweighting).
        """
        glm.set_params(penalty_weights=base_pw)
        # Along the CV path the GLM would otherwise warm-start the next plain fit from the last
        # adaptive one, a worse start than the previous plain fit (same result, more iterations).
        start = getattr(glm, "_plain_start", None)
        if start is not None and start[0].shape == getattr(glm, "coef_", np.zeros(0)).shape:
            glm.coef_, glm.intercept_ = start[0].copy(), start[1]
        tol = glm.tol
        if first_tol is not None and False not in variants and text_mask.any():
            glm.set_params(tol=first_tol)
        with _quiet_convergence():
            glm.fit(X, y, w)
        glm.set_params(tol=tol)
        if True in variants and len(variants) > 1:
            glm._plain_start = (glm.coef_.copy(), float(glm.intercept_))
        if False in variants:
            yield False, glm.coef_.copy(), float(glm.intercept_)
        if True not in variants:
            return
        if text_mask.any():
            b2 = glm.coef_[text_mask] ** 2
            eps = float(np.mean(b2)) + 1e-12
            factor = eps / (b2 + eps)
            factor = factor / factor.mean()
            pw = base_pw.copy()
            pw[text_mask] = base_pw[text_mask] * factor
            glm.set_params(penalty_weights=pw)
            with _quiet_convergence():
                glm.fit(X, y, w)
        yield True, glm.coef_.copy(), float(glm.intercept_)

    # --------------------------------------------------------------------- fit
    def fit(self, posts: pd.DataFrame, outcome: str = "clicks") -> "EngagementModel":
        """Learn from history ``posts`` (the workspace's posts frame). Returns ``self``.

        The steps, each a method that can be run and tested alone: ``_design`` (features and
        time blocks), ``_choose_penalty`` (time folds), ``_final_fit``, ``_bootstrap``, ``_add_meaning``
        (the headline-meaning column, weighed on the same folds),
        ``_keep_state`` (what prediction and drivers need, incl. drift levels), ``_predictive_spread``
        (the interval's post-to-post part) and ``_validate`` (held-out figures).
        """
        from threadpoolctl import threadpool_limits
        from tqdm import tqdm

        dense_names, alphas = self._check_params()
        frame = self._check_posts(posts, outcome)
        data = self._design(frame, outcome, dense_names)
        encoding = self._start_encoding(data)
        bar = tqdm(total=self.n_folds * len(alphas) + self.n_bootstrap, desc="learn", unit="fit", file=sys.stderr,
                   disable=not self.progress, leave=False)
        # Scipy's L-BFGS-B calls BLAS on tiny vectors; with several BLAS threads on a shared
        # 2-core machine that is ~30x slower than one thread, so fits run single-threaded.
        with threadpool_limits(limits=1, user_api="blas"):
            oof_by_alpha = self._choose_penalty(data, alphas, bar)
            X0, X, glm, gidx = self._final_fit(data)
            boot, clusters = self._bootstrap(data, X, glm, bar)
        bar.close()
        self.boot_coef_ = boot
        oof = oof_by_alpha[(self.alpha_, self.adaptive_)]
        X0, X, oof = self._add_meaning(data, X0, X, glm, oof, encoding)
        eta_all = self._keep_state(data, X0, gidx, clusters, oof)
        self._predictive_spread(data, X0, X, glm, eta_all, oof)
        self.validation_ = self._validate(data, X0, oof)
        return self

    def _design(self, frame: pd.DataFrame, outcome: str, dense_names: list[str]) -> "_FitData":
        """Featurise the history once and cut it into time blocks.

        Dense features are per-headline functions (no look-ahead); the term and wording
        vocabularies are built on all history but every fold keeps only the columns its own
        training posts reach min_df on, which is what refitting them per fold would give.
        """
        k = frame[outcome].to_numpy(float)
        n = frame["impressions"].to_numpy(float)
        periods = frame["_period"].to_numpy()
        check_history_size(len(frame), k.sum(), len(np.unique(periods)), self.n_folds, outcome)
        self.featurizer_ = HeadlineFeaturizer(min_df=1, max_terms=self.max_terms, n_jobs=self.n_jobs).fit(frame)
        fs = self.featurizer_.transform(frame, progress=self.progress)
        T, Wm = self._text_blocks(fs, fit=True)
        # The bare "<num>" token is has_digit under another name; two copies would split its effect.
        self._num_only_terms_ = np.array([t == "<num>" for t in self.featurizer_.term_names_], dtype=bool)
        if not self.terms:
            self._num_only_terms_ = np.zeros(0, dtype=bool)
        self._num_only_words_ = (np.array([w == "<num>" for w in self.wording_vec_.get_feature_names_out()], dtype=bool)
                                 if self.wording_vec_ is not None else np.zeros(0, dtype=bool))
        cols = dense_names + (list(TIME_COLUMNS) if self.use_time else [])
        return _FitData(
            frame=frame, outcome=outcome, k=k, n=n, y=k / n, periods=periods, cols=cols,
            D=fs.dense[cols].to_numpy(float), T=T, Wm=Wm, channel=fs.channel.to_numpy(dtype=object),
            experiment=frame["experiment_id"].to_numpy(dtype=object),
            in_exp=pd.notna(frame["experiment_id"]).to_numpy(), blocks=_time_blocks(frame, self.n_folds),
            large=len(frame) >= LARGE_HISTORY_POSTS,
        )

    def _choose_penalty(self, data: "_FitData", alphas: np.ndarray, bar) -> dict:
        """alpha (and the adaptive variant) by forward time folds; returns held-out logits per choice.

        Sets ``alpha_``, ``adaptive_``, ``cv_metric_`` and ``cv_results_``.
        """
        from .evaluation import pair_accuracy
        from .glm import PenalizedBinomialGLM, add_group_effects

        frame, outcome, k, n, y = data.frame, data.outcome, data.k, data.n, data.y
        D, T, Wm, channel, experiment, in_exp = data.D, data.T, data.Wm, data.channel, data.experiment, data.in_exp
        blocks, large = data.blocks, data.large
        n_cv = self.n_folds * len(alphas)
        # Fits inside CV only rank penalties, so a looser tolerance does (looser still on large
        # histories, see LARGE_HISTORY_POSTS); the final fit is tight.
        glm_kw = dict(max_iter=2000, tol=_LARGE_TOL if large else 1e-5)
        folds = []
        for f in range(1, self.n_folds + 1):
            tr = np.flatnonzero(blocks < f)
            te = np.flatnonzero(blocks == f)
            st = self._state(D, T, Wm, channel, tr)
            Xtr, gidx = add_group_effects(self._matrix(D, T, Wm, channel, tr, st), experiment[tr])
            Xte = self._matrix(D, T, Wm, channel, te, st)
            glm = PenalizedBinomialGLM(warm_start=True, **glm_kw)
            folds.append((tr, te, Xtr, Xte, glm, (st, len(gidx)), self._text_mask(st, len(gidx))))
        rows = []
        oof_by_alpha = {}
        rising = 0
        best = np.inf
        held_rows = np.flatnonzero(blocks >= 1)
        metric = self._cv_metric(frame.iloc[held_rows], outcome)
        self.cv_metric_ = metric
        variants = {"auto": (False, True), True: (True,), False: (False,)}[self.adaptive]
        n_workers = _n_workers(self.n_jobs, len(frame), len(folds))
        pool = _FoldPool(self, folds, y, n, k, experiment, in_exp, variants, n_workers)
        try:
            def evaluate(alpha: float) -> float:
                crit = {v: 0.0 for v in variants}
                oof = {v: np.full(len(frame), np.nan) for v in variants}
                for f_idx, v, te, eta, c in pool.step(float(alpha)):
                    oof[v][te] = eta
                    crit[v] += c
                bar.update(self.n_folds)
                done[0] += self.n_folds
                for v in variants:
                    row = {"alpha": float(alpha), "adaptive": v, "deviance": crit[v]}
                    c = crit[v]
                    if metric == "pairwise":
                        acc = pair_accuracy(frame.iloc[held_rows], oof[v][held_rows], outcome, n_boot=1)["accuracy"]
                        row["pairwise_accuracy"] = acc
                        c = -acc
                    row["criterion"] = c
                    rows.append(row)
                    oof_by_alpha[(float(alpha), v)] = oof[v]
                return min(r["criterion"] for r in rows[-len(variants):])

            done = [0]
            # Large histories: a path one decade apart first, then the half steps either side
            # of its best alpha (8 instead of 9 alphas on bench_learn's 100,000 posts).
            coarse = large and len(alphas) >= 5
            for alpha in (alphas[::2] if coarse else alphas):
                c_best = evaluate(alpha)
                if c_best < best - 1e-9:
                    best, rising = c_best, 0
                else:
                    rising += 1
                    if rising >= 2:
                        break
            if coarse:
                seen = {r["alpha"] for r in rows}
                i = int(np.flatnonzero(alphas == min(rows, key=lambda r: r["criterion"])["alpha"])[0])
                for j in (i - 1, i + 1):
                    if 0 <= j < len(alphas) and float(alphas[j]) not in seen:
                        evaluate(alphas[j])
            bar.update(max(n_cv - done[0], 0))
        finally:
            pool.close()
        cv = smooth_criterion(pd.DataFrame(rows))
        self.cv_results_ = cv
        # Smallest smoothed criterion; among equals the stronger penalty (sort is stable).
        pick = cv.sort_values("alpha", ascending=False, kind="stable").loc[lambda t: t["smoothed"].idxmin()]
        self.alpha_ = float(pick["alpha"])
        self.adaptive_ = bool(pick["adaptive"])
        del folds
        return oof_by_alpha

    def _final_fit(self, data: "_FitData"):
        """The GLM on all history at the chosen penalty; returns (shared design, full design, glm, experiments)."""
        from .glm import PenalizedBinomialGLM, add_group_effects

        D, T, Wm, channel, experiment = data.D, data.T, data.Wm, data.channel, data.experiment
        y, n, large, frame = data.y, data.n, data.large, data.frame
        # Final fit on all history.
        all_rows = np.arange(len(frame))
        st = self._state(D, T, Wm, channel, all_rows)
        X0 = self._matrix(D, T, Wm, channel, all_rows, st)
        X, gidx = add_group_effects(X0, experiment)
        pw = self._penalties(st, len(gidx), self.alpha_)
        glm = PenalizedBinomialGLM(alpha=self.alpha_, penalty_weights=pw, warm_start=True, max_iter=3000, tol=1e-6)
        for _ in self._fit_glm(glm, X, y, n, pw, self._text_mask(st, len(gidx)), (self.adaptive_,),
                                 first_tol=_LARGE_TOL if large else None):
            pass
        self.glm_ = FittedLinear.from_glm(glm)
        self.state_ = st
        self.n_shared_ = X0.shape[1]
        self.experiments_ = list(gidx)
        return X0, X, glm, gidx

    def _meaning_rows(self, data: "_FitData") -> tuple[np.ndarray, np.ndarray]:
        """The posts the meaning column learns from, in time order (every other post counts as 0), and
        each one's (test, image) group code.

        Arms of a test (and image) that shows at least two different headlines: an arm alone, or
        arms that share one headline, teach a within-test ridge nothing. Above ``MEANING_MAX_ARMS``
        such arms, an even share of the tests in time order (whole tests), so learn's time stays
        bounded and every time fold still has tests before it to learn from.
        """
        from .meaning import group_codes

        frame = data.frame
        rows = np.flatnonzero(data.in_exp)
        text = frame["headline"].iloc[rows].map(clean_headline).to_numpy(dtype=object)
        image = frame["image_id"].to_numpy(dtype=object)[rows] if "image_id" in frame else np.full(len(rows), None)
        groups = group_codes(data.experiment[rows], image)
        varied = pd.Series(text).groupby(groups).transform("nunique").to_numpy() >= 2
        rows, groups = rows[varied], groups[varied]
        if len(rows) > MEANING_MAX_ARMS:
            # Tests in time order (the frame is), every (1/share)-th one: floor((i + 1) q) > floor(i q).
            order = pd.Series(rows).groupby(groups).min().sort_values().index.to_numpy()
            share = MEANING_MAX_ARMS / len(rows)
            i = np.arange(len(order))
            keep = order[np.floor((i + 1) * share) > np.floor(i * share)]
            kept = np.isin(groups, keep)
            rows, groups = rows[kept], groups[kept]
        return rows, groups

    def _meaning_texts(self, data: "_FitData", rows: np.ndarray) -> list[str]:
        """The headlines of ``rows`` (from :meth:`_meaning_rows`), cleaned as the featurizer cleans them."""
        return data.frame["headline"].iloc[rows].map(clean_headline).tolist()

    def _start_encoding(self, data: "_FitData"):
        """Encode the test posts' headlines in a child process while the folds and bootstrap run.

        Encoding is most of what headline meaning adds to ``learn`` (about half a minute for the
        archive's 8,700 test headlines on one core), and the GLM steps leave a core idle much of
        the time. Returns a future of the embeddings, or None (encode in ``_add_meaning`` instead)
        when meaning will not be tried, ``n_jobs=1`` asks for one core, or ``fork`` is missing.
        """
        import multiprocessing as mp

        if self.n_jobs == 1 or "fork" not in mp.get_all_start_methods():
            return None
        # The same rule _choose_penalty applies (it depends on the held-out blocks alone).
        self.cv_metric_ = self._cv_metric(data.frame.iloc[np.flatnonzero(data.blocks >= 1)], data.outcome)
        if self._meaning_unusable(data):
            return None
        from concurrent.futures import ProcessPoolExecutor

        from .meaning import embed_headlines

        executor = ProcessPoolExecutor(max_workers=1, mp_context=mp.get_context("fork"))
        try:
            return executor.submit(embed_headlines, self._meaning_texts(data, self._meaning_rows(data)[0]), 1)
        finally:
            executor.shutdown(wait=False)  # the worker exits once the embeddings are sent

    def _add_meaning(self, data: "_FitData", X0, X, glm, oof, encoding=None):
        """The headline-meaning column, its ridge penalty and weight chosen on the forward time folds.

        In each fold a within-test ridge (:func:`contentlab.meaning.within_test_ridge`, tests of
        the earlier blocks) scores the held-out block; the score times each weight of
        ``MEANING_WEIGHTS`` is added to the GLM's held-out logit, and the (penalty, weight) with
        the best held-out criterion (the one alpha was chosen by) is kept; weight 0, no column,
        wins ties. Then the ridge is refitted on every test and its centred score becomes the
        last shared column (after the channels, so every other offset stays), with the weight
        as its coefficient (it has no bootstrap spread of its own). Returns the shared design,
        the full design and the held-out logits, each with the column's part.
        """
        self.meaning_column_ = None
        self.meaning_weight_ = 0.0
        self.meaning_ridge_ = float("nan")
        self.meaning_cv_ = pd.DataFrame(columns=["ridge", "weight", "criterion"])
        note = self._meaning_unusable(data)
        if note:
            self.meaning_note_ = note
            return X0, X, oof
        from .meaning import MODEL_NAME, embed_headlines, within_test_ridge

        frame, blocks = data.frame, data.blocks
        # Only arms of tests are encoded (see _meaning_rows): the ridge learns from them alone, and any
        # other post counts as of typical meaning (column 0), so the cost follows the tests, not the history.
        t, groups = self._meaning_rows(data)
        E = None
        if encoding is not None:
            from concurrent.futures.process import BrokenProcessPool

            try:
                E = encoding.result()
            except BrokenProcessPool:  # the child died (killed, out of memory): encode here instead
                E = None
        if E is None:
            E = embed_headlines(self._meaning_texts(data, t), threads=self.n_jobs)
        E = np.asarray(E, dtype=float)
        k, n, bt = data.k[t], data.n[t], blocks[t]
        held = np.flatnonzero(blocks >= 1)
        scores = np.zeros((len(MEANING_RIDGES), len(frame)))
        for f in range(1, self.n_folds + 1):
            tr, te = bt < f, bt == f
            if not tr.any() or not te.any():
                continue  # no encoded test before this fold (or in it): its held-out score stays 0
            beta = within_test_ridge(E[tr], k[tr], n[tr], groups[tr], MEANING_RIDGES)
            # Centred on the fold's own tests, as the final column is on all of them: the score
            # orders arms within tests and must not move the level.
            scores[:, t[te]] = beta @ E[te].T - (beta @ E[tr].T).mean(axis=1, keepdims=True)
        rows = []
        for i, lam in enumerate(MEANING_RIDGES):
            for w in MEANING_WEIGHTS:
                if w == 0 and i:
                    continue
                rows.append({"ridge": lam, "weight": w,
                             "criterion": self._held_criterion(data, held, oof[held] + w * scores[i, held])})
        cv = pd.DataFrame(rows)
        self.meaning_cv_ = cv
        best = cv.sort_values(["criterion", "weight", "ridge"], kind="stable").iloc[0]
        if float(best["weight"]) == 0.0:
            self.meaning_note_ = f"not used: on the time folds it did not improve the {self.cv_metric_} criterion"
            return X0, X, oof
        i = MEANING_RIDGES.index(float(best["ridge"]))
        self.meaning_weight_ = float(best["weight"])
        self.meaning_ridge_ = float(best["ridge"])
        self.meaning_beta_ = within_test_ridge(E, k, n, groups, [self.meaning_ridge_])[0]
        self.meaning_center_ = float(np.mean(E @ self.meaning_beta_))
        column = np.zeros(len(frame))
        column[t] = E @ self.meaning_beta_ - self.meaning_center_
        self.meaning_note_ = (f"used: {MODEL_NAME} sentence embeddings, ridge {self.meaning_ridge_:g}, "
                              f"weight {self.meaning_weight_:g} (chosen on the time folds)")
        col = sp.csr_matrix(column[:, None])
        at = X0.shape[1]
        X0 = sp.hstack([X0, col], format="csr")
        X = sp.hstack([X0, X[:, at:]], format="csr")
        glm.coef_ = np.insert(glm.coef_, at, self.meaning_weight_)
        self.glm_.coef_ = np.insert(self.glm_.coef_, at, self.meaning_weight_)
        if self.glm_.params.get("penalty_weights") is not None:
            self.glm_.params["penalty_weights"] = np.insert(self.glm_.params["penalty_weights"], at, 0.0)
            self.glm_.penalty_weights = self.glm_.params["penalty_weights"]
        self.boot_coef_ = np.insert(self.boot_coef_, at, np.float32(self.meaning_weight_), axis=1)
        self.meaning_column_ = at
        self.n_shared_ = X0.shape[1]
        return X0, X, oof + self.meaning_weight_ * scores[i]

    def _meaning_unusable(self, data: "_FitData") -> str | None:
        """Why the headline-meaning column is left out (None: try it on the folds)."""
        if self.meaning is False:
            return "not used (meaning=False)"
        if len(pd.unique(data.experiment[data.in_exp])) < 2:
            return "not used: it learns from the differences between arms of A/B tests, and the history has none"
        if self.meaning == "auto" and self.cv_metric_ != "pairwise":
            return (f"not used: the held-out time folds hold fewer than {CV_MIN_PAIRS} clearly different pairs "
                    "of A/B-test arms, too few to weigh it by")
        from .meaning import missing_runtime

        why = missing_runtime()
        if why and self.meaning is True:
            raise ContentlabError(why)
        return f"not used: {why}" if why else None

    def _held_criterion(self, data: "_FitData", rows: np.ndarray, eta: np.ndarray) -> float:
        """The time folds' criterion (smaller is better) of held-out logits ``eta`` of ``rows``."""
        from .evaluation import pair_accuracy, within_experiment_deviance

        if self.cv_metric_ == "pairwise":
            return -float(pair_accuracy(data.frame.iloc[rows], eta, data.outcome, n_boot=1)["accuracy"])
        e = data.in_exp[rows]
        if not e.any():
            return 0.0
        r = rows[e]
        return float(within_experiment_deviance(eta[e], data.k[r], data.n[r], data.experiment[r])[0])

    def _meaning_values(self, texts) -> np.ndarray | None:
        """The headline-meaning column for ``texts`` (None when the model has none)."""
        if getattr(self, "meaning_column_", None) is None:
            return None
        from .meaning import embed_headlines

        return embed_headlines(list(texts)).astype(float) @ self.meaning_beta_ - self.meaning_center_

    def _bootstrap(self, data: "_FitData", X, glm, bar):
        """Refits on resampled whole experiments (and weeks outside them); returns (coefficients, cluster codes)."""
        from .glm import PenalizedBinomialGLM

        frame, experiment, in_exp, periods, n, y = data.frame, data.experiment, data.in_exp, data.periods, data.n, data.y
        pw = np.asarray(glm.penalty_weights, dtype=float)
        # Bootstrap: resample whole experiments, and weeks for posts outside experiments.
        clusters = np.where(in_exp, ("exp:" + pd.Series(experiment).astype(str)).to_numpy(),
                            ("week:" + pd.Series(periods).astype(str)).to_numpy())
        codes, uniq = pd.factorize(pd.Series(clusters))
        rng = np.random.default_rng(self.random_state)
        # All resampling counts drawn up front, so the draws do not depend on n_jobs.
        n_refits = bootstrap_refits(self.n_bootstrap, len(frame))
        counts = rng.multinomial(len(uniq), np.full(len(uniq), 1.0 / len(uniq)), size=n_refits)
        n_shared = self.n_shared_

        def refit(draws: np.ndarray) -> np.ndarray:
            out = np.empty((len(draws), n_shared + 1), dtype=np.float32)
            bglm = PenalizedBinomialGLM(alpha=self.alpha_, penalty_weights=pw, warm_start=True,
                                        max_iter=500, tol=1e-5)
            for j, b in enumerate(draws):
                # Warm start from the full fit: a resample moves the coefficients a little.
                bglm.coef_, bglm.intercept_, bglm.n_features_in_ = glm.coef_.copy(), glm.intercept_, X.shape[1]
                # Posts of clusters not drawn have weight 0 and add nothing to the objective:
                # leaving them out (about a third of the rows) gives the same fit, faster.
                wb = n * counts[b][codes]
                keep = wb > 0
                with _quiet_convergence():
                    bglm.fit(X[keep], y[keep], wb[keep])
                out[j, :-1] = bglm.coef_[:n_shared]
                out[j, -1] = bglm.intercept_
                if n_boot_workers == 1:
                    bar.update(1)
            return out

        n_boot_workers = _n_workers(self.n_jobs, len(frame), n_refits)
        chunks = [c for c in np.array_split(np.arange(n_refits), n_boot_workers) if len(c)]
        parts = _run_forked(refit, chunks, n_boot_workers)
        boot = np.vstack(parts) if parts else np.empty((0, n_shared + 1), dtype=np.float32)
        bar.update(self.n_bootstrap - n_refits if n_boot_workers == 1 else self.n_bootstrap)
        return boot, (codes, uniq)

    def _keep_state(self, data: "_FitData", X0, gidx, clusters, oof) -> np.ndarray:
        """What prediction, drivers and scoring need; calibrates spread and drift levels. Returns the
        history's logits without experiment effects."""
        frame, outcome, k, n = data.frame, data.outcome, data.k, data.n
        D, T, Wm, channel, experiment, in_exp = data.D, data.T, data.Wm, data.channel, data.experiment, data.in_exp
        periods, blocks, cols = data.periods, data.blocks, data.cols
        codes, uniq = clusters
        st = self.state_
        boot = self.boot_coef_
        self.outcome_ = outcome
        self.n_posts_ = int(len(frame))
        self.n_experiment_posts_ = int(in_exp.sum())
        self.n_experiments_ = int(len(gidx))
        self.dense_columns_ = [cols[i] for i in st["dense_idx"]]
        self.term_names_ = [self.featurizer_.term_names_[i] for i in st["term_idx"]]
        self.term_df_ = np.asarray((T[:, st["term_idx"]] > 0).sum(axis=0)).ravel()
        if self.wording_vec_ is not None:
            names = self.wording_vec_.get_feature_names_out()
            self.wording_names_ = [str(names[i]) for i in st["word_idx"]]
            self.wording_df_ = np.asarray((Wm[:, st["word_idx"]] > 0).sum(axis=0)).ravel()
        else:
            self.wording_names_ = []
            self.wording_df_ = np.zeros(0)
        self.term_vocabulary_ = frozenset(self.term_names_)
        self.term_groups_, self.term_group_index_ = _term_groups(
            T[:, st["term_idx"]], Wm[:, st["word_idx"]], self.term_names_, len(st["dense_idx"]), self.n_shared_
        )
        # In how many independent units (experiments, or weeks outside them) each such word
        # appears: ten arms of one test are one piece of evidence, not ten.
        E = sp.csc_matrix(T[:, st["term_idx"]])[:, self.term_group_index_]
        C = sp.csr_matrix((np.ones(len(codes)), (np.arange(len(codes)), codes)), shape=(len(codes), len(uniq)))
        self.term_clusters_ = np.diff(sp.csr_matrix(E.T @ C).indptr)
        self.term_varied_tests_ = _varied_tests(E, experiment, in_exp)
        self.term_weeks_outside_tests_ = _varied_tests(E, periods, ~in_exp, varied=False)
        self.typical_rate_ = float(k.sum() / n.sum())
        self.time_known_share_ = float(np.mean(~np.isnan(frame["local_hour"].to_numpy(float))))
        self.dense_range_ = (D[:, st["dense_idx"]].min(axis=0), D[:, st["dense_idx"]].max(axis=0))
        self.typical_range_ = typical_range(D[:, st["dense_idx"]])

        chan_off = len(st["dense_idx"]) + len(st["term_idx"]) + len(st["word_idx"])
        # How far apart the model puts headlines of one test, calibrated on the held-out folds.
        self.spread_ = spread_factor(oof, k, n, experiment, in_exp)
        self.glm_.coef_[:chan_off] *= self.spread_
        if boot.shape[0]:
            boot[:, :chan_off] *= np.float32(self.spread_)
        if self.meaning_column_ is not None:
            self.glm_.coef_[self.meaning_column_] *= self.spread_
            boot[:, self.meaning_column_] *= np.float32(self.spread_)
        eta_all = np.asarray(X0 @ self.glm_.coef_[: self.n_shared_]).ravel() + self.glm_.intercept_
        # Levels that follow drift: each channel's level (and damped slope) at the history's end, by a
        # half-life and damping chosen on the time folds (see contentlab.levels).
        if self.level == "recent":
            level = recent_levels(oof, eta_all, k, n, channel, periods, blocks, self.n_folds)
        else:
            level = {"half_life": float("inf"), "damping": 0.0, "offsets": {}, "slopes": {},
                     "table": pd.DataFrame(columns=["half_life_weeks", "damping", "deviance"])}
        self.level_half_life_, self.level_damping_ = level["half_life"], level["damping"]
        self.level_offsets_, self.level_slopes_, self.level_cv_ = level["offsets"], level["slopes"], level["table"]
        shift = np.array([self.level_offsets_.get(c, 0.0) for c in st["channels"]])
        self.glm_.coef_[chan_off: chan_off + len(shift)] += shift
        if boot.shape[0]:
            boot[:, chan_off: chan_off + len(shift)] += shift.astype(boot.dtype)
        self.logit_spread_ = float(np.var(eta_all))
        self._fit_typical(frame, D, X0, channel, n)
        self.training_posts_summary_ = frame[["channel", "local_hour", "impressions", outcome]].copy()
        return eta_all

    def _predictive_spread(self, data: "_FitData", X0, X, glm, eta_all, oof) -> None:
        """Held-out logits (``oof_``), the post-to-post spread of the predictive interval, and the
        within-test share of each column's evidence."""
        frame, k, n, blocks = data.frame, data.k, data.n, data.blocks
        experiment, channel, in_exp = data.experiment, data.channel, data.in_exp
        st = self.state_
        boot = self.boot_coef_
        fold = np.where(blocks >= 1, blocks, -1)
        self.oof_ = pd.DataFrame({
            "post_id": frame["post_id"].to_numpy(),
            "fold": fold,
            "logit": oof,
            "predicted_rate": expit(oof),
        })
        held = ~np.isnan(oof)

        # The held-out posts at the level forecast their fold would have made (none with level="history").
        periods = frame["_period"].to_numpy()
        week = week_number(periods)
        level_off, ahead = fold_forecasts(oof, k, n, channel, week, blocks, self.n_folds,
                                          self.level_half_life_, self.level_damping_)
        if self.level != "recent":
            level_off = np.where(np.isfinite(level_off), 0.0, np.nan)
        self.oof_["level_offset"], self.oof_["weeks_ahead"] = level_off, ahead
        # Around each held-out week's own level: the post-to-post spread; and the level's own error,
        # ``a + b * weeks_ahead`` (see contentlab.levels.level_error_variance).
        self.post_variance_, self.week_level_variance_, self.level_drift_ = level_error_variance(
            oof, level_off, ahead, k, n, channel, week)
        use = np.isfinite(level_off)
        self.heldout_weeks_ahead_ = float(np.mean(ahead[use])) if use.any() else 1.0
        self.last_week_ = float(week.max())
        # One factor on that variance so that the folds' held-out posts get the nominal coverage.
        eta_h, n_h, rate_h = oof[use] + level_off[use], n[use], k[use] / n[use]
        var_h = self.post_variance_ + self.week_level_variance_ + self.level_drift_ * ahead[use]

        def coverage_at(factor: float) -> float:
            low, high = predictive_interval(eta_h, factor * var_h, n_h, self.interval)
            return float(np.mean((rate_h >= low) & (rate_h <= high)))

        self.interval_scale_ = interval_scale(coverage_at, self.interval) if use.any() else 1.0
        param_var = 0.0
        if self.n_bootstrap >= 2:
            Xh = X0[np.flatnonzero(held)]
            eb = np.asarray(Xh @ boot[:, :-1].T.astype(float)) + boot[:, -1].astype(float)
            param_var = float(np.mean(np.var(eb, axis=1, ddof=1)))
        # The held-out spread holds the fold models' parameter uncertainty; a draft's own is added apart.
        self.overdispersion_ = max(self.interval_scale_ * self.post_variance_ - param_var, 0.0)
        term_coef = glm.coef_[len(st["dense_idx"]): len(st["dense_idx"]) + len(st["term_idx"])]
        self.term_effect_var_ = float(np.mean(term_coef ** 2)) if term_coef.size else 0.0

        # Evidence behind each shared column: information from within-experiment differences
        # against information from differences between ordinary posts of one channel.
        p_fit = expit(eta_all + np.asarray(X[:, self.n_shared_:] @ glm.coef_[self.n_shared_:]).ravel())
        self.within_share_ = _within_share(X0, n * p_fit * (1 - p_fit), experiment, channel, in_exp)

    def _validate(self, data: "_FitData", X0, oof) -> dict:
        """Held-out figures against the baselines (deviance, within-test gain, pairs, coverage)."""
        from .evaluation import baseline_rates, deviance_table, pair_accuracy, within_experiment_deviance

        frame, outcome, k, n, blocks = data.frame, data.outcome, data.k, data.n, data.blocks
        experiment, in_exp = data.experiment, data.in_exp
        held = ~np.isnan(oof)
        test_rows = np.flatnonzero(held)
        deviance_rows = []
        base_all = {key: np.full(len(frame), np.nan) for key in
                    ("overall rate", "per-channel rate", "per-channel and hour-block rate")}
        for f in range(1, self.n_folds + 1):
            tr = np.flatnonzero(blocks < f)
            te = np.flatnonzero(blocks == f)
            for key, val in baseline_rates(frame.iloc[tr], frame.iloc[te], outcome).items():
                base_all[key][te] = val
        table = deviance_table(k[test_rows], n[test_rows], expit(oof[test_rows]),
                               {key: v[test_rows] for key, v in base_all.items()})
        deviance_rows = table.to_dict(orient="records")
        validation: dict = {
            "outcome": outcome,
            "n_posts": self.n_posts_,
            "n_held_out": int(held.sum()),
            "n_folds": int(self.n_folds),
            "alpha": self.alpha_,
            "deviance": deviance_rows,
        }
        if in_exp[held].any():
            e = held & in_exp
            # With the held-out spread factor the final model applies to its differences (one
            # number fitted on these posts): the arms' rates as the saved model would predict them.
            d_m, d_b = within_experiment_deviance(self.spread_ * oof[e], k[e], n[e], experiment[e])
            validation["within_experiment"] = {
                "n_posts": int(e.sum()),
                "model_deviance": d_m,
                "per_experiment_mean_deviance": d_b,
                "gain": 1.0 - d_m / d_b if d_b > 0 else float("nan"),
            }
            acc = pair_accuracy(frame.iloc[test_rows], oof[test_rows], outcome, n_boot=1000)
            validation["pairwise"] = acc
        validation["coverage"] = _coverage(self, k, n, oof)
        validation["messages"] = _validation_messages(validation)
        validation["trustworthy"] = not any(m.startswith("WARNING") for m in validation["messages"])
        return validation

    def _fit_typical(self, frame, D, X0, channel, n) -> None:
        """Per channel: the typical post (mean design row), its logit, and its median impressions."""
        st = self.state_
        self.channels_ = list(st["channels"])
        typical_rows = {}
        med_impr = {}
        time_means = {}
        tcols = [i for i, c in enumerate(self._all_dense_names()) if c in TIME_COLUMNS]
        for c in self.channels_:
            sel = channel == c
            typical_rows[c] = np.asarray(X0[np.flatnonzero(sel)].mean(axis=0)).ravel()
            med_impr[c] = float(np.median(n[sel]))
            time_means[c] = D[sel][:, tcols].mean(axis=0) if tcols else np.zeros(0)
        self.typical_design_ = typical_rows
        self.channel_impressions_ = med_impr
        self.channel_time_means_ = time_means
        self.channel_share_ = pd.Series(channel).value_counts(normalize=True).to_dict()

    def _all_dense_names(self) -> list[str]:
        dense = list(DEFAULT_DENSE if self.dense_features is None else self.dense_features)
        return dense + (list(TIME_COLUMNS) if self.use_time else [])

    # ----------------------------------------------------------------- predict
    def _draft_design(self, drafts: pd.DataFrame, allow_unknown_channel: bool = False):
        """Design rows (shared columns only) for new headlines, plus novelty figures."""
        self._check_fitted()
        if not isinstance(drafts, pd.DataFrame) or "headline" not in drafts:
            raise ContentlabError("drafts need a 'headline' column")
        frame = drafts.copy()
        text = frame["headline"].map(clean_headline)
        empty = np.flatnonzero((text == "").to_numpy())
        if empty.size:
            raise ContentlabError(f"draft {empty[0] + 1} has an empty headline")
        if "channel" not in frame or frame["channel"].isna().all():
            if len(self.channels_) == 1:
                frame["channel"] = self.channels_[0]
            elif "(none)" in self.channels_:
                frame["channel"] = None
            elif not allow_unknown_channel:
                raise ContentlabError(
                    f"give each draft a channel; the history has several: {', '.join(self.channels_)}"
                )
        for col in ("local_hour", "local_weekday"):
            if col not in frame:
                frame[col] = np.nan
        fs = self.featurizer_.transform(frame)
        channel = fs.channel.to_numpy(dtype=object)
        unknown = sorted(set(channel) - set(self.channels_))
        if unknown and not allow_unknown_channel:
            raise ContentlabError(
                f"channel '{unknown[0]}' is not in the history the model learned from; "
                f"use one of: {', '.join(self.channels_)}"
            )
        names = self._all_dense_names()
        D = fs.dense[names].to_numpy(float)
        # A draft without a planned time gets its channel's typical time, not "hour unknown".
        tcols = [i for i, c in enumerate(names) if c in TIME_COLUMNS]
        if tcols and self.time_known_share_ > 0:
            no_time = np.isnan(frame["local_hour"].to_numpy(float))
            for c in set(channel[no_time]):
                if c in self.channel_time_means_:
                    sel = no_time & (channel == c)
                    D[np.ix_(sel, tcols)] = self.channel_time_means_[c]
        T, Wm = self._text_blocks(fs)
        rows = np.arange(len(frame))
        raw_dense = D.copy()  # the draft's own values, for reasons (the design below is bounded and may be shrunk)
        D, outside, distance = self._bound_dense(D)
        X = self._matrix(D, T, Wm, channel, rows, self.state_)
        meaning = self._meaning_values(text)
        if meaning is not None:
            X = sp.hstack([X, sp.csr_matrix(meaning[:, None])], format="csr")
        if unknown:
            # Unknown channel (evaluation only): the history's channel mix stands in for it.
            off = len(self.state_["dense_idx"]) + len(self.state_["term_idx"]) + len(self.state_["word_idx"])
            mix = np.array([self.channel_share_.get(c, 0.0) for c in self.channels_])
            X = X.tolil()
            for i in np.flatnonzero(~np.isin(channel, self.channels_)):
                X[i, off: off + len(mix)] = mix
            X = X.tocsr()
        unseen_n = np.zeros(len(frame))
        unseen_share = np.zeros(len(frame))
        for i, t in enumerate(fs.text):
            unigrams = [tok for tok in topic_tokens(t) if " " not in tok]
            if unigrams:
                miss = sum(tok not in self.term_vocabulary_ for tok in unigrams)
                unseen_n[i] = miss
                unseen_share[i] = miss / len(unigrams)
        # Words can only make a draft far when the model knows words (a model without topic terms has none).
        X, shrink = self._shrink_far(X, channel, distance, unseen_share if len(self.term_vocabulary_) else None)
        frame["_shrink"] = shrink
        frame["_distance"] = distance
        frame.attrs["raw_dense"] = (names, raw_dense)
        return X, channel, unseen_n, unseen_share, outside, frame

    def _bound_dense(self, D: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Clip each dense feature to the range the history showed; say how far outside each draft was.

        A linear effect learned on headlines of 20-120 characters says nothing about one of 2:
        extrapolating it gave "Hi" a top rank. So every feature's contribution is bounded by
        what the history's own posts reached. Returns the clipped matrix, the number of features
        outside the range per draft, and the summed distance outside the range of the measured
        features (``typical_range_``) in standard deviations.
        """
        idx = self.state_["dense_idx"]
        lo, hi = self.dense_range_
        Du = D[:, idx]
        outside = ((Du < lo - 1e-12) | (Du > hi + 1e-12)).sum(axis=1)
        t_lo, t_hi = getattr(self, "typical_range_", self.dense_range_)
        excess = np.maximum(t_lo - Du, 0.0) + np.maximum(Du - t_hi, 0.0)
        distance = (excess / self.state_["scale"]).sum(axis=1)
        D = D.copy()
        D[:, idx] = np.clip(Du, lo, hi)
        return D, outside, distance

    def _typical_rows(self, channel: np.ndarray) -> np.ndarray:
        """The channel's typical design row per draft (the history's channel mix for an unknown channel)."""
        mix = None
        rows = []
        for c in channel:
            row = self.typical_design_.get(c)
            if row is None:
                if mix is None:
                    mix = sum(self.channel_share_.get(k, 0.0) * np.asarray(v) for k, v in self.typical_design_.items())
                row = mix
            rows.append(row)
        return np.vstack(rows) if rows else np.zeros((0, self.n_shared_))

    def _shrink_far(self, X, channel: np.ndarray, distance: np.ndarray, unseen_share: np.ndarray | None = None):
        """Pull far drafts toward their channel's typical post, in proportion to how far they are.

        A draft ``d`` standard deviations (summed over features) outside the history's range
        gets the design row ``(1 - w) x + w x_typical`` with ``w = min(1, d / FAR_DISTANCE)``:
        its prediction, contributions and bootstrap spread move toward the channel's typical
        post, and a draft the model cannot judge at all is scored as a typical one. So is a
        draft none of whose words the history used (``unseen_share`` 1): its style alone says
        little about how it would do ("sqa sqa sqa" is short and easy to read, yet nothing
        like a real post).
        """
        w = np.clip(np.asarray(distance, float) / FAR_DISTANCE, 0.0, 1.0)
        if unseen_share is not None:
            by_words = np.asarray(unseen_share, float)
            w = np.maximum(w, np.where(by_words >= UNKNOWN_WORDS_SHARE, 1.0, 0.0))
        if not np.any(w > 0):
            return X, w
        far = np.flatnonzero(w > 0)
        typical = self._typical_rows(channel[far])
        X = sp.csr_matrix(X, dtype=float).tolil()
        for r, i in enumerate(far):
            X[i] = (1.0 - w[i]) * X[i].toarray().ravel() + w[i] * typical[r]
        return X.tocsr(), w

    def decision_function(self, drafts: pd.DataFrame) -> np.ndarray:
        """Log-odds of the rate for each headline (no experiment effect: a new post)."""
        X, *_ = self._draft_design(drafts)
        return np.asarray(X @ self.glm_.coef_[: self.n_shared_]).ravel() + self.glm_.intercept_

    def predict(self, drafts: pd.DataFrame) -> np.ndarray:
        """Predicted rate per impression for each headline."""
        return expit(self.decision_function(drafts))

    def predict_frame(
        self, drafts: pd.DataFrame, impressions: float | np.ndarray | None = None, *,
        allow_unknown_channel: bool = False,
    ) -> pd.DataFrame:
        """Predicted rate with a predictive interval for each draft (one row per input row).

        ``rate_low``/``rate_high`` bound the rate the post will *show* at
        ``impressions`` (default: its channel's median impressions in history)
        with probability ``interval``: parameter uncertainty (bootstrap), the
        post-to-post spread seen on held-out posts, and binomial noise. The
        logit-normal rate is moment-matched to a Beta and the observed rate
        to a Beta with the beta-binomial's mean and variance.
        ``expected_low``/``expected_high`` cover parameter uncertainty only
        (what the model knows about this headline's typical rate).

        Columns: ``predicted_rate, rate_low, rate_high, expected_low,
        expected_high, logit, logit_se, impressions_assumed,
        unseen_term_share, n_unseen_terms, n_outside_range, far_from_history,
        distance_from_history, shrink_to_typical``: each dense feature is
        bounded to the history's range, and a draft outside it is pulled toward
        its channel's typical post (``shrink_to_typical`` is the weight, 1 =
        scored as the typical post; see ``_shrink_far``).
        """
        X, channel, unseen_n, unseen_share, outside, prepared = self._draft_design(drafts, allow_unknown_channel)
        coef = self.glm_.coef_[: self.n_shared_]
        eta = np.asarray(X @ coef).ravel() + self.glm_.intercept_
        if self.boot_coef_.shape[0] >= 2:
            eb = np.asarray(X @ self.boot_coef_[:, :-1].T.astype(float)) + self.boot_coef_[:, -1].astype(float)
            param_var = np.var(eb, axis=1, ddof=1)
        else:
            param_var = np.zeros(len(eta))
        out = pd.DataFrame(
            self.interval_columns(eta, param_var, unseen_n, unseen_share, outside, channel, impressions,
                                  shrink=prepared["_shrink"].to_numpy(float), weeks_ahead=self._weeks_ahead(drafts)),
            index=drafts.index,
        )
        out["distance_from_history"] = prepared["_distance"].to_numpy(float)
        out["shrink_to_typical"] = prepared["_shrink"].to_numpy(float)
        return out

    def _weeks_ahead(self, drafts: pd.DataFrame) -> np.ndarray | None:
        """Weeks from the history's last week to each draft's ``published_at`` (None without dates)."""
        if "published_at" not in drafts or not hasattr(self, "last_week_"):
            return None
        d = pd.to_datetime(drafts["published_at"].astype(str).str.slice(0, 10), errors="coerce")
        if d.isna().any():
            return None
        monday = (d - pd.to_timedelta(d.dt.day_of_week, unit="D")).dt.strftime("%Y-%m-%d").to_numpy()
        return week_number(monday) - self.last_week_

    def interval_columns(self, eta, param_var, unseen_n, unseen_share, outside, channel,
                         impressions=None, shrink=None, weeks_ahead=None) -> dict[str, np.ndarray]:
        """``predict_frame``'s columns from a draft design's logits and bootstrap variance.

        The one place the predictive interval is computed; scoring's batch path
        calls it too, so the two can never disagree. ``weeks_ahead``: how many weeks after
        the history's last week each post appears (default 1, the next week); the channel
        level's damped slope and its error variance grow with it.
        """
        from scipy.special import ndtri

        eta = np.asarray(eta, dtype=float)
        unseen_n = np.asarray(unseen_n, dtype=float)
        # A word the model has never seen has an unknown effect: as much variance as a typical term's.
        var_se = np.asarray(param_var, dtype=float) + unseen_n * self.term_effect_var_
        if shrink is not None:
            # A draft scored toward the typical post because the model cannot judge it: its rate
            # could be anywhere the history's posts were, so that spread is added in proportion.
            var_se = var_se + np.asarray(shrink, dtype=float) * getattr(self, "logit_spread_", 0.0)
        logit_se = np.sqrt(var_se)
        if impressions is None:
            fallback = float(np.median(list(self.channel_impressions_.values())))
            n_imp = np.array([self.channel_impressions_.get(c, fallback) for c in channel], dtype=float)
        else:
            n_imp = np.broadcast_to(np.asarray(impressions, dtype=float), eta.shape).astype(float)
            if np.any(~np.isfinite(n_imp) | (n_imp <= 0)):
                raise ContentlabError("impressions must be numbers > 0")
        z = ndtri(0.5 + self.interval / 2)
        ahead = np.ones(eta.shape) if weeks_ahead is None else np.maximum(np.asarray(weeks_ahead, dtype=float), 1.0)
        # The channel's damped slope beyond next week (next week's is in the channel level already).
        damping = getattr(self, "level_damping_", 0.0)
        slope = np.array([getattr(self, "level_slopes_", {}).get(c, 0.0) for c in channel], dtype=float)
        eta = eta + slope * (damped_steps(damping, ahead) - damped_steps(damping, 1.0))
        # The level's error grows with the weeks ahead (measured on the time folds, see contentlab.levels).
        level_var = getattr(self, "interval_scale_", 1.0) * (
            getattr(self, "week_level_variance_", 0.0) + getattr(self, "level_drift_", 0.0) * ahead)
        low, high = predictive_interval(eta, var_se + self.overdispersion_ + level_var, n_imp, self.interval)
        outside = np.asarray(outside)
        unseen_share = np.asarray(unseen_share, dtype=float)
        return {
            "predicted_rate": expit(eta),
            "rate_low": low,
            "rate_high": high,
            "expected_low": expit(eta - z * logit_se),
            "expected_high": expit(eta + z * logit_se),
            "logit": eta,
            "logit_se": logit_se,
            "impressions_assumed": n_imp,
            "unseen_term_share": unseen_share,
            "n_unseen_terms": unseen_n.astype(int),
            "n_outside_range": outside.astype(int),
            "far_from_history": (unseen_share >= FAR_UNSEEN_SHARE) | (outside > 0),
        }

    def contributions(self, drafts: pd.DataFrame) -> pd.DataFrame:
        """Log-odds contribution of each feature group, relative to the channel's typical post.

        One row per draft, one column per group (each dense feature, ``posting
        time``, ``topic terms``, ``wording``) plus ``typical_logit``. The
        contributions add up to the draft's logit minus ``typical_logit``; a
        contribution ``c`` means the rate is about ``exp(c) - 1`` higher
        (lower when negative) than the channel's typical post.
        """
        X, channel, *_ = self._draft_design(drafts)
        coef = self.glm_.coef_[: self.n_shared_]
        typical = np.vstack([self.typical_design_[c] for c in channel])
        diff = X.toarray() - typical if X.shape[1] <= 5000 else None
        out = {}
        groups = self._column_groups()
        for name, idx in groups.items():
            if diff is not None:
                out[name] = diff[:, idx] @ coef[idx]
            else:
                out[name] = np.asarray(X[:, idx] @ coef[idx]).ravel() - typical[:, idx] @ coef[idx]
        frame = pd.DataFrame(out, index=drafts.index)
        frame["typical_logit"] = typical @ coef + self.glm_.intercept_
        return frame

    def _column_groups(self) -> dict[str, np.ndarray]:
        """Column indices (shared design) of each contribution group."""
        st = self.state_
        groups: dict[str, list[int]] = {}
        for j, name in enumerate(self.dense_columns_):
            key = "posting time" if name in TIME_COLUMNS else name
            groups.setdefault(key, []).append(j)
        d = len(st["dense_idx"])
        t = len(st["term_idx"])
        w = len(st["word_idx"])
        if t:
            groups["topic terms"] = list(range(d, d + t))
        if w:
            groups["wording"] = list(range(d + t, d + t + w))
        if getattr(self, "meaning_column_", None) is not None:
            groups[MEANING_GROUP] = [self.meaning_column_]
        return {k: np.asarray(v, dtype=int) for k, v in groups.items()}

    def drivers(self, *, top_terms: int = 15, min_term_posts: int = 10) -> pd.DataFrame:
        """Effects as relative changes for meaningful steps, with bootstrap intervals (see drivers.py)."""
        from .drivers import driver_table

        self._check_fitted()
        return driver_table(self, top_terms=top_terms, min_term_posts=min_term_posts)

    def summary(self) -> dict:
        """JSON-ready figures saved beside the model in the workspace."""
        self._check_fitted()
        return {
            "outcome": self.outcome_,
            "n_posts": self.n_posts_,
            "n_experiments": self.n_experiments_,
            "alpha": self.alpha_,
            "adaptive": self.adaptive_,
            "cv_metric": self.cv_metric_,
            "n_dense": len(self.dense_columns_),
            "n_terms": len(self.term_names_),
            "n_wording": len(self.wording_names_),
            "meaning": getattr(self, "meaning_note_", "not used (older model)"),
            "overdispersion": self.overdispersion_,
            "n_bootstrap": int(self.boot_coef_.shape[0]),
            "validation": self.validation_,
            "params": {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.get_params().items()},
        }


# ----------------------------------------------------------------------------- helpers

def _period_of(frame: pd.DataFrame) -> np.ndarray:
    """Week (Monday, as text) of each post, from local_date, else published_at."""
    if "local_date" in frame and frame["local_date"].notna().all():
        d = pd.to_datetime(frame["local_date"])
    else:
        d = pd.to_datetime(frame["published_at"].astype(str).str.slice(0, 10), errors="coerce")
        if d.isna().any():
            raise ContentlabError("posts need a published_at date (YYYY-MM-DD...) to be split by time")
    monday = d - pd.to_timedelta(d.dt.day_of_week, unit="D")
    return monday.dt.strftime("%Y-%m-%d").to_numpy()


def _time_blocks(frame: pd.DataFrame, n_folds: int) -> np.ndarray:
    """Block number 0..n_folds per post: consecutive weeks with about equal numbers of posts.

    An experiment's arms all go to the block of its first week, so a test is
    never split between learning and checking.
    """
    period = pd.Series(frame["_period"].to_numpy())
    exp = frame["experiment_id"]
    first = period.groupby(exp.to_numpy()).transform("min") if exp.notna().any() else period
    period = period.where(exp.isna().to_numpy(), first)
    counts = period.value_counts().sort_index()
    cum_before = counts.cumsum() - counts
    n_blocks = n_folds + 1
    block_of = np.minimum((cum_before / counts.sum() * n_blocks).astype(int), n_blocks - 1)
    blocks = period.map(block_of).to_numpy(int)
    present = np.unique(blocks)
    if len(present) < n_blocks:
        # Too few weeks for equal blocks: one block per distinct week, in order.
        ranks = pd.Series(counts.index).rank(method="dense").astype(int).to_numpy() - 1
        block_of = pd.Series(np.minimum(ranks * n_blocks // len(counts), n_blocks - 1), index=counts.index)
        blocks = period.map(block_of).to_numpy(int)
        if len(np.unique(blocks)) < n_blocks:
            raise ContentlabError(
                f"the history covers too few weeks for {n_folds} time folds; import more history"
            )
    return blocks


def _held_out_criterion(eta, k, n, experiment, in_exp) -> float:
    """Held-out deviance; experiment posts are judged within their experiment.

    Ordinary posts: plain binomial deviance. Experiment posts: each test's level
    is refitted, and the model's differences between arms are scaled by the one
    factor ``s`` in [0, 3] that fits the held-out tests best. Only the *ranking*
    inside a test then counts, not how confidently the model spreads its arms;
    arm-to-arm noise beyond binomial otherwise makes the plain deviance prefer a
    model that says almost nothing (seen on the archive: the plain criterion
    chose a penalty 1000x stronger and lost 3 points of pairwise accuracy).
    """
    from scipy.optimize import minimize_scalar

    from .evaluation import recenter_logits
    from .stats import binomial_deviance

    total = 0.0
    plain = ~in_exp
    if plain.any():
        total += binomial_deviance(k[plain], n[plain], np.clip(expit(eta[plain]), 1e-12, 1 - 1e-12))
    if in_exp.any():
        ke, ne, ee, ge = k[in_exp], n[in_exp], eta[in_exp], experiment[in_exp]

        def dev(scale: float) -> float:
            centred = recenter_logits(scale * ee, ke, ne, ge)
            return binomial_deviance(ke, ne, np.clip(expit(centred), 1e-12, 1 - 1e-12))

        res = minimize_scalar(dev, bounds=(0.0, 3.0), method="bounded", options={"xatol": 1e-3})
        total += float(res.fun)
    return total


class _quiet_convergence:
    """Silence the GLM's ConvergenceWarning inside CV and bootstrap refits (loose fits are fine there)."""

    def __enter__(self):
        import warnings

        from sklearn.exceptions import ConvergenceWarning

        self._ctx = warnings.catch_warnings()
        self._ctx.__enter__()
        warnings.simplefilter("ignore", ConvergenceWarning)
        return self

    def __exit__(self, *exc):
        return self._ctx.__exit__(*exc)



# ----------------------------------------------------------------------------- parallel fits

# From this many posts on, the CV fits (which only rank penalties) stop at a looser tolerance.
# Not the final fit nor the bootstrap refits: at 1e-4 the warm-started refits barely move from
# the full fit and their spread shrank to 0.1-0.75 of the converged one (measured on 100,000
# synthetic posts), which would make the intervals too narrow.
LARGE_HISTORY_POSTS = 50_000
_LARGE_TOL = 1e-4

# Below this many posts a fit takes well under a second and forking workers costs more than it saves.
PARALLEL_MIN_POSTS = 20_000


# Bootstrap refits on large histories: the full n_bootstrap up to this many posts, fewer beyond.
BOOTSTRAP_FULL_POSTS = 5_000
BOOTSTRAP_MIN_REFITS = 40


def bootstrap_refits(n_bootstrap: int, n_posts: int) -> int:
    """How many bootstrap refits to run: ``n_bootstrap`` up to ``BOOTSTRAP_FULL_POSTS`` posts, then
    fewer in proportion to the history's size, never below ``BOOTSTRAP_MIN_REFITS`` (nor above
    ``n_bootstrap``).

    Why: each refit costs time in proportion to the history, while the intervals need only the
    refits' standard deviation (drivers and drafts use normal intervals with it), whose relative
    error is about ``1 / sqrt(2 B)`` for ``B`` refits (normal theory): 7% at 100, 11% at 40. A
    large history has narrow intervals already, so 11% of a narrow width is a small error; the
    refit time stays about that of a 5,000-post history (the archive's 15,424 posts: 40 refits).
    """
    if n_bootstrap <= 0:
        return 0
    scaled = int(np.ceil(n_bootstrap * BOOTSTRAP_FULL_POSTS / max(n_posts, 1)))
    return int(min(n_bootstrap, max(BOOTSTRAP_MIN_REFITS, scaled)))


def _n_workers(n_jobs, n_posts: int, n_tasks: int) -> int:
    """Worker processes for CV folds and bootstrap refits (1 = in this process)."""
    import multiprocessing as mp
    import os

    if n_jobs == 1 or n_posts < PARALLEL_MIN_POSTS or "fork" not in mp.get_all_start_methods():
        return 1
    want = (os.cpu_count() or 1) if n_jobs is None or n_jobs < 1 else int(n_jobs)
    return max(1, min(want, n_tasks))


def _fold_step(i, fold, alpha, W, model, y, n, k, experiment, in_exp, variants) -> list:
    """Fit one CV fold at one alpha; return (fold, variant, held-out rows, logits, criterion) per variant."""
    tr, te, Xtr, Xte, glm, (st_f, n_exp_f), tmask = fold
    # alpha is a penalty per impression of the *whole* history; a fold that learns from a
    # quarter of it gets four times that, i.e. the same prior precision alpha * W. Otherwise the
    # small early folds, which need more shrinkage per impression, would choose a penalty too
    # strong for the final fit.
    alpha_f = float(alpha) * W / n[tr].sum()
    glm.set_params(alpha=alpha_f)
    q = Xte.shape[1]
    out = []
    # The plain ridge fit is the first step of the adaptive one: both are scored.
    for v, coef, b in model._fit_glm(glm, Xtr, y[tr], n[tr], model._penalties(st_f, n_exp_f, alpha_f), tmask,
                                     variants):
        eta = np.asarray(Xte @ coef[:q]).ravel() + b
        out.append((i, v, te, eta, _held_out_criterion(eta, k[te], n[te], experiment[te], in_exp[te])))
    return out


def _deal(sizes: Sequence[int], n_workers: int) -> list[list[int]]:
    """Task indices per worker, largest first to the least loaded (folds grow over time)."""
    load = [0] * n_workers
    out: list[list[int]] = [[] for _ in range(n_workers)]
    for i in sorted(range(len(sizes)), key=lambda j: -sizes[j]):
        w = int(np.argmin(load))
        out[w].append(i)
        load[w] += sizes[i]
    return [o for o in out if o]


def _fold_worker(conn, items, args, W) -> None:
    try:
        while True:
            alpha = conn.recv()
            if alpha is None:
                break
            try:
                conn.send([r for i, fold in items for r in _fold_step(i, fold, alpha, W, *args)])
            except BaseException as exc:  # pragma: no cover - reported to the parent
                conn.send(exc)
    finally:
        conn.close()


class _FoldPool:
    """The CV folds' fits for one alpha at a time, in forked worker processes when asked.

    Each worker owns fixed folds for the whole alpha path, so its GLMs keep their warm starts;
    folds are dealt so workers get similar numbers of training rows. The fits are the same
    deterministic computations as in one process, so results do not depend on ``n_jobs``.
    """

    def __init__(self, model, folds, y, n, k, experiment, in_exp, variants, n_workers: int) -> None:
        self.folds = folds
        self.args = (model, y, n, k, experiment, in_exp, variants)
        self.W = float(n.sum())
        self.workers = []
        if n_workers > 1:
            import multiprocessing as mp

            ctx = mp.get_context("fork")
            for ids in _deal([len(f[0]) for f in folds], n_workers):
                parent, child = ctx.Pipe()
                proc = ctx.Process(target=_fold_worker, args=(child, [(i, folds[i]) for i in ids], self.args, self.W),
                                   daemon=True)
                proc.start()
                child.close()
                self.workers.append((proc, parent))

    def step(self, alpha: float) -> list:
        if not self.workers:
            return [r for i, fold in enumerate(self.folds) for r in _fold_step(i, fold, alpha, self.W, *self.args)]
        for _, conn in self.workers:
            conn.send(alpha)
        out = []
        for _, conn in self.workers:
            res = conn.recv()
            if isinstance(res, BaseException):
                raise res
            out.extend(res)
        return out

    def close(self) -> None:
        for proc, conn in self.workers:
            try:
                conn.send(None)
                conn.close()
            except (OSError, BrokenPipeError):
                pass
            proc.join(timeout=10)
            if proc.is_alive():
                proc.terminate()
        self.workers = []


def _run_forked(func, chunks: list, n_workers: int) -> list:
    """``[func(c) for c in chunks]``, the chunks spread over forked processes when n_workers > 1."""
    if n_workers <= 1 or len(chunks) <= 1:
        return [func(c) for c in chunks]
    import multiprocessing as mp

    ctx = mp.get_context("fork")
    jobs = []

    def target(conn, chunk):
        try:
            conn.send(func(chunk))
        except BaseException as exc:  # pragma: no cover - reported to the parent
            conn.send(exc)
        finally:
            conn.close()

    for chunk in chunks:
        parent, child = ctx.Pipe()
        proc = ctx.Process(target=target, args=(child, chunk), daemon=True)
        proc.start()
        child.close()
        jobs.append((proc, parent))
    out = []
    for proc, conn in jobs:
        res = conn.recv()
        proc.join()
        if isinstance(res, BaseException):
            raise res
        out.append(res)
    return out


# A topic word's driver counts every text column that (almost) only occurs together with it.
TERM_GROUP_MIN_POSTS = 10
TERM_GROUP_MAX_TERMS = 2000
TERM_GROUP_TIED = 0.9


def _term_groups(T, Wm, names, offset, n_shared) -> tuple[sp.csr_matrix, np.ndarray]:
    """For frequent unigram terms t: weights ``P(c | t)`` over text columns c with ``P(t | c) >= 0.9``.

    Ridge shares one effect among columns that always appear together ("makerspace",
    "laser", "the makerspace"), so the word's own column understates what the word goes with;
    the row for ``t`` adds, weighted by how often they come with it, the columns tied to it.
    Returns the (n_eligible, n_shared) matrix and the eligible term indices.
    """
    T = sp.csr_matrix(T)
    df = np.asarray((T > 0).sum(axis=0)).ravel()
    uni = np.array([" " not in n for n in names], dtype=bool)
    cand = np.flatnonzero(uni & (df >= TERM_GROUP_MIN_POSTS))
    cand = cand[np.argsort(-df[cand], kind="stable")][:TERM_GROUP_MAX_TERMS]
    cand = np.sort(cand)
    if cand.size == 0:
        return sp.csr_matrix((0, n_shared)), cand
    text = sp.hstack([T, sp.csr_matrix(Wm)], format="csc")
    text.data[:] = 1.0
    E = T[:, cand].tocsc()
    E.data[:] = 1.0
    M = (E.T @ text).tocoo()  # co-occurrence counts
    df_c = np.asarray(text.sum(axis=0)).ravel()
    df_t = df[cand].astype(float)
    p_c_given_t = M.data / df_t[M.row]
    p_t_given_c = M.data / np.maximum(df_c[M.col], 1.0)
    keep = p_t_given_c >= TERM_GROUP_TIED
    A = sp.csr_matrix((p_c_given_t[keep], (M.row[keep], M.col[keep] + offset)), shape=(cand.size, n_shared))
    return A, cand


# Neighbouring alphas this close (decades) are averaged into each one's criterion.
SMOOTH_DECADES = 0.5


def smooth_criterion(cv: pd.DataFrame, width: float = SMOOTH_DECADES) -> pd.DataFrame:
    """Add ``smoothed``: each alpha's criterion averaged with its neighbours within ``width`` decades.

    Held-out pairwise accuracy is a step function of alpha with a standard error (about 0.015
    on a thousand pairs) larger than the differences between neighbouring alphas, so the best
    single alpha flipped between neighbours on noise (seen on the archive: 3.2e-5 against
    3.2e-4 from one cut to the next). Averaging over a window on the log scale is a kernel
    smoother of the criterion curve; the pick then sits in a broad good region rather than on
    one lucky value. Done per variant (plain or adaptive).
    """
    cv = cv.copy()
    if cv.empty:
        cv["smoothed"] = []
        return cv
    la = np.log10(cv["alpha"].to_numpy(float))
    crit = cv["criterion"].to_numpy(float)
    var = cv["adaptive"].to_numpy()
    near = (np.abs(la[:, None] - la[None, :]) <= width + 1e-9) & (var[:, None] == var[None, :])
    cv["smoothed"] = (near * crit[None, :]).sum(axis=1) / near.sum(axis=1)
    return cv


def spread_factor(oof, k, n, experiment, in_exp, min_posts: int = 2 * CV_MIN_PAIRS) -> float:
    """The factor in [0.05, 1] that best fits held-out A/B tests when it scales the model's differences.

    A weak penalty ranks headlines best (what alpha is chosen for) but spreads the arms of a
    test further apart than they turn out: judged within each held-out test (its level
    refitted), ``s * eta`` with the best ``s`` predicts the arms' rates better and ranks them
    the same. 1 (no change) when the held-out folds hold fewer than ``min_posts`` test arms.
    """
    from scipy.optimize import minimize_scalar

    from .evaluation import recenter_logits
    from .stats import binomial_deviance

    oof = np.asarray(oof, float)
    use = np.asarray(in_exp, bool) & np.isfinite(oof)
    if use.sum() < min_posts:
        return 1.0
    ke, ne, ee, ge = k[use], n[use], oof[use], np.asarray(experiment)[use]

    def dev(scale: float) -> float:
        return binomial_deviance(ke, ne, np.clip(expit(recenter_logits(scale * ee, ke, ne, ge)), 1e-12, 1 - 1e-12))

    res = minimize_scalar(dev, bounds=(0.05, 1.0), method="bounded", options={"xatol": 1e-3})
    return float(res.x)


def typical_range(D: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per dense column, the range a draft must stay inside to count as "like the history".

    Measured features (length, word length, readability, time) use the history's full
    range: a 9-character draft beside a history whose shortest post has 19 is outside it.
    Flags and small counts (whole numbers spanning at most 10) are never "far": a third
    negative word where the history had at most two is bounded by the clipping, but the
    headline is still an ordinary one (their range is infinite here).
    """
    if D.shape[0] == 0:
        return np.zeros(D.shape[1]), np.zeros(D.shape[1])
    lo, hi = D.min(axis=0), D.max(axis=0)
    counts = np.all(np.isclose(D, np.round(D)), axis=0) & (hi - lo <= 10)
    return np.where(counts, -np.inf, lo), np.where(counts, np.inf, hi)


def predictive_interval(eta, s2, impressions, interval: float) -> tuple[np.ndarray, np.ndarray]:
    """Interval for the *observed* rate of a post with logit ``eta`` at ``impressions``.

    The one place the predictive interval is computed. The rate is logit-normal
    (variance ``s2`` on the log-odds: parameters plus post-to-post spread); its
    mean and variance come from Gauss-Hermite quadrature, binomial noise at the
    post's impressions is added (the beta-binomial's variance), and the result is
    moment-matched to a Beta whose quantiles bound the observed rate. The
    interval always holds the point prediction ``expit(eta)`` (a very skewed
    Beta of a tiny rate could otherwise leave it out).
    """
    from scipy.special import betaincinv

    eta = np.asarray(eta, dtype=float)
    s2 = np.broadcast_to(np.asarray(s2, dtype=float), eta.shape)
    lat = expit(eta[:, None] + np.sqrt(s2)[:, None] * _GH_NODES[None, :])
    m = lat @ _GH_WEIGHTS
    v = np.maximum((lat ** 2) @ _GH_WEIGHTS - m ** 2, 1e-18)
    v_obs = v + np.maximum(m - m ** 2 - v, 0.0) / np.asarray(impressions, dtype=float)
    a, b = _beta_from_moments(m, v_obs)
    tail = (1 - interval) / 2
    point = expit(eta)
    return np.minimum(betaincinv(a, b, tail), point), np.maximum(betaincinv(a, b, 1 - tail), point)


def _varied_tests(E, experiment: np.ndarray, in_exp: np.ndarray, varied: bool = True) -> np.ndarray:
    """Per word (column of the 0/1 matrix ``E``): in how many A/B tests some arms had it and others not.

    Only there does a test tell what the word did; a word every arm of a test shares says
    nothing about it (the test's own level absorbs it). With ``varied=False``: in how many
    groups (e.g. weeks of ordinary posts) the word appears at all.
    """
    rows = np.flatnonzero(in_exp)
    if rows.size == 0 or E.shape[1] == 0:
        return np.zeros(E.shape[1], dtype=np.int64)
    codes, uniq = pd.factorize(pd.Series(experiment[rows]).astype(str))
    G = sp.csr_matrix((np.ones(rows.size), (np.arange(rows.size), codes)), shape=(rows.size, len(uniq)))
    with_word = sp.csr_matrix(sp.csr_matrix(E)[rows].T @ G)  # arms with the word, per test
    arms = np.asarray(G.sum(axis=0)).ravel()
    if varied:
        with_word.data = (with_word.data < arms[with_word.indices]).astype(float)
    with_word.eliminate_zeros()
    return np.diff(with_word.indptr).astype(np.int64)


def _beta_from_moments(m: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    m = np.clip(m, 1e-12, 1 - 1e-12)
    v = np.minimum(v, m * (1 - m) * (1 - 1e-9))
    s = m * (1 - m) / v - 1.0
    return m * s, (1 - m) * s


def _within_share(X0, v, experiment, channel, in_exp) -> np.ndarray:
    """Per shared column: share of its information that comes from within-experiment differences.

    Information of column j ~ sum_i v_i (x_ij - mean of x_j in i's group)^2, with groups = the
    experiment for experiment posts and the channel for the rest, v_i = n_i p_i (1 - p_i).
    """
    X0 = sp.csr_matrix(X0)

    def group_ss(rows, labels):
        if rows.size == 0:
            return np.zeros(X0.shape[1])
        Xr = X0[rows]
        vr = v[rows]
        codes, uniq = pd.factorize(pd.Series(labels[rows]).astype(str))
        G = sp.csr_matrix((np.ones(rows.size), (np.arange(rows.size), codes)), shape=(rows.size, len(uniq)))
        ss = np.asarray(Xr.multiply(Xr).T @ vr).ravel()
        # Kept sparse: a test's arms share few words, so most (group, column) sums are zero.
        S1 = sp.csr_matrix(G.T @ sp.diags(vr) @ Xr)
        Vg = np.asarray(G.T @ vr).ravel()
        S1.data = S1.data ** 2 / np.maximum(Vg, 1e-300)[np.repeat(np.arange(S1.shape[0]), np.diff(S1.indptr))]
        return np.maximum(ss - np.asarray(S1.sum(axis=0)).ravel(), 0.0)

    within = group_ss(np.flatnonzero(in_exp), experiment)
    obs = group_ss(np.flatnonzero(~in_exp), channel)
    tot = within + obs
    return np.where(tot > 0, within / np.where(tot > 0, tot, 1.0), 0.0)


def _coverage(model: EngagementModel, k, n, oof) -> dict:
    """Share of held-out posts whose observed rate fell inside the predictive interval.

    Uses the fold models' logits (``oof_``) at their fold's level forecast, with the final model's
    spread at each post's weeks ahead. The spread's factor was calibrated on these same posts, so
    this checks that calibration held, not the interval on unseen weeks (benchmarks/evaluate_archive.py
    does that on the archive).
    """
    level_off = model.oof_["level_offset"].to_numpy(float)
    use = np.isfinite(level_off) & np.isfinite(np.asarray(oof, float))
    if not use.any():
        return {"n_posts": 0, "coverage": float("nan"), "nominal": model.interval}
    ahead = model.oof_["weeks_ahead"].to_numpy(float)[use]
    var = model.interval_scale_ * (model.post_variance_ + model.week_level_variance_ + model.level_drift_ * ahead)
    low, high = predictive_interval(oof[use] + level_off[use], var, n[use], model.interval)
    r = k[use] / n[use]
    inside = (r >= low) & (r <= high)
    return {"n_posts": int(use.sum()), "coverage": float(inside.mean()), "nominal": float(model.interval)}


def _merged_baselines(rows: list[dict]) -> list[tuple[str, dict]]:
    """Baselines that predict identically (one channel, no posting hours) named together once."""
    groups: list[tuple[list[str], dict]] = []
    for row in rows:
        if groups and np.isclose(groups[-1][1]["baseline_deviance"], row["baseline_deviance"], rtol=1e-12):
            groups[-1][0].append(row["baseline"])
        else:
            groups.append(([row["baseline"]], row))
    out = []
    for names, row in groups:
        if len(names) == 1:
            out.append((names[0], row))
        else:
            joined = ", ".join(names[:-1]) + " and " + names[-1]
            out.append((f"{joined} (the same here: they differ only by channel and hour)", row))
    return out


def _validation_messages(validation: dict) -> list[str]:
    """Plain sentences about the held-out figures; a WARNING where the model is not worth trusting."""
    msgs = []
    for names, row in _merged_baselines(validation["deviance"]):
        if row["beats_baseline"]:
            msgs.append(
                f"On held-out later posts the model beats the {names} "
                f"(deviance {row['gain']:+.1%})."
            )
        else:
            msgs.append(
                f"WARNING: on held-out later posts the model does not beat the {names} "
                f"(deviance {row['gain']:+.1%}); do not trust its drivers or scores beyond that baseline."
            )
    we = validation.get("within_experiment")
    if we is not None:
        if we["gain"] > 0:
            msgs.append(f"Inside held-out A/B tests it explains {we['gain']:.1%} of the deviance left by each test's mean.")
        else:
            msgs.append(
                "WARNING: inside held-out A/B tests the model does not beat each test's mean rate; "
                "its ranking of headlines within a test should not be trusted."
            )
    pw = validation.get("pairwise")
    if pw is not None and pw.get("n_pairs", 0) > 0:
        lo, hi = pw["ci_low"], pw["ci_high"]
        text = (f"It ranked {pw['accuracy']:.0%} of {pw['n_pairs']} clearly different pairs of test arms the right "
                f"way round (95% interval {lo:.0%} to {hi:.0%}; chance is 50%).")
        if lo <= 0.5:
            text = "WARNING: " + text + " That is not clearly better than chance."
        msgs.append(text)
    return msgs
