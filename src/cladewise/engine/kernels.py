"""Numba kernels of the linear-time Gaussian tree likelihood.

Everything here works on plain arrays in the :class:`cladewise.data.trees.FlatTree`
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
value, ``N(y_o; x_o, (t R + E + S_c)[o, o])`` with ``S_c = err[c]`` the species'
k x k measurement-error covariance: the rows and columns of unobserved cells are
dropped, which is zero precision in those directions. This stays finite when a
species has no measurement error (``S = 0``), where an information-form tip
message would be infinite. ``err`` is always ``(N, k, k)`` here; a diagonal error is
passed with zero off-diagonals. The kernels read ``(err[i, j] + err[j, i]) / 2``, so
``d_err`` is the exact partial derivative with respect to every entry.
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic

_JIT = {"cache": True, "nogil": True}
# small helpers are inlined: a call passing many arrays costs more than k x k algebra
_INLINE = {"cache": True, "nogil": True, "inline": "always"}
LOG_2PI = math.log(2.0 * math.pi)

MODE_GRAD = 1
MODE_LOO = 2
MODE_ANCESTRAL = 4
# how many nodes ahead the k = 2 passes prefetch a parent's row
PREFETCH_AHEAD = 8


@intrinsic
def prefetch_row(typingctx, arr, i):
    """Ask the CPU to start loading row ``i`` of a C-contiguous 2-D array.

    A hint only (LLVM ``prefetch``): no effect on results. The passes read a
    parent's row at a random place in memory after a long stretch of arithmetic,
    which otherwise leaves the processor waiting for each such read in turn.
    """
    sig = types.void(arr, i)

    def codegen(context, builder, signature, args):
        aryty = signature.args[0]
        ary = context.make_array(aryty)(context, builder, args[0])
        zero = context.get_constant(types.intp, 0)
        idx = context.cast(builder, args[1], signature.args[1], types.intp)
        ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [idx, zero])
        i8p = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0i8")
        # read access, high temporal locality, data cache
        builder.call(fn, [builder.bitcast(ptr, i8p), ir.Constant(i32, 0),
                          ir.Constant(i32, 3), ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen


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
def observed_index(observed, i, idx):
    q = 0
    for j in range(observed.shape[1]):
        if observed[i, j]:
            idx[q] = j
            q += 1
    return q


@njit(**_JIT)
def upward(parent, lengths, y, observed, R, regime, E, err, mu, Jn, hn, Ju, hu, Js, hs):
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
        rg = regime[v]
        Jv = Ju[v]
        hv = hu[v]
        if v < ntip:
            for i in range(k):
                hv[i] = 0.0
                for j in range(k):
                    Jv[i, j] = 0.0
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
                        Jv[idx[a], idx[b]] = W[a, b]
                    hv[idx[a]] = s
                    quad += s * y[v, idx[a]]
                total += -0.5 * quad - 0.5 * logdet - 0.5 * q * LOG_2PI
        elif t == 0.0:
            for i in range(k):
                hv[i] = hn[v, i]
                for j in range(k):
                    Jv[i, j] = Jn[v, i, j]
        else:
            for i in range(k):
                for j in range(k):
                    K[i, j] = t * R[rg, i, j]
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


def _tip_terms_py(c, t, y, observed, R, E, err, m, P, mode, idx, K, W, r, Wr,
               d_lengths, d_y, d_R, d_E, d_err, d_mu, is_root,
               loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, k):
    """Gradient, LOO and ancestral terms of tip ``c`` given its outside ``N(m, P)``."""
    Pc = P[c]
    mc = m[c]
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
            anc_mean[c] = mc
            anc_cov[c] = Pc
        return
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
                tr += R[ia, ib] * G
                d_R[ia, ib] += t * G
                d_E[ia, ib] += G
                d_err[c, ia, ib] = G
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
def downward(parent, lengths, y, observed, R, regime, E, err, mu, Jn, hn, Ju, hu, Js, hs,
             sufJ, sufh, m, P, mode, d_lengths, d_y, d_R, d_E, d_err, d_mu,
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
        d_err[:] = 0.0
        d_mu[:] = 0.0
    sufJ[:] = 0.0
    sufh[:] = 0.0

    root = n - 1
    t = lengths[root]
    rg = regime[root]
    m[root] = mu
    for i in range(k):
        for j in range(k):
            P[root, i, j] = t * R[rg, i, j]
    if root < ntip:
        _tip_terms(root, t, y, observed, R[rg], E, err, m, P, mode, idx, K, W, r, Wr,
                   d_lengths, d_y, d_R[rg], d_E, d_err, d_mu, True,
                   loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, k)
    elif want_internal:
        _internal_terms(root, t, Jn, hn, m, P, R[rg], mode, M, piv, H, g, d_lengths, d_R[rg],
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
        rg = regime[c]
        for i in range(k):
            for j in range(i + 1):
                s = 0.5 * (Pc[i, j] + Pc[j, i]) + t * R[rg, i, j]
                Pc[i, j] = s
                Pc[j, i] = s
        if c < ntip:
            _tip_terms(c, t, y, observed, R[rg], E, err, m, P, mode, idx, K, W, r, Wr,
                       d_lengths, d_y, d_R[rg], d_E, d_err, d_mu, False,
                       loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov, k)
        elif want_internal:
            _internal_terms(c, t, Jn, hn, m, P, R[rg], mode, M, piv, H, g, d_lengths,
                            d_R[rg],
                            anc_mean, anc_cov, k)


# --------------------------------------------------------------------- k = 2 fast path
# For two traits the generic loops, LU pivoting and per-node array views cost several
# times the arithmetic. The functions below do the same computations in closed form
# on scalars, with each node's symmetric 2 x 2 matrix and 2-vector packed into 5
# numbers, ``[J00, J01, J11, h0, h1]`` for a canonical message and
# ``[m0, m1, P00, P01, P11]`` for a moment form. At large N the passes are bound by
# memory access (a node's parent is anywhere in the node order), so everything that
# is read or written at the parent sits in one compact internal-node array ``Pm``
# and the per-node data read in node order in another, ``Sq``.
@njit(**_JIT)
def workspace2(n, ntip):
    """``Pm`` (one row of 10 per internal node) and ``Sq`` (one row of 10 per node)."""
    return np.empty((n - ntip, 10)), np.empty((n, 10))


@njit(**_JIT)
def _absorb2(j00, j01, j11, h0, h1, v00, v01, v10, v11, m0, m1):
    """:func:`absorb` for k = 2: returns ``(H00, H01, H11, g0, g1, log det M)``."""
    a00 = 1.0 + j00 * v00 + j01 * v10
    a01 = j00 * v01 + j01 * v11
    a10 = j01 * v00 + j11 * v10
    a11 = 1.0 + j01 * v01 + j11 * v11
    det = a00 * a11 - a01 * a10
    inv = 1.0 / det
    H00 = (a11 * j00 - a01 * j01) * inv
    H01 = 0.5 * ((a11 * j01 - a01 * j11) + (a00 * j01 - a10 * j00)) * inv
    H11 = (a00 * j11 - a10 * j01) * inv
    r0 = h0 - (j00 * m0 + j01 * m1)
    r1 = h1 - (j01 * m0 + j11 * m1)
    g0 = (a11 * r0 - a01 * r1) * inv
    g1 = (a00 * r1 - a10 * r0) * inv
    return H00, H01, H11, g0, g1, math.log(abs(det))


@njit(**_JIT)
def upward2(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq):
    """:func:`upward` for k = 2 on the workspace of :func:`workspace2`.

    ``Pm[v - N, 0:5]`` accumulates the message at internal node ``v`` (sum of its
    children's); ``Sq[v, 0:5]`` receives the message node ``v`` pushes across its
    branch and ``Sq[v, 5:10]`` the sum of the messages of the siblings before ``v``.
    With an empty ``Sq`` (value only) ``Pm`` needs just 5 columns.
    """
    n = parent.shape[0]
    ntip = y.shape[0]
    store = Sq.shape[0] > 0
    e00 = E[0, 0]
    e10 = E[1, 0]
    e11 = E[1, 1]
    for v in range(n - ntip):
        for i in range(5):
            Pm[v, i] = 0.0
    total = 0.0
    J00 = 0.0
    J01 = 0.0
    J11 = 0.0
    h0 = 0.0
    h1 = 0.0
    for v in range(n):
        t = lengths[v]
        # this branch's regime rate matrix (one regime: always R[0])
        rg = regime[v]
        r00 = R[rg, 0, 0]
        r01 = R[rg, 0, 1]
        r10 = R[rg, 1, 0]
        r11 = R[rg, 1, 1]
        if v < ntip:
            o0 = observed[v, 0]
            o1 = observed[v, 1]
            J00 = 0.0
            J01 = 0.0
            J11 = 0.0
            h0 = 0.0
            h1 = 0.0
            if o0 and o1:
                k00 = t * r00 + e00 + err[v, 0, 0]
                k01 = t * r10 + e10 + 0.5 * (err[v, 0, 1] + err[v, 1, 0])
                k11 = t * r11 + e11 + err[v, 1, 1]
                det = k00 * k11 - k01 * k01
                if not (k00 > 0.0 and det > 0.0):
                    return -np.inf
                inv = 1.0 / det
                J00 = k11 * inv
                J01 = -k01 * inv
                J11 = k00 * inv
                y0 = y[v, 0]
                y1 = y[v, 1]
                h0 = J00 * y0 + J01 * y1
                h1 = J01 * y0 + J11 * y1
                total += -0.5 * (h0 * y0 + h1 * y1) - 0.5 * math.log(det) - LOG_2PI
            elif o0:
                k00 = t * r00 + e00 + err[v, 0, 0]
                if not k00 > 0.0:
                    return -np.inf
                J00 = 1.0 / k00
                h0 = J00 * y[v, 0]
                total += -0.5 * h0 * y[v, 0] - 0.5 * math.log(k00) - 0.5 * LOG_2PI
            elif o1:
                k11 = t * r11 + e11 + err[v, 1, 1]
                if not k11 > 0.0:
                    return -np.inf
                J11 = 1.0 / k11
                h1 = J11 * y[v, 1]
                total += -0.5 * h1 * y[v, 1] - 0.5 * math.log(k11) - 0.5 * LOG_2PI
        else:
            J00 = Pm[v - ntip, 0]
            J01 = Pm[v - ntip, 1]
            J11 = Pm[v - ntip, 2]
            h0 = Pm[v - ntip, 3]
            h1 = Pm[v - ntip, 4]
            if t != 0.0:
                v00 = t * r00
                v01 = t * r01
                v10 = t * r10
                v11 = t * r11
                J00, J01, J11, g0, g1, logdet = _absorb2(J00, J01, J11, h0, h1, v00, v01,
                                                         v10, v11, 0.0, 0.0)
                quad = (v00 * h0 + v01 * h1) * g0 + (v10 * h0 + v11 * h1) * g1
                total += -0.5 * logdet + 0.5 * quad
                h0 = g0
                h1 = g1
        if v + PREFETCH_AHEAD < n - 1:
            prefetch_row(Pm, parent[v + PREFETCH_AHEAD] - ntip)
        p = parent[v] - ntip
        if store:
            Sq[v, 0] = J00
            Sq[v, 1] = J01
            Sq[v, 2] = J11
            Sq[v, 3] = h0
            Sq[v, 4] = h1
        if p >= 0:
            if store:
                # siblings before v: what the parent holds so far
                for i in range(5):
                    Sq[v, 5 + i] = Pm[p, i]
            Pm[p, 0] += J00
            Pm[p, 1] += J01
            Pm[p, 2] += J11
            Pm[p, 3] += h0
            Pm[p, 4] += h1
    # J, h now hold the root's message
    m0 = mu[0]
    m1 = mu[1]
    quad = (m0 * (h0 - 0.5 * (J00 * m0 + J01 * m1))
            + m1 * (h1 - 0.5 * (J01 * m0 + J11 * m1)))
    return total + quad


@njit(**_JIT)
def _tips2(parent, lengths, y, observed, R, regime, E, err, Sq, mode, d_lengths, d_y, d_R, d_E,
           d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    """:func:`_tip_terms` of every tip for k = 2, in one sequential sweep.

    Unobserved cells get zero rows in ``W`` and ``W r``, which makes their terms
    vanish without separate cases.
    """
    ntip = y.shape[0]
    root = parent.shape[0] - 1
    e00 = E[0, 0]
    e01 = E[0, 1]
    e10 = E[1, 0]
    e11 = E[1, 1]
    # d R per regime: columns 00, 01, 11
    dRr = np.zeros((R.shape[0], 3))
    dE00 = 0.0
    dE01 = 0.0
    dE11 = 0.0
    for c in range(ntip):
        m0 = Sq[c, 0]
        m1 = Sq[c, 1]
        p00 = Sq[c, 2]
        p01 = Sq[c, 3]
        p11 = Sq[c, 4]
        s00 = p00 + e00 + err[c, 0, 0]
        s11 = p11 + e11 + err[c, 1, 1]
        x01 = 0.5 * (err[c, 0, 1] + err[c, 1, 0])
        if mode & MODE_LOO:
            loo_mean[c, 0] = m0
            loo_mean[c, 1] = m1
            loo_cov[c, 0, 0] = s00
            loo_cov[c, 0, 1] = p01 + e01 + x01
            loo_cov[c, 1, 0] = p01 + e10 + x01
            loo_cov[c, 1, 1] = s11
        o0 = observed[c, 0]
        o1 = observed[c, 1]
        w00 = 0.0
        w01 = 0.0
        w11 = 0.0
        r0 = 0.0
        r1 = 0.0
        logdet = 0.0
        q = 0
        if o0 and o1:
            s01 = p01 + e10 + x01
            det = s00 * s11 - s01 * s01
            inv = 1.0 / det
            w00 = s11 * inv
            w01 = -s01 * inv
            w11 = s00 * inv
            logdet = math.log(det) if (s00 > 0.0 and det > 0.0) else np.nan
            r0 = y[c, 0] - m0
            r1 = y[c, 1] - m1
            q = 2
        elif o0:
            w00 = 1.0 / s00
            logdet = math.log(s00) if s00 > 0.0 else np.nan
            r0 = y[c, 0] - m0
            q = 1
        elif o1:
            w11 = 1.0 / s11
            logdet = math.log(s11) if s11 > 0.0 else np.nan
            r1 = y[c, 1] - m1
            q = 1
        a0 = w00 * r0 + w01 * r1
        a1 = w01 * r0 + w11 * r1
        if mode & MODE_LOO:
            loo_logdens[c] = -0.5 * (a0 * r0 + a1 * r1) - 0.5 * logdet - 0.5 * q * LOG_2PI
        if mode & MODE_GRAD:
            t = lengths[c]
            rg = regime[c]
            G00 = 0.5 * (a0 * a0 - w00)
            G01 = 0.5 * (a0 * a1 - w01)
            G11 = 0.5 * (a1 * a1 - w11)
            d_lengths[c] = (R[rg, 0, 0] * G00 + (R[rg, 0, 1] + R[rg, 1, 0]) * G01
                            + R[rg, 1, 1] * G11)
            dRr[rg, 0] += t * G00
            dRr[rg, 1] += t * G01
            dRr[rg, 2] += t * G11
            dE00 += G00
            dE01 += G01
            dE11 += G11
            d_err[c, 0, 0] = G00
            d_err[c, 0, 1] = G01
            d_err[c, 1, 0] = G01
            d_err[c, 1, 1] = G11
            d_y[c, 0] = -a0
            d_y[c, 1] = -a1
            if c == root:
                d_mu[0] = a0
                d_mu[1] = a1
        if mode & MODE_ANCESTRAL:
            anc_mean[c, 0] = m0 + p00 * a0 + p01 * a1
            anc_mean[c, 1] = m1 + p01 * a0 + p11 * a1
            # P - P W P
            t00 = p00 * w00 + p01 * w01
            t01 = p00 * w01 + p01 * w11
            t10 = p01 * w00 + p11 * w01
            t11 = p01 * w01 + p11 * w11
            anc_cov[c, 0, 0] = p00 - (t00 * p00 + t01 * p01)
            anc_cov[c, 0, 1] = p01 - (t00 * p01 + t01 * p11)
            anc_cov[c, 1, 0] = p01 - (t10 * p00 + t11 * p01)
            anc_cov[c, 1, 1] = p11 - (t10 * p01 + t11 * p11)
    if mode & MODE_GRAD:
        for rg in range(R.shape[0]):
            d_R[rg, 0, 0] += dRr[rg, 0]
            d_R[rg, 0, 1] += dRr[rg, 1]
            d_R[rg, 1, 0] += dRr[rg, 1]
            d_R[rg, 1, 1] += dRr[rg, 2]
        d_E[0, 0] += dE00
        d_E[0, 1] += dE01
        d_E[1, 0] += dE01
        d_E[1, 1] += dE11


@njit(**_JIT)
def downward2(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
               d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
               anc_mean, anc_cov):
    """:func:`downward` for k = 2 after :func:`upward2`.

    Internal nodes' terms are computed in the main loop, the tips' in a sequential
    sweep afterwards. ``Pm[v - N, 0:5]`` (the message at ``v``) is recycled, after
    ``v`` is visited, as the running sum of the messages of ``v``'s children
    visited so far; ``v``'s outside distribution ``[m0, m1, P00, P01, P11]`` goes
    to ``Pm[v - N, 5:10]`` for an internal node and over its upward message in
    ``Sq[v, 0:5]`` for a tip.
    """
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
    # d R per regime: columns 00, 01, 11
    dRr = np.zeros((R.shape[0], 3))
    root = n - 1
    for c in range(root, -1, -1):
        t = lengths[c]
        if c == root:
            nm0 = mu[0]
            nm1 = mu[1]
            q00 = 0.0
            q01 = 0.0
            q11 = 0.0
        else:
            if c >= PREFETCH_AHEAD:
                prefetch_row(Pm, parent[c - PREFETCH_AHEAD] - ntip)
            p = parent[c] - ntip
            # siblings' messages: those before c (from the upward pass) plus those
            # after c (suffix sums; children are visited in decreasing order), rather
            # than subtracting c from the total, which could cancel badly when c
            # dominates
            s00 = Sq[c, 5] + Pm[p, 0]
            s01 = Sq[c, 6] + Pm[p, 1]
            s11 = Sq[c, 7] + Pm[p, 2]
            sh0 = Sq[c, 8] + Pm[p, 3]
            sh1 = Sq[c, 9] + Pm[p, 4]
            for i in range(5):
                Pm[p, i] += Sq[c, i]
            m0 = Pm[p, 5]
            m1 = Pm[p, 6]
            p00 = Pm[p, 7]
            p01 = Pm[p, 8]
            p11 = Pm[p, 9]
            if s00 != 0.0 or s01 != 0.0 or s11 != 0.0:
                # condition the parent's outside N(m_p, P_p) on the siblings' messages
                H00, H01, H11, g0, g1, _ = _absorb2(s00, s01, s11, sh0, sh1, p00, p01,
                                                    p01, p11, m0, m1)
                nm0 = m0 + p00 * g0 + p01 * g1
                nm1 = m1 + p01 * g0 + p11 * g1
                t00 = p00 * H00 + p01 * H01
                t01 = p00 * H01 + p01 * H11
                t10 = p01 * H00 + p11 * H01
                t11 = p01 * H01 + p11 * H11
                q00 = p00 - (t00 * p00 + t01 * p01)
                q01 = 0.5 * ((p01 - (t00 * p01 + t01 * p11))
                             + (p01 - (t10 * p00 + t11 * p01)))
                q11 = p11 - (t10 * p01 + t11 * p11)
            else:
                nm0 = m0
                nm1 = m1
                q00 = p00
                q01 = p01
                q11 = p11
        rg = regime[c]
        r00 = R[rg, 0, 0]
        r11 = R[rg, 1, 1]
        q00 += t * r00
        q01 += t * R[rg, 1, 0]
        q11 += t * r11
        if c < ntip:
            Sq[c, 0] = nm0
            Sq[c, 1] = nm1
            Sq[c, 2] = q00
            Sq[c, 3] = q01
            Sq[c, 4] = q11
            continue
        w = c - ntip
        Pm[w, 5] = nm0
        Pm[w, 6] = nm1
        Pm[w, 7] = q00
        Pm[w, 8] = q01
        Pm[w, 9] = q11
        if want_internal:
            # gradient and ancestral terms of an internal node
            H00, H01, H11, g0, g1, _ = _absorb2(Pm[w, 0], Pm[w, 1], Pm[w, 2], Pm[w, 3],
                                                Pm[w, 4], q00, q01, q01, q11, nm0, nm1)
            if mode & MODE_GRAD:
                G00 = 0.5 * (g0 * g0 - H00)
                G01 = 0.5 * (g0 * g1 - H01)
                G11 = 0.5 * (g1 * g1 - H11)
                d_lengths[c] = r00 * G00 + (R[rg, 0, 1] + R[rg, 1, 0]) * G01 + r11 * G11
                dRr[rg, 0] += t * G00
                dRr[rg, 1] += t * G01
                dRr[rg, 2] += t * G11
                if c == root:
                    d_mu[0] = g0
                    d_mu[1] = g1
            if mode & MODE_ANCESTRAL:
                anc_mean[c, 0] = nm0 + q00 * g0 + q01 * g1
                anc_mean[c, 1] = nm1 + q01 * g0 + q11 * g1
                t00 = q00 * H00 + q01 * H01
                t01 = q00 * H01 + q01 * H11
                t10 = q01 * H00 + q11 * H01
                t11 = q01 * H01 + q11 * H11
                anc_cov[c, 0, 0] = q00 - (t00 * q00 + t01 * q01)
                anc_cov[c, 0, 1] = q01 - (t00 * q01 + t01 * q11)
                anc_cov[c, 1, 0] = q01 - (t10 * q00 + t11 * q01)
                anc_cov[c, 1, 1] = q11 - (t10 * q01 + t11 * q11)
        for i in range(5):
            Pm[w, i] = 0.0
    if mode & MODE_GRAD:
        for rg in range(R.shape[0]):
            d_R[rg, 0, 0] += dRr[rg, 0]
            d_R[rg, 0, 1] += dRr[rg, 1]
            d_R[rg, 1, 0] += dRr[rg, 1]
            d_R[rg, 1, 1] += dRr[rg, 2]
    _tips2(parent, lengths, y, observed, R, regime, E, err, Sq, mode, d_lengths, d_y, d_R, d_E,
           d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov)


# --------------------------------------------------------------------- k = 1 fast path
# One trait (single-trait models, phylogenetic regressions) in the same layout as the
# k = 2 path, with scalars: a canonical message is ``[J, h]`` and a moment form
# ``[m, P]``.
@njit(**_JIT)
def workspace1(n, ntip):
    """``Pm`` (one row of 4 per internal node) and ``Sq`` (one row of 4 per node)."""
    return np.empty((n - ntip, 4)), np.empty((n, 4))


@njit(**_INLINE)
def _absorb1(j, h, v, m):
    """:func:`absorb` for k = 1: returns ``(H, g, 1 / M)``.

    The Kalman-updated variance ``v - v H v`` equals ``v / M``, which has no
    cancellation (it is exactly 0 when ``v`` is).
    """
    inv = 1.0 / (1.0 + j * v)
    return j * inv, (h - j * m) * inv, inv


@njit(**_JIT)
def upward1(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq):
    """:func:`upward` for k = 1 on the workspace of :func:`workspace1`.

    ``Pm[v - N, 0:2]`` accumulates the message at internal node ``v``; ``Sq[v, 0:2]``
    receives the message node ``v`` pushes across its branch and ``Sq[v, 2:4]`` the
    sum of the messages of the siblings before ``v``. With an empty ``Sq`` (value
    only) ``Pm`` needs just 2 columns.
    """
    n = parent.shape[0]
    ntip = y.shape[0]
    store = Sq.shape[0] > 0
    e = E[0, 0]
    for v in range(n - ntip):
        Pm[v, 0] = 0.0
        Pm[v, 1] = 0.0
    total = 0.0
    J = 0.0
    h = 0.0
    for v in range(n):
        t = lengths[v]
        r = R[regime[v], 0, 0]
        if v < ntip:
            J = 0.0
            h = 0.0
            if observed[v, 0]:
                kv = t * r + e + err[v, 0, 0]
                if not kv > 0.0:
                    return -np.inf
                J = 1.0 / kv
                yv = y[v, 0]
                h = J * yv
                total += -0.5 * h * yv - 0.5 * math.log(kv) - 0.5 * LOG_2PI
        else:
            J = Pm[v - ntip, 0]
            h = Pm[v - ntip, 1]
            if t != 0.0:
                vv = t * r
                J, g, inv = _absorb1(J, h, vv, 0.0)
                total += 0.5 * math.log(abs(inv)) + 0.5 * (vv * h) * g
                h = g
        if v + PREFETCH_AHEAD < n - 1:
            prefetch_row(Pm, parent[v + PREFETCH_AHEAD] - ntip)
        p = parent[v] - ntip
        if store:
            Sq[v, 0] = J
            Sq[v, 1] = h
        if p >= 0:
            if store:
                # siblings before v: what the parent holds so far
                Sq[v, 2] = Pm[p, 0]
                Sq[v, 3] = Pm[p, 1]
            Pm[p, 0] += J
            Pm[p, 1] += h
    # J, h now hold the root's message
    m = mu[0]
    return total + m * (h - 0.5 * (J * m))


@njit(**_JIT)
def _tips1(parent, lengths, y, observed, R, regime, E, err, Sq, mode, d_lengths, d_y, d_R, d_E,
           d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    """:func:`_tip_terms` of every tip for k = 1, in one sequential sweep."""
    ntip = y.shape[0]
    root = parent.shape[0] - 1
    e = E[0, 0]
    dRr = np.zeros(R.shape[0])
    dE = 0.0
    for c in range(ntip):
        m = Sq[c, 0]
        p = Sq[c, 1]
        s = p + e + err[c, 0, 0]
        if mode & MODE_LOO:
            loo_mean[c, 0] = m
            loo_cov[c, 0, 0] = s
        if not observed[c, 0]:
            # no terms; kept out of the sums so that a NaN branch length of an
            # unobserved tip does not leak into d_R (as in the general path)
            if mode & MODE_LOO:
                loo_logdens[c] = 0.0
            if mode & MODE_ANCESTRAL:
                anc_mean[c, 0] = m
                anc_cov[c, 0, 0] = p
            continue
        w = 1.0 / s
        logdet = math.log(s) if s > 0.0 else np.nan
        res = y[c, 0] - m
        a = w * res
        if mode & MODE_LOO:
            loo_logdens[c] = -0.5 * (a * res) - 0.5 * logdet - 0.5 * LOG_2PI
        if mode & MODE_GRAD:
            G = 0.5 * (a * a - w)
            rg = regime[c]
            d_lengths[c] = R[rg, 0, 0] * G
            dRr[rg] += lengths[c] * G
            dE += G
            d_err[c, 0, 0] = G
            d_y[c, 0] = -a
            if c == root:
                d_mu[0] = a
        if mode & MODE_ANCESTRAL:
            anc_mean[c, 0] = m + p * a
            # p - p w p, as p (s - p) / s without cancellation
            anc_cov[c, 0, 0] = p * ((e + err[c, 0, 0]) * w)
    if mode & MODE_GRAD:
        for rg in range(R.shape[0]):
            d_R[rg, 0, 0] += dRr[rg]
        d_E[0, 0] += dE


@njit(**_JIT)
def downward1(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
               d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
               anc_mean, anc_cov):
    """:func:`downward` for k = 1 after :func:`upward1`.

    Same scheme as :func:`downward2`: ``Pm[v - N, 0:2]`` is recycled as the running
    sum of the messages of ``v``'s children visited so far; ``v``'s outside
    distribution ``[m, P]`` goes to ``Pm[v - N, 2:4]`` for an internal node and over
    its upward message in ``Sq[v, 0:2]`` for a tip.
    """
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
    dRr = np.zeros(R.shape[0])
    root = n - 1
    for c in range(root, -1, -1):
        t = lengths[c]
        if c == root:
            nm = mu[0]
            q = 0.0
        else:
            if c >= PREFETCH_AHEAD:
                prefetch_row(Pm, parent[c - PREFETCH_AHEAD] - ntip)
            p = parent[c] - ntip
            # siblings' messages: before c (upward pass) plus after c (suffix sums)
            sJ = Sq[c, 2] + Pm[p, 0]
            sh = Sq[c, 3] + Pm[p, 1]
            Pm[p, 0] += Sq[c, 0]
            Pm[p, 1] += Sq[c, 1]
            m = Pm[p, 2]
            P = Pm[p, 3]
            if sJ != 0.0:
                # condition the parent's outside N(m_p, P_p) on the siblings' messages
                _, g, inv = _absorb1(sJ, sh, P, m)
                nm = m + P * g
                q = P * inv
            else:
                nm = m
                q = P
        rg = regime[c]
        r = R[rg, 0, 0]
        q += t * r
        if c < ntip:
            Sq[c, 0] = nm
            Sq[c, 1] = q
            continue
        w = c - ntip
        Pm[w, 2] = nm
        Pm[w, 3] = q
        if want_internal:
            # gradient and ancestral terms of an internal node
            H, g, inv = _absorb1(Pm[w, 0], Pm[w, 1], q, nm)
            if mode & MODE_GRAD:
                G = 0.5 * (g * g - H)
                d_lengths[c] = r * G
                dRr[rg] += t * G
                if c == root:
                    d_mu[0] = g
            if mode & MODE_ANCESTRAL:
                anc_mean[c, 0] = nm + q * g
                anc_cov[c, 0, 0] = q * inv
        Pm[w, 0] = 0.0
        Pm[w, 1] = 0.0
    if mode & MODE_GRAD:
        for rg in range(R.shape[0]):
            d_R[rg, 0, 0] += dRr[rg]
    _tips1(parent, lengths, y, observed, R, regime, E, err, Sq, mode, d_lengths, d_y, d_R, d_E,
           d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov)


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


# Regimes: ``R`` is ``(n_regimes, k, k)``, one rate matrix per regime, and
# ``regime`` an int array with one entry per node: the branch above node ``v`` has
# covariance ``lengths[v] * R[regime[v]]`` (the root edge uses ``regime[root]``).
# This is the multi-rate Brownian motion of O'Meara et al. (2006) with every branch
# in one regime; a branch that changes regime part-way is split by the caller or
# given the regime of its lower end. The ``*_kernel`` entry points without
# ``regimes`` in their name keep their single ``(k, k)`` signature and call the
# regime versions with one regime.
@njit(**_JIT)
def _one_regime(R, n):
    k = R.shape[0]
    return np.ascontiguousarray(R).reshape((1, k, k)), np.zeros(n, np.int64)


@njit(**_JIT)
def loglik_regimes_kernel(parent, lengths, y, observed, R, regime, E, err, mu):
    """Log-likelihood only (one upward pass); ``R`` is ``(n_regimes, k, k)``."""
    n = parent.shape[0]
    k = y.shape[1]
    if k == 2:
        return upward2(parent, lengths, y, observed, R, regime, E, err, mu,
                        np.empty((n - y.shape[0], 5)), np.empty((0, 10)))
    if k == 1:
        return upward1(parent, lengths, y, observed, R, regime, E, err, mu,
                        np.empty((n - y.shape[0], 2)), np.empty((0, 4)))
    Jn, hn, Ju, hu, Js, hs = _workspace(n, k)
    return upward(parent, lengths, y, observed, R, regime, E, err, mu, Jn, hn, Ju, hu,
                  Js, hs)


@njit(**_JIT)
def loglik_kernel(parent, lengths, y, observed, R, E, err, mu):
    """Log-likelihood only (one upward pass)."""
    R3, regime = _one_regime(R, parent.shape[0])
    return loglik_regimes_kernel(parent, lengths, y, observed, R3, regime, E, err, mu)


@njit(**_JIT)
def _run(parent, lengths, y, observed, R, regime, E, err, mu, mode, d_lengths, d_y, d_R,
         d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    n = parent.shape[0]
    k = y.shape[1]
    if k == 2:
        Pm, Sq = workspace2(n, y.shape[0])
        logp = upward2(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq)
        if not np.isfinite(logp):
            return logp
        downward2(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
                   d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov,
                   loo_logdens, anc_mean, anc_cov)
        return logp
    if k == 1:
        Pm, Sq = workspace1(n, y.shape[0])
        logp = upward1(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq)
        if not np.isfinite(logp):
            return logp
        downward1(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
                   d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov,
                   loo_logdens, anc_mean, anc_cov)
        return logp
    Jn, hn, Ju, hu, Js, hs = _workspace(n, k)
    logp = upward(parent, lengths, y, observed, R, regime, E, err, mu, Jn, hn, Ju, hu,
                  Js, hs)
    if not np.isfinite(logp):
        return logp
    # the upward pass is done with Jn's role as an accumulator, reuse nothing else
    sufJ = np.empty((n, k, k))
    sufh = np.empty((n, k))
    m = np.empty((n, k))
    P = np.empty((n, k, k))
    downward(parent, lengths, y, observed, R, regime, E, err, mu, Jn, hn, Ju, hu, Js, hs,
             sufJ, sufh, m, P, mode, d_lengths, d_y, d_R, d_E, d_err, d_mu,
             loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov)
    return logp


@njit(**_JIT)
def value_and_grad_regimes_kernel(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`value_and_grad_kernel` with ``R`` ``(n_regimes, k, k)``.

    ``d_R`` is ``(n_regimes, k, k)``, one symmetric matrix derivative per regime.
    """
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    d_lengths = np.zeros(n)
    d_y = np.zeros((ntip, k))
    d_R = np.zeros(R.shape)
    d_E = np.zeros((k, k))
    d_err = np.zeros((ntip, k, k))
    d_mu = np.zeros(k)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_GRAD, d_lengths,
                d_y, d_R, d_E, d_err, d_mu, e1, e2, e0, e1, e2)
    if not np.isfinite(logp):
        d_lengths[:] = 0.0
        d_y[:] = 0.0
        d_R[:] = 0.0
        d_E[:] = 0.0
        d_err[:] = 0.0
        d_mu[:] = 0.0
    return logp, d_lengths, d_y, d_R, d_E, d_err, d_mu


