"""Numba kernels of the linear-time Gaussian tree likelihood.

Everything here works on plain arrays in the :class:`cladewise.trees.FlatTree`
order (tips ``0..N-1`` first, ``parent[i] > i``, root last) and trusts its input:
validation happens once in :mod:`cladewise.engine.api`. All functions are
``@njit`` so that other numba code (the PyTensor Op's numba implementation, the
posterior-draw loops) can call them directly.

Small k x k algebra (k is 1..6) is written out by hand on preallocated scratch
arrays: calling LAPACK from numba allocates on every call and would cost more than
the arithmetic itself.

Messages are in canonical form over a node's latent value,
``L(x) = exp(-x'Jx/2 + h'x + c)``. Every step that combines a canonical message
``(J, h)`` with a Gaussian in moment form ``N(m, V)`` goes through one primitive,
:func:`absorb`, which factors ``M = I + J V`` (LU with partial pivoting; its
eigenvalues are those of ``I + V^1/2 J V^1/2``, all >= 1, so it is always
invertible, even for singular ``J`` or ``V``) and returns

* ``H = M^-1 J = J (I + V J)^-1`` (symmetrised),
* ``g = M^-1 (h - J m)``,
* ``log det M``.

``H`` and ``g`` are at the same time the message pushed across a branch of
covariance ``V`` (with ``m = 0``), the Price/Bonnet derivatives
``dF/dm = g``, ``dF/dV = (g g' - H) / 2`` of ``F(m, V) = log E_N(m,V)[L(x)]``,
and the Kalman update of ``N(m, V)`` by ``L`` (mean ``m + V g``, covariance
``V - V H V``).

Tips are handled in moment form, directly from their observations: the message a
tip sends to its parent is the density of its observed cells given the parent's
value, ``N(y_o; x_o, (t R + E + diag(err_var))[o, o])``. This stays finite when a
species has no measurement error (``S = 0``), where an information-form tip
message would be infinite.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

_JIT = {"cache": True, "nogil": True}
# small helpers are inlined: a call passing many arrays costs more than k x k algebra
_INLINE = {"cache": True, "nogil": True, "inline": "always"}
_LOG_2PI = math.log(2.0 * math.pi)

MODE_GRAD = 1
MODE_LOO = 2
MODE_ANCESTRAL = 4


# --------------------------------------------------------------------- small algebra
@njit(**_INLINE)
def lu_factor(a, piv, k):
    """LU-factor ``a[:k, :k]`` in place (partial pivoting); return log|det|."""
    logdet = 0.0
    for col in range(k):
        p = col
        best = abs(a[col, col])
        for r in range(col + 1, k):
            v = abs(a[r, col])
            if v > best:
                best = v
                p = r
        piv[col] = p
        if p != col:
            for j in range(k):
                tmp = a[col, j]
                a[col, j] = a[p, j]
                a[p, j] = tmp
        d = a[col, col]
        logdet += math.log(abs(d))
        for r in range(col + 1, k):
            f = a[r, col] / d
            a[r, col] = f
            for j in range(col + 1, k):
                a[r, j] -= f * a[col, j]
    return logdet


@njit(**_INLINE)
def lu_solve_vec(lu, piv, b, k):
    """Solve ``A x = b`` in place given :func:`lu_factor` output."""
    for i in range(k):
        p = piv[i]
        if p != i:
            tmp = b[i]
            b[i] = b[p]
            b[p] = tmp
    for i in range(k):
        s = b[i]
        for j in range(i):
            s -= lu[i, j] * b[j]
        b[i] = s
    for i in range(k - 1, -1, -1):
        s = b[i]
        for j in range(i + 1, k):
            s -= lu[i, j] * b[j]
        b[i] = s / lu[i, i]


@njit(**_INLINE)
def lu_solve_mat(lu, piv, b, k):
    """Solve ``A X = B`` in place (``B`` is k x k) given :func:`lu_factor` output."""
    for i in range(k):
        p = piv[i]
        if p != i:
            for c in range(k):
                tmp = b[i, c]
                b[i, c] = b[p, c]
                b[p, c] = tmp
    for c in range(k):
        for i in range(k):
            s = b[i, c]
            for j in range(i):
                s -= lu[i, j] * b[j, c]
            b[i, c] = s
        for i in range(k - 1, -1, -1):
            s = b[i, c]
            for j in range(i + 1, k):
                s -= lu[i, j] * b[j, c]
            b[i, c] = s / lu[i, i]


@njit(**_INLINE)
def absorb(J, h, V, m, M, piv, H, g, k):
    """Combine canonical ``(J, h)`` with ``N(m, V)``; see the module docstring.

    Writes ``H`` and ``g``; ``M`` and ``piv`` are scratch. Returns ``log det(I + J V)``.
    """
    for i in range(k):
        for j in range(k):
            s = 0.0
            for l in range(k):
                s += J[i, l] * V[l, j]
            M[i, j] = s
        M[i, i] += 1.0
    logdet = lu_factor(M, piv, k)
    for i in range(k):
        s = h[i]
        for l in range(k):
            s -= J[i, l] * m[l]
        g[i] = s
        for j in range(k):
            H[i, j] = J[i, j]
    lu_solve_vec(M, piv, g, k)
    lu_solve_mat(M, piv, H, k)
    for i in range(k):
        for j in range(i + 1, k):
            s = 0.5 * (H[i, j] + H[j, i])
            H[i, j] = s
            H[j, i] = s
    return logdet


@njit(**_INLINE)
def chol_inv(K, q, W):
    """Cholesky-invert the SPD ``K[:q, :q]`` in place; inverse into ``W[:q, :q]``.

    Returns ``log det K``, or NaN when ``K`` is not positive definite.
    """
    logdet = 0.0
    for j in range(q):
        s = K[j, j]
        for l in range(j):
            s -= K[j, l] * K[j, l]
        if not s > 0.0:
            return np.nan
        d = math.sqrt(s)
        K[j, j] = d
        logdet += 2.0 * math.log(d)
        for i in range(j + 1, q):
            s = K[i, j]
            for l in range(j):
                s -= K[i, l] * K[j, l]
            K[i, j] = s / d
    # K now holds L (lower). Invert L in place into the lower triangle of K.
    for j in range(q):
        K[j, j] = 1.0 / K[j, j]
        for i in range(j + 1, q):
            s = 0.0
            for l in range(j, i):
                s -= K[i, l] * K[l, j]
            K[i, j] = s / K[i, i]
    # W = L^-T L^-1
    for i in range(q):
        for j in range(i + 1):
            s = 0.0
            for l in range(i, q):
                s += K[l, i] * K[l, j]
            W[i, j] = s
            W[j, i] = s
    return logdet


# --------------------------------------------------------------------- the passes
@njit(**_INLINE)
def _observed_index(observed, i, idx):
    q = 0
    for j in range(observed.shape[1]):
        if observed[i, j]:
            idx[q] = j
            q += 1
    return q


@njit(**_JIT)
def upward(parent, lengths, y, observed, R, E, err_var, mu, Jn, hn, Ju, hu, Js, hs):
    """Pruning pass from the tips to the root; returns the log-likelihood.

    Fills, for every node ``v``: ``Jn[v], hn[v]`` the message at the node (sum of
    its children's messages; unused for tips), ``Ju[v], hu[v]`` the message pushed
    across its branch to the parent, and ``Js[v], hs[v]`` the sum of the messages
    of the siblings that come before ``v`` (completed by :func:`downward`).
    Returns ``-inf`` when a tip's observed block is not positive definite.
    """
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    idx = np.empty(k, np.int64)
    K = np.empty((k, k))
    W = np.empty((k, k))
    M = np.empty((k, k))
    piv = np.empty(k, np.int64)
    zero = np.zeros(k)
    Rh = np.empty(k)
    Jn[:] = 0.0
    hn[:] = 0.0
    total = 0.0
    for v in range(n):
        t = lengths[v]
        Jv = Ju[v]
        hv = hu[v]
        if v < ntip:
            for i in range(k):
                hv[i] = 0.0
                for j in range(k):
                    Jv[i, j] = 0.0
            q = _observed_index(observed, v, idx)
            if q > 0:
                for a in range(q):
                    ia = idx[a]
                    for b in range(q):
                        ib = idx[b]
                        K[a, b] = t * R[ia, ib] + E[ia, ib]
                    K[a, a] += err_var[v, ia]
                logdet = chol_inv(K, q, W)
                if math.isnan(logdet):
                    return -np.inf
                quad = 0.0
                for a in range(q):
                    s = 0.0
                    for b in range(q):
                        s += W[a, b] * y[v, idx[b]]
                        Jv[idx[a], idx[b]] = W[a, b]
                    hv[idx[a]] = s
                    quad += s * y[v, idx[a]]
                total += -0.5 * quad - 0.5 * logdet - 0.5 * q * _LOG_2PI
        elif t == 0.0:
            for i in range(k):
                hv[i] = hn[v, i]
                for j in range(k):
                    Jv[i, j] = Jn[v, i, j]
        else:
            for i in range(k):
                for j in range(k):
                    K[i, j] = t * R[i, j]
            logdet = absorb(Jn[v], hn[v], K, zero, M, piv, Jv, hv, k)
            quad = 0.0
            for i in range(k):
                s = 0.0
                for j in range(k):
                    s += K[i, j] * hn[v, j]
                Rh[i] = s
                quad += s * hv[i]
            total += -0.5 * logdet + 0.5 * quad
        p = parent[v]
        if p >= 0:
            # siblings before v: what the parent holds so far
            for i in range(k):
                hs[v, i] = hn[p, i]
                hn[p, i] += hv[i]
                for j in range(k):
                    Js[v, i, j] = Jn[p, i, j]
                    Jn[p, i, j] += Jv[i, j]
    root = n - 1
    quad = 0.0
    for i in range(k):
        s = 0.0
        for j in range(k):
            s += Ju[root, i, j] * mu[j]
        quad += mu[i] * (hu[root, i] - 0.5 * s)
    return total + quad


def _internal_terms_py(v, t, Jn, hn, m, P, R, mode, M, piv, H, g, d_lengths, d_R,
                    anc_mean, anc_cov, k):
    """Gradient and ancestral terms of an internal node (or of the root)."""
    absorb(Jn[v], hn[v], P[v], m[v], M, piv, H, g, k)
    if mode & MODE_GRAD:
        tr = 0.0
        for i in range(k):
            for j in range(k):
                G = 0.5 * (g[i] * g[j] - H[i, j])
                tr += R[i, j] * G
                d_R[i, j] += t * G
        d_lengths[v] = tr
    if mode & MODE_ANCESTRAL:
        Pv = P[v]
        for i in range(k):
            s = m[v, i]
            for j in range(k):
                s += Pv[i, j] * g[j]
            anc_mean[v, i] = s
        # V - V H V
        for i in range(k):
            for j in range(k):
                s = 0.0
                for a in range(k):
                    for b in range(k):
                        s += Pv[i, a] * H[a, b] * Pv[b, j]
                anc_cov[v, i, j] = Pv[i, j] - s


def _tip_terms_py(c, t, y, observed, R, E, err_var, m, P, mode, idx, K, W, r, Wr,
               d_lengths, d_y, d_R, d_E, d_err_var, d_mu, is_root,
               loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, k):
    """Gradient, LOO and ancestral terms of tip ``c`` given its outside ``N(m, P)``."""
    Pc = P[c]
    mc = m[c]
    if mode & MODE_LOO:
        for i in range(k):
            loo_mean[c, i] = mc[i]
            for j in range(k):
                loo_cov[c, i, j] = Pc[i, j] + E[i, j]
            loo_cov[c, i, i] += err_var[c, i]
    q = _observed_index(observed, c, idx)
    if q == 0:
        if mode & MODE_LOO:
            loo_logdens[c] = 0.0
        if mode & MODE_GRAD:
            d_lengths[c] = 0.0
        if mode & MODE_ANCESTRAL:
            anc_mean[c] = mc
            anc_cov[c] = Pc
        return
    for a in range(q):
        ia = idx[a]
        for b in range(q):
            K[a, b] = Pc[ia, idx[b]] + E[ia, idx[b]]
        K[a, a] += err_var[c, ia]
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
        loo_logdens[c] = -0.5 * quad - 0.5 * logdet - 0.5 * q * _LOG_2PI
    if mode & MODE_GRAD:
        tr = 0.0
        for a in range(q):
            ia = idx[a]
            for b in range(q):
                ib = idx[b]
                G = 0.5 * (Wr[a] * Wr[b] - W[a, b])
                tr += R[ia, ib] * G
                d_R[ia, ib] += t * G
                d_E[ia, ib] += G
            d_err_var[c, ia] = 0.5 * (Wr[a] * Wr[a] - W[a, a])
            d_y[c, ia] = -Wr[a]
            if is_root:
                d_mu[ia] = Wr[a]
        d_lengths[c] = tr
    if mode & MODE_ANCESTRAL:
        # Kalman update of N(m, P) by y_o = x_o + e, e ~ N(0, S): gain P[:, o] W.
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


_internal_terms = njit(**_JIT)(_internal_terms_py)
_tip_terms = njit(**_JIT)(_tip_terms_py)


@njit(**_JIT)
def downward(parent, lengths, y, observed, R, E, err_var, mu, Jn, hn, Ju, hu, Js, hs,
             sufJ, sufh, m, P, mode, d_lengths, d_y, d_R, d_E, d_err_var, d_mu,
             loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    """Pass from the root to the tips after :func:`upward`.

    ``m[v], P[v]`` become the mean and covariance of node ``v``'s latent value given
    all data outside its subtree. ``mode`` (bit flags ``MODE_GRAD``, ``MODE_LOO``,
    ``MODE_ANCESTRAL``) says which outputs to fill; the others are not touched and
    may be empty arrays.
    """
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    idx = np.empty(k, np.int64)
    K = np.empty((k, k))
    W = np.empty((k, k))
    M = np.empty((k, k))
    H = np.empty((k, k))
    T = np.empty((k, k))
    piv = np.empty(k, np.int64)
    g = np.empty(k)
    r = np.empty(k)
    Wr = np.empty(k)
    want_internal = (mode & (MODE_GRAD | MODE_ANCESTRAL)) != 0
    if mode & MODE_GRAD:
        d_lengths[:] = 0.0
        d_y[:] = 0.0
        d_R[:] = 0.0
        d_E[:] = 0.0
        d_err_var[:] = 0.0
        d_mu[:] = 0.0
    sufJ[:] = 0.0
    sufh[:] = 0.0

    root = n - 1
    t = lengths[root]
    m[root] = mu
    for i in range(k):
        for j in range(k):
            P[root, i, j] = t * R[i, j]
    if root < ntip:
        _tip_terms(root, t, y, observed, R, E, err_var, m, P, mode, idx, K, W, r, Wr,
                   d_lengths, d_y, d_R, d_E, d_err_var, d_mu, True,
                   loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, k)
    elif want_internal:
        _internal_terms(root, t, Jn, hn, m, P, R, mode, M, piv, H, g, d_lengths, d_R,
                        anc_mean, anc_cov, k)
        if mode & MODE_GRAD:
            d_mu[:] = g

    for c in range(n - 2, -1, -1):
        p = parent[c]
        Jsc = Js[c]
        hsc = hs[c]
        # add the siblings after c (suffix sums; children are visited in
        # decreasing order) rather than subtracting c from the total, which could
        # cancel badly when c's message dominates
        for i in range(k):
            hsc[i] += sufh[p, i]
            sufh[p, i] += hu[c, i]
            for j in range(k):
                Jsc[i, j] += sufJ[p, i, j]
                sufJ[p, i, j] += Ju[c, i, j]
        Pp = P[p]
        Pc = P[c]
        nonzero = False
        for i in range(k):
            for j in range(k):
                if Jsc[i, j] != 0.0:
                    nonzero = True
        if nonzero:
            # condition the parent's outside N(m_p, P_p) on the siblings' messages
            absorb(Jsc, hsc, Pp, m[p], M, piv, H, g, k)
            for i in range(k):
                s = m[p, i]
                for j in range(k):
                    s += Pp[i, j] * g[j]
                m[c, i] = s
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
                    Pc[i, j] = Pp[i, j] - s
        else:
            for i in range(k):
                m[c, i] = m[p, i]
                for j in range(k):
                    Pc[i, j] = Pp[i, j]
        t = lengths[c]
        for i in range(k):
            for j in range(i + 1):
                s = 0.5 * (Pc[i, j] + Pc[j, i]) + t * R[i, j]
                Pc[i, j] = s
                Pc[j, i] = s
        if c < ntip:
            _tip_terms(c, t, y, observed, R, E, err_var, m, P, mode, idx, K, W, r, Wr,
                       d_lengths, d_y, d_R, d_E, d_err_var, d_mu, False,
                       loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, k)
        elif want_internal:
            _internal_terms(c, t, Jn, hn, m, P, R, mode, M, piv, H, g, d_lengths, d_R,
                            anc_mean, anc_cov, k)


# --------------------------------------------------------------------- drivers
@njit(**_JIT)
def _workspace(n, k):
    Jn = np.empty((n, k, k))
    hn = np.empty((n, k))
    Ju = np.empty((n, k, k))
    hu = np.empty((n, k))
    Js = np.empty((n, k, k))
    hs = np.empty((n, k))
    return Jn, hn, Ju, hu, Js, hs


@njit(**_JIT)
def loglik_kernel(parent, lengths, y, observed, R, E, err_var, mu):
    """Log-likelihood only (one upward pass)."""
    n = parent.shape[0]
    k = y.shape[1]
    Jn, hn, Ju, hu, Js, hs = _workspace(n, k)
    return upward(parent, lengths, y, observed, R, E, err_var, mu, Jn, hn, Ju, hu, Js, hs)


@njit(**_JIT)
def _run(parent, lengths, y, observed, R, E, err_var, mu, mode, d_lengths, d_y, d_R,
         d_E, d_err_var, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    n = parent.shape[0]
    k = y.shape[1]
    Jn, hn, Ju, hu, Js, hs = _workspace(n, k)
    logp = upward(parent, lengths, y, observed, R, E, err_var, mu, Jn, hn, Ju, hu, Js, hs)
    if not np.isfinite(logp):
        return logp
    # the upward pass is done with Jn's role as an accumulator, reuse nothing else
    sufJ = np.empty((n, k, k))
    sufh = np.empty((n, k))
    m = np.empty((n, k))
    P = np.empty((n, k, k))
    downward(parent, lengths, y, observed, R, E, err_var, mu, Jn, hn, Ju, hu, Js, hs,
             sufJ, sufh, m, P, mode, d_lengths, d_y, d_R, d_E, d_err_var, d_mu,
             loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov)
    return logp


@njit(**_JIT)
def value_and_grad_kernel(parent, lengths, y, observed, R, E, err_var, mu):
    """Log-likelihood and its gradient.

    Returns ``(logp, d_lengths, d_y, d_R, d_E, d_err_var, d_mu)``; the gradients
    with respect to the symmetric matrices ``R`` and ``E`` are symmetric (the
    derivative along a symmetric perturbation of an off-diagonal pair is
    ``d[i, j] + d[j, i]``). Gradients are zero when ``logp`` is not finite.
    """
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    d_lengths = np.zeros(n)
    d_y = np.zeros((ntip, k))
    d_R = np.zeros((k, k))
    d_E = np.zeros((k, k))
    d_err_var = np.zeros((ntip, k))
    d_mu = np.zeros(k)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    logp = _run(parent, lengths, y, observed, R, E, err_var, mu, MODE_GRAD, d_lengths, d_y,
                d_R, d_E, d_err_var, d_mu, e1, e2, e0, e1, e2)
    if not np.isfinite(logp):
        d_lengths[:] = 0.0
        d_y[:] = 0.0
        d_R[:] = 0.0
        d_E[:] = 0.0
        d_err_var[:] = 0.0
        d_mu[:] = 0.0
    return logp, d_lengths, d_y, d_R, d_E, d_err_var, d_mu


@njit(**_JIT)
def loo_kernel(parent, lengths, y, observed, R, E, err_var, mu):
    """Leave-one-species-out predictive of every tip: ``(mean, cov, logdens, logp)``."""
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    loo_mean = np.full((ntip, k), np.nan)
    loo_cov = np.full((ntip, k, k), np.nan)
    loo_logdens = np.full(ntip, np.nan)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    ev = np.empty(k)
    logp = _run(parent, lengths, y, observed, R, E, err_var, mu, MODE_LOO, e0, e1, ek, ek,
                e1, ev, loo_mean, loo_cov, loo_logdens, e1, e2)
    return loo_mean, loo_cov, loo_logdens, logp


@njit(**_JIT)
def ancestral_kernel(parent, lengths, y, observed, R, E, err_var, mu):
    """Posterior mean and covariance of every node's latent value: ``(mean, cov, logp)``."""
    n = parent.shape[0]
    k = y.shape[1]
    anc_mean = np.full((n, k), np.nan)
    anc_cov = np.full((n, k, k), np.nan)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    ev = np.empty(k)
    logp = _run(parent, lengths, y, observed, R, E, err_var, mu, MODE_ANCESTRAL, e0, e1, ek,
                ek, e1, ev, e1, e2, e0, anc_mean, anc_cov)
    return anc_mean, anc_cov, logp


@njit(**_JIT)
def loo_logdens_draws_kernel(parent, lengths, y, observed, R, E, err_var, mu):
    """Leave-one-species-out log densities for many parameter draws.

    ``lengths`` is (S_l, n_nodes), ``err_var`` (S_e, N, k) with S_l, S_e in {1, S};
    ``R``, ``E`` are (S, k, k) and ``mu`` (S, k). Returns (S, N); a draw whose
    likelihood cannot be evaluated gets NaN.
    """
    S = R.shape[0]
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    out = np.empty((S, ntip))
    Jn, hn, Ju, hu, Js, hs = _workspace(n, k)
    sufJ = np.empty((n, k, k))
    sufh = np.empty((n, k))
    m = np.empty((n, k))
    P = np.empty((n, k, k))
    loo_mean = np.empty((ntip, k))
    loo_cov = np.empty((ntip, k, k))
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    ev = np.empty(k)
    for s in range(S):
        ln = lengths[s if lengths.shape[0] > 1 else 0]
        evs = err_var[s if err_var.shape[0] > 1 else 0]
        logp = upward(parent, ln, y, observed, R[s], E[s], evs, mu[s], Jn, hn, Ju, hu, Js, hs)
        if not np.isfinite(logp):
            out[s, :] = np.nan
            continue
        downward(parent, ln, y, observed, R[s], E[s], evs, mu[s], Jn, hn, Ju, hu, Js, hs,
                 sufJ, sufh, m, P, MODE_LOO, e0, e1, ek, ek, e1, ev,
                 loo_mean, loo_cov, out[s], e1, e2)
    return out
