"""Numba kernels for k = 3..6 traits: the general algorithm on a compact memory layout.

Same messages and formulas as the general passes of :mod:`cladewise.engine.kernels`
(:func:`~cladewise.engine.kernels.absorb`, :func:`~cladewise.engine.kernels.chol_inv`),
laid out like the k = 2 path: at large N the passes are bound by memory access (a
node's parent is anywhere in the node order), so all that is read or written at the
parent sits in one row of a compact internal-node array ``Pm`` and the per-node data
read in node order in another, ``Sq``; the small k x k algebra runs on scratch
arrays that stay in the first-level cache.

The trait count is a compile-time constant: every function takes ``kt``, a tuple of
``k`` zeros, whose length numba knows when it compiles. Each k gets its own machine
code (loops of known length are unrolled), compiled on first use and cached on disk.

Row layout (``B = k*k + k``): a canonical message is ``[J (k*k, row-major), h (k)]``,
a moment form ``[P (k*k), m (k)]``. ``Pm[v - N, 0:B]`` is the message accumulated at
internal node ``v``, ``Pm[v - N, B:2B]`` its outside moment form (downward pass);
``Sq[v, 0:B]`` the message ``v`` pushes across its branch (after the downward pass,
for a tip, its outside moment form) and ``Sq[v, B:2B]`` the sum of the messages of
the siblings before ``v``.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from cladewise.engine.kernels import (
    LOG_2PI,
    PREFETCH_AHEAD,
    MODE_ANCESTRAL,
    MODE_GRAD,
    MODE_LOO,
    observed_index,
    prefetch_row,
    absorb,
    chol_inv,
)

__all__ = [
    "SMALL_K",
    "loglik_small",
    "value_and_grad_small",
    "loo_small",
    "ancestral_small",
    "loo_logdens_draws_small",
]

#: trait counts served by this module
SMALL_K = (3, 4, 5, 6)

_JIT = {"cache": True, "nogil": True}


@njit(**_JIT)
def _workspace(n, ntip, kt):
    k = len(kt)
    B = k * k + k
    return np.empty((n - ntip, 2 * B)), np.empty((n, 2 * B))


@njit(**_JIT)
def _upward(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, kt):
    """Pruning pass (see :func:`cladewise.engine.kernels.upward`); returns the log-likelihood.

    With an empty ``Sq`` (value only) ``Pm`` needs just ``B`` columns.
    """
    k = len(kt)
    KK = k * k
    B = KK + k
    n = parent.shape[0]
    ntip = y.shape[0]
    store = Sq.shape[0] > 0
    idx = np.empty(k, np.int64)
    K = np.empty((k, k))
    W = np.empty((k, k))
    M = np.empty((k, k))
    H = np.empty((k, k))
    J = np.empty((k, k))
    V = np.empty((k, k))
    piv = np.empty(k, np.int64)
    zero = np.zeros(k)
    h = np.empty(k)
    g = np.empty(k)
    for w in range(n - ntip):
        for i in range(B):
            Pm[w, i] = 0.0
    total = 0.0
    for v in range(n):
        t = lengths[v]
        rg = regime[v]
        if v < ntip:
            for i in range(k):
                h[i] = 0.0
                for j in range(k):
                    J[i, j] = 0.0
            q = observed_index(observed, v, idx)
            if q > 0:
                for a in range(q):
                    ia = idx[a]
                    for b in range(q):
                        ib = idx[b]
                        K[a, b] = (t * R[rg, ia, ib] + E[ia, ib]
                                   + 0.5 * (err[v, ia, ib] + err[v, ib, ia]))
                logdet = chol_inv(K, q, W)
                if math.isnan(logdet):
                    return -np.inf
                quad = 0.0
                for a in range(q):
                    s = 0.0
                    for b in range(q):
                        s += W[a, b] * y[v, idx[b]]
                        J[idx[a], idx[b]] = W[a, b]
                    h[idx[a]] = s
                    quad += s * y[v, idx[a]]
                total += -0.5 * quad - 0.5 * logdet - 0.5 * q * LOG_2PI
        else:
            w = v - ntip
            for i in range(k):
                h[i] = Pm[w, KK + i]
                for j in range(k):
                    J[i, j] = Pm[w, i * k + j]
            if t != 0.0:
                for i in range(k):
                    for j in range(k):
                        V[i, j] = t * R[rg, i, j]
                logdet = absorb(J, h, V, zero, M, piv, H, g, k)
                quad = 0.0
                for i in range(k):
                    s = 0.0
                    for j in range(k):
                        s += V[i, j] * h[j]
                    quad += s * g[i]
                total += -0.5 * logdet + 0.5 * quad
                for i in range(k):
                    h[i] = g[i]
                    for j in range(k):
                        J[i, j] = H[i, j]
        if v + PREFETCH_AHEAD < n - 1:
            prefetch_row(Pm, parent[v + PREFETCH_AHEAD] - ntip)
        p = parent[v] - ntip
        if store:
            for i in range(k):
                Sq[v, KK + i] = h[i]
                for j in range(k):
                    Sq[v, i * k + j] = J[i, j]
        if p >= 0:
            if store:
                # siblings before v: what the parent holds so far
                for i in range(B):
                    Sq[v, B + i] = Pm[p, i]
            for i in range(k):
                Pm[p, KK + i] += h[i]
                for j in range(k):
                    Pm[p, i * k + j] += J[i, j]
    # J, h now hold the root's message
    quad = 0.0
    for i in range(k):
        s = 0.0
        for j in range(k):
            s += J[i, j] * mu[j]
        quad += mu[i] * (h[i] - 0.5 * s)
    return total + quad


@njit(**_JIT)
def _tips(parent, lengths, y, observed, R, regime, E, err, Sq, mode, d_lengths, d_y, d_R, d_E,
          d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, kt):
    """Terms of every tip from its outside moment form in ``Sq[c, 0:B]`` (one sweep).

    The formulas of :func:`cladewise.engine.kernels._tip_terms`.
    """
    k = len(kt)
    KK = k * k
    ntip = y.shape[0]
    root = parent.shape[0] - 1
    idx = np.empty(k, np.int64)
    K = np.empty((k, k))
    W = np.empty((k, k))
    Pc = np.empty((k, k))
    mc = np.empty(k)
    r = np.empty(k)
    Wr = np.empty(k)
    for c in range(ntip):
        t = lengths[c]
        rg = regime[c]
        for i in range(k):
            mc[i] = Sq[c, KK + i]
            for j in range(k):
                Pc[i, j] = Sq[c, i * k + j]
        if mode & MODE_LOO:
            for i in range(k):
                loo_mean[c, i] = mc[i]
                for j in range(k):
                    loo_cov[c, i, j] = Pc[i, j] + E[i, j] + 0.5 * (err[c, i, j] + err[c, j, i])
        q = observed_index(observed, c, idx)
        if q == 0:
            if mode & MODE_LOO:
                loo_logdens[c] = 0.0
            if mode & MODE_GRAD:
                d_lengths[c] = 0.0
            if mode & MODE_ANCESTRAL:
                for i in range(k):
                    anc_mean[c, i] = mc[i]
                    for j in range(k):
                        anc_cov[c, i, j] = Pc[i, j]
            continue
        for a in range(q):
            ia = idx[a]
            for b in range(q):
                ib = idx[b]
                K[a, b] = Pc[ia, ib] + E[ia, ib] + 0.5 * (err[c, ia, ib] + err[c, ib, ia])
        logdet = chol_inv(K, q, W)
        quad = 0.0
        for a in range(q):
            r[a] = y[c, idx[a]] - mc[idx[a]]
        for a in range(q):
            s = 0.0
            for b in range(q):
                s += W[a, b] * r[b]
            Wr[a] = s
            quad += s * r[a]
        if mode & MODE_LOO:
            loo_logdens[c] = -0.5 * quad - 0.5 * logdet - 0.5 * q * LOG_2PI
        if mode & MODE_GRAD:
            tr = 0.0
            for a in range(q):
                ia = idx[a]
                for b in range(q):
                    ib = idx[b]
                    G = 0.5 * (Wr[a] * Wr[b] - W[a, b])
                    tr += R[rg, ia, ib] * G
                    d_R[rg, ia, ib] += t * G
                    d_E[ia, ib] += G
                    d_err[c, ia, ib] = G
                d_y[c, ia] = -Wr[a]
                if c == root:
                    d_mu[ia] = Wr[a]
            d_lengths[c] = tr
        if mode & MODE_ANCESTRAL:
            for i in range(k):
                s = mc[i]
                for a in range(q):
                    s += Pc[i, idx[a]] * Wr[a]
                anc_mean[c, i] = s
            for i in range(k):
                for j in range(k):
                    s = 0.0
                    for a in range(q):
                        for b in range(q):
                            s += Pc[i, idx[a]] * W[a, b] * Pc[idx[b], j]
                    anc_cov[c, i, j] = Pc[i, j] - s


@njit(**_JIT)
def _downward(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
              d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
              anc_mean, anc_cov, kt):
    """Pass from the root to the tips after :func:`_upward` (see
    :func:`cladewise.engine.kernels.downward`).

    ``Pm[v - N, 0:B]`` (the message at ``v``) is recycled, once ``v`` is visited, as
    the running sum of the messages of ``v``'s children visited so far (children
    are visited in decreasing order, so these are the siblings after a child).
    """
    k = len(kt)
    KK = k * k
    B = KK + k
    n = parent.shape[0]
    ntip = y.shape[0]
    want_internal = (mode & (MODE_GRAD | MODE_ANCESTRAL)) != 0
    if mode & MODE_GRAD:
        d_lengths[:] = 0.0
        d_y[:] = 0.0
        d_R[:] = 0.0
        d_E[:] = 0.0
        d_err[:] = 0.0
        d_mu[:] = 0.0
    M = np.empty((k, k))
    H = np.empty((k, k))
    T = np.empty((k, k))
    sJ = np.empty((k, k))
    Pp = np.empty((k, k))
    Q = np.empty((k, k))
    J = np.empty((k, k))
    dR = np.zeros(R.shape)
    piv = np.empty(k, np.int64)
    sh = np.empty(k)
    mp = np.empty(k)
    nm = np.empty(k)
    h = np.empty(k)
    g = np.empty(k)
    root = n - 1
    for c in range(root, -1, -1):
        t = lengths[c]
        if c == root:
            for i in range(k):
                nm[i] = mu[i]
                for j in range(k):
                    Q[i, j] = 0.0
        else:
            if c >= PREFETCH_AHEAD:
                prefetch_row(Pm, parent[c - PREFETCH_AHEAD] - ntip)
            p = parent[c] - ntip
            # siblings' messages: before c (upward pass) plus after c (running sum),
            # rather than the total minus c, which could cancel badly
            nonzero = False
            for i in range(k):
                sh[i] = Sq[c, B + KK + i] + Pm[p, KK + i]
                mp[i] = Pm[p, B + KK + i]
                for j in range(k):
                    s = Sq[c, B + i * k + j] + Pm[p, i * k + j]
                    sJ[i, j] = s
                    if s != 0.0:
                        nonzero = True
                    Pp[i, j] = Pm[p, B + i * k + j]
            for i in range(B):
                Pm[p, i] += Sq[c, i]
            if nonzero:
                # condition the parent's outside N(m_p, P_p) on the siblings' messages
                absorb(sJ, sh, Pp, mp, M, piv, H, g, k)
                for i in range(k):
                    s = mp[i]
                    for j in range(k):
                        s += Pp[i, j] * g[j]
                    nm[i] = s
                    for j in range(k):
                        s = 0.0
                        for a in range(k):
                            s += Pp[i, a] * H[a, j]
                        T[i, j] = s
                for i in range(k):
                    for j in range(k):
                        s = 0.0
                        for a in range(k):
                            s += T[i, a] * Pp[a, j]
                        Q[i, j] = Pp[i, j] - s
            else:
                for i in range(k):
                    nm[i] = mp[i]
                    for j in range(k):
                        Q[i, j] = Pp[i, j]
        rg = regime[c]
        for i in range(k):
            for j in range(i + 1):
                s = 0.5 * (Q[i, j] + Q[j, i]) + t * R[rg, i, j]
                Q[i, j] = s
                Q[j, i] = s
        if c < ntip:
            for i in range(k):
                Sq[c, KK + i] = nm[i]
                for j in range(k):
                    Sq[c, i * k + j] = Q[i, j]
            continue
        w = c - ntip
        for i in range(k):
            Pm[w, B + KK + i] = nm[i]
            for j in range(k):
                Pm[w, B + i * k + j] = Q[i, j]
        if want_internal:
            # gradient and ancestral terms of an internal node (or the root)
            for i in range(k):
                h[i] = Pm[w, KK + i]
                for j in range(k):
                    J[i, j] = Pm[w, i * k + j]
            absorb(J, h, Q, nm, M, piv, H, g, k)
            if mode & MODE_GRAD:
                tr = 0.0
                for i in range(k):
                    for j in range(k):
                        G = 0.5 * (g[i] * g[j] - H[i, j])
                        tr += R[rg, i, j] * G
                        dR[rg, i, j] += t * G
                d_lengths[c] = tr
                if c == root:
                    for i in range(k):
                        d_mu[i] = g[i]
            if mode & MODE_ANCESTRAL:
                for i in range(k):
                    s = nm[i]
                    for j in range(k):
                        s += Q[i, j] * g[j]
                    anc_mean[c, i] = s
                for i in range(k):
                    for j in range(k):
                        s = 0.0
                        for a in range(k):
                            for b in range(k):
                                s += Q[i, a] * H[a, b] * Q[b, j]
                        anc_cov[c, i, j] = Q[i, j] - s
        for i in range(B):
            Pm[w, i] = 0.0
    if mode & MODE_GRAD:
        for rg in range(R.shape[0]):
            for i in range(k):
                for j in range(k):
                    d_R[rg, i, j] += dR[rg, i, j]
    _tips(parent, lengths, y, observed, R, regime, E, err, Sq, mode, d_lengths, d_y, d_R, d_E,
          d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, kt)


# --------------------------------------------------------------------- drivers
@njit(**_JIT)
def _run(parent, lengths, y, observed, R, regime, E, err, mu, mode, d_lengths, d_y, d_R,
         d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, kt):
    Pm, Sq = _workspace(parent.shape[0], y.shape[0], kt)
    logp = _upward(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, kt)
    if not np.isfinite(logp):
        return logp
    _downward(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
              d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
              anc_mean, anc_cov, kt)
    return logp


@njit(**_JIT)
def loglik_small(parent, lengths, y, observed, R, regime, E, err, mu, kt):
    """:func:`cladewise.engine.kernels.loglik_kernel` for ``k = len(kt)``."""
    k = len(kt)
    Pm = np.empty((parent.shape[0] - y.shape[0], k * k + k))
    return _upward(parent, lengths, y, observed, R, regime, E, err, mu, Pm, np.empty((0, 1)), kt)


@njit(**_JIT)
def value_and_grad_small(parent, lengths, y, observed, R, regime, E, err, mu, kt):
    """:func:`cladewise.engine.kernels.value_and_grad_kernel` for ``k = len(kt)``."""
    k = len(kt)
    n = parent.shape[0]
    ntip = y.shape[0]
    d_lengths = np.zeros(n)
    d_y = np.zeros((ntip, k))
    d_R = np.zeros(R.shape)
    d_E = np.zeros((k, k))
    d_err = np.zeros((ntip, k, k))
    d_mu = np.zeros(k)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_GRAD, d_lengths, d_y,
                d_R, d_E, d_err, d_mu, e1, e2, e0, e1, e2, kt)
    if not np.isfinite(logp):
        d_lengths[:] = 0.0
        d_y[:] = 0.0
        d_R[:] = 0.0
        d_E[:] = 0.0
        d_err[:] = 0.0
        d_mu[:] = 0.0
    return logp, d_lengths, d_y, d_R, d_E, d_err, d_mu


@njit(**_JIT)
def loo_small(parent, lengths, y, observed, R, regime, E, err, mu, kt):
    """:func:`cladewise.engine.kernels.loo_kernel` for ``k = len(kt)``."""
    k = len(kt)
    ntip = y.shape[0]
    loo_mean = np.full((ntip, k), np.nan)
    loo_cov = np.full((ntip, k, k), np.nan)
    loo_logdens = np.full(ntip, np.nan)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    ev = np.empty(k)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_LOO, e0, e1,
                np.empty(R.shape), ek, e2, ev, loo_mean, loo_cov, loo_logdens, e1, e2, kt)
    return loo_mean, loo_cov, loo_logdens, logp


@njit(**_JIT)
def ancestral_small(parent, lengths, y, observed, R, regime, E, err, mu, kt):
    """:func:`cladewise.engine.kernels.ancestral_kernel` for ``k = len(kt)``."""
    k = len(kt)
    n = parent.shape[0]
    anc_mean = np.full((n, k), np.nan)
    anc_cov = np.full((n, k, k), np.nan)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    ev = np.empty(k)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_ANCESTRAL, e0, e1,
                np.empty(R.shape), ek, e2, ev, e1, e2, e0, anc_mean, anc_cov, kt)
    return anc_mean, anc_cov, logp


@njit(**_JIT)
def loo_logdens_draws_small(parent, lengths, y, observed, R, regime, E, err, mu, kt):
    """:func:`cladewise.engine.kernels.loo_logdens_draws_kernel` for ``k = len(kt)``."""
    k = len(kt)
    S = R.shape[0]
    ntip = y.shape[0]
    out = np.empty((S, ntip))
    loo_mean = np.empty((ntip, k))
    loo_cov = np.empty((ntip, k, k))
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    ev = np.empty(k)
    eR = np.empty(R.shape[1:])
    Pm, Sq = _workspace(parent.shape[0], ntip, kt)
    for s in range(S):
        ln = lengths[s if lengths.shape[0] > 1 else 0]
        evs = err[s if err.shape[0] > 1 else 0]
        rgs = regime[s if regime.shape[0] > 1 else 0]
        logp = _upward(parent, ln, y, observed, R[s], rgs, E[s], evs, mu[s], Pm, Sq, kt)
        if not np.isfinite(logp):
            out[s, :] = np.nan
            continue
        _downward(parent, ln, y, observed, R[s], rgs, E[s], evs, mu[s], Pm, Sq, MODE_LOO,
                  e0, e1, eR, ek, e2, ev, loo_mean, loo_cov, out[s], e1, e2, kt)
    return out
