"""Split impressions between drafts by Thompson sampling, and say when to stop.

Each arm (draft) has a Beta posterior on its click-through rate. The prior is a
flat Beta(1, 1) base plus ``prior_strength`` pseudo-impressions at the arm's
prior mean ``m`` (for example a model's predicted rate)::

    a = 1 + m * s + clicks
    b = 1 + (1 - m) * s + (impressions - clicks)

so ``s = 0`` is the flat prior and a large ``s`` holds the arm near ``m`` until
real results outweigh it. The prior mean is ``(1 + m s) / (2 + s)``; the base
adds one pseudo-click and one pseudo-miss to every arm alike, which shifts an
arm with 30 clicks by about 3% and keeps ``a, b >= 1`` so the posterior never
piles up at 0 or 1. :func:`fit_prior_strength` estimates ``s`` from history.

The prior learned from past tests (issue 12) uses the same Beta form, but
around the test's own level: :func:`fit_arm_spread` fits, by restricted
maximum likelihood over past tests, how far arms' log-odds sit from their
test's level (``logit_sd``), and :func:`within_test_prior` turns it into
``m`` and ``s`` at the current level (:func:`estimate_level`), so an early gap
is weighed against the gaps arms of one test usually show, and a drift of
rates between tests is followed rather than fought.

With a horizon (the impressions the test is expected to get: its budget, its
planned end, or a multiple of the user's typical past test),
:func:`worth_learning` drops from the split every arm whose results over the
impressions left could not pay back what showing it costs (a
knowledge-gradient index, see its docstring); Thompson sampling then shares
the traffic among the arms still worth learning about.

The module is pure computation (no workspace, no I/O). The vectorised core,
:func:`posterior_summary`, :func:`allocation_shares` and
:func:`split_impressions`, works on arrays of shape ``(n_experiments, n_arms)``;
:class:`ThompsonBandit` calls it with one row, and the replay benchmark calls it
with many, so both run the same code.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from numbers import Integral, Real

import numpy as np
from numpy.typing import ArrayLike
from scipy import special  # light; scipy.stats and scipy.optimize are imported where needed

from contentlab.errors import ContentlabError
from contentlab.percentages import probability

__all__ = [
    "BUDGET_TEMPER_END",
    "ArmSpread",
    "Decision",
    "ThompsonBandit",
    "allocation_shares",
    "budget_temper",
    "knowledge_gradient",
    "empirical_logits",
    "estimate_level",
    "first_split_cap",
    "fit_arm_spread",
    "fit_prior_strength",
    "paced_budget",
    "posterior_summary",
    "prior_params",
    "prob_beta_greater",
    "replay_regret_rows",
    "split_impressions",
    "stop_rule",
    "wilson_interval",
    "within_test_prior",
    "worth_learning",
]

POLICIES = ("thompson", "top_two")

# Defaults chosen by benchmarks/replay_archive.py on the earlier 70% of the
# archive's experiments only (see the docstring of ThompsonBandit).
DEFAULT_TEMPER = 4.0
DEFAULT_MIN_SHARE = 0.01
# Worst-case binomial standard error of a share estimated from n draws is
# sqrt(0.25 / n); 10,000 draws make it 0.5 percentage points (shares of 5-20%
# get 0.2-0.4 points) and keep a 50-arm allocation within 50 ms.
DEFAULT_N_DRAWS = 10_000
# Upper bound on the draws held in memory at once (elements of the draw array).
_CHUNK_ELEMENTS = 2_000_000
# The first split (before any results) gives no arm more than this share
# (and at most twice an equal share); see first_split_cap.
FIRST_SPLIT_MAX = 0.6
# Pseudo-impressions behind the history's typical rate when a test's own
# level is estimated (see within_test_prior): a quarter of one batch of
# results, so a test whose rate has drifted from the latest past tests' is
# followed after its first results. Chosen by benchmarks/replay_archive.py
# --tune on the earlier experiments (25 to 400 tried; 200 before).
DEFAULT_LEVEL_WEIGHT = 50.0
# With a budget, the temper rises from DEFAULT_TEMPER_START to BUDGET_TEMPER_END
# as it is spent (budget_temper); chosen by an earlier benchmarks/replay_archive.py
# --tune (which then also replayed budget schedules) on the earlier experiments.
DEFAULT_TEMPER_START = 2.0
BUDGET_TEMPER_END = 6.0
# worth_learning tries looking ahead over the impressions left, halved up to
# this many times (the knowledge-gradient index's best horizon, KG(*)).
LOOKAHEAD_HALVINGS = 14
# Stopping rule defaults (ThompsonBandit.decision and the replay's stop figures).
PROB_STOP = 0.95
LOSS_STOP_SHARE = 0.01


# --------------------------------------------------------------------------
# Vectorised core, shared by ThompsonBandit and the replay benchmark.
# --------------------------------------------------------------------------


def prior_params(prior_means: ArrayLike | None, prior_strength: float, n_arms: int) -> tuple[np.ndarray, np.ndarray]:
    """Beta prior (a0, b0) per arm: the flat base plus ``prior_strength`` pseudo-impressions."""
    if prior_means is None or prior_strength == 0:
        ones = np.ones(n_arms)
        return ones, ones.copy()
    m = np.asarray(prior_means, dtype=float)
    return 1.0 + m * prior_strength, 1.0 + (1.0 - m) * prior_strength


def posterior_summary(
    a: np.ndarray,
    b: np.ndarray,
    n_draws: int,
    rng: np.random.Generator,
    *,
    with_loss: bool = False,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Probability of being best (and expected loss) per arm, from joint Beta draws.

    ``a`` and ``b`` have shape ``(n_rows, n_arms)``; each row is an independent
    experiment. Returns ``prob_best`` of the same shape (rows sum to 1) and, if
    ``with_loss``, ``E[max_j p_j - p_k]`` per arm, else None.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    n_rows, n_arms = a.shape
    counts = np.zeros(n_rows * n_arms, dtype=np.int64)
    loss = np.zeros((n_rows, n_arms)) if with_loss else None
    offsets = (np.arange(n_rows) * n_arms)[:, None]
    # Draw in chunks so that 50 arms x 10,000 draws (or thousands of replayed
    # experiments) never hold more than a few tens of MB at once.
    chunk = max(1, min(n_draws, _CHUNK_ELEMENTS // max(1, n_rows * n_arms)))
    done = 0
    while done < n_draws:
        d = min(chunk, n_draws - done)
        x = rng.beta(a[:, None, :], b[:, None, :], size=(n_rows, d, n_arms))
        winner = x.argmax(axis=2)
        counts += np.bincount((winner + offsets).ravel(), minlength=n_rows * n_arms)
        if with_loss:
            loss += (x.max(axis=2, keepdims=True) - x).sum(axis=1)
        done += d
    prob = counts.reshape(n_rows, n_arms) / n_draws
    if with_loss:
        loss /= n_draws
    return prob, loss


def allocation_shares(
    prob_best: np.ndarray,
    *,
    policy: str = "thompson",
    temper: float = DEFAULT_TEMPER,
    min_share: float = DEFAULT_MIN_SHARE,
    top_two_beta: float = 0.5,
    cap: ArrayLike | None = None,
    keep: ArrayLike | None = None,
) -> np.ndarray:
    """Turn probabilities of being best, shape ``(n_rows, n_arms)``, into traffic shares.

    ``thompson``: share proportional to ``prob_best ** temper``.
    ``top_two`` (Russo, 2016): with probability ``top_two_beta`` show the arm a
    posterior draw ranks first, otherwise the first-ranked arm of a fresh draw
    that ranks a different arm first; in closed form
    ``share_i = beta p_i + (1 - beta) p_i sum_{j != i} p_j / (1 - p_j)``.

    Floors: every arm gets at least ``min(min_share, prob_best)``, so an arm
    counts as live while its probability of being best is at least
    ``min_share`` and tempering never starves it faster than plain Thompson
    sampling would. The floors are filled by water-filling: only arms below
    their floor are lifted, the others are scaled down together. The floors
    never sum to more than 1, because each is at most ``prob_best``.

    ``temper`` may be one number or one per row (shape ``(n_rows, 1)``).
    ``cap`` (one number, or an array broadcastable to the shares, each at
    least ``1 / n_arms``): no arm gets more; the excess goes to the other arms
    in proportion to their shares (see :func:`first_split_cap`).
    ``keep`` (boolean, the shape of ``prob_best``; see :func:`worth_learning`):
    arms outside it get nothing and the others share the traffic as above;
    a row whose kept arms all have probability 0 splits evenly among them.
    """
    p = np.asarray(prob_best, dtype=float)
    n_arms = p.shape[-1]
    if n_arms == 1:
        return np.ones_like(p)
    if keep is not None:
        keep = np.broadcast_to(np.asarray(keep, dtype=bool), p.shape)
        p = np.where(keep, p, 0.0)
        total = p.sum(axis=-1, keepdims=True)
        p = np.where(total > 0, p / np.where(total > 0, total, 1.0), keep / keep.sum(axis=-1, keepdims=True))
    if policy == "thompson":
        w = p ** np.asarray(temper, dtype=float)
    else:
        # A tiny smoothing keeps the challenger defined when one arm won every
        # draw (then the challenger is uniform over the others).
        eps = 1e-9
        q = (p + eps) / (1.0 + n_arms * eps)
        r = q / (1.0 - q)
        w = top_two_beta * q + (1.0 - top_two_beta) * q * (r.sum(axis=-1, keepdims=True) - r)
    w = w / w.sum(axis=-1, keepdims=True)
    floor = np.minimum(min_share, p)
    share = w
    fixed = np.zeros(p.shape, dtype=bool)
    for _ in range(n_arms):
        low = (share < floor - 1e-15) & ~fixed
        if not low.any():
            break
        fixed |= low
        free_mass = 1.0 - np.where(fixed, floor, 0.0).sum(axis=-1, keepdims=True)
        w_free = np.where(fixed, 0.0, w)
        total = w_free.sum(axis=-1, keepdims=True)
        scaled = np.divide(w_free * free_mass, total, out=np.zeros_like(w_free), where=total > 0)
        share = np.where(fixed, floor, scaled)
    if keep is not None:  # top-two would otherwise hand dropped arms a challenger's share
        share = np.where(keep, share, 0.0)
    share = share / share.sum(axis=-1, keepdims=True)
    if cap is not None:
        share = _apply_cap(share, np.broadcast_to(np.asarray(cap, dtype=float), share.shape))
    return share


def _apply_cap(share: np.ndarray, cap: np.ndarray) -> np.ndarray:
    """Lower shares above their cap to it and hand the excess to the others, in proportion to their shares."""
    cap = np.maximum(cap, 1.0 / share.shape[-1])
    fixed = np.zeros(share.shape, dtype=bool)
    for _ in range(share.shape[-1]):
        over = (share > cap + 1e-12) & ~fixed
        if not over.any():
            break
        fixed |= over
        free_mass = 1.0 - np.where(fixed, cap, 0.0).sum(axis=-1, keepdims=True)
        free = np.where(fixed, 0.0, share)
        total = free.sum(axis=-1, keepdims=True)
        # Arms with no share at all split the excess evenly.
        even = np.where(fixed, 0.0, 1.0)
        scaled = np.where(total > 0, free * free_mass / np.where(total > 0, total, 1.0),
                          even * free_mass / np.maximum(even.sum(axis=-1, keepdims=True), 1.0))
        share = np.where(fixed, cap, scaled)
    return share / share.sum(axis=-1, keepdims=True)


def first_split_cap(n_arms: int) -> float:
    """Largest share one arm may get before any results: twice an equal share, and never more than 60%.

    Before results the only evidence is the prior, and tempered sampling can
    turn a modest prior lead into nearly all the traffic (the demo once sent
    97% of its first impressions to one draft). Twice the equal share keeps
    every arm learning; 60% keeps a two- or three-arm test from opening
    lopsided. Both numbers are a rule of thumb of ours (common practice is an
    equal first split).
    """
    return float(min(FIRST_SPLIT_MAX, 2.0 / max(int(n_arms), 1)))


def split_impressions(shares: np.ndarray, n: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Integer impressions per arm that sum exactly to ``n`` per row.

    Largest-remainder rounding (ties go to the earlier arm). A row with
    ``n == 1`` instead draws the one arm to show with probability equal to its
    share, because rounding would always pick the leader and never explore.
    """
    shares = np.asarray(shares, dtype=float)
    n = np.asarray(n, dtype=np.int64)
    raw = shares * n[:, None]
    base = np.floor(raw).astype(np.int64)
    rest = n - base.sum(axis=1)
    order = np.argsort(-(raw - base), axis=1, kind="stable")
    ranks = np.empty_like(order)
    np.put_along_axis(ranks, order, np.arange(shares.shape[1])[None, :].repeat(len(n), axis=0), axis=1)
    out = base + (ranks < rest[:, None])
    single = np.flatnonzero(n == 1)
    if single.size:
        u = rng.random(single.size)
        cum = np.cumsum(shares[single], axis=1)
        pick = np.minimum((cum < u[:, None] * cum[:, -1:]).sum(axis=1), shares.shape[1] - 1)
        out[single] = 0
        out[single, pick] = 1
    return out


