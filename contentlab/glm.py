"""Ridge-penalised binomial GLM (logit link) with impressions as exposure.

The workhorse behind ``contentlab learn``: a scikit-learn compatible estimator
that takes observed rates ``y = clicks / impressions`` with
``sample_weight = impressions`` (exactly the binomial likelihood of the counts),
per-column penalty multipliers (channel baselines and experiment effects get
little or no penalty, text terms the full one), dense or CSR sparse input, and
a Laplace approximation of the coefficient covariance for interval widths.
"""

from __future__ import annotations

import numbers
import warnings
from collections.abc import Sequence

import numpy as np
import pandas as pd
import scipy.linalg
import scipy.optimize
import scipy.sparse as sp
from numpy.typing import ArrayLike
from scipy.special import expit, xlogy
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.exceptions import NotFittedError as _SklearnNotFittedError
from threadpoolctl import threadpool_limits

from contentlab.errors import ContentlabError

__all__ = ["PenalizedBinomialGLM", "NotFittedError", "add_group_effects"]

_SOLVERS = ("auto", "lbfgs", "newton")
# "auto" uses Newton on dense problems whose Hessian build costs at most this many flops per iteration.
_NEWTON_MAX_FLOPS = 1e9
# Above this many parameters the penalised Hessian is not formed densely; solves use block CG.
_DENSE_HESSIAN_MAX = 3000
# Columns filled in more than this share of rows go into the exactly inverted block of the CG preconditioner.
_DENSE_COLUMN_SHARE = 0.05
_DENSE_BLOCK_MAX = 500


class NotFittedError(ContentlabError, _SklearnNotFittedError):
    """Raised when a model is used before ``fit``; both a ContentlabError and sklearn's NotFittedError."""


def _one_blas_thread():
    # The solvers only do vector-sized BLAS work (dot products, L-BFGS updates, thin products);
    # threaded OpenBLAS gains nothing there, and on a busy 2-core machine its spinning threads
    # made one fit 10x slower (measured: 1.3 s with 1 thread vs 10-20 s with 2 under load).
    return threadpool_limits(limits=1, user_api="blas")


def _log1pexp(eta: np.ndarray) -> np.ndarray:
    # log(1 + e^eta) without overflow for large |eta| (np.logaddexp is the stable form).
    return np.logaddexp(0.0, eta)


class _Design:
    """X for the solvers: products ``X @ b``, ``X.T @ r`` and ``(X * X).T @ v``.

    With ``split=True`` a CSR matrix whose columns are mostly filled (channel, hour,
    length features stored sparse next to the term counts) is split once into a CSR
    part and a dense block: the conjugate-gradient solves need that block for their
    preconditioner, and with many right-hand sides its products run as BLAS matrix
    products. (For the single-vector products of the fit, measured faster unsplit.)
    """

    def __init__(self, X, *, split: bool = True) -> None:
        self.shape = X.shape
        n, p = X.shape
        if not sp.issparse(X):
            self.S, self.D = None, X
            self.dense_idx = np.arange(p)
            self.sparse_idx = np.arange(0)
            return
        col_nnz = np.diff(X.tocsc().indptr) if split else np.zeros(p)
        dense = col_nnz > _DENSE_COLUMN_SHARE * n
        if dense.sum() > _DENSE_BLOCK_MAX:
            dense[:] = False
            dense[np.argsort(col_nnz)[::-1][:_DENSE_BLOCK_MAX]] = True
        self.dense_idx = np.flatnonzero(dense)
        self.sparse_idx = np.flatnonzero(~dense)
        if self.dense_idx.size == 0:
            self.S, self.D = X, None
            self.sparse_idx = None  # identity: no re-indexing needed
        else:
            self.S = X[:, self.sparse_idx].tocsr()
            self.D = np.ascontiguousarray(X[:, self.dense_idx].toarray())

    def dot(self, b: np.ndarray) -> np.ndarray:
        if self.S is None:
            return self.D @ b
        if self.D is None:
            return self.S @ b
        return self.S @ b[self.sparse_idx] + self.D @ b[self.dense_idx]

    def tdot(self, r: np.ndarray) -> np.ndarray:
        if self.S is None:
            return self.D.T @ r
        if self.D is None:
            return self.S.T @ r
        out = np.empty((self.shape[1],) + r.shape[1:])
        out[self.sparse_idx] = self.S.T @ r
        out[self.dense_idx] = self.D.T @ r
        return out

    def colsq(self, v: np.ndarray) -> np.ndarray:
        """``sum_i v_i x_ij^2`` for every column j."""
        out = np.empty(self.shape[1])
        if self.S is None:
            return (self.D * self.D).T @ v
        sq = np.asarray(self.S.multiply(self.S).T @ v).ravel()
        if self.D is None:
            return sq
        out[self.sparse_idx] = sq
        out[self.dense_idx] = (self.D * self.D).T @ v
        return out

    def dense_block(self) -> tuple[np.ndarray, np.ndarray]:
        """``(idx, X[:, idx])`` for the densely filled columns, at most ``_DENSE_BLOCK_MAX`` of them."""
        if self.D is None or self.dense_idx.size > _DENSE_BLOCK_MAX:
            return np.arange(0), np.zeros((self.shape[0], 0))
        return self.dense_idx, self.D


