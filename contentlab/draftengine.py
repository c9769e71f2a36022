"""The draft-prediction engine: drafts as the model sees them, their joint draws, comparisons.

Two drafts (or a draft and its rewrite) share most of their features, so their
predictions are strongly correlated; the probability that one is truly better,
and the interval of a rewrite's lift, come from the uncertainty of the
*difference* of their log-odds. The model's bootstrap refits give joint draws
of every coefficient, so that difference is evaluated draw by draw (its
variance is the bootstrap variance of ``(x_a - x_b) . beta``: only the features
that differ contribute), plus the variance of words the model never saw that
one draft has and the other does not. Under the normal approximation
``P(a better than b) = Phi((eta_a - eta_b) / sd(eta_a - eta_b))``. Models
without bootstrap draws fall back to independent predictions (wider).

Scoring (:mod:`contentlab.scoring`) and best slots (:mod:`contentlab.slots`)
both stand on this module, so neither needs the other's internals.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import ContentlabError

__all__ = ["prob_better", "rate_lift", "joint_logits", "engine_for", "DraftEngine", "DraftDesign",
           "PRED_COLUMNS", "logistic"]


# ------------------------------------------------------------ probabilities

def prob_better(logit_a, logit_b, var_a, var_b, cov_ab=0.0):
    """P(true logit a > true logit b) for jointly normal estimates: Phi(diff / sd(diff)).

    ``sd(diff) = sqrt(var_a + var_b - 2 cov_ab)``. With no uncertainty at all the
    answer is 1, 0 or 0.5 (tie).
    """
    from scipy.special import ndtr

    diff = np.asarray(logit_a, dtype=float) - np.asarray(logit_b, dtype=float)
    var = np.asarray(var_a, dtype=float) + np.asarray(var_b, dtype=float) - 2 * np.asarray(cov_ab, dtype=float)
    sd = np.sqrt(np.maximum(var, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where(sd > 0, ndtr(diff / np.where(sd > 0, sd, 1.0)), np.where(diff > 0, 1.0,
                                                                                  np.where(diff < 0, 0.0, 0.5)))
    return float(p) if np.ndim(p) == 0 else p


def rate_lift(base_logit, diff, diff_sd, level: float = 0.9):
    """Relative change of the rate for a log-odds change ``diff`` (with its sd), and its interval.

    ``lift = expit(base + diff) / expit(base) - 1``; the interval maps
    ``diff +- z sd`` the same way (monotone, so it is exact for a normal ``diff``).
    """
    from scipy.special import ndtri

    z = ndtri(0.5 + level / 2)
    base = np.asarray(base_logit, dtype=float)
    d = np.asarray(diff, dtype=float)
    s = np.asarray(diff_sd, dtype=float)

    def rel(x):
        return logistic(base + x) / logistic(base) - 1.0

    out = rel(d), rel(d - z * s), rel(d + z * s)
    if np.ndim(out[0]) == 0:
        return tuple(float(v) for v in out)
    return out


def logistic(x):
    """1 / (1 + exp(-x)) elementwise, without importing scipy."""
    x = np.asarray(x, dtype=float)
    return 1.0 / (1.0 + np.exp(-x))


# ------------------------------------------------------------------ engine

class Columns(dict):
    """Named result arrays with the drafts' index (a DataFrame is built only when needed)."""

    def __init__(self, data, index):
        super().__init__(data)
        self.index = index

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame(dict(self), index=self.index)


@dataclass
class DraftDesign:
    """One batch of drafts as the model sees them."""

    X: object  # sparse design rows (shared columns) or None in the generic path
    channel: np.ndarray
    eta: np.ndarray
    draws: np.ndarray | None  # (n, B) bootstrap log-odds, or None
    unseen_n: np.ndarray
    unseen_share: np.ndarray
    outside: np.ndarray
    texts: list[str]
    pred: Columns  # predict_frame's columns
    contrib: pd.DataFrame | None = None
    dense: np.ndarray | None = None  # standardised dense columns, filled on first use
    raw: np.ndarray | None = None  # the drafts' own dense values (before bounding and shrinking), when known
    shrink: np.ndarray | None = None  # how far each draft was pulled toward its channel's typical post (0-1)
    blocks: dict | None = None  # per text block: each draft's strongest columns, filled on first use


PRED_COLUMNS = ("predicted_rate", "rate_low", "rate_high", "expected_low", "expected_high", "logit", "logit_se",
                 "impressions_assumed", "unseen_term_share", "n_unseen_terms", "n_outside_range", "far_from_history")


