"""Dense reference implementation of the Gaussian tree likelihood.

Builds the full ``(N k) x (N k)`` covariance and uses scipy. O(N^3) time and
O(N^2) memory: for tests and benchmarks on small trees only, never on the
large-tree path.

Ordering is species-major: row ``i * k + j`` is trait ``j`` of species ``i``.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.stats

from cladewise.data.trees import FlatTree, covariance

__all__ = [
    "tip_covariance",
    "node_covariance",
    "error_blocks",
    "dense_covariance",
    "loglik",
    "loo_conditionals",
    "ancestral_states",
]


def _tree(parent: np.ndarray, lengths: np.ndarray, n_tips: int) -> FlatTree:
    return FlatTree(parent, lengths, tuple(f"t{i}" for i in range(n_tips)))


def tip_covariance(parent: np.ndarray, lengths: np.ndarray, n_tips: int) -> np.ndarray:
    """Shared path length (plus root edge) between tips, ``n_tips x n_tips``."""
    return covariance(_tree(parent, lengths, n_tips))


def node_covariance(parent: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Shared path length (plus root edge) between all nodes, ``n_nodes x n_nodes``.

    The covariance of two nodes' values under Brownian motion is the distance from
    the top of the root edge to their most recent common ancestor.
    """
    parent = np.asarray(parent)
    n = parent.shape[0]
    depth = np.zeros(n)
    depth[n - 1] = lengths[n - 1]
    anc = [set() for _ in range(n)]
    anc[n - 1] = {n - 1}
    for v in range(n - 2, -1, -1):
        depth[v] = depth[parent[v]] + lengths[v]
        anc[v] = anc[parent[v]] | {v}
    C = np.empty((n, n))
    for u in range(n):
        for v in range(u, n):
            common = anc[u] & anc[v]
            C[u, v] = C[v, u] = max(depth[w] for w in common)
    return C


def error_blocks(err_var: np.ndarray) -> np.ndarray:
    """Per-species error covariances ``(N, k, k)`` from ``(N, k)`` variances or as given."""
    err_var = np.asarray(err_var, dtype=float)
    if err_var.ndim == 3:
        return err_var
    return err_var[:, :, None] * np.eye(err_var.shape[1])[None, :, :]


def dense_covariance(
    parent: np.ndarray,
    lengths: np.ndarray,
    R: np.ndarray,
    E: np.ndarray,
    err_var: np.ndarray,
) -> np.ndarray:
    """Covariance of all observation cells: ``C (x) R + I (x) E + blockdiag(S_i)``.

    ``err_var`` is ``(N, k)`` variances (``S_i`` diagonal) or ``(N, k, k)``.
    """
    S = error_blocks(err_var)
    n_tips, k = S.shape[:2]
    C = tip_covariance(parent, lengths, n_tips)
    return np.kron(C, R) + np.kron(np.eye(n_tips), E) + scipy.linalg.block_diag(*S)


def loglik(parent, lengths, y, observed, R, E, err_var, mu) -> float:
    """Log density of the observed cells under the dense multivariate normal (scipy)."""
    n_tips, k = y.shape
    obs = np.ravel(observed).astype(bool)
    if not obs.any():
        return 0.0
    cov = dense_covariance(parent, lengths, R, E, err_var)[np.ix_(obs, obs)]
    mean = np.tile(mu, n_tips)[obs]
    return float(scipy.stats.multivariate_normal.logpdf(np.ravel(y)[obs], mean, cov))


def loo_conditionals(parent, lengths, y, observed, R, E, err_var, mu):
    """Predictive of each species' full observation vector given the other species.

    Explicit Gaussian conditioning of the dense covariance. Returns ``(mean (N, k),
    cov (N, k, k), logdens (N,))`` where ``logdens`` is the log density of the
    species' observed cells (0 when it has none).
    """
    n_tips, k = np.shape(y)
    cov = dense_covariance(parent, lengths, R, E, err_var)
    obs = np.ravel(observed).astype(bool)
    yv = np.ravel(y)
    mv = np.tile(mu, n_tips)
    mean = np.empty((n_tips, k))
    ccov = np.empty((n_tips, k, k))
    logdens = np.zeros(n_tips)
    for i in range(n_tips):
        mine = np.zeros(n_tips * k, bool)
        mine[i * k : (i + 1) * k] = True
        rest = obs & ~mine
        blk = slice(i * k, (i + 1) * k)
        if rest.any():
            S_rr = cov[np.ix_(rest, rest)]
            S_ir = cov[blk][:, rest]
            A = scipy.linalg.solve(S_rr, S_ir.T, assume_a="pos").T
            mean[i] = mv[blk] + A @ (yv[rest] - mv[rest])
            ccov[i] = cov[blk, blk] - A @ S_ir.T
        else:
            mean[i] = mv[blk]
            ccov[i] = cov[blk, blk]
        o = np.asarray(observed[i], bool)
        if o.any():
            logdens[i] = scipy.stats.multivariate_normal.logpdf(
                y[i, o], mean[i, o], ccov[i][np.ix_(o, o)]
            )
    return mean, ccov, logdens


def ancestral_states(parent, lengths, y, observed, R, E, err_var, mu):
    """Posterior of every node's latent value given all data, by dense conditioning.

    The latent values of all nodes and the observations are jointly Gaussian:
    ``Cov(X_u, X_v) = C_node[u, v] R``, ``Y_o = X_o + e``.
    """
    n_tips, k = y.shape
    Cn = node_covariance(parent, lengths)
    n = Cn.shape[0]
    cov_x = np.kron(Cn, R)
    obs = np.ravel(observed).astype(bool)
    cov_y = dense_covariance(parent, lengths, R, E, err_var)[np.ix_(obs, obs)]
    cov_xy = cov_x[:, : n_tips * k][:, obs]
    mx = np.tile(mu, n)
    if obs.any():
        A = scipy.linalg.solve(cov_y, cov_xy.T, assume_a="pos").T
        post_mean = mx + A @ (np.ravel(y)[obs] - np.tile(mu, n_tips)[obs])
        post_cov = cov_x - A @ cov_xy.T
    else:
        post_mean, post_cov = mx, cov_x
    mean = post_mean.reshape(n, k)
    cov = np.stack([post_cov[v * k : (v + 1) * k, v * k : (v + 1) * k] for v in range(n)])
    return mean, cov
