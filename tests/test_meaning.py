"""Headline meaning: the encoder against sentence-transformers, the within-test ridge against a
fixed-effects regression, and the model column on A/B tests whose later topics use new words."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from contentlab import meaning
from contentlab.errors import ContentlabError
from contentlab.evaluation import pair_accuracy
from contentlab.model import EngagementModel
from contentlab.modelfile import dumps, loads

REFERENCE = Path(__file__).resolve().parent / "data" / "minilm_reference.json"
needs_runtime = pytest.mark.skipif(meaning.missing_runtime() is not None,
                                   reason=str(meaning.missing_runtime()))


# ----------------------------------------------------------------------------- encoder

@needs_runtime
def test_encoder_matches_sentence_transformers():
    # Reference: sentence-transformers' own all-MiniLM-L6-v2 (fp32 weights, torch), vectors stored
    # in tests/data by the command named in the file. The int8 ONNX weights move a vector a
    # little (the package's authors state cosine 0.999 or better); 0.995 leaves room for CPUs.
    ref = json.loads(REFERENCE.read_text())
    got = meaning.embed_headlines(ref["sentences"])
    want = np.asarray(ref["embeddings"])
    assert got.shape == (3, meaning.DIMENSION)
    np.testing.assert_allclose(np.linalg.norm(got, axis=1), 1.0, atol=1e-5)
    cosine = (got * want).sum(axis=1) / np.linalg.norm(want, axis=1)
    assert np.all(cosine > 0.995), cosine


@needs_runtime
def test_encoder_rows_follow_the_input_and_repeat_exactly():
    texts = ["A puppy learns to swim", "Budget audit finds errors", "A puppy learns to swim"]
    E = meaning.embed_headlines(texts)
    np.testing.assert_array_equal(E[0], E[2])
    np.testing.assert_array_equal(E[1], meaning.embed_headlines([texts[1]])[0])


def test_missing_runtime_names_the_packages(monkeypatch):
    real = meaning.importlib.util.find_spec
    monkeypatch.setattr(meaning.importlib.util, "find_spec",
                        lambda name: None if name == "onnxruntime" else real(name))
    why = meaning.missing_runtime()
    assert why is not None and "onnxruntime" in why and "pip install" in why


# ----------------------------------------------------------------------------- ridge

def test_within_test_ridge_is_the_fixed_effects_regression():
    # Frisch-Waugh-Lovell theorem: regressing group-demeaned y on group-demeaned X (weighted)
    # gives the slopes of the weighted regression of y on X plus one dummy per group. Checked
    # against statsmodels' WLS with the dummies, at a negligible penalty.
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(0)
    n_groups, per, dim = 40, 3, 4
    g = np.repeat(np.arange(n_groups), per)
    X = rng.normal(size=(g.size, dim))
    n = rng.integers(2000, 9000, size=g.size).astype(float)
    eta = -4 + rng.normal(size=n_groups)[g] + X @ np.array([0.3, -0.2, 0.0, 0.1])
    k = rng.binomial(n.astype(int), 1 / (1 + np.exp(-eta))).astype(float)
    beta = meaning.within_test_ridge(X, k, n, g, [1e-9])[0]
    p = (k + 0.5) / (n + 1)
    y = np.log(p / (1 - p))
    w = 1 / (1 / (k + 0.5) + 1 / (n - k + 0.5))
    dummies = (g[:, None] == np.arange(n_groups)).astype(float)
    ref = sm.WLS(y, np.column_stack([X, dummies]), weights=w).fit().params[:dim]
    np.testing.assert_allclose(beta, ref, rtol=1e-6, atol=1e-8)
    # Rows outside tests (-1) are left out; a stronger penalty only shrinks.
    g2 = np.r_[g, -1, -1]
    beta2 = meaning.within_test_ridge(np.vstack([X, rng.normal(size=(2, dim))]), np.r_[k, 1, 1], np.r_[n, 9, 9],
                                      g2, [1e-9, 10.0, 1000.0])
    np.testing.assert_allclose(beta2[0], beta, rtol=1e-9)
    assert np.linalg.norm(beta2[0]) > np.linalg.norm(beta2[1]) > np.linalg.norm(beta2[2])


def test_group_codes():
    codes = meaning.group_codes(np.array(["e1", "e1", None, "e2"], dtype=object),
                                np.array(["a", "b", "a", None], dtype=object))
    assert codes[2] == -1
    assert len({codes[0], codes[1], codes[3]}) == 3


# ----------------------------------------------------------------------------- the model column

# Topics move on: each stretch of time has its own words, so held-out weeks bring new ones.
ANIMALS = ["puppy", "dog", "horse", "parrot", "rabbit", "goat", "kitten", "cat", "pony", "hamster", "duck", "sheep",
           "lamb", "donkey", "owl", "fox", "otter", "deer", "piglet", "cow", "turtle", "goose", "squirrel",
           "hedgehog"]
PAPER = ["form", "invoice", "permit", "audit", "memo", "receipt", "tariff", "ledger", "bylaw", "levy", "fee",
         "report", "rule", "code", "claim", "payroll", "registry", "return", "filing", "budget", "quota", "notice",
         "policy", "statute"]
# Words that say nothing, added at random to either arm so length and style cannot tell the arms apart.
FILLER = ["big", "new", "local", "old", "small", "odd", "late"]
FRAMES = ["A {} at the town hall", "What the {} did this week", "The {} nobody expected",
          "Inside the {} story", "One {} changed the meeting", "Our {} update for you"]


def _ab_tests(n_tests: int, chunks: range, start: str, seed: int, prefix: str) -> pd.DataFrame:
    """Two-arm tests: an arm about an animal beats an arm about paperwork by 40% (log-odds 0.34);
    the tests' words move through ``chunks`` (four animals and four paperwork words each) in time."""
    rng = np.random.default_rng(seed)
    rows = []
    t0 = pd.Timestamp(start)
    for t in range(n_tests):
        c = chunks[t * len(chunks) // n_tests]
        level = -4.0 + rng.normal(0, 0.3)
        day = (t0 + pd.Timedelta(days=int(t * 7 * 20 / n_tests))).strftime("%Y-%m-%d")
        pair = ((rng.choice(ANIMALS[4 * c: 4 * c + 4]), np.log(1.4)), (rng.choice(PAPER[4 * c: 4 * c + 4]), 0.0))
        for arm, (word, lift) in enumerate(pair):
            extra = " ".join(rng.choice(FILLER, size=rng.integers(0, 3), replace=False))
            text = FRAMES[rng.integers(len(FRAMES))].format(f"{extra} {word}".strip())
            n = int(rng.integers(8000, 20000))
            rows.append({"post_id": f"{prefix}{t}-{arm}", "published_at": day, "has_time": 0, "headline": text,
                         "impressions": n, "clicks": int(rng.binomial(n, 1 / (1 + np.exp(-(level + lift))))),
                         "channel": "web", "experiment_id": f"{prefix}{t}", "image_id": None,
                         "local_date": day, "local_hour": np.nan, "local_weekday": np.nan})
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def meaning_data():
    if meaning.missing_runtime() is not None:
        pytest.skip(meaning.missing_runtime())
    history = _ab_tests(400, range(5), "2024-01-01", 1, "h")
    later = _ab_tests(120, range(5, 6), "2024-06-03", 2, "l")
    with_meaning = EngagementModel(n_bootstrap=5, meaning=True).fit(history)
    without = EngagementModel(n_bootstrap=5, meaning=False).fit(history)
    return history, later, with_meaning, without


@needs_runtime
def test_meaning_ranks_tests_whose_words_are_new(meaning_data):
    _, later, with_meaning, without = meaning_data
    assert with_meaning.meaning_weight_ > 0, with_meaning.meaning_note_
    assert without.meaning_column_ is None and "meaning=False" in without.meaning_note_

    def accuracy(model):
        logit = model.predict_frame(later, impressions=later["impressions"].to_numpy(float))["logit"]
        return pair_accuracy(later, logit.to_numpy(), "clicks", n_boot=1)

    got, base = accuracy(with_meaning), accuracy(without)
    assert got["n_pairs"] >= 40
    # Words never seen: the word model can only tie or guess; meaning carries "animal" over.
    assert base["accuracy"] < 0.65
    assert got["accuracy"] >= 0.8 and got["accuracy"] >= base["accuracy"] + 0.2


@needs_runtime
def test_meaning_column_is_one_contribution_and_survives_saving(meaning_data):
    _, later, model, _ = meaning_data
    drafts = later.head(6)[["headline", "channel"]]
    contrib = model.contributions(drafts)
    assert "headline meaning" in contrib.columns
    eta = model.predict_frame(drafts)["logit"].to_numpy()
    parts = contrib.drop(columns="typical_logit").sum(axis=1) + contrib["typical_logit"]
    np.testing.assert_allclose(parts.to_numpy(), eta, atol=1e-9)
    again = loads(dumps(model))
    np.testing.assert_allclose(again.predict_frame(drafts)["logit"].to_numpy(), eta, atol=1e-12)
    assert model.summary()["meaning"].startswith("used")


def test_meaning_needs_tests_and_its_packages(monkeypatch):
    history = _ab_tests(120, range(5), "2024-01-01", 3, "h")
    plain = history.assign(experiment_id=None)
    model = EngagementModel(n_bootstrap=0, meaning=True).fit(plain)
    assert model.meaning_column_ is None and "A/B tests" in model.meaning_note_
    monkeypatch.setattr(meaning, "missing_runtime", lambda: "headline meaning needs the package(s) onnxruntime")
    auto = EngagementModel(n_bootstrap=0, meaning="auto", cv_metric="pairwise").fit(history)
    assert auto.meaning_column_ is None and "onnxruntime" in auto.meaning_note_
    with pytest.raises(ContentlabError, match="onnxruntime"):
        EngagementModel(n_bootstrap=0, meaning=True).fit(history)
    with pytest.raises(ContentlabError, match="meaning must be"):
        EngagementModel(meaning="yes").fit(history)


@needs_runtime
def test_encoding_beside_the_folds_gives_the_same_model(meaning_data):
    """With n_jobs other than 1 the encoder runs in a child process while the folds run; the model is the
    same as with encoding in line (same embeddings, same choices)."""
    history, later, inline, _ = meaning_data
    model = EngagementModel(n_bootstrap=5, meaning=True, n_jobs=2)
    dense_names, _ = model._check_params()
    data = model._design(model._check_posts(history, "clicks"), "clicks", dense_names)
    future = model._start_encoding(data)
    assert future is not None
    rows, _ = model._meaning_rows(data)
    np.testing.assert_allclose(future.result(), meaning.embed_headlines(model._meaning_texts(data, rows)), atol=1e-6)
    beside = model.fit(history)
    assert beside.meaning_ridge_ == inline.meaning_ridge_ and beside.meaning_weight_ == inline.meaning_weight_
    np.testing.assert_allclose(beside.meaning_beta_, inline.meaning_beta_, atol=1e-8)
    np.testing.assert_allclose(beside.predict_frame(later)["logit"].to_numpy(),
                               inline.predict_frame(later)["logit"].to_numpy(), atol=1e-8)
    assert EngagementModel(meaning=True, n_jobs=1)._start_encoding(data) is None  # one core asked for: in line


def test_meaning_rows_keep_varied_tests_spread_over_time(monkeypatch):
    """Arms that cannot teach a within-test ridge (alone in their test, or sharing one headline) are not
    encoded; above the bound, whole tests are kept, spread evenly over time (every fold keeps some)."""
    from contentlab import model as model_module

    history = _ab_tests(60, range(3), "2024-01-01", 3, "v")
    model = EngagementModel(n_bootstrap=0)
    dense_names, _ = model._check_params()
    data = model._design(model._check_posts(history, "clicks"), "clicks", dense_names)
    first = data.frame.index[data.in_exp][0]
    same = data.frame["experiment_id"] == data.frame.loc[first, "experiment_id"]
    data.frame.loc[same, "headline"] = "One headline for every arm"
    rows, _ = model._meaning_rows(data)
    assert not same.to_numpy()[rows].any() and len(rows) == int(data.in_exp.sum() - same.sum())
    monkeypatch.setattr(model_module, "MEANING_MAX_ARMS", 40)
    capped, _ = model._meaning_rows(data)
    assert 36 <= len(capped) <= 44 and set(capped) <= set(rows)  # about the bound (two-arm tests)
    tests = data.frame["experiment_id"].to_numpy()
    for t in set(tests[capped]):  # whole tests
        assert np.isin(rows[tests[rows] == t], capped).all()
    # Spread over time: each time block with encoded arms keeps about its share of them.
    blocks = data.blocks
    for b in np.unique(blocks[rows]):
        share = np.mean(blocks[capped] == b)
        assert abs(share - np.mean(blocks[rows] == b)) < 0.15