@njit(**_JIT)
def value_and_grad_kernel(parent, lengths, y, observed, R, E, err, mu):
    """Log-likelihood and its gradient.

    Returns ``(logp, d_lengths, d_y, d_R, d_E, d_err, d_mu)``; the gradients
    with respect to the symmetric matrices ``R`` and ``E`` are symmetric (the
    derivative along a symmetric perturbation of an off-diagonal pair is
    ``d[i, j] + d[j, i]``). Gradients are zero when ``logp`` is not finite.
    """
    k = y.shape[1]
    R3, regime = _one_regime(R, parent.shape[0])
    logp, d_lengths, d_y, d_R, d_E, d_err, d_mu = value_and_grad_regimes_kernel(
        parent, lengths, y, observed, R3, regime, E, err, mu)
    return logp, d_lengths, d_y, d_R.reshape((k, k)), d_E, d_err, d_mu


@njit(**_JIT)
def loo_regimes_kernel(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`loo_kernel` with ``R`` ``(n_regimes, k, k)``."""
    ntip = y.shape[0]
    k = y.shape[1]
    loo_mean = np.full((ntip, k), np.nan)
    loo_cov = np.full((ntip, k, k), np.nan)
    loo_logdens = np.full(ntip, np.nan)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    eR = np.empty(R.shape)
    ev = np.empty(k)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_LOO, e0, e1, eR,
                ek, e2, ev, loo_mean, loo_cov, loo_logdens, e1, e2)
    return loo_mean, loo_cov, loo_logdens, logp


@njit(**_JIT)
def loo_kernel(parent, lengths, y, observed, R, E, err, mu):
    """Leave-one-species-out predictive of every tip: ``(mean, cov, logdens, logp)``."""
    R3, regime = _one_regime(R, parent.shape[0])
    return loo_regimes_kernel(parent, lengths, y, observed, R3, regime, E, err, mu)


@njit(**_JIT)
def ancestral_regimes_kernel(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`ancestral_kernel` with ``R`` ``(n_regimes, k, k)``."""
    n = parent.shape[0]
    k = y.shape[1]
    anc_mean = np.full((n, k), np.nan)
    anc_cov = np.full((n, k, k), np.nan)
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    eR = np.empty(R.shape)
    ev = np.empty(k)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_ANCESTRAL, e0,
                e1, eR, ek, e2, ev, e1, e2, e0, anc_mean, anc_cov)
    return anc_mean, anc_cov, logp