class PenalizedBinomialGLM(RegressorMixin, BaseEstimator):
    r"""Binomial GLM with logit link, weighted by exposure, with a per-column ridge penalty.

    Objective minimised over ``beta`` (``coef_``) and ``b`` (``intercept_``)::

        L(beta, b) = - sum_i w_i [ y_i log p_i + (1 - y_i) log(1 - p_i) ] / sum_i w_i
                     + 0.5 * alpha * sum_j penalty_weights_j * beta_j ** 2

        p_i = expit(x_i . beta + b)

    ``y_i`` is the observed rate (clicks / impressions) and ``w_i`` the
    impressions, so the first term is the binomial log-likelihood of the counts
    divided by the total number of impressions ``W = sum_i w_i``. That scaling
    makes ``alpha`` a penalty per impression: the same ``alpha`` means the same
    balance of data and prior whatever the unit of ``sample_weight``, and it is
    equivalent to the unscaled likelihood with ridge strength ``alpha * W``
    (a Gaussian prior with precision ``alpha * W * penalty_weights_j``; this is
    the prior used by :meth:`coef_covariance`). The intercept is never penalised.

    Parameters
    ----------
    alpha : float, default=1e-6
        Ridge strength per impression, ``>= 0``; choose it by time-respecting
        cross-validation (on histories of 1e7-1e9 impressions, useful values lie
        roughly in 1e-9 to 1e-5). ``0`` gives the maximum-likelihood fit (which
        diverges on separable data).
    penalty_weights : array-like of shape (n_features,) or None, default=None
        Per-column multipliers of ``alpha``, each ``>= 0``; ``0`` leaves a column
        unpenalised (channel baselines), small values penalise lightly
        (per-experiment effects). ``None`` means 1 for every column.
    fit_intercept : bool, default=True
        Fit an unpenalised intercept ``b``; otherwise ``b = 0``.
    tol : float, default=1e-6
        Stop when ``max_j |dL/dtheta_j| / sqrt(h_j) <= tol``, the gradient
        scaled by the square root of the Hessian diagonal ``h_j`` (so every
        coefficient is judged on the scale of its own curvature), ``> 0``.
    max_iter : int, default=1000
        Iteration limit of the solver, ``>= 1``.
    solver : {"auto", "lbfgs", "newton"}, default="auto"
        ``"lbfgs"``: scipy L-BFGS-B with the analytic gradient (any size, sparse
        input). ``"newton"``: Newton with step halving on a dense Hessian (small
        dense problems, very precise). ``"auto"`` picks Newton for dense input
        when ``n_samples * (n_features + 1) ** 2 <= 1e9``, else L-BFGS-B.
    warm_start : bool, default=False
        Start from the previous ``coef_`` / ``intercept_`` when refitting on data
        with the same number of columns.

    Attributes
    ----------
    coef_ : ndarray of shape (n_features,)
    intercept_ : float
    n_iter_ : int
        Solver iterations used.
    converged_ : bool
        Whether the tolerance was reached within ``max_iter``.
    n_features_in_ : int
    solver_ : str
        The solver actually used.
    objective_ : float
        Value of ``L`` at the solution.
    """

    def __init__(
        self,
        *,
        alpha: float = 1e-6,
        penalty_weights: ArrayLike | None = None,
        fit_intercept: bool = True,
        tol: float = 1e-6,
        max_iter: int = 1000,
        solver: str = "auto",
        warm_start: bool = False,
    ) -> None:
        self.alpha = alpha
        self.penalty_weights = penalty_weights
        self.fit_intercept = fit_intercept
        self.tol = tol
        self.max_iter = max_iter
        self.solver = solver
        self.warm_start = warm_start

    # ------------------------------------------------------------------ checks
    def _check_params(self, n_features: int) -> np.ndarray:
        a = self.alpha
        if not isinstance(a, numbers.Real) or isinstance(a, bool) or not np.isfinite(a) or a < 0:
            raise ContentlabError(f"alpha must be a finite number >= 0; got {a!r}")
        if not isinstance(self.fit_intercept, (bool, np.bool_)):
            raise ContentlabError(f"fit_intercept must be True or False; got {self.fit_intercept!r}")
        if not isinstance(self.warm_start, (bool, np.bool_)):
            raise ContentlabError(f"warm_start must be True or False; got {self.warm_start!r}")
        t = self.tol
        if not isinstance(t, numbers.Real) or isinstance(t, bool) or not np.isfinite(t) or t <= 0:
            raise ContentlabError(f"tol must be a finite number > 0; got {t!r}")
        m = self.max_iter
        if not isinstance(m, numbers.Integral) or isinstance(m, bool) or m < 1:
            raise ContentlabError(f"max_iter must be an integer >= 1; got {m!r}")
        if self.solver not in _SOLVERS:
            raise ContentlabError(f"solver must be one of {_SOLVERS}; got {self.solver!r}")
        if self.penalty_weights is None:
            return np.ones(n_features)
        pw = np.asarray(self.penalty_weights, dtype=float)
        if pw.shape != (n_features,):
            raise ContentlabError(
                f"penalty_weights must have one entry per column of X ({n_features}); got shape {pw.shape}"
            )
        if not np.all(np.isfinite(pw)) or np.any(pw < 0):
            bad = float(pw[~(np.isfinite(pw) & (pw >= 0))][0])
            raise ContentlabError(f"penalty_weights must be finite and >= 0; got {bad!r}")
        return pw

    @staticmethod
    def _check_X(X, *, name: str = "X"):
        if sp.issparse(X):
            # CSR float64: row slicing and X @ v are fast, X.T @ r runs on the free CSC transpose.
            X = sp.csr_matrix(X, dtype=np.float64)
            if not np.all(np.isfinite(X.data)):
                raise ContentlabError(f"{name} must contain only finite numbers; found NaN or infinity")
        else:
            try:
                X = np.asarray(X, dtype=np.float64)
            except (TypeError, ValueError) as exc:
                raise ContentlabError(f"{name} must be numeric: {exc}") from None
            if X.ndim != 2:
                raise ContentlabError(f"{name} must be 2-D (n_samples, n_features); got shape {X.shape}")
            if not np.all(np.isfinite(X)):
                raise ContentlabError(f"{name} must contain only finite numbers; found NaN or infinity")
        if X.shape[0] < 1:
            raise ContentlabError(f"{name} must have at least one row; got {X.shape[0]}")
        return X

    @staticmethod
    def _check_y_w(y, sample_weight, n: int):
        y = np.asarray(y, dtype=np.float64).ravel()
        if y.shape != (n,):
            raise ContentlabError(f"y must have one rate per row of X ({n}); got {y.shape[0]}")
        if not np.all(np.isfinite(y)) or np.any((y < 0) | (y > 1)):
            raise ContentlabError(
                "y must be observed rates (clicks / impressions) within [0, 1]; "
                f"got values from {np.nanmin(y)!r} to {np.nanmax(y)!r}"
            )
        if sample_weight is None:
            w = np.ones(n)
        else:
            w = np.asarray(sample_weight, dtype=np.float64).ravel()
            if w.shape != (n,):
                raise ContentlabError(
                    f"sample_weight must have one weight (impressions) per row of X ({n}); got {w.shape[0]}"
                )
            if not np.all(np.isfinite(w)) or np.any(w < 0):
                raise ContentlabError("sample_weight (impressions) must be finite and >= 0")
        if w.sum() <= 0:
            raise ContentlabError("sample_weight (impressions) must not sum to zero")
        return y, w

    def _check_fitted(self) -> None:
        if not hasattr(self, "coef_"):
            raise NotFittedError(
                f"This {type(self).__name__} is not fitted yet; call fit(X, y, sample_weight) first."
            )

    def _check_X_predict(self, X, name: str = "X"):
        self._check_fitted()
        X = self._check_X(X, name=name)
        if X.shape[1] != self.n_features_in_:
            raise ContentlabError(
                f"{name} has {X.shape[1]} columns but the model was fitted with {self.n_features_in_}"
            )
        return X

    # --------------------------------------------------------------------- fit
    def fit(self, X, y, sample_weight=None) -> "PenalizedBinomialGLM":
        """Fit on rates ``y`` with ``sample_weight`` = impressions. Returns ``self``."""
        X = self._check_X(X)
        n, p = X.shape
        pw = self._check_params(p)
        y, w = self._check_y_w(y, sample_weight, n)
        W = w.sum()
        # Work with weights summing to 1 so the loss is O(1) whatever the impression counts,
        # which keeps the gradient tolerance meaningful across data sets.
        wn = w / W
        pen = float(self.alpha) * pw
        fit_b = bool(self.fit_intercept)

        theta0 = np.zeros(p + 1)
        if (
            self.warm_start
            and hasattr(self, "coef_")
            and getattr(self, "n_features_in_", None) == p
        ):
            theta0[:p] = self.coef_
            theta0[p] = self.intercept_ if fit_b else 0.0
        elif fit_b:
            # Start the intercept at the pooled rate's logit (clipped so all-zero data stays finite).
            ybar = float(np.clip(np.dot(wn, y), 1e-12, 1 - 1e-12))
            theta0[p] = np.log(ybar / (1 - ybar))

        solver = self.solver
        if solver == "auto":
            solver = "newton" if (not sp.issparse(X) and n * (p + 1) ** 2 <= _NEWTON_MAX_FLOPS) else "lbfgs"
        with _one_blas_thread():
            if solver == "newton":
                if sp.issparse(X):
                    if n * (p + 1) > 5e7:
                        raise ContentlabError(
                            f"solver='newton' works on a dense copy of X; {n} x {p} is too large, use 'lbfgs'"
                        )
                    X = X.toarray()
                theta, n_iter, converged, obj = self._fit_newton(X, y, wn, pen, fit_b, theta0)
            else:
                theta, n_iter, converged, obj = self._fit_lbfgs(_Design(X, split=False), y, wn, pen, fit_b, theta0)

        if not converged:
            warnings.warn(
                f"PenalizedBinomialGLM did not reach tol={self.tol} within max_iter={self.max_iter} "
                f"iterations (solver {solver}); increase max_iter or alpha.",
                ConvergenceWarning,
                stacklevel=2,
            )
        self.coef_ = theta[:p].copy()
        self.intercept_ = float(theta[p]) if fit_b else 0.0
        self.n_iter_ = int(n_iter)
        self.converged_ = bool(converged)
        self.n_features_in_ = p
        self.solver_ = solver
        self.objective_ = float(obj)
        return self

    @staticmethod
    def _loss_grad(X, y, wn, pen, fit_b, theta):
        eta = X.dot(theta[:-1]) + theta[-1]
        # -[y log p + (1-y) log(1-p)] = log(1 + e^eta) - y * eta, computed stably.
        f = np.dot(wn, _log1pexp(eta) - y * eta) + 0.5 * np.dot(pen, theta[:-1] ** 2)
        r = wn * (expit(eta) - y)
        g = np.empty_like(theta)
        g[:-1] = X.tdot(r) + pen * theta[:-1]
        g[-1] = r.sum() if fit_b else 0.0
        return f, g, eta

    @staticmethod
    def _hess_diag(X, wn, pen, fit_b, pbar):
        """Hessian diagonal of L with every rate at pbar: pbar (1-pbar) sum_i wn_i x_ij^2 + pen_j (intercept last)."""
        v = (pbar * (1 - pbar)) * wn
        h = np.empty(X.shape[1] + 1)
        h[:-1] = X.colsq(v) + pen
        h[-1] = v.sum() if fit_b else 1.0
        return h

    def _fit_lbfgs(self, X, y, wn, pen, fit_b, theta0):
        # Diagonal preconditioning: optimise z = s * theta with s = sqrt(Hessian diagonal at the
        # pooled rate). The minimiser is the same, but columns of very different scale or
        # frequency (a rare term vs. a dense hour feature) get comparable curvature. Measured on
        # benchmarks/bench_glm.py: 47 L-BFGS iterations instead of 639 without the scaling.
        ybar = float(np.clip(np.dot(wn, y), 1e-6, 1 - 1e-6))
        s = np.sqrt(self._hess_diag(X, wn, pen, fit_b, ybar))
        s[s <= 0] = 1.0  # all-zero unpenalised column: gradient is 0 there, any scale will do
        if not fit_b:
            s[-1] = 1.0

        def fun(z):
            f, g, _ = self._loss_grad(X, y, wn, pen, fit_b, z / s)
            return f, g / s

        res = scipy.optimize.minimize(
            fun,
            theta0 * s,
            jac=True,
            method="L-BFGS-B",
            options=dict(
                maxiter=int(self.max_iter),
                gtol=float(self.tol),
                # Stop on the scaled gradient (gtol), not on a relative decrease of the objective.
                ftol=1e3 * np.finfo(float).eps,
                maxcor=20,
                maxls=50,
            ),
        )
        theta = res.x / s
        _, g, _ = self._loss_grad(X, y, wn, pen, fit_b, theta)
        converged = bool(np.max(np.abs(g / s)) <= self.tol) or res.status == 0
        return theta, res.nit, converged, res.fun

    def _fit_newton(self, X, y, wn, pen, fit_b, theta):
        p = X.shape[1]
        Xa = np.hstack([X, np.ones((X.shape[0], 1))])
        X = _Design(X)
        pen_a = np.r_[pen, 0.0]
        f, g, eta = self._loss_grad(X, y, wn, pen, fit_b, theta)
        converged = False
        n_iter = 0
        for n_iter in range(1, int(self.max_iter) + 1):
            pr = expit(eta)
            v = wn * pr * (1 - pr)
            H = (Xa.T * v) @ Xa
            H[np.diag_indices_from(H)] += pen_a
            if not fit_b:
                H[p, :] = 0.0
                H[:, p] = 0.0
                H[p, p] = 1.0
            hd = np.sqrt(np.maximum(np.diag(H), 1e-300))
            if np.max(np.abs(g) / hd) <= self.tol:
                converged = True
                n_iter -= 1
                break
            # Solve in the Jacobi-scaled system (unit diagonal) for accuracy; fall back to
            # least squares when the Hessian is singular (collinear unpenalised columns).
            Hs = H / hd[:, None] / hd[None, :]
            try:
                step = scipy.linalg.cho_solve(scipy.linalg.cho_factor(Hs), g / hd) / hd
            except np.linalg.LinAlgError:
                step = np.linalg.lstsq(Hs, g / hd, rcond=None)[0] / hd
            gd = float(np.dot(g, step))
            # Newton decrement: the predicted decrease 0.5 * g' H^-1 g is below what float64 can
            # resolve in f, so no step can improve the fit any further.
            if 0.5 * gd <= 8 * np.finfo(float).eps * max(abs(f), 1e-300):
                converged = True
                n_iter -= 1
                break
            t = 1.0
            while True:
                new = theta - t * step
                f_new, g_new, eta_new = self._loss_grad(X, y, wn, pen, fit_b, new)
                if f_new <= f - 1e-4 * t * gd or t < 1e-10:
                    break
                t *= 0.5
            if t < 1e-10:
                # The line search found no decrease: we are at the optimum's floating-point noise floor.
                converged = bool(np.max(np.abs(g) / hd) <= 1e3 * self.tol)
                break
            theta, f, g, eta = new, f_new, g_new, eta_new
        return theta, n_iter, converged, f

    # ----------------------------------------------------------------- predict
    def decision_function(self, X) -> np.ndarray:
        """Linear predictor (logit of the rate), shape (n_samples,)."""
        X = self._check_X_predict(X)
        return np.asarray(X @ self.coef_).ravel() + self.intercept_

    def predict(self, X) -> np.ndarray:
        """Predicted rate per impression, ``expit(decision_function(X))``, shape (n_samples,)."""
        return expit(self.decision_function(X))

    def deviance(self, X, y, sample_weight=None) -> float:
        """Total binomial deviance ``2 sum_i w_i [y log(y/p) + (1-y) log((1-y)/(1-p))]`` on (X, y, w).

        With ``y`` = rates and ``sample_weight`` = impressions this equals
        :func:`contentlab.stats.binomial_deviance` of the counts. Computed from
        the logit, so extreme predictions do not lose precision.
        """
        X = self._check_X_predict(X)
        y, w = self._check_y_w(y, sample_weight, X.shape[0])
        eta = np.asarray(X @ self.coef_).ravel() + self.intercept_
        # y log p + (1-y) log(1-p) = y eta - log(1 + e^eta)
        ll_model = y * eta - _log1pexp(eta)
        ll_sat = xlogy(y, y) + xlogy(1 - y, 1 - y)
        return float(2.0 * np.dot(w, ll_sat - ll_model))

    # ------------------------------------------------------------- uncertainty
    def _laplace_parts(self, X, y, sample_weight):
        """Weights and penalty of the unscaled penalised Hessian H = X_a' diag(v) X_a + diag(pen)."""
        X = self._check_X_predict(X)
        y, w = self._check_y_w(y, sample_weight, X.shape[0])
        p = X.shape[1]
        pw = self._check_params(p)
        pr = expit(np.asarray(X @ self.coef_).ravel() + self.intercept_)
        v = w * pr * (1 - pr)
        # Back on the count scale: the prior precision is alpha * W * penalty_weights (see class doc).
        pen = np.r_[float(self.alpha) * w.sum() * pw, 0.0]
        return X, v, pen

    def solve_hessian(
        self, X, y, sample_weight, B: ArrayLike, *, rtol: float = 1e-6, max_iter: int = 2000
    ) -> np.ndarray:
        """Return ``H^{-1} B`` for the penalised Hessian of the negative log-posterior at the fit.

        ``H = X_a' diag(w_i p_i (1 - p_i)) X_a + diag(alpha * W * penalty_weights, 0)``
        where ``X_a = [X, 1]`` (intercept last) and ``W = sum w``, i.e. the
        Hessian of the unscaled objective (counts likelihood plus Gaussian prior).
        ``H^{-1}`` is the Laplace-approximation covariance of ``(coef_, intercept_)``.
        ``(X, y, sample_weight)`` must be the training data.

        ``B`` has shape (n_features + 1,) or (n_features + 1, k). Up to 3,000
        parameters ``H`` is formed densely and Cholesky-factored; above that it
        is never formed and the k systems are solved together by Jacobi-
        preconditioned conjugate gradients to relative residual ``rtol``.
        Without an intercept its row and column are the identity.
        """
        X, v, pen = self._laplace_parts(X, y, sample_weight)
        B = np.asarray(B, dtype=float)
        one_d = B.ndim == 1
        B2 = B[:, None] if one_d else B
        p1 = X.shape[1] + 1
        if B2.ndim != 2 or B2.shape[0] != p1:
            raise ContentlabError(f"B must have n_features + 1 = {p1} rows; got shape {B.shape}")
        fit_b = bool(self.fit_intercept)
        if p1 <= _DENSE_HESSIAN_MAX:
            out = _dense_solve(X, v, pen, fit_b, B2)
        else:
            with _one_blas_thread():
                out = _block_pcg(X, v, pen, fit_b, B2, rtol=rtol, max_iter=max_iter)
        return out[:, 0] if one_d else out

    def coef_covariance(
        self,
        X,
        y,
        sample_weight=None,
        columns: Sequence[int] | np.ndarray | None = None,
        *,
        include_intercept: bool = False,
        rtol: float = 1e-4,
    ) -> np.ndarray:
        """Laplace-approximation covariance of chosen coefficients, shape (k, k).

        The block of ``H^{-1}`` (see :meth:`solve_hessian`) for ``columns``
        (indices into ``coef_``; ``None`` = all, allowed up to 3,000 columns),
        with the intercept appended last when ``include_intercept``. This is
        the marginal posterior covariance (other coefficients integrated out),
        not the conditional one. Cost: one solve per requested column (on the
        100,000 x 23,000 benchmark about 40 CG iterations, ~0.3 s, per column).
        ``rtol`` is the CG relative residual; the variances converge faster than
        the residual (on the benchmark ``rtol=1e-3`` already matched ``1e-8`` to
        about 1e-4 relative), so the default ``1e-4`` is ample for interval widths.
        """
        self._check_fitted()
        p = self.n_features_in_
        if columns is None:
            if p + 1 > _DENSE_HESSIAN_MAX:
                raise ContentlabError(
                    f"columns=None (every coefficient) is allowed up to {_DENSE_HESSIAN_MAX - 1} "
                    f"coefficients; this model has {p}: pass the columns you need"
                )
            cols = np.arange(p)
        else:
            cols = np.asarray(columns, dtype=int).ravel()
            if cols.size and (cols.min() < 0 or cols.max() >= p):
                raise ContentlabError(f"columns must be indices in [0, {p - 1}]; got {columns!r}")
        if include_intercept:
            if not self.fit_intercept:
                raise ContentlabError("include_intercept=True but the model was fitted without an intercept")
            cols = np.r_[cols, p]
        E = np.zeros((p + 1, cols.size))
        E[cols, np.arange(cols.size)] = 1.0
        Z = self.solve_hessian(X, y, sample_weight, E, rtol=rtol)
        C = Z[cols, :]
        return 0.5 * (C + C.T)

    def decision_function_std(self, X_new, X, y, sample_weight=None, *, rtol: float = 1e-4) -> np.ndarray:
        """Posterior standard deviation of the logit for each row of ``X_new`` (Laplace approximation).

        ``sd_i = sqrt(a_i' H^{-1} a_i)`` with ``a_i = [x_i, 1]``; ``(X, y,
        sample_weight)`` is the training data. One solve per new row, so meant
        for batches of drafts, not for the whole history.
        """
        Xn = self._check_X_predict(X_new, name="X_new")
        A = Xn.toarray() if sp.issparse(Xn) else Xn
        A = np.hstack([A, np.full((A.shape[0], 1), 1.0 if self.fit_intercept else 0.0)]).T
        Z = self.solve_hessian(X, y, sample_weight, A, rtol=rtol)
        return np.sqrt(np.maximum(np.sum(A * Z, axis=0), 0.0))


