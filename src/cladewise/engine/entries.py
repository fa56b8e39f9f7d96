"""Entry points per trait count, so that a model compiles only the kernels it uses.

The ``*_kernel`` functions of :mod:`cladewise.engine.kernels` choose the k = 1,
k = 2 or general path at run time, so numba compiles all three the first time any
of them runs (most of a first fit's wait on a fresh install). The functions here
each reach one path: ``*_k1`` the one-trait path, ``*_k2`` the two-trait path,
:mod:`cladewise.engine.kernels_k3` ... ``kernels_k6`` k = 3..6 (straight-line code written by
:mod:`cladewise.engine.codegen_small`), and the general kernels any k.
:func:`kernel_for` picks one by k. All take the regime signature
(``R (n_regimes, k, k)``, ``regime`` one int per node; one regime is
``R[None]`` with ``regime`` zeros).
"""

from __future__ import annotations

import numpy as np
from numba import njit

import importlib

from cladewise.engine import kernels
from cladewise.engine.kernels import (
    MODE_ANCESTRAL,
    MODE_GRAD,
    MODE_LOO,
    downward1,
    downward2,
    upward1,
    upward2,
    workspace1,
    workspace2,
)

__all__ = ["TASKS", "kernel_for", "path_name"]

_JIT = {"cache": True, "nogil": True}
#: trait counts with generated kernels (:data:`cladewise.engine.codegen_small.GENERATED_K`;
#: not imported from there so that running the generator as a script stays clean)
GENERATED_K = (3, 4, 5, 6)
#: serve k = 3..6 by the generated kernels (checked equal to the general kernels and the
#: dense reference by tests/engine/test_kernels_small.py); False: the general kernels
COMPACT_SMALL_K = True
#: what an entry point computes (the names of the general ``*_regimes_kernel``)
TASKS = ("loglik", "value_and_grad", "loo", "ancestral", "loo_logdens_draws")