class DraftEngine:
    """Fast scoring through one design pass per batch, cached per fitted model.

    ``EngagementModel.predict_frame`` and ``contributions`` each featurise the
    drafts again; scoring needs both plus joint draws for comparisons, so this
    builds the design once and applies the same formulas (a test checks the
    numbers equal ``predict_frame``'s). Models without those internals go
    through the public methods instead.
    """

    _NEEDED = ("_draft_design", "glm_", "n_shared_", "boot_coef_", "typical_design_", "_column_groups",
               "term_effect_var_", "overdispersion_", "channel_impressions_", "state_", "dense_columns_",
               "interval")

    def __init__(self, model):
        self.model = model
        self._fitted = (getattr(model, "glm_", None), getattr(model, "boot_coef_", None))
        self._unseen_cache: dict[str, frozenset[str]] = {}
        self.fast = all(hasattr(model, a) for a in self._NEEDED)
        if not hasattr(model, "predict_frame"):
            raise ContentlabError("model must be a fitted contentlab EngagementModel (run contentlab learn)")
        if self.fast:
            p = model.n_shared_
            self.coef = np.asarray(model.glm_.coef_[:p], dtype=float)
            self.intercept = float(model.glm_.intercept_)
            boot = np.asarray(model.boot_coef_, dtype=float)
            self.boot_t = np.ascontiguousarray(boot[:, :-1].T) if boot.shape[0] >= 2 else None
            self.boot_b = boot[:, -1] if boot.shape[0] >= 2 else None
            self.groups = model._column_groups()
            self.channels = list(getattr(model, "channels_", []))
            self.typical = {c: np.asarray(v, dtype=float) for c, v in model.typical_design_.items()}
            st = model.state_
            self.n_dense = len(st["dense_idx"])
            self.dense_mean = np.asarray(st["mean"], dtype=float)
            self.dense_scale = np.asarray(st["scale"], dtype=float)
            self.n_terms = len(st["term_idx"])
            self.n_words = len(st["word_idx"])
            self.term_names = list(getattr(model, "term_names_", []))
            self.wording_names = list(getattr(model, "wording_names_", []))
        else:
            self.channels = list(getattr(model, "channels_", []))

    def current(self) -> bool:
        """Whether the cached arrays still belong to the model's current fit."""
        glm, boot = self._fitted
        return getattr(self.model, "glm_", None) is glm and getattr(self.model, "boot_coef_", None) is boot

    # ----------------------------------------------------------- design
    def design(self, frame: pd.DataFrame, impressions=None) -> DraftDesign:
        m = self.model
        if not self.fast:
            pf = m.predict_frame(frame, impressions=impressions) if impressions is not None else m.predict_frame(frame)
            contrib = m.contributions(frame) if hasattr(m, "contributions") else None
            n = len(frame)
            defaults = {"expected_low": pf["rate_low"], "expected_high": pf["rate_high"],
                        "impressions_assumed": np.nan, "unseen_term_share": 0.0, "n_unseen_terms": 0,
                        "n_outside_range": 0, "far_from_history": False}
            cols = {c: np.asarray(pf[c]) if c in pf else np.broadcast_to(np.asarray(defaults[c]), (n,)).copy()
                    for c in PRED_COLUMNS}
            if "logit_se" not in pf:
                raise ContentlabError("the model gives no logit_se; it cannot be used for draft comparisons")
            pred = Columns(cols, frame.index)
            channel = (frame["channel"].fillna("(none)").to_numpy(object) if "channel" in frame else
                       np.full(n, "(none)", dtype=object))
            return DraftDesign(None, channel, pred["logit"].astype(float), None,
                           pred["n_unseen_terms"].astype(float), pred["unseen_term_share"].astype(float),
                           pred["n_outside_range"].astype(float), frame["headline"].astype(str).tolist(), pred,
                           contrib)
        feat = m.featurizer_
        old_jobs = getattr(feat, "n_jobs", None)
        try:
            if len(frame) >= 2000 and old_jobs == 1:
                feat.n_jobs = None  # large batches: let the featurizer use every core
            X, channel, unseen_n, unseen_share, outside, prepared = m._draft_design(frame)
        finally:
            feat.n_jobs = old_jobs
        shrink = prepared["_shrink"].to_numpy(float) if "_shrink" in prepared else np.zeros(len(frame))
        X = X.tocsr()
        eta = np.asarray(X @ self.coef).ravel() + self.intercept
        draws = None
        if self.boot_t is not None:
            draws = np.asarray(X @ self.boot_t) + self.boot_b
        ahead = m._weeks_ahead(frame) if hasattr(m, "_weeks_ahead") else None
        pred = self._predictions(eta, draws, channel, unseen_n, unseen_share, outside, impressions, frame.index,
                                 shrink, ahead)
        pred["shrink_to_typical"] = shrink
        from .features import clean_headline

        texts = [clean_headline(t) for t in frame["headline"].tolist()]
        raw = None
        names, values = prepared.attrs.get("raw_dense", (None, None))
        if names is not None and set(m.dense_columns_) <= set(names):
            where = {c: j for j, c in enumerate(names)}
            raw = np.asarray(values, dtype=float)[:, [where[c] for c in m.dense_columns_]]
        return DraftDesign(X, channel, eta, draws, unseen_n, unseen_share, outside, texts, pred,
                           raw=raw, shrink=shrink)

    def _predictions(self, eta, draws, channel, unseen_n, unseen_share, outside, impressions, index,
                     shrink=None, weeks_ahead=None) -> pd.DataFrame:
        """predict_frame's numbers from one design pass (same formulas as EngagementModel.predict_frame)."""
        param_var = np.var(draws, axis=1, ddof=1) if draws is not None else np.zeros(len(eta))
        return Columns(
            self.model.interval_columns(eta, param_var, unseen_n, unseen_share, outside, channel, impressions,
                                        shrink=shrink, weeks_ahead=weeks_ahead),
            index,
        )

    # ---------------------------------------------------- contributions
    def _group_weights(self):
        """Sparse (n_shared x n_groups) matrix: coef_j in the column of j's group, so X @ W sums each group."""
        if getattr(self, "_W", None) is None:
            import scipy.sparse as sp

            names = list(self.groups)
            rows, cols = [], []
            for g, name in enumerate(names):
                idx = np.asarray(self.groups[name], dtype=int)
                rows.append(idx)
                cols.append(np.full(idx.size, g))
            r = np.concatenate(rows) if rows else np.zeros(0, dtype=int)
            c = np.concatenate(cols) if cols else np.zeros(0, dtype=int)
            self._W = sp.csr_matrix((self.coef[r], (r, c)), shape=(len(self.coef), len(names)))
            self._W_dense_part = self._W[: self.n_dense].toarray()
            self._W_text_part = self._W[self.n_dense:].tocsr()
            self._group_names = names
            # The typical post of each channel: its part of every group, and its logit.
            self._typical_parts = {ch: np.asarray(self._W.T @ t).ravel() for ch, t in self.typical.items()}
            self._typical_logit = {ch: float(t @ self.coef) + self.intercept for ch, t in self.typical.items()}
        return self._W

    def contributions(self, d: DraftDesign) -> pd.DataFrame:
        """Log-odds contribution per feature group against the channel's typical post."""
        if d.contrib is not None or not self.fast:
            return d.contrib if d.contrib is not None else pd.DataFrame(index=d.pred.index)
        self._group_weights()
        nd = self.n_dense
        if d.dense is None:
            d.dense = d.X[:, :nd].toarray()
        own = d.dense @ self._W_dense_part
        if self._W_text_part.shape[0]:
            own = own + np.asarray((d.X[:, nd:] @ self._W_text_part).todense())
        zero = np.zeros(len(self._group_names))
        base = np.vstack([self._typical_parts.get(c, zero) for c in d.channel]) if len(d.channel) else \
            np.zeros((0, len(self._group_names)))
        values = np.column_stack([own - base,
                                  [self._typical_logit.get(c, self.intercept) for c in d.channel]])
        frame = pd.DataFrame(values, columns=self._group_names + ["typical_logit"], index=d.pred.index)
        d.contrib = frame
        return frame

    def raw_dense(self, d: DraftDesign) -> np.ndarray | None:
        """The drafts' own dense feature values ("11 characters"), not the bounded or shrunk design's."""
        if not self.fast:
            return None
        if d.raw is not None:
            return d.raw
        if d.dense is None:
            d.dense = d.X[:, : self.n_dense].toarray()
        return d.dense * self.dense_scale + self.dense_mean

    def own_text_columns(self, d: DraftDesign, start: int, size: int):
        """The drafts' own columns of one text block (CSR), without the typical post's share.

        A far draft's design row is ``(1 - w) x + w x_typical``; the typical row holds every
        word's average, so the draft's own words are where ``x`` is non-zero. Rows pulled all the
        way (``w = 1``) have no words of their own left: they are scored as a typical post.
        """
        import scipy.sparse as sp

        sub = d.X[:, start:start + size].tocsr()
        w = np.zeros(sub.shape[0]) if d.shrink is None else np.asarray(d.shrink, dtype=float)
        far = np.flatnonzero(w > 0)
        if not len(far):
            return sub
        sub = sub.tolil()
        for i in far.tolist():
            if w[i] >= 1.0:
                sub[i] = 0.0
                continue
            typical = self.typical.get(d.channel[i])
            row = sub[i].toarray().ravel()
            if typical is not None:
                row = (row - w[i] * typical[start:start + size]) / (1.0 - w[i])
            row[np.abs(row) < 1e-9] = 0.0
            sub[i] = row
        return sp.csr_matrix(sub)

    # ------------------------------------------------------ comparisons
    def unseen_terms(self, text: str) -> frozenset[str]:
        """Unigram terms of ``text`` the model has no column for (cached: drafts repeat in rewrites)."""
        hit = self._unseen_cache.get(text)
        if hit is None:
            from .features import topic_tokens

            vocab = getattr(self.model, "term_vocabulary_", None)
            hit = frozenset() if vocab is None else frozenset(
                t for t in topic_tokens(text) if " " not in t and t not in vocab)
            if len(self._unseen_cache) > 50_000:
                self._unseen_cache.clear()
            self._unseen_cache[text] = hit
        return hit

    def diff_var(self, da: DraftDesign, ia: np.ndarray, db: DraftDesign, ib: np.ndarray) -> np.ndarray:
        """Variance of eta_a - eta_b for row pairs (ia[k] of da, ib[k] of db)."""
        ia = np.asarray(ia, dtype=int)
        ib = np.asarray(ib, dtype=int)
        tev = float(getattr(self.model, "term_effect_var_", 0.0))
        if da.draws is not None and db.draws is not None:
            var = np.var(da.draws[ia] - db.draws[ib], axis=1, ddof=1)
        else:
            se_a = np.asarray(da.pred["logit_se"], dtype=float)[ia]
            se_b = np.asarray(db.pred["logit_se"], dtype=float)[ib]
            return se_a ** 2 + se_b ** 2  # independent: no joint draws to say otherwise
        # Words the model never saw: each has an unknown effect of variance tev; the ones
        # both drafts share cancel in the difference, the others add up.
        na, nb = da.unseen_n[ia], db.unseen_n[ib]
        extra = np.zeros(len(ia))
        for k in np.flatnonzero((na > 0) | (nb > 0)):
            ua = self.unseen_terms(da.texts[ia[k]]) if na[k] > 0 else frozenset()
            ub = self.unseen_terms(db.texts[ib[k]]) if nb[k] > 0 else frozenset()
            extra[k] = len(ua ^ ub) * tev
        return var + extra