# --------------------------------------------------------------------------
# The prior learned from past tests: each arm's rate around its test's level.
# --------------------------------------------------------------------------


def empirical_logits(impressions: ArrayLike, clicks: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Log-odds of each arm's observed rate and its binomial variance, with half a click and miss added.

    The +0.5 keeps arms with no clicks finite (Haldane's correction, the
    usual one for empirical log-odds; Cox, 1970, "The Analysis of Binary Data").
    """
    n = np.asarray(impressions, dtype=float)
    k = np.asarray(clicks, dtype=float)
    ell = np.log((k + 0.5) / (n - k + 0.5))
    v = 1.0 / (k + 0.5) + 1.0 / (n - k + 0.5)
    return ell, v


@dataclass(frozen=True)
class ArmSpread:
    """How far arms of one test sit from each other, learned from past tests.

    ``logit_sd``: standard deviation of an arm's log-odds around its test's
    level (after the model's offsets times ``slope``, when given); ``level``:
    the typical click-through rate of the latest past tests (the start value
    of a new test's level).
    """

    logit_sd: float
    level: float
    slope: float
    n_tests: int
    n_arms: int
    loglik: float

    def to_dict(self) -> dict:
        return asdict(self)


def _grouped(codes: np.ndarray, values: np.ndarray, n_groups: int) -> np.ndarray:
    return np.bincount(codes, weights=values, minlength=n_groups)


def _within_reml(codes, ell, v, delta, n_groups, tau2: float) -> tuple[float, float]:
    """Restricted log-likelihood of the arms' log-odds with each test's level integrated out, and the slope.

    Model: ``ell_jk = level_j + slope delta_jk + u_jk + e_jk`` with
    ``u ~ N(0, tau2)`` and ``e ~ N(0, v_jk)``; a flat prior on every test's
    level gives, per test, ``-1/2 [sum log(v + tau2) + log sum w + sum w (r - r_w)^2]``
    with ``w = 1 / (v + tau2)`` and ``r`` the residual around its weighted
    mean (Harville, 1977, "Maximum likelihood approaches to variance component
    estimation"). ``slope`` is its weighted within-test regression estimate.
    """
    w = 1.0 / (v + tau2)
    sw = _grouped(codes, w, n_groups)

    def centred(x):
        return x - (_grouped(codes, w * x, n_groups) / sw)[codes]

    ell_c = centred(ell)
    slope = 0.0
    if delta is not None:
        d_c = centred(delta)
        sxx = float((w * d_c * d_c).sum())
        slope = float((w * d_c * ell_c).sum() / sxx) if sxx > 0 else 0.0
        ell_c = ell_c - slope * d_c
    ll = -0.5 * (np.log(v + tau2).sum() + np.log(sw).sum() + float((w * ell_c * ell_c).sum()))
    return float(ll), slope


def fit_arm_spread(
    experiment_ids: ArrayLike,
    impressions: ArrayLike,
    clicks: ArrayLike,
    *,
    offsets: ArrayLike | None = None,
    recent_tests: int = 50,
    bounds: tuple[float, float] = (1e-3, 3.0),
) -> ArmSpread:
    """Fit, by restricted maximum likelihood on past tests, how far arms typically sit from their test's level.

    Rows are arms of past tests (``experiment_ids`` in time order of the
    tests; tests with one arm say nothing about spread and are left out).
    Each test's level is integrated out, so a test's overall rate, and any
    drift of rates between tests, does not count as spread: only the gaps
    between arms of one test do. With ``offsets`` (each arm's predicted
    log-odds minus its test's mean), ``slope`` says how much of the model's
    predicted gaps is real (0: none, 1: all) and ``logit_sd`` is the spread
    left. ``level`` is the pooled rate of the ``recent_tests`` latest tests.
    """
    ids = group_codes(experiment_ids)
    n = np.asarray(impressions, dtype=float).ravel()
    k = np.asarray(clicks, dtype=float).ravel()
    if not (len(ids) == len(n) == len(k)) or len(n) == 0:
        raise ContentlabError("fit_arm_spread needs experiment ids, impressions and clicks of the same, non-zero length.")
    if np.any(n <= 0) or np.any(k < 0) or np.any(k > n) or not np.all(np.isfinite(n + k)):
        raise ContentlabError("fit_arm_spread needs impressions > 0 and 0 <= clicks <= impressions for every arm.")
    delta = None if offsets is None else np.asarray(offsets, dtype=float).ravel()
    if delta is not None and (delta.shape != n.shape or not np.all(np.isfinite(delta))):
        raise ContentlabError("fit_arm_spread needs one finite offset per arm.")
    size = np.bincount(ids)[ids]
    keep = size >= 2
    if not keep.any():
        raise ContentlabError("fit_arm_spread needs at least one past test with two or more arms.")
    _, codes = np.unique(ids[keep], return_inverse=True)
    n, k = n[keep], k[keep]
    delta = None if delta is None else delta[keep]
    n_groups = int(codes.max()) + 1
    ell, v = empirical_logits(n, k)

    def nll(log_tau: float) -> float:
        return -_within_reml(codes, ell, v, delta, n_groups, math.exp(2 * log_tau))[0]

    lo, hi = math.log(bounds[0]), math.log(bounds[1])
    grid = np.linspace(lo, hi, 33)
    values = np.array([nll(g) for g in grid])
    j = int(np.argmin(values))
    if j == 0:
        log_tau = lo
    else:
        from scipy import optimize

        res = optimize.minimize_scalar(
            nll, bounds=(grid[j - 1], grid[min(j + 1, len(grid) - 1)]), method="bounded", options={"xatol": 1e-5}
        )
        log_tau = float(res.x)
    tau = math.exp(log_tau)
    ll, slope = _within_reml(codes, ell, v, delta, n_groups, tau * tau)
    last = codes >= n_groups - recent_tests  # codes follow the order of first appearance
    level = float(k[last].sum() / n[last].sum())
    return ArmSpread(float(tau), float(np.clip(level, 1e-6, 1 - 1e-6)), float(slope), n_groups, int(len(n)), float(ll))


def group_codes(values: ArrayLike) -> np.ndarray:
    """Integer codes of ``values`` in order of first appearance (0, 1, ...)."""
    arr = np.asarray(values, dtype=object).ravel()
    _, first, inverse = np.unique(arr.astype(str), return_index=True, return_inverse=True)
    order = np.argsort(np.argsort(first))
    return order[inverse]


def within_test_prior(
    clicks: np.ndarray,
    impressions: np.ndarray,
    *,
    logit_sd: float,
    level: float,
    level_weight: float = DEFAULT_LEVEL_WEIGHT,
    offsets: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Beta prior ``(a0, b0)`` per arm that holds arms near their test's level, shape ``(n_rows, n_arms)``.

    The level is the test's own pooled rate so far, started at ``level`` worth
    ``level_weight`` impressions, so it follows a drift of rates between tests.
    Each arm's prior mean is the level, moved by ``offsets`` on the log-odds
    scale; its strength ``s`` matches a spread of ``logit_sd`` log-odds at
    that level (a Beta's variance ``m (1 - m) / (s + 1)`` set equal to
    ``(m (1 - m) logit_sd)^2``, the delta method), added to the flat base as
    in :func:`prior_params`. An early gap between arms is then weighed against
    how far arms of one test usually differ.
    """
    k = np.asarray(clicks, dtype=float)
    n = np.asarray(impressions, dtype=float)
    mu = estimate_level(k, n, logit_sd=logit_sd, level=level, level_weight=level_weight, offsets=offsets)
    strength = np.maximum(1.0 / (mu * (1 - mu) * logit_sd**2) - 1.0, 0.0)
    if offsets is None:
        m = np.broadcast_to(mu, k.shape)
    else:
        m = special.expit(special.logit(mu) + np.asarray(offsets, dtype=float))
    return 1.0 + m * strength, 1.0 + (1.0 - m) * strength


def estimate_level(
    clicks: np.ndarray,
    impressions: np.ndarray,
    *,
    logit_sd: float,
    level: float,
    level_weight: float = DEFAULT_LEVEL_WEIGHT,
    offsets: np.ndarray | None = None,
) -> np.ndarray:
    """A test's level (rate of its typical arm) from its arms so far, shape ``(n_rows, 1)``.

    The random-effects mean of the arms' log-odds (less their offsets):
    weights ``1 / (v_k + logit_sd^2)``, so an arm that got most of the
    traffic counts more, but never more than an arm's own spread allows; a
    pooled rate would let the leader set the level alone and pull every
    other arm toward it. The history's ``level``, worth ``level_weight``
    impressions, is one more observation of the level (the only one before
    results arrive).
    """
    ell, v = empirical_logits(impressions, clicks)
    if offsets is not None:
        ell = ell - np.asarray(offsets, dtype=float)
    seen = np.asarray(impressions) > 0
    w = np.where(seen, 1.0 / (v + logit_sd**2), 0.0)
    level = float(np.clip(level, 1e-6, 1 - 1e-6))
    w0 = level_weight * level * (1 - level)
    eta = (w0 * special.logit(level) + (w * ell).sum(axis=-1, keepdims=True)) / (w0 + w.sum(axis=-1, keepdims=True))
    return special.expit(eta)


def budget_temper(spent: ArrayLike, budget: ArrayLike, temper: float, temper_start: float) -> np.ndarray:
    """Temper that rises from ``temper_start`` to ``temper`` as the budget is spent: explore early, commit late.

    With much budget left, what is learnt now pays off on many later
    impressions, so sampling stays close to plain Thompson sampling; near the
    end there is little left to learn for, and traffic goes to the leader.
    """
    frac = np.clip(np.asarray(spent, dtype=float) / np.maximum(np.asarray(budget, dtype=float), 1.0), 0.0, 1.0)
    return temper_start + (temper - temper_start) * frac


def knowledge_gradient(mean: ArrayLike, gain_sd: ArrayLike, rival: ArrayLike) -> np.ndarray:
    """Expected rise of the best posterior mean from learning about one arm: ``E[max(mean', rival)] - max(mean, rival)``.

    The arm's posterior mean after more results is taken as normal around
    ``mean`` with standard deviation ``gain_sd``; ``rival`` is the best
    other arm's mean. Closed form ``s f(-|mean - rival| / s)`` with
    ``f(z) = z Phi(z) + phi(z)`` (Frazier, Powell and Dayanik, 2008, "A
    knowledge-gradient policy for sequential information collection", SIAM
    J. Control Optim. 47(5); from memory, checked in the tests against the
    exact beta-binomial expectation).
    """
    from scipy import stats

    s = np.maximum(np.asarray(gain_sd, dtype=float), 1e-300)
    z = -np.abs(np.asarray(mean, dtype=float) - np.asarray(rival, dtype=float)) / s
    return s * (z * stats.norm.cdf(z) + stats.norm.pdf(z))


def worth_learning(a: np.ndarray, b: np.ndarray, remaining: ArrayLike) -> np.ndarray:
    """Arms still worth showing with ``remaining`` impressions to come, shape ``(n_rows, n_arms)`` of bool.

    Showing arm ``k`` for ``m`` more impressions costs about ``m (leader's
    mean - k's mean)`` clicks now; what it can teach is worth the expected
    rise of the best mean (:func:`knowledge_gradient`, with the beta-binomial
    spread of the posterior mean after ``m`` impressions,
    ``mean (1 - mean) m / ((a + b + 1)(a + b + m))``), earned on each of the
    ``remaining - m`` impressions after. An arm is kept while, for some ``m``
    (the impressions left halved up to :data:`LOOKAHEAD_HALVINGS` times),
    its mean plus that value per impression reaches the leader's mean: the
    KG(*) index of online learning (Ryzhov, Powell and Frazier, 2012, "The
    knowledge gradient algorithm for a general class of online learning
    problems", Operations Research 60(1); from memory), which looks over
    several horizons because a single batch of clicks at 1-2% rarely changes
    the ranking on its own. The leader is always kept. Many impressions left
    keep every arm that could plausibly be best; few left keep only those
    close to the leader, so a test commits as its budget runs out.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    total = a + b
    mean = a / total
    left = np.maximum(np.asarray(remaining, dtype=float), 1.0).reshape(-1, 1)
    order = np.argsort(-mean, axis=1)
    rows = np.arange(len(mean))
    first, second = mean[rows, order[:, 0]], mean[rows, order[:, min(1, mean.shape[1] - 1)]]
    rival = np.where(np.arange(mean.shape[1])[None] == order[:, :1], second[:, None], first[:, None])
    value = np.zeros_like(mean)
    for j in range(1, LOOKAHEAD_HALVINGS + 1):
        m = np.maximum(left * 0.5**j, 1.0)
        gain_sd = np.sqrt(mean * (1 - mean) * m / ((total + 1) * (total + m)))
        value = np.maximum(value, (left - m) * knowledge_gradient(mean, gain_sd, rival) / m)
    # value >= 0, so the leader (and any arm tied with it) is always kept.
    return mean + value >= mean.max(axis=1, keepdims=True) * (1 - 1e-12)


def paced_budget(spent: ArrayLike, elapsed: ArrayLike, left: ArrayLike) -> np.ndarray:
    """The whole budget a planned end time implies: impressions so far plus the pace so far times the time left.

    ``elapsed`` and ``left`` are in one unit (seconds for a real test,
    rounds in the replay). Where nothing has been spent or no time has
    passed the pace is unknown and the answer is NaN (no budget yet).
    """
    spent = np.asarray(spent, dtype=float)
    elapsed = np.asarray(elapsed, dtype=float)
    left = np.maximum(np.asarray(left, dtype=float), 0.0)
    known = (spent > 0) & (elapsed > 0)
    pace = np.divide(spent, elapsed, out=np.zeros_like(spent * elapsed), where=known)
    return np.where(known, spent + pace * left, np.nan)


def stop_rule(prob: np.ndarray, loss: np.ndarray, mean: np.ndarray,
              prob_threshold: float = PROB_STOP, loss_share: float = LOSS_STOP_SHARE) -> tuple[np.ndarray, np.ndarray]:
    """Rows whose leader would be named now (probability of being best, or expected loss small), and the leader.

    The rule of :meth:`ThompsonBandit.decision`, on arrays of shape (rows, arms).
    """
    lead = prob.argmax(axis=1)
    rows = np.arange(len(prob))
    stop = (prob[rows, lead] >= prob_threshold) | (loss[rows, lead] < loss_share * mean[rows, lead])
    return stop, lead


def replay_regret_rows(
    p: np.ndarray,
    budget: np.ndarray,
    a0: np.ndarray | None,
    b0: np.ndarray | None,
    rng: np.random.Generator,
    *,
    batch: int | np.ndarray,
    n_draws: int,
    policy: str = "thompson",
    temper: float = DEFAULT_TEMPER,
    min_share: float = DEFAULT_MIN_SHARE,
    trace: list | None = None,
    spread: Mapping | None = None,
    offsets: np.ndarray | None = None,
    temper_start: float | None = None,
    first_cap: float | None = None,
    cap_lift: bool = False,
    stops: dict | None = None,
    round_sizes: np.ndarray | None = None,
    paced: bool = False,
    commit_on_stop: bool = False,
    horizon: ArrayLike | None = None,
) -> np.ndarray:
    """Replay past tests whose arm rates ``p`` are taken as the truth; clicks lost per test.

    Rows are tests with the same number of arms (``p``, ``a0``, ``b0`` of shape
    (tests, arms)); each spends its ``budget`` of impressions in rounds of
    ``batch`` (one number, or one per test), allocated as the bandit would from
    Beta(a0 + clicks, b0 + misses) and answered by binomial clicks. Regret is
    the expected clicks lost against always showing the best arm. Shared by the
    archive replay benchmark and by the prior checks on a user's own tests,
    so both measure the same policy as :class:`ThompsonBandit`.

    ``spread`` (``logit_sd``, ``level``, ``level_weight``): the prior learned
    from past tests (:func:`within_test_prior`, with the model's ``offsets``
    per arm if given) replaces ``a0, b0``. ``temper_start``: the temper rises
    from it to ``temper`` as the budget is spent (:func:`budget_temper`).
    ``first_cap``: the first split (before results) is plain Thompson
    sampling, each arm getting its prior probability of being best, and no
    arm more than this share (with ``cap_lift``, except up to that probability).
    ``stops``: filled with ``impressions`` used when the stopping rule first
    fires (the budget if never) and ``named``, the arm it names (else the
    leader at the end). ``round_sizes`` (tests, rounds): impressions of each
    round instead of ``batch`` (traffic whose pace varies; each row sums to
    its budget). ``paced`` (with ``temper_start``): the budget the temper
    sees is not the real one but :func:`paced_budget` after each round, as
    with a planned end time (``experiment new --ends-at``): the rounds are the
    clock, the pace so far times the rounds left the impressions still to come.
    ``commit_on_stop``: while the stopping rule fires, the round goes wholly
    to the arm it names (:meth:`ThompsonBandit.committed_arm`).
    ``horizon`` (one number or one per test): the impressions each test is
    expected to get in all (``ThompsonBandit.horizon``); once results are in,
    only arms :func:`worth_learning` with the impressions left (at least this
    round's) share the round. With ``paced`` the horizon is the one the pace
    so far implies instead, as for ``temper_start``.
    """
    gap = p.max(axis=1, keepdims=True) - p
    if horizon is not None:
        horizon = np.broadcast_to(np.asarray(horizon, dtype=float), budget.shape)
    batch = np.broadcast_to(np.asarray(batch, dtype=np.int64), budget.shape)
    if round_sizes is not None:
        round_sizes = np.asarray(round_sizes, dtype=np.int64)
        n_rounds = (np.cumsum(round_sizes[:, ::-1], axis=1) > 0).sum(axis=1)  # up to the last round with traffic
    else:
        n_rounds = -(-budget.astype(np.int64) // np.maximum(batch, 1))
    done_rounds = 0
    remaining = budget.astype(np.int64).copy()
    impressions = np.zeros_like(p)
    clicks = np.zeros_like(p)
    regret = np.zeros(len(p))
    track = stops is not None
    if track:
        stop_at = np.full(len(p), -1, dtype=np.int64)
        named = np.full(len(p), -1, dtype=np.int64)
    while True:
        act = np.flatnonzero(remaining > 0)
        if act.size == 0:
            break
        if round_sizes is None:
            n = np.minimum(batch[act], remaining[act])
        else:
            n = np.minimum(round_sizes[act, done_rounds], remaining[act])
        if spread is not None:
            off = None if offsets is None else offsets[act]
            pa0, pb0 = within_test_prior(clicks[act], impressions[act], logit_sd=spread["logit_sd"],
                                         level=spread["level"], level_weight=spread["level_weight"], offsets=off)
        else:
            pa0, pb0 = a0[act], b0[act]
        a = pa0 + clicks[act]
        b = pb0 + (impressions[act] - clicks[act])
        prob, loss = posterior_summary(a, b, n_draws, rng, with_loss=track or commit_on_stop)
        spent = impressions[act].sum(axis=1)
        if track or commit_on_stop:
            now, lead = stop_rule(prob, loss, a / (a + b))
            now &= spent > 0
        if track:
            fire = now & (stop_at[act] < 0)
            stop_at[act[fire]] = spent[fire]
            named[act[fire]] = lead[fire]
        # With a planned end time the whole budget is the one the pace so far implies (unknown before any spending).
        paced_total = paced_budget(spent, done_rounds, n_rounds[act] - done_rounds) if paced else None
        t = temper
        if temper_start is not None:
            planned = budget[act] if paced_total is None else np.where(np.isfinite(paced_total), paced_total, 1.0)
            t = budget_temper(spent, planned, temper, temper_start)[:, None]
        keep = None
        if horizon is not None:
            expected = horizon[act] if paced_total is None else np.where(np.isfinite(paced_total), paced_total,
                                                                          horizon[act])
            keep = worth_learning(a, b, np.maximum(expected - spent, n))
            keep[spent == 0] = True
        cap = None
        if first_cap is not None:
            fresh = spent == 0
            cap = np.where(fresh[:, None], first_cap, 1.0)
            if cap_lift:
                cap = np.maximum(cap, prob)
            t = np.where(fresh[:, None], 1.0, t)
        share = allocation_shares(prob, policy=policy, temper=t, min_share=min_share, cap=cap, keep=keep)
        if commit_on_stop and now.any():
            share[now] = np.eye(p.shape[1])[lead[now]]
        alloc = split_impressions(share, n, rng)
        if trace is not None:
            trace.append(alloc[0].tolist())
        impressions[act] += alloc
        clicks[act] += rng.binomial(alloc, p[act])
        remaining[act] -= n
        regret[act] += (alloc * gap[act]).sum(axis=1)
        done_rounds += 1
    if track:
        never = stop_at < 0
        if never.any():
            if spread is not None:
                pa0, pb0 = within_test_prior(clicks[never], impressions[never], logit_sd=spread["logit_sd"],
                                             level=spread["level"], level_weight=spread["level_weight"],
                                             offsets=None if offsets is None else offsets[never])
            else:
                pa0, pb0 = a0[never], b0[never]
            a = pa0 + clicks[never]
            b = pb0 + impressions[never] - clicks[never]
            prob, _ = posterior_summary(a, b, n_draws, rng)
            named[never] = prob.argmax(axis=1)
            stop_at[never] = budget[never]
        stops["impressions"] = stop_at
        stops["named"] = named
        stops["fired"] = ~never
    return regret


# --------------------------------------------------------------------------
# The bandit.
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class Decision:
    """Whether to stop an experiment now, and why, in plain language."""

    leader: str
    prob_best: float
    expected_loss: float
    loss_threshold: float
    stop: bool
    reason: str
    further_impressions: int | None = None
    warnings: tuple[str, ...] = ()


class ThompsonBandit:
    """Thompson sampling over Beta posteriors of click-through rates.

    Shares of the next impressions follow the probability that each arm is
    best, ``P_k = P(p_k = max_j p_j | data)``, estimated from ``n_draws`` joint
    posterior draws; then tempered (``P_k ** temper``, renormalised) and
    floored (each arm gets at least ``min(min_share, P_k)``).

    Parameters
    ----------
    arms : list of str
        Unique arm names (drafts), at least one.
    prior_means : sequence of float in (0, 1) or mapping arm -> float, default None
        Prior mean rate per arm, e.g. a model's predicted click-through rate.
    prior_strength : float >= 0, default 0.0
        Pseudo-impressions the prior is worth (``s`` in the module docstring);
        0 is the flat Beta(1, 1) prior. See :func:`fit_prior_strength`.
    policy : {"thompson", "top_two"}, default "thompson"
        ``thompson`` maximises clicks during the test. ``top_two`` (top-two
        Thompson sampling, Russo 2016) gives about half the traffic to the
        leader and half to its closest challenger, to find the best arm with
        fewer impressions at the cost of more clicks lost during the test.
    top_two_beta : float in (0, 1), default 0.5
        Leader's share of draws under ``top_two``.
    min_share : float in [0, 1], default 0.01
        Floor share of each live arm (one whose probability of being best is
        at least ``min_share``); other arms keep at least their probability
        of being best. It stops tempering from starving an arm after an
        unlucky start, and it costs clicks: in the replay of the earlier 70%
        of the archive's experiments (benchmarks/replay_archive.py, temper 4)
        regret was 0.299 of the equal split's with no floor, 0.310 with 0.01
        and 0.325 with 0.02; 0.01 is the largest floor tried that costs at
        most 0.015. The floors never add up to more than 1.
    temper : float > 0, default 4.0
        Exponent on the probability of being best; 1 is plain Thompson
        sampling, above 1 moves traffic to the leader sooner, which loses
        fewer clicks within a fixed budget. In the same replay regret fell
        from 0.394 of the equal split's at 1 to 0.325 at 2 and 0.310 at 4,
        then stayed flat (0.307 at 6, 0.310 at 8); 4 is the smallest value
        within 0.005 of the best. Used by ``thompson`` only.
    discount : float in (0, 1], default 1.0
        Each call to :meth:`update` or :meth:`update_many` first multiplies
        every arm's past results by ``discount`` (the prior is not
        discounted), so results ``k`` rounds old weigh ``discount ** k``. Use
        below 1 when rates drift; feed one round's results in one
        :meth:`update_many` call.
    n_draws : int >= 100, default 10,000
        Posterior draws per estimate; the binomial standard error of a share
        is at most ``0.5 / sqrt(n_draws)``, i.e. 0.5 percentage points.
    logit_sd : float > 0 or None, default None
        The prior learned from past tests (:func:`fit_arm_spread`): each
        arm's log-odds sit about ``logit_sd`` from its test's level. When
        given, it replaces ``prior_means``/``prior_strength`` with
        :func:`within_test_prior`, so early gaps are judged against how far
        arms of one test usually differ.
    level : float in (0, 1) or None, default None
        Typical rate of past tests, the level before results (needed with ``logit_sd``).
    level_weight : float >= 0, default 50
        Impressions the history's ``level`` is worth against the test's own results.
    prior_offsets : sequence of float or None, default None
        Expected log-odds gap of each arm from the test's level (the model's
        predicted differences times their validated slope), with ``logit_sd``.
    budget : int > 0 or None, default None
        Total impressions the test will get. When given, the temper rises
        from ``temper_start`` to ``temper`` as it is spent: more exploring
        while much budget remains, committing as it runs out.
    temper_start : float > 0, default 2.0
        Temper at the start of a budget (used only with ``budget``).
    first_cap : float in (0, 1] or None, default None
        Before any results, allocate by plain Thompson sampling (temper 1) and
        give no arm more than this share (see :func:`first_split_cap`); None:
        no cap and the usual temper (the former behaviour).
    cap_lift : bool, default False
        Let an arm exceed ``first_cap`` up to its prior probability of being
        best (for a prior validated on past tests).
    horizon : float > 0 or None, default None
        Impressions the test is expected to get in all (its budget, its
        planned end, or a multiple of the typical past test's). Once results
        are in, only the arms :func:`worth_learning` with the impressions left
        share the traffic; the others get none (and no floor). None: every
        arm stays in the split.
    commit_on_stop : bool, default False
        While the stopping rule of :meth:`decision` (default thresholds)
        fires, every impression goes to the arm it names, as when the test is
        stopped and the winner shown: the floors and exploration would only
        lose clicks on arms the rule has ruled out.
    random_state : int, numpy Generator or None, default None
        An int makes every answer a function of the seed and the number of
        updates so far (asking twice gives the same split); a Generator is
        used as a stream; None draws fresh entropy.

    Attributes
    ----------
    impressions_ : ndarray of shape (n_arms,)
        Recorded impressions per arm (after discounting).
    clicks_ : ndarray of shape (n_arms,)
        Recorded clicks per arm (after discounting).
    n_updates_ : int
        Number of update calls so far.
    """

    def __init__(
        self,
        *,
        arms: Sequence[str],
        prior_means: Sequence[float] | Mapping[str, float] | None = None,
        prior_strength: float = 0.0,
        policy: str = "thompson",
        top_two_beta: float = 0.5,
        min_share: float = DEFAULT_MIN_SHARE,
        temper: float = DEFAULT_TEMPER,
        discount: float = 1.0,
        n_draws: int = DEFAULT_N_DRAWS,
        logit_sd: float | None = None,
        level: float | None = None,
        level_weight: float = DEFAULT_LEVEL_WEIGHT,
        prior_offsets: Sequence[float] | None = None,
        budget: int | None = None,
        temper_start: float = DEFAULT_TEMPER_START,
        first_cap: float | None = None,
        cap_lift: bool = False,
        horizon: float | None = None,
        commit_on_stop: bool = False,
        random_state: int | np.random.Generator | None = None,
    ) -> None:
        self.arms = arms
        self.prior_means = prior_means
        self.prior_strength = prior_strength
        self.policy = policy
        self.top_two_beta = top_two_beta
        self.min_share = min_share
        self.temper = temper
        self.discount = discount
        self.n_draws = n_draws
        self.logit_sd = logit_sd
        self.level = level
        self.level_weight = level_weight
        self.prior_offsets = prior_offsets
        self.budget = budget
        self.temper_start = temper_start
        self.first_cap = first_cap
        self.cap_lift = cap_lift
        self.horizon = horizon
        self.commit_on_stop = commit_on_stop
        self.random_state = random_state

    # ---- validation -----------------------------------------------------

    def _check_params(self) -> list[str]:
        arms = self.arms
        if isinstance(arms, str) or not isinstance(arms, Sequence) or len(arms) == 0:
            raise ContentlabError(f"arms must be a non-empty list of arm names; got {arms!r}.")
        arms = list(arms)
        if not all(isinstance(x, str) and x.strip() for x in arms):
            raise ContentlabError(f"Every arm name must be a non-empty string; got {arms!r}.")
        if len(set(arms)) != len(arms):
            dupes = sorted({x for x in arms if arms.count(x) > 1})
            raise ContentlabError(f"Arm names must be unique; repeated: {', '.join(dupes)}.")
        _check_real("prior_strength", self.prior_strength, low=0.0)
        if self.prior_strength > 0 and self.prior_means is None:
            raise ContentlabError(
                f"prior_strength is {self.prior_strength} but prior_means is None; "
                "give a prior mean rate per arm, or set prior_strength=0 for a flat prior."
            )
        if self.policy not in POLICIES:
            raise ContentlabError(f"policy must be one of {', '.join(POLICIES)}; got {self.policy!r}.")
        _check_real("top_two_beta", self.top_two_beta, low=0.0, high=1.0, open_low=True, open_high=True)
        _check_real("temper", self.temper, low=0.0, open_low=True)
        _check_real("discount", self.discount, low=0.0, high=1.0, open_low=True)
        _check_real("min_share", self.min_share, low=0.0, high=1.0)
        if isinstance(self.n_draws, bool) or not isinstance(self.n_draws, Integral) or self.n_draws < 100:
            raise ContentlabError(f"n_draws must be an integer of at least 100; got {self.n_draws!r}.")
        if self.logit_sd is not None:
            _check_real("logit_sd", self.logit_sd, low=0.0, open_low=True)
            _check_real("level", self.level, low=0.0, high=1.0, open_low=True, open_high=True)
            _check_real("level_weight", self.level_weight, low=0.0)
            if self.prior_offsets is not None:
                off = np.asarray(self.prior_offsets, dtype=float)
                if off.shape != (len(arms),) or not np.all(np.isfinite(off)):
                    raise ContentlabError(f"prior_offsets needs one finite log-odds gap per arm; got {self.prior_offsets!r}.")
        elif self.prior_offsets is not None:
            raise ContentlabError("prior_offsets needs logit_sd (the spread of arms around their test's level).")
        if self.budget is not None:
            b = self.budget
            if isinstance(b, bool) or not isinstance(b, Integral) or b < 1:
                raise ContentlabError(f"budget must be a whole number of impressions, at least 1; got {b!r}.")
        _check_real("temper_start", self.temper_start, low=0.0, open_low=True)
        if self.first_cap is not None:
            _check_real("first_cap", self.first_cap, low=0.0, high=1.0, open_low=True)
        if self.horizon is not None:
            _check_real("horizon", self.horizon, low=0.0, open_low=True)
        for name in ("cap_lift", "commit_on_stop"):
            if not isinstance(getattr(self, name), (bool, np.bool_)):
                raise ContentlabError(f"{name} must be True or False; got {getattr(self, name)!r}.")
        rs = self.random_state
        if not (rs is None or isinstance(rs, np.random.Generator)):
            if isinstance(rs, bool) or not isinstance(rs, Integral) or rs < 0:
                raise ContentlabError(
                    f"random_state must be a non-negative integer, a numpy Generator or None; got {rs!r}."
                )
        return arms

    def _prior_means_array(self, arms: list[str]) -> np.ndarray | None:
        if self.prior_means is None:
            return None
        pm = self.prior_means
        if isinstance(pm, Mapping):
            missing = [a for a in arms if a not in pm]
            if missing:
                raise ContentlabError(f"prior_means has no value for arm(s): {', '.join(missing)}.")
            values = [pm[a] for a in arms]
        else:
            values = list(pm)
            if len(values) != len(arms):
                raise ContentlabError(
                    f"prior_means has {len(values)} values but there are {len(arms)} arms; give one per arm."
                )
        m = np.asarray(values, dtype=float)
        if not np.all((m > 0) & (m < 1)):
            raise ContentlabError(f"prior_means must be rates strictly between 0 and 1; got {values!r}.")
        return m

    def _state(self) -> list[str]:
        """Validate parameters and create empty results on first use."""
        arms = self._check_params()
        if not hasattr(self, "impressions_"):
            self.impressions_ = np.zeros(len(arms))
            self.clicks_ = np.zeros(len(arms))
            self.n_updates_ = 0
        elif len(self.impressions_) != len(arms):
            raise ContentlabError(
                "arms changed after results were recorded; create a new bandit for a different set of arms."
            )
        return arms

    def _rng(self) -> np.random.Generator:
        rs = self.random_state
        if isinstance(rs, np.random.Generator):
            return rs
        if rs is None:
            return np.random.default_rng()
        return np.random.default_rng([int(rs), self.n_updates_])

    # ---- learning -------------------------------------------------------

    def update(self, arm: str, impressions: int, clicks: int) -> ThompsonBandit:
        """Add one arm's new results (increments, not running totals); returns self."""
        return self.update_many({arm: (impressions, clicks)})

    def update_many(self, results: Mapping[str, tuple[int, int]]) -> ThompsonBandit:
        """Add one round of results, ``{arm: (impressions, clicks)}``, all or nothing."""
        arms = self._state()
        index = {a: i for i, a in enumerate(arms)}
        add_n = np.zeros(len(arms))
        add_k = np.zeros(len(arms))
        for arm, pair in results.items():
            if arm not in index:
                raise ContentlabError(f"Unknown arm {arm!r}; the arms are: {', '.join(arms)}.")
            try:
                n, k = pair
            except (TypeError, ValueError):
                raise ContentlabError(
                    f"Results for arm {arm!r} must be a pair (impressions, clicks); got {pair!r}."
                ) from None
            for name, v in (("impressions", n), ("clicks", k)):
                if isinstance(v, bool) or not isinstance(v, Integral) or v < 0:
                    raise ContentlabError(f"{name} for arm {arm!r} must be a non-negative integer; got {v!r}.")
            if k > n:
                raise ContentlabError(
                    f"Arm {arm!r} has {k} clicks but only {n} impressions; clicks cannot exceed impressions."
                )
            add_n[index[arm]] += int(n)
            add_k[index[arm]] += int(k)
        self.impressions_ = self.impressions_ * self.discount + add_n
        self.clicks_ = self.clicks_ * self.discount + add_k
        self.n_updates_ += 1
        return self

    # ---- posterior ------------------------------------------------------

    def prior_ab(self) -> tuple[np.ndarray, np.ndarray]:
        """The Beta prior ``(a0, b0)`` per arm now (the within-test prior moves with the test's level)."""
        arms = self._state()
        if self.logit_sd is not None:
            off = None if self.prior_offsets is None else np.asarray(self.prior_offsets, dtype=float)[None]
            a0, b0 = within_test_prior(
                self.clicks_[None], self.impressions_[None], logit_sd=float(self.logit_sd), level=float(self.level),
                level_weight=float(self.level_weight), offsets=off,
            )
            return a0[0], b0[0]
        return prior_params(self._prior_means_array(arms), float(self.prior_strength), len(arms))

    def _ab(self) -> tuple[list[str], np.ndarray, np.ndarray]:
        arms = self._state()
        a0, b0 = self.prior_ab()
        return arms, a0 + self.clicks_, b0 + (self.impressions_ - self.clicks_)

    def current_temper(self) -> float:
        """The temper of the next allocation: fixed, or rising with the budget spent."""
        self._state()
        if self.budget is None or self.policy != "thompson":
            return float(self.temper)
        return float(budget_temper(self.impressions_.sum(), self.budget, float(self.temper), float(self.temper_start)))

    def posterior_params(self) -> dict[str, tuple[float, float]]:
        """Beta posterior ``(a, b)`` per arm; the posterior mean is ``a / (a + b)``."""
        arms, a, b = self._ab()
        return {arm: (float(x), float(y)) for arm, x, y in zip(arms, a, b)}

    def _summary(self, with_loss: bool) -> tuple[list[str], np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
        arms, a, b = self._ab()
        prob, loss = posterior_summary(a[None], b[None], int(self.n_draws), self._rng(), with_loss=with_loss)
        return arms, a, b, prob[0], None if loss is None else loss[0]

    def prob_best(self) -> dict[str, float]:
        """Posterior probability that each arm has the highest click-through rate."""
        arms, _, _, prob, _ = self._summary(False)
        return dict(zip(arms, prob.tolist()))

    def expected_loss(self) -> dict[str, float]:
        """Per arm, ``E[max_j p_j - p_arm]``: the rate given up by choosing it now (Scott, 2015)."""
        arms, _, _, _, loss = self._summary(True)
        return dict(zip(arms, loss.tolist()))

    def impressions_left(self, n_impressions: int = 1) -> float | None:
        """Impressions still expected after the results so far (at least the next ``n_impressions``); None without a horizon."""
        self._state()
        if self.horizon is None:
            return None
        return float(max(float(self.horizon) - float(self.impressions_.sum()), n_impressions, 1))

    def worth_learning(self, n_impressions: int = 1) -> dict[str, bool]:
        """Per arm, whether it stays in the next split (:func:`worth_learning`; every arm without a horizon or results)."""
        arms, a, b = self._ab()
        keep = self._keep(a, b, n_impressions)
        return dict(zip(arms, [True] * len(arms) if keep is None else keep[0].tolist()))

    def _keep(self, a: np.ndarray, b: np.ndarray, n_impressions: int) -> np.ndarray | None:
        """The arms still worth learning about, shape (1, n_arms); None (all of them) without a horizon or results."""
        if self.horizon is None or self.impressions_.sum() == 0:
            return None
        return worth_learning(a[None], b[None], [self.impressions_left(n_impressions)])

    def _shares(self, n_impressions: int = 1) -> tuple[list[str], np.ndarray, np.random.Generator]:
        arms, a, b = self._ab()
        rng = self._rng()
        commit = bool(self.commit_on_stop)
        prob, loss = posterior_summary(a[None], b[None], int(self.n_draws), rng, with_loss=commit)
        if commit and self.impressions_.sum() > 0:
            fire, lead = stop_rule(prob, loss, (a / (a + b))[None])
            if fire[0]:
                return arms, np.eye(len(arms))[lead], rng
        cap = None
        temper = self.current_temper()
        if self.first_cap is not None and self.impressions_.sum() == 0:
            # Before results: plain Thompson sampling (each arm's prior
            # probability of being best), capped unless the prior was validated.
            temper = 1.0
            cap = np.full(prob.shape, float(self.first_cap))
            if self.cap_lift:
                cap = np.maximum(cap, prob)
        keep = self._keep(a, b, n_impressions)
        share = allocation_shares(
            prob,
            policy=self.policy,
            temper=temper,
            min_share=float(self.min_share),
            top_two_beta=float(self.top_two_beta),
            cap=cap,
            keep=keep,
        )
        return arms, share, rng

    def settled_arm(self) -> str | None:
        """The arm that gets every next impression once results are in (committed on stop, or the only one still
        worth learning about); else None."""
        arms = self._state()
        if self.impressions_.sum() == 0:
            return None
        _, share, _ = self._shares()
        top = int(np.argmax(share[0]))
        return arms[top] if share[0, top] == 1.0 else None

    def committed_arm(self) -> str | None:
        """With ``commit_on_stop``, the arm that gets every next impression because the stopping rule fires; else None."""
        return self.settled_arm() if self.commit_on_stop else None

    def shares(self) -> dict[str, float]:
        """Fraction of the next impressions each arm should get (sums to 1)."""
        arms, share, _ = self._shares()
        return dict(zip(arms, share[0].tolist()))

    def allocate(self, n_impressions: int) -> dict[str, int]:
        """Impressions per arm for the next ``n_impressions``, summing exactly to it.

        With ``n_impressions == 1`` (a channel that shows one draft at a time)
        one arm gets 1, drawn with probability equal to its share.
        """
        n = n_impressions
        if isinstance(n, bool) or not isinstance(n, Integral) or n < 0:
            raise ContentlabError(f"n_impressions must be a non-negative integer; got {n!r}.")
        arms, share, rng = self._shares(int(n))
        counts = split_impressions(share, np.array([int(n)]), rng)[0]
        return dict(zip(arms, counts.tolist()))

    def choose(self) -> str:
        """The one arm to post next, for channels without traffic splitting."""
        return next(arm for arm, c in self.allocate(1).items() if c == 1)

    # ---- stopping -------------------------------------------------------

    def decision(self, prob_threshold: float = PROB_STOP, loss_threshold: float | None = None) -> Decision:
        """Recommend stopping when the leader is very likely best or choosing it now costs little.

        Stops when the leader's probability of being best is at least
        ``prob_threshold`` or its expected loss is below ``loss_threshold``
        (default: 1% of the leader's posterior mean rate). Otherwise gives a
        rough count of further impressions, assuming the posterior spread
        shrinks like ``1/sqrt(impressions)`` and the current gap holds.
        """
        _check_real("prob_threshold", prob_threshold, low=0.5, high=1.0, open_high=True)
        if loss_threshold is not None:
            _check_real("loss_threshold", loss_threshold, low=0.0, open_low=True)
        arms, a, b, prob, loss = self._summary(True)
        lead = int(np.argmax(prob))
        mean = a / (a + b)
        thr = float(LOSS_STOP_SHARE * mean[lead]) if loss_threshold is None else float(loss_threshold)
        pb, el = float(prob[lead]), float(loss[lead])
        name = arms[lead]
        warnings = []
        if self.clicks_[lead] < 30:
            warnings.append(
                f"{name} has {self.clicks_[lead]:.0f} clicks; with fewer than about 30 clicks per arm "
                "early leads often reverse (common practice)."
            )
        total = float(self.impressions_.sum())
        if total == 0:
            return Decision(name, pb, el, thr, False, "Keep testing: no results recorded yet.", None, tuple(warnings))
        if len(arms) == 1:
            return Decision(name, 1.0, 0.0, thr, True, f"Stop: {name} is the only arm.", None, tuple(warnings))
        if pb >= prob_threshold:
            reason = (
                f"Stop: {name} has a {probability(pb, 1)} probability of being best "
                f"(at least {prob_threshold:.0%})."
            )
            return Decision(name, pb, el, thr, True, reason, None, tuple(warnings))
        if el < thr:
            reason = (
                f"Stop: choosing {name} now gives up an expected {100 * el:.4f} percentage points of "
                f"click-through rate, below the threshold of {100 * thr:.4f}; the arms left are too close to matter."
            )
            return Decision(name, pb, el, thr, True, reason, None, tuple(warnings))
        # Rough sample still needed: loss and posterior sd both shrink about
        # like 1/sqrt(n), so reaching a target that is f times smaller needs
        # about f**2 times the impressions so far.
        var = a * b / ((a + b) ** 2 * (a + b + 1))
        others = np.delete(np.arange(len(arms)), lead)
        runner = others[np.argmax(mean[others])]
        gap = mean[lead] - mean[runner]
        factor = (el / thr) ** 2
        if gap > 0:
            z = special.ndtri(prob_threshold)  # the standard normal quantile
            factor = min(factor, (z * math.sqrt(var[lead] + var[runner]) / gap) ** 2)
        further = int(math.ceil(max(factor - 1.0, 0.01) * total))
        reason = (
            f"Keep testing: {name} leads with a {probability(pb, 1)} probability of being best (stop at "
            f"{prob_threshold:.0%}), and choosing it now would give up an expected {100 * el:.4f} percentage "
            f"points of click-through rate (stop below {100 * thr:.4f}). Roughly {further:,} more impressions "
            "are likely needed, if the current gap holds."
        )
        return Decision(name, pb, el, thr, False, reason, further, tuple(warnings))

    # ---- persistence ----------------------------------------------------

    def to_dict(self) -> dict:
        """Parameters and recorded results as plain JSON-ready values."""
        arms = self._state()
        if isinstance(self.random_state, np.random.Generator):
            raise ContentlabError("A bandit seeded with a numpy Generator cannot be saved; use an integer random_state.")
        pm = self.prior_means
        if pm is not None:
            pm = self._prior_means_array(arms).tolist()
        return {
            "format": "contentlab.bandit/1",
            "params": {
                "arms": arms,
                "prior_means": pm,
                "prior_strength": float(self.prior_strength),
                "policy": self.policy,
                "top_two_beta": float(self.top_two_beta),
                "min_share": float(self.min_share),
                "temper": float(self.temper),
                "discount": float(self.discount),
                "n_draws": int(self.n_draws),
                "logit_sd": None if self.logit_sd is None else float(self.logit_sd),
                "level": None if self.level is None else float(self.level),
                "level_weight": float(self.level_weight),
                "prior_offsets": None if self.prior_offsets is None else [float(x) for x in self.prior_offsets],
                "budget": None if self.budget is None else int(self.budget),
                "temper_start": float(self.temper_start),
                "first_cap": None if self.first_cap is None else float(self.first_cap),
                "cap_lift": bool(self.cap_lift),
                "horizon": None if self.horizon is None else float(self.horizon),
                "commit_on_stop": bool(self.commit_on_stop),
                "random_state": None if self.random_state is None else int(self.random_state),
            },
            "state": {
                "impressions": self.impressions_.tolist(),
                "clicks": self.clicks_.tolist(),
                "n_updates": int(self.n_updates_),
            },
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> ThompsonBandit:
        """Rebuild a bandit saved by :meth:`to_dict`."""
        if not isinstance(data, Mapping) or data.get("format") != "contentlab.bandit/1":
            raise ContentlabError("Not a saved contentlab bandit (expected format 'contentlab.bandit/1').")
        try:
            bandit = cls(**data["params"])
            arms = bandit._check_params()
            state = data["state"]
            n = np.asarray(state["impressions"], dtype=float)
            k = np.asarray(state["clicks"], dtype=float)
            n_updates = int(state["n_updates"])
        except (KeyError, TypeError, ValueError) as exc:
            raise ContentlabError(f"The saved bandit is incomplete or damaged ({exc}); record its results again.") from None
        if n.shape != (len(arms),) or k.shape != n.shape or np.any(k < 0) or np.any(k > n + 1e-9):
            raise ContentlabError("The saved bandit's results do not match its arms; record its results again.")
        bandit.impressions_, bandit.clicks_, bandit.n_updates_ = n, k, n_updates
        return bandit


# --------------------------------------------------------------------------
# Pure statistics.
# --------------------------------------------------------------------------


def wilson_interval(
    clicks: ArrayLike, impressions: ArrayLike, confidence: float = 0.95
) -> tuple[float, float] | tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a click-through rate; (0, 1) when there are no impressions.

    Accepts scalars or arrays; returns ``(low, high)`` of the same shape.
    Preferred to the normal interval because it stays inside [0, 1] and keeps
    its coverage at the low rates and small counts of early results.
    """
    _check_real("confidence", confidence, low=0.0, high=1.0, open_low=True, open_high=True)
    k = np.asarray(clicks, dtype=float)
    n = np.asarray(impressions, dtype=float)
    if np.any(k < 0) or np.any(n < 0) or np.any(k > n):
        raise ContentlabError("wilson_interval needs 0 <= clicks <= impressions.")
    z = special.ndtri(0.5 + confidence / 2)  # the standard normal quantile
    with np.errstate(invalid="ignore", divide="ignore"):
        p = k / n
        denom = 1 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
    low = np.where(n > 0, np.clip(centre - half, 0.0, 1.0), 0.0)
    high = np.where(n > 0, np.clip(centre + half, 0.0, 1.0), 1.0)
    if low.ndim == 0:
        return float(low), float(high)
    return low, high


def prob_beta_greater(a1: float, b1: float, a2: int, b2: float) -> float:
    """Exact ``P(p2 > p1)`` for ``p1 ~ Beta(a1, b1)``, ``p2 ~ Beta(a2, b2)`` and integer ``a2``.

    Closed form (Cook, 2005, "Exact calculation of beta inequalities"; E. Miller,
    2015, "Formulas for Bayesian A/B testing"):
    ``sum_{i<a2} B(a1+i, b1+b2) / ((b2+i) B(1+i, b2) B(a1, b1))``, summed in
    logs with ``betaln`` so that thousands of clicks do not overflow. When
    ``a1`` is also an integer and smaller, the shorter sum for
    ``1 - P(p1 > p2)`` is used.
    """
    for name, v in (("a1", a1), ("b1", b1), ("a2", a2), ("b2", b2)):
        _check_real(name, v, low=0.0, open_low=True)
    if float(a2) != int(a2):
        raise ContentlabError(f"prob_beta_greater needs an integer a2 (the closed form sums over it); got {a2!r}.")
    if float(a1) == int(a1) and a1 < a2:
        return 1.0 - _miller_sum(a2, b2, int(a1), b1)
    return _miller_sum(a1, b1, int(a2), b2)


def _miller_sum(a1: float, b1: float, a2: int, b2: float) -> float:
    i = np.arange(a2, dtype=float)
    terms = special.betaln(a1 + i, b1 + b2) - np.log(b2 + i) - special.betaln(1 + i, b2) - special.betaln(a1, b1)
    return float(np.clip(np.exp(special.logsumexp(terms)), 0.0, 1.0))


def fit_prior_strength(
    predicted_rates: ArrayLike,
    impressions: ArrayLike,
    clicks: ArrayLike,
    *,
    bounds: tuple[float, float] = (1e-2, 1e8),
) -> float:
    """Empirical-Bayes strength ``s`` of a model's predicted rates as a prior.

    Maximises ``sum_i log BetaBinomial(clicks_i | impressions_i, m_i s, (1 - m_i) s)``
    over ``log s``, where ``m_i`` are the predicted rates: true rates are taken
    to scatter around the predictions as ``Beta(m_i s, (1 - m_i) s)``. A large
    ``s`` means predictions sit close to the real rates (a tight, useful
    prior); a small one means they say little. Returns the upper bound when the
    spread is no larger than binomial noise.
    """
    m = np.asarray(predicted_rates, dtype=float).ravel()
    n = np.asarray(impressions).ravel()
    k = np.asarray(clicks).ravel()
    if not (len(m) == len(n) == len(k)) or len(m) == 0:
        raise ContentlabError(
            "fit_prior_strength needs predicted_rates, impressions and clicks of the same, non-zero length; "
            f"got {len(m)}, {len(n)} and {len(k)}."
        )
    if not (np.all(np.isfinite(m)) and np.all((m > 0) & (m < 1))):
        raise ContentlabError("predicted_rates must be strictly between 0 and 1.")
    if not (np.issubdtype(n.dtype, np.integer) and np.issubdtype(k.dtype, np.integer)):
        if not (np.all(np.mod(n, 1) == 0) and np.all(np.mod(k, 1) == 0)):
            raise ContentlabError("impressions and clicks must be whole numbers.")
    n = n.astype(np.int64)
    k = k.astype(np.int64)
    if np.any(k < 0) or np.any(k > n):
        raise ContentlabError("fit_prior_strength needs 0 <= clicks <= impressions for every row.")
    lo, hi = math.log(bounds[0]), math.log(bounds[1])

    def nll(log_s: float) -> float:
        s = math.exp(log_s)
        return -float(betabinom_logpmf(k, n, m * s, (1 - m) * s).sum())

    # A coarse grid first, so the bounded Brent search starts in the right
    # bracket even if the likelihood is flat far out.
    grid = np.linspace(lo, hi, 41)
    values = np.array([nll(g) for g in grid])
    j = int(np.argmin(values))
    if j == len(grid) - 1:
        return float(bounds[1])
    from scipy import optimize

    res = optimize.minimize_scalar(
        nll, bounds=(grid[max(j - 1, 0)], grid[min(j + 1, len(grid) - 1)]), method="bounded",
        options={"xatol": 1e-4},
    )
    return float(math.exp(res.x))


def betabinom_logpmf(k, n, a, b) -> np.ndarray:
    """log P(k | n, a, b) of the beta-binomial: log C(n, k) + log B(k + a, n - k + b) - log B(a, b).

    The same value as ``scipy.stats.betabinom.logpmf`` (checked in the tests) without importing scipy.stats,
    which would cost every command that loads this module about half a second.
    """
    k = np.asarray(k, dtype=float)
    n = np.asarray(n, dtype=float)
    log_choose = special.gammaln(n + 1) - special.gammaln(k + 1) - special.gammaln(n - k + 1)
    return log_choose + special.betaln(k + a, n - k + b) - special.betaln(a, b)


def _check_real(name, value, *, low=None, high=None, open_low=False, open_high=False) -> None:
    ok = isinstance(value, Real) and not isinstance(value, bool) and math.isfinite(value)
    if ok and low is not None:
        ok = value > low if open_low else value >= low
    if ok and high is not None:
        ok = value < high if open_high else value <= high
    if not ok:
        lo_b = "(" if open_low else "["
        hi_b = ")" if open_high else "]"
        lo_s = "-inf" if low is None else f"{low:g}"
        hi_s = "inf" if high is None else f"{high:g}"
        raise ContentlabError(f"{name} must be a number in {lo_b}{lo_s}, {hi_s}{hi_b}; got {value!r}.")