def _dense_solve(X, v, pen, fit_b, B):
    p1 = X.shape[1] + 1
    if sp.issparse(X):
        Xa = sp.hstack([X, sp.csr_matrix(np.ones((X.shape[0], 1)))], format="csr")
        H = (Xa.T @ Xa.multiply(v[:, None])).toarray()
    else:
        Xa = np.hstack([X, np.ones((X.shape[0], 1))])
        H = (Xa.T * v) @ Xa
    H[np.diag_indices(p1)] += pen
    if not fit_b:
        H[-1, :] = 0.0
        H[:, -1] = 0.0
        H[-1, -1] = 1.0
    # Jacobi scaling before the Cholesky factorisation: rare terms and dense features differ in
    # curvature by orders of magnitude, and unit-diagonal scaling keeps the factorisation accurate.
    d = np.sqrt(np.maximum(np.diag(H), 1e-300))
    Hs = H / d[:, None] / d[None, :]
    try:
        Z = scipy.linalg.cho_solve(scipy.linalg.cho_factor(Hs), B / d[:, None])
    except np.linalg.LinAlgError:
        warnings.warn(
            "Penalised Hessian is singular (collinear unpenalised columns); using a pseudo-inverse.",
            RuntimeWarning,
            stacklevel=3,
        )
        Z = scipy.linalg.pinvh(Hs) @ (B / d[:, None])
    return Z / d[:, None]


