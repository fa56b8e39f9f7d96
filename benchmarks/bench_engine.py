"""Speed of the linear-time likelihood (value + full gradient) against a dense reference.

Setting: k = 2 traits, measurement error on every cell, 5% missing cells, random
bifurcating non-ultrametric trees (invented), Pagel's lambda = 0.8 applied by
scaling internal branches. The engine is timed at the kernel the PyTensor Op calls
(``kernels.value_and_grad_kernel``); the dense reference is Cholesky-based
numpy/scipy on the (N k) x (N k) covariance: value plus gradient with respect to R
via Sigma^-1 (the tree covariance C is precomputed and not timed).
A last table times k = 1 (first trait only) on the same trees.

Run: ``python benchmarks/bench_engine.py`` (about a minute on 2 cores).
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
import scipy.linalg

from cladewise.engine import kernels, loglik_and_grad
from cladewise.engine.dense import tip_covariance
from cladewise.engine.testing import random_tree

K = 2
ENGINE_SIZES = [100, 1_000, 2_000, 10_000, 50_000]
DENSE_SIZES = [100, 1_000, 2_000]


def make_problem(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    parent, lengths = random_tree(n, rng)
    lengths = lengths.copy()
    lengths[n:-1] *= 0.8  # Pagel's lambda = 0.8: internal branches scaled
    R = np.array([[1.0, 0.6], [0.6, 2.0]])
    E = np.zeros((K, K))
    err_var = rng.uniform(0.01, 0.2, (n, K))
    observed = rng.random((n, K)) > 0.05
    y = rng.normal(size=(n, K))
    y[~observed] = 0.0
    mu = np.array([0.5, -0.5])
    return parent, lengths, y, observed, R, E, err_var, mu


def make_problem_k1(n: int, seed: int = 0):
    """Single-trait version of :func:`make_problem` (invented data)."""
    parent, lengths, y, observed, R, E, err_var, mu = make_problem(n, seed)
    return (parent, lengths, y[:, :1].copy(), observed[:, :1].copy(), R[:1, :1].copy(),
            E[:1, :1].copy(), err_var[:, :1].copy(), mu[:1].copy())


def kernel_args(args):
    """The kernels take the error as (N, k, k) covariances: embed the variances."""
    a = list(args)
    ev = a[6]
    a[6] = ev[:, :, None] * np.eye(ev.shape[1])[None, :, :]
    return tuple(a)


def median_time(fn, min_total: float = 0.3, min_reps: int = 5, max_reps: int = 2000) -> float:
    times = []
    start = time.perf_counter()
    while len(times) < max_reps and (
        len(times) < min_reps or time.perf_counter() - start < min_total
    ):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def engine_workspace_bytes(n_tips: int, n_nodes: int, k: int) -> int:
    # Arrays the kernels allocate, counted from the code, plus the gradient outputs:
    # k = 2 keeps 10 numbers per node and 10 more per internal node (k = 1: 4 and 4,
    # not used here); other k use
    # 5 (n, k, k) and 5 (n, k) node arrays.
    if k == 2:
        work = 10 * n_nodes + 10 * (n_nodes - n_tips)
    else:
        work = n_nodes * (5 * k * k + 5 * k)
    return 8 * (work + n_nodes + 2 * n_tips * k + 2 * k * k + k)


def dense_value_and_grad(C, y, observed, R, err_var, mu):
    n = C.shape[0]
    obs = observed.ravel()
    cov = np.kron(C, R) + np.diag(err_var.ravel())
    cov_o = cov[np.ix_(obs, obs)]
    r = (y - mu).ravel()[obs]
    cf = scipy.linalg.cho_factor(cov_o, lower=True, check_finite=False)
    alpha = scipy.linalg.cho_solve(cf, r, check_finite=False)
    logdet = 2.0 * np.log(np.diag(cf[0])).sum()
    logp = -0.5 * (r @ alpha) - 0.5 * logdet - 0.5 * obs.sum() * np.log(2 * np.pi)
    inv = scipy.linalg.cho_solve(cf, np.eye(obs.sum()), check_finite=False)
    G = np.zeros((n * K, n * K))
    G[np.ix_(obs, obs)] = 0.5 * (np.outer(alpha, alpha) - inv)
    dR = np.einsum("ij,iajb->ab", C, G.reshape(n, K, n, K))
    return logp, dR


def main() -> None:
    rows = {}
    # compile outside the timings
    kernels.value_and_grad_kernel(*kernel_args(make_problem(10)))
    kernels.loglik_kernel(*kernel_args(make_problem(10)))
    for n in ENGINE_SIZES:
        args = make_problem(n)
        kargs = kernel_args(args)
        t_engine = median_time(lambda: kernels.value_and_grad_kernel(*kargs))
        t_value = median_time(lambda: kernels.loglik_kernel(*kargs))
        tracemalloc.start()
        logp, grad = loglik_and_grad(*args)
        peak_engine = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        rows[n] = {"engine": t_engine, "value": t_value, "engine_peak": peak_engine, "logp": logp,
                   "dR": grad["R"], "ws": engine_workspace_bytes(n, args[0].size, K)}
    for n in DENSE_SIZES:
        parent, lengths, y, observed, R, E, err_var, mu = make_problem(n)
        C = tip_covariance(parent, lengths, n)
        reps = 3 if n >= 1000 else 10
        t_dense = median_time(lambda: dense_value_and_grad(C, y, observed, R, err_var, mu),
                              min_total=0.0, min_reps=reps, max_reps=reps)
        tracemalloc.start()
        logp, dR = dense_value_and_grad(C, y, observed, R, err_var, mu)
        peak_dense = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        rows[n].update(dense=t_dense, dense_peak=peak_dense,
                       agree=max(abs(logp - rows[n]["logp"]) / abs(logp),
                                 float(np.abs(dR - rows[n]["dR"]).max() / np.abs(dR).max())))

    print("k=2, measurement error, 5% missing, lambda=0.8; value + full gradient per call")
    header = (f"{'N':>7} {'value ms':>9} {'engine ms':>10} {'engine peak MB':>15} {'workspace MB':>13} "
              f"{'dense ms':>10} {'dense peak MB':>14} {'dense/engine':>13} {'max rel diff':>13}")
    print(header)
    for n in ENGINE_SIZES:
        r = rows[n]
        dense_ms = f"{1e3 * r['dense']:10.2f}" if "dense" in r else f"{'-':>10}"
        dense_mb = f"{r['dense_peak'] / 2**20:14.1f}" if "dense" in r else f"{'-':>14}"
        ratio = f"{r['dense'] / r['engine']:12.0f}x" if "dense" in r else f"{'-':>13}"
        agree = f"{r['agree']:13.1e}" if "dense" in r else f"{'-':>13}"
        print(f"{n:>7} {1e3 * r['value']:9.3f} {1e3 * r['engine']:10.3f} {r['engine_peak'] / 2**20:15.2f} "
              f"{r['ws'] / 2**20:13.2f} {dense_ms} {dense_mb} {ratio} {agree}")
    big = [n for n in ENGINE_SIZES if n >= 1_000]
    slope = np.polyfit(np.log(big), np.log([rows[n]["engine"] for n in big]), 1)[0]
    print("value ms: log-likelihood only (kernels.loglik_kernel); engine ms: value + "
          "gradient; engine peak MB: tracemalloc of one loglik_and_grad call; "
          "workspace MB: bytes of the arrays the kernel allocates, for comparison")
    print(f"engine time growth exponent, N = {big[0]} to {big[-1]}: {slope:.2f}")
    print(f"engine speedup vs dense at N=2000: {rows[2000]['dense'] / rows[2000]['engine']:.0f}x")

    # k = 1 has its own closed-form path in the kernels
    kernels.value_and_grad_kernel(*kernel_args(make_problem_k1(10)))
    kernels.loglik_kernel(*kernel_args(make_problem_k1(10)))
    print("k=1, same setting: value ms / engine ms (value + gradient)")
    for n in [1_000, 10_000, 50_000]:
        args = kernel_args(make_problem_k1(n))
        t_value = median_time(lambda: kernels.loglik_kernel(*args))
        t_engine = median_time(lambda: kernels.value_and_grad_kernel(*args))
        print(f"{n:>7} {1e3 * t_value:9.3f} {1e3 * t_engine:10.3f}")


if __name__ == "__main__":
    main()