@njit(**_JIT)
def ancestral_kernel(parent, lengths, y, observed, R, E, err, mu):
    """Posterior mean and covariance of every node's latent value: ``(mean, cov, logp)``."""
    R3, regime = _one_regime(R, parent.shape[0])
    return ancestral_regimes_kernel(parent, lengths, y, observed, R3, regime, E, err, mu)


@njit(**_JIT)
def loo_logdens_draws_regimes_kernel(parent, lengths, y, observed, R, regime, E, err, mu):
    """Leave-one-species-out log densities for many parameter draws, with regimes.

    ``lengths`` is (S_l, n_nodes), ``regime`` (S_g, n_nodes) and ``err``
    (S_e, N, k, k) with S_l, S_g, S_e in {1, S}; ``R`` is (S, n_regimes, k, k),
    ``E`` (S, k, k) and ``mu`` (S, k). Returns (S, N); a draw whose likelihood
    cannot be evaluated gets NaN.
    """
    S = R.shape[0]
    n = parent.shape[0]
    ntip = y.shape[0]
    k = y.shape[1]
    out = np.empty((S, ntip))
    loo_mean = np.empty((ntip, k))
    loo_cov = np.empty((ntip, k, k))
    e1 = np.empty((0, k))
    e2 = np.empty((0, k, k))
    e0 = np.empty(0)
    ek = np.empty((k, k))
    eR = np.empty(R.shape[1:])
    ev = np.empty(k)
    if k == 2:
        Pm, Sq = workspace2(n, ntip)
        for s in range(S):
            ln = lengths[s if lengths.shape[0] > 1 else 0]
            rg = regime[s if regime.shape[0] > 1 else 0]
            evs = err[s if err.shape[0] > 1 else 0]
            logp = upward2(parent, ln, y, observed, R[s], rg, E[s], evs, mu[s], Pm, Sq)
            if not np.isfinite(logp):
                out[s, :] = np.nan
                continue
            downward2(parent, ln, y, observed, R[s], rg, E[s], evs, mu[s], Pm, Sq,
                       MODE_LOO, e0, e1, eR, ek, e2, ev, loo_mean, loo_cov, out[s], e1, e2)
        return out
    if k == 1:
        Pm, Sq = workspace1(n, ntip)
        for s in range(S):
            ln = lengths[s if lengths.shape[0] > 1 else 0]
            rg = regime[s if regime.shape[0] > 1 else 0]
            evs = err[s if err.shape[0] > 1 else 0]
            logp = upward1(parent, ln, y, observed, R[s], rg, E[s], evs, mu[s], Pm, Sq)
            if not np.isfinite(logp):
                out[s, :] = np.nan
                continue
            downward1(parent, ln, y, observed, R[s], rg, E[s], evs, mu[s], Pm, Sq,
                       MODE_LOO, e0, e1, eR, ek, e2, ev, loo_mean, loo_cov, out[s], e1, e2)
        return out
    Jn, hn, Ju, hu, Js, hs = _workspace(n, k)
    sufJ = np.empty((n, k, k))
    sufh = np.empty((n, k))
    m = np.empty((n, k))
    P = np.empty((n, k, k))
    for s in range(S):
        ln = lengths[s if lengths.shape[0] > 1 else 0]
        rg = regime[s if regime.shape[0] > 1 else 0]
        evs = err[s if err.shape[0] > 1 else 0]
        logp = upward(parent, ln, y, observed, R[s], rg, E[s], evs, mu[s], Jn, hn, Ju, hu,
                      Js, hs)
        if not np.isfinite(logp):
            out[s, :] = np.nan
            continue
        downward(parent, ln, y, observed, R[s], rg, E[s], evs, mu[s], Jn, hn, Ju, hu, Js,
                 hs, sufJ, sufh, m, P, MODE_LOO, e0, e1, eR, ek, e2, ev,
                 loo_mean, loo_cov, out[s], e1, e2)
    return out


@njit(**_JIT)
def loo_logdens_draws_kernel(parent, lengths, y, observed, R, E, err, mu):
    """Leave-one-species-out log densities for many parameter draws.

    ``lengths`` is (S_l, n_nodes), ``err`` (S_e, N, k, k) with S_l, S_e in {1, S};
    ``R``, ``E`` are (S, k, k) and ``mu`` (S, k). Returns (S, N); a draw whose
    likelihood cannot be evaluated gets NaN.
    """
    S = R.shape[0]
    k = R.shape[1]
    R4 = np.ascontiguousarray(R).reshape((S, 1, k, k))
    regime = np.zeros((1, parent.shape[0]), np.int64)
    return loo_logdens_draws_regimes_kernel(parent, lengths, y, observed, R4, regime, E,
                                            err, mu)
