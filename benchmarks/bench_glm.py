"""Benchmark PenalizedBinomialGLM at archive-plus scale (issue 3, item 8).

100,000 synthetic posts: a sparse 20,000-term matrix (about 15 terms per post,
Zipf-like term frequencies), 30 dense features (channel / hour / length style),
3,000 experiment indicator columns (add_group_effects), impressions as exposure.
Prints fit time and peak memory; no timed assertions (the target in the issue is
under 30 s and 4 GB on 2 cores).

Run:  .venv/bin/python benchmarks/bench_glm.py [--alpha 1e-6 ...]
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
import tracemalloc

import numpy as np
import scipy.sparse as sp

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from contentlab.glm import PenalizedBinomialGLM, add_group_effects  # noqa: E402


def make_data(n: int, n_terms: int, n_dense: int, n_experiments: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    # Terms: Zipf-like popularity, ~15 per post.
    nnz_per_row = rng.poisson(15, size=n).clip(1, None)
    pop = 1.0 / np.arange(1, n_terms + 1) ** 0.9
    pop /= pop.sum()
    indptr = np.r_[0, np.cumsum(nnz_per_row)]
    indices = rng.choice(n_terms, size=indptr[-1], p=pop).astype(np.int32)
    T = sp.csr_matrix((np.ones(indptr[-1]), indices, indptr), shape=(n, n_terms))
    T.sum_duplicates()
    T.data[:] = 1.0
    D = rng.normal(size=(n, n_dense))
    # Experiments: 3,000 experiments of 2-6 arms each, the rest of the posts in none.
    arms = rng.integers(2, 7, size=n_experiments)
    groups = np.full(n, np.nan)
    rows = rng.choice(n, size=arms.sum(), replace=False)
    groups[rows] = np.repeat(np.arange(n_experiments), arms)

    X0 = sp.hstack([T, sp.csr_matrix(D)], format="csr")
    X, gidx = add_group_effects(X0, groups)

    beta = np.r_[
        np.where(rng.random(n_terms) < 0.05, rng.normal(0, 0.15, n_terms), 0.0),
        rng.normal(0, 0.1, n_dense),
        rng.normal(0, 0.3, len(gidx)),
    ]
    imp = np.round(np.exp(rng.normal(np.log(2000), 1.0, size=n))).astype(float) + 1
    eta = -4.0 + X @ beta
    clicks = rng.binomial(imp.astype(np.int64), 1.0 / (1.0 + np.exp(-eta))).astype(float)
    pw = np.r_[np.ones(n_terms), np.full(n_dense, 0.01), np.full(len(gidx), 0.01)]
    return X, clicks / imp, imp, pw, n_terms, n_dense


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--terms", type=int, default=20_000)
    ap.add_argument("--dense", type=int, default=30)
    ap.add_argument("--experiments", type=int, default=3_000)
    ap.add_argument("--alpha", type=float, nargs="+", default=[1e-5, 1e-6, 1e-7])
    args = ap.parse_args()

    t0 = time.perf_counter()
    X, y, w, pw, n_terms, n_dense = make_data(args.n, args.terms, args.dense, args.experiments)
    print(f"data: X {X.shape[0]} x {X.shape[1]} CSR, nnz {X.nnz:,} "
          f"({X.nnz / X.shape[0]:.1f}/row), {sum(w):,.0f} impressions; built in {time.perf_counter() - t0:.1f} s")
    print(f"threads: OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}, cpus={os.cpu_count()}")

    for alpha in args.alpha:
        model = PenalizedBinomialGLM(alpha=alpha, penalty_weights=pw, tol=1e-6, max_iter=2000)
        tracemalloc.start()
        t0 = time.perf_counter()
        model.fit(X, y, w)
        t_fit = time.perf_counter() - t0
        _, peak_fit = tracemalloc.get_traced_memory()
        tracemalloc.stop()

        dense_cols = np.arange(n_terms, n_terms + n_dense)
        tracemalloc.start()
        t0 = time.perf_counter()
        cov = model.coef_covariance(X, y, w, columns=dense_cols)
        t_cov = time.perf_counter() - t0
        _, peak_cov = tracemalloc.get_traced_memory()
        tracemalloc.stop()

        t0 = time.perf_counter()
        sd = model.decision_function_std(X[:100, :], X, y, w)
        t_sd = time.perf_counter() - t0
        print(
            f"alpha={alpha:g}: fit {t_fit:.1f} s, {model.n_iter_} iterations, converged={model.converged_}, "
            f"peak traced {peak_fit / 2**20:.0f} MiB | coef_covariance(30 cols) {t_cov:.1f} s, "
            f"peak {peak_cov / 2**20:.0f} MiB, median se {np.median(np.sqrt(np.diag(cov))):.4f} | "
            f"decision_function_std(100 rows) {t_sd:.1f} s, median sd {np.median(sd):.3f}"
        )
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
    print(f"process peak RSS (ru_maxrss, includes data generation): {maxrss:.0f} MiB")


if __name__ == "__main__":
    main()