def _block_pcg(X, v, pen, fit_b, B, *, rtol: float, max_iter: int):
    """Solve H Z = B column by column, all columns at once, by Jacobi-preconditioned CG.

    H is applied as X_a' (v * (X_a V)) + pen * V and never formed: for 100,000 x 20,000
    sparse X that is two sparse-times-dense products per iteration instead of a
    (possibly very dense) 20,000 x 20,000 matrix.
    """
    ib = 1.0 if fit_b else 0.0

    n, p = X.shape
    X = _Design(X)

    def matvec(V):
        u = (X.dot(V[:-1]) + ib * V[-1][None, :]) * v[:, None]
        out = np.empty_like(V)
        out[:-1] = X.tdot(u)
        out[-1] = ib * u.sum(axis=0)
        out += pen[:, None] * V
        if not fit_b:
            out[-1] = V[-1]
        return out

    diag = np.r_[X.colsq(v), v.sum() if fit_b else 1.0] + pen
    if not fit_b:
        diag[-1] = 1.0
    minv = np.where(diag > 0, 1.0 / np.where(diag > 0, diag, 1.0), 1.0)[:, None]

    # Block-Jacobi preconditioner: the intercept and the densely filled columns (channel, hour,
    # length...) are coupled with every other column, which is what makes plain Jacobi-CG slow.
    # Their block of H (at most a few hundred columns) is inverted exactly; the sparse rest
    # keeps its diagonal.
    d_idx, d_cols = X.dense_block()
    blk = np.r_[d_idx, p]
    XD = np.hstack([d_cols, np.full((n, 1), ib)])
    HD = (XD.T * v) @ XD
    HD[np.diag_indices_from(HD)] += pen[blk]
    if not fit_b:
        HD[-1, :] = 0.0
        HD[:, -1] = 0.0
        HD[-1, -1] = 1.0
    try:
        HD_f = scipy.linalg.cho_factor(HD)
    except np.linalg.LinAlgError:
        HD_f = None

    def precond(R):
        Y = minv * R
        if HD_f is not None:
            Y[blk] = scipy.linalg.cho_solve(HD_f, R[blk])
        return Y

    Z = np.zeros_like(B)
    R = B.copy()
    bnorm = np.linalg.norm(B, axis=0)
    bnorm[bnorm == 0] = 1.0
    Y = precond(R)
    P = Y.copy()
    ry = np.sum(R * Y, axis=0)
    active = np.linalg.norm(R, axis=0) > rtol * bnorm
    it = 0
    while active.any() and it < max_iter:
        it += 1
        AP = matvec(P)
        pap = np.sum(P * AP, axis=0)
        a = np.where(active & (pap > 0), ry / np.where(pap > 0, pap, 1.0), 0.0)
        Z += P * a
        R -= AP * a
        active &= np.linalg.norm(R, axis=0) > rtol * bnorm
        Y = precond(R)
        ry_new = np.sum(R * Y, axis=0)
        beta = np.where(active & (ry > 0), ry_new / np.where(ry > 0, ry, 1.0), 0.0)
        P = Y + P * beta
        ry = ry_new
    if active.any():
        warnings.warn(
            f"Conjugate gradients did not reach rtol={rtol} for {int(active.sum())} of {B.shape[1]} "
            f"systems within {max_iter} iterations; covariances may be inaccurate.",
            ConvergenceWarning,
            stacklevel=3,
        )
    return Z