# --------------------------------------------------------------------- k = 1
@njit(**_JIT)
def _run_k1(parent, lengths, y, observed, R, regime, E, err, mu, mode, d_lengths, d_y, d_R,
            d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    Pm, Sq = workspace1(parent.shape[0], y.shape[0])
    logp = upward1(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq)
    if np.isfinite(logp):
        downward1(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
                   d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
                   anc_mean, anc_cov)
    return logp


@njit(**_JIT)
def loglik_k1(parent, lengths, y, observed, R, regime, E, err, mu):
    return upward1(parent, lengths, y, observed, R, regime, E, err, mu,
                    np.empty((parent.shape[0] - y.shape[0], 2)), np.empty((0, 4)))


@njit(**_JIT)
def value_and_grad_k1(parent, lengths, y, observed, R, regime, E, err, mu):
    o = _grad_outputs(parent, y, R)
    e1, e2, e0 = _empties(y)
    logp = _run_k1(parent, lengths, y, observed, R, regime, E, err, mu, MODE_GRAD, o[0], o[1],
                   o[2], o[3], o[4], o[5], e1, e2, e0, e1, e2)
    return _finish_grad(logp, o)


@njit(**_JIT)
def loo_k1(parent, lengths, y, observed, R, regime, E, err, mu):
    mean, cov, dens = _loo_outputs(y)
    e1, e2, e0 = _empties(y)
    k = y.shape[1]
    logp = _run_k1(parent, lengths, y, observed, R, regime, E, err, mu, MODE_LOO, e0, e1,
                   np.empty(R.shape), np.empty((k, k)), e2, np.empty(k), mean, cov, dens, e1, e2)
    return mean, cov, dens, logp


@njit(**_JIT)
def ancestral_k1(parent, lengths, y, observed, R, regime, E, err, mu):
    mean, cov = _anc_outputs(parent, y)
    e1, e2, e0 = _empties(y)
    k = y.shape[1]
    logp = _run_k1(parent, lengths, y, observed, R, regime, E, err, mu, MODE_ANCESTRAL, e0, e1,
                   np.empty(R.shape), np.empty((k, k)), e2, np.empty(k), e1, e2, e0, mean, cov)
    return mean, cov, logp


@njit(**_JIT)
def loo_logdens_draws_k1(parent, lengths, y, observed, R, regime, E, err, mu):
    out, mean, cov = _draws_outputs(R, y)
    e1, e2, e0 = _empties(y)
    k = y.shape[1]
    eR, ek, ev = np.empty(R.shape[1:]), np.empty((k, k)), np.empty(k)
    for s in range(R.shape[0]):
        logp = _run_k1(parent, lengths[s if lengths.shape[0] > 1 else 0], y, observed, R[s],
                       regime[s if regime.shape[0] > 1 else 0], E[s],
                       err[s if err.shape[0] > 1 else 0], mu[s], MODE_LOO, e0, e1, eR, ek, e2,
                       ev, mean, cov, out[s], e1, e2)
        if not np.isfinite(logp):
            out[s, :] = np.nan
    return out


# --------------------------------------------------------------------- k = 2
@njit(**_JIT)
def _run_k2(parent, lengths, y, observed, R, regime, E, err, mu, mode, d_lengths, d_y, d_R,
            d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    Pm, Sq = workspace2(parent.shape[0], y.shape[0])
    logp = upward2(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq)
    if np.isfinite(logp):
        downward2(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
                   d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
                   anc_mean, anc_cov)
    return logp


@njit(**_JIT)
def loglik_k2(parent, lengths, y, observed, R, regime, E, err, mu):
    return upward2(parent, lengths, y, observed, R, regime, E, err, mu,
                    np.empty((parent.shape[0] - y.shape[0], 5)), np.empty((0, 10)))


@njit(**_JIT)
def value_and_grad_k2(parent, lengths, y, observed, R, regime, E, err, mu):
    o = _grad_outputs(parent, y, R)
    e1, e2, e0 = _empties(y)
    logp = _run_k2(parent, lengths, y, observed, R, regime, E, err, mu, MODE_GRAD, o[0], o[1],
                   o[2], o[3], o[4], o[5], e1, e2, e0, e1, e2)
    return _finish_grad(logp, o)


@njit(**_JIT)
def loo_k2(parent, lengths, y, observed, R, regime, E, err, mu):
    mean, cov, dens = _loo_outputs(y)
    e1, e2, e0 = _empties(y)
    k = y.shape[1]
    logp = _run_k2(parent, lengths, y, observed, R, regime, E, err, mu, MODE_LOO, e0, e1,
                   np.empty(R.shape), np.empty((k, k)), e2, np.empty(k), mean, cov, dens, e1, e2)
    return mean, cov, dens, logp


@njit(**_JIT)
def ancestral_k2(parent, lengths, y, observed, R, regime, E, err, mu):
    mean, cov = _anc_outputs(parent, y)
    e1, e2, e0 = _empties(y)
    k = y.shape[1]
    logp = _run_k2(parent, lengths, y, observed, R, regime, E, err, mu, MODE_ANCESTRAL, e0, e1,
                   np.empty(R.shape), np.empty((k, k)), e2, np.empty(k), e1, e2, e0, mean, cov)
    return mean, cov, logp


@njit(**_JIT)
def loo_logdens_draws_k2(parent, lengths, y, observed, R, regime, E, err, mu):
    out, mean, cov = _draws_outputs(R, y)
    e1, e2, e0 = _empties(y)
    k = y.shape[1]
    eR, ek, ev = np.empty(R.shape[1:]), np.empty((k, k)), np.empty(k)
    for s in range(R.shape[0]):
        logp = _run_k2(parent, lengths[s if lengths.shape[0] > 1 else 0], y, observed, R[s],
                       regime[s if regime.shape[0] > 1 else 0], E[s],
                       err[s if err.shape[0] > 1 else 0], mu[s], MODE_LOO, e0, e1, eR, ek, e2,
                       ev, mean, cov, out[s], e1, e2)
        if not np.isfinite(logp):
            out[s, :] = np.nan
    return out


# --------------------------------------------------------------------- shared pieces
@njit(**_JIT)
def _empties(y):
    k = y.shape[1]
    return np.empty((0, k)), np.empty((0, k, k)), np.empty(0)


@njit(**_JIT)
def _grad_outputs(parent, y, R):
    ntip, k = y.shape
    return (np.zeros(parent.shape[0]), np.zeros((ntip, k)), np.zeros(R.shape), np.zeros((k, k)),
            np.zeros((ntip, k, k)), np.zeros(k))


@njit(**_JIT)
def _finish_grad(logp, o):
    if not np.isfinite(logp):
        o[0][:] = 0.0
        o[5][:] = 0.0
        o[1][:] = 0.0
        o[2][:] = 0.0
        o[3][:] = 0.0
        o[4][:] = 0.0
    return logp, o[0], o[1], o[2], o[3], o[4], o[5]


@njit(**_JIT)
def _loo_outputs(y):
    ntip, k = y.shape
    return np.full((ntip, k), np.nan), np.full((ntip, k, k), np.nan), np.full(ntip, np.nan)


@njit(**_JIT)
def _anc_outputs(parent, y):
    n, k = parent.shape[0], y.shape[1]
    return np.full((n, k), np.nan), np.full((n, k, k), np.nan)


@njit(**_JIT)
def _draws_outputs(R, y):
    ntip, k = y.shape
    return np.empty((R.shape[0], ntip)), np.empty((ntip, k)), np.empty((ntip, k, k))


# --------------------------------------------------------------------- dispatch
_BY_K = {
    1: {"loglik": loglik_k1, "value_and_grad": value_and_grad_k1, "loo": loo_k1,
        "ancestral": ancestral_k1, "loo_logdens_draws": loo_logdens_draws_k1},
    2: {"loglik": loglik_k2, "value_and_grad": value_and_grad_k2, "loo": loo_k2,
        "ancestral": ancestral_k2, "loo_logdens_draws": loo_logdens_draws_k2},
}


def _generated(task: str, k: int):
    # imported on first use: each k is its own module of straight-line code
    return getattr(importlib.import_module(f"cladewise.engine.kernels_k{k}"), f"{task}_k{k}")


def path_name(k: int) -> str:
    """Which kernels serve ``k`` traits (for messages and benchmarks)."""
    if k in _BY_K:
        return f"k = {k} closed-form path"
    if k in GENERATED_K and COMPACT_SMALL_K:
        return f"k = {k} generated path"
    return "general path"


def kernel_for(task: str, k: int):
    """The numba function computing ``task`` for ``k`` traits, with the regime signature.

    Returns ``(fn, extra)``: call ``fn(parent, lengths, y, observed, R, regime, E, err,
    mu, *extra)``; ``extra`` is ``()`` (kept so that callers need not change if a path
    ever takes extra arguments).
    """
    if task not in TASKS:
        raise ValueError(f"unknown task {task!r}; one of {TASKS}")
    if k in _BY_K:
        return _BY_K[k][task], ()
    if k in GENERATED_K and COMPACT_SMALL_K:
        return _generated(task, k), ()
    return getattr(kernels, f"{task}_regimes_kernel"), ()