_ENGINES: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def engine_for(model) -> DraftEngine:
    try:
        eng = _ENGINES.get(model)
    except TypeError:
        eng = None
    if eng is not None and not eng.current():
        eng = None  # the model was refitted in place since
    if eng is None:
        eng = DraftEngine(model)
        try:
            _ENGINES[model] = eng
        except TypeError:
            pass
    return eng


def joint_logits(model, frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Log-odds of each row of a prepared drafts frame and their joint covariance (n x n).

    From the model's bootstrap draws (plus the shared-unseen-word term); a
    diagonal matrix of ``logit_se**2`` when the model has no draws.
    """
    eng = engine_for(model)
    d = eng.design(frame)
    n = len(frame)
    if d.draws is None:
        return d.eta, np.diag(np.asarray(d.pred["logit_se"], dtype=float) ** 2)
    cov = np.cov(d.draws, ddof=1) if n > 1 else np.var(d.draws, ddof=1).reshape(1, 1)
    cov = np.atleast_2d(cov)
    tev = float(getattr(model, "term_effect_var_", 0.0))
    if tev > 0 and np.any(d.unseen_n > 0):
        sets = [eng.unseen_terms(t) if u > 0 else frozenset() for t, u in zip(d.texts, d.unseen_n)]
        for i in range(n):
            if not sets[i]:
                continue
            for j in range(n):
                if sets[j]:
                    cov[i, j] += len(sets[i] & sets[j]) * tev
    return d.eta, cov