def add_group_effects(X, groups: ArrayLike) -> tuple[sp.csr_matrix, pd.Index]:
    """Append one sparse 0/1 indicator column per group (e.g. per A/B experiment).

    ``groups`` has one label per row of ``X``; a missing label (None / NaN)
    means the row is in no group and gets no indicator. Returns
    ``(X_aug, group_index)``: ``X_aug`` is CSR ``[X, G]`` of shape
    (n_samples, n_features + n_groups) and ``group_index[k]`` is the label of
    column ``n_features + k``. Pair with ``penalty_weights`` that give these
    columns a small multiplier, so each experiment's level is absorbed by its own
    effect and text features are learned from within-experiment differences.
    """
    n = X.shape[0]
    labels = pd.Series(np.asarray(groups, dtype=object) if not isinstance(groups, pd.Series) else groups.to_numpy())
    if len(labels) != n:
        raise ContentlabError(f"groups must have one label per row of X ({n}); got {len(labels)}")
    codes, uniques = pd.factorize(labels, use_na_sentinel=True)
    rows = np.flatnonzero(codes >= 0)
    G = sp.csr_matrix(
        (np.ones(rows.size), (rows, codes[rows])), shape=(n, len(uniques)), dtype=np.float64
    )
    Xs = X if sp.issparse(X) else sp.csr_matrix(np.asarray(X, dtype=np.float64))
    return sp.hstack([Xs, G], format="csr", dtype=np.float64), pd.Index(uniques)
