"""Blomberg's K in linear time, with a permutation p-value.

Blomberg, Garland & Ives (2003, Evolution 57:717-745) compare the observed ratio
of two mean squared errors of a trait ``y`` on a tree with covariance ``C`` to the
ratio expected under Brownian motion::

    K = [ (y - a)'(y - a) / ((y - a)' C^-1 (y - a)) ]  /  [ (tr(C) - N / (1' C^-1 1)) / (N - 1) ]

with ``a`` the generalized-least-squares (GLS) root mean ``1'C^-1 y / 1'C^-1 1``.
K near 1: as much resemblance among relatives as Brownian motion predicts; near 0:
little; above 1: more (close relatives more alike than Brownian motion predicts).

No ``N x N`` matrix is formed. One pruning pass over the tree (Felsenstein 1973,
1985) gives every piece: combining the children ``c`` of a node, with estimates
``m_c`` and extended variances ``V_c`` (branch length plus the variance carried up
from below), gives the node's estimate ``m = sum(m_c / V_c) / sum(1 / V_c)`` and adds
``sum((m_c - m)^2 / V_c)`` to the quadratic form; for two children that term is the
squared standardized independent contrast. At the root, ``m`` is the GLS mean, the
sum of those terms is ``(y - a)' C^-1 (y - a)`` and ``1' C^-1 1 = 1 / (V_root +
root edge)``. ``tr(C)`` is the sum of root-to-tip distances (root edge included,
as in :func:`cladewise.data.trees.covariance`). Polytomies combine all children.
The cost is O(N) per evaluation, O(N P) for P permutations.

The permutation p-value shuffles the values across the tips (the null of no
phylogenetic pattern) and reports ``(1 + #{K_perm >= K}) / (P + 1)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numba import njit

from cladewise.data.trees import FlatTree, prune_to
from cladewise.errors import InputError

__all__ = ["KResult", "blomberg_k", "k_statistics"]


@njit(cache=True, nogil=True)
def _prune_many(ptr, kids, length, Y):  # pragma: no cover - compiled
    """GLS root means and quadratic forms of every row of ``Y`` (columns x tips).

    Returns (root means, quadratic forms, 1'C^-1 1); the extended variances depend on
    the tree only and are computed once.
    """
    P, n = Y.shape
    N = length.shape[0]
    V = length.copy()
    prec = np.zeros(N)
    for node in range(n, N):
        s = 0.0
        for q in range(ptr[node], ptr[node + 1]):
            s += 1.0 / V[kids[q]]
        prec[node] = s
        V[node] += 1.0 / s
    root = N - 1
    ones_prec = 1.0 / V[root]  # V[root] holds 1/prec + root edge
    means = np.empty(P)
    quads = np.empty(P)
    m = np.empty(N)
    for p in range(P):
        for i in range(n):
            m[i] = Y[p, i]
        quad = 0.0
        for node in range(n, N):
            s = 0.0
            for q in range(ptr[node], ptr[node + 1]):
                c = kids[q]
                s += m[c] / V[c]
            mu = s / prec[node]
            m[node] = mu
            for q in range(ptr[node], ptr[node + 1]):
                c = kids[q]
                d = m[c] - mu
                quad += d * d / V[c]
        means[p] = m[root]
        quads[p] = quad
    return means, quads, ones_prec


def _check_lengths(tree: FlatTree) -> None:
    """Extended variances must be positive: a zero-length tip branch is a tip equal to
    its ancestor, and two of them under one node make C singular."""
    if np.any(tree.length[: tree.n_tips] <= 0):
        bad = [tree.tip_names[i] for i in np.flatnonzero(tree.length[: tree.n_tips] <= 0)[:5]]
        raise InputError(
            f"Blomberg's K needs a positive branch length above every species; "
            f"{', '.join(repr(b) for b in bad)} {'has' if len(bad) == 1 else 'have'} length 0. "
            "Give those branches a small positive length."
        )


def _tree_parts(tree: FlatTree) -> tuple:
    _check_lengths(tree)
    ptr, kids = tree.children()
    trace_c = float(np.sum(tree.heights()[: tree.n_tips]) + tree.n_tips * tree.length[tree.root])
    return np.asarray(ptr, np.int64), np.asarray(kids, np.int64), tree.length.astype(float), trace_c


def _k_of_rows(parts: tuple, rows: np.ndarray) -> tuple[np.ndarray, dict[str, float]]:
    ptr, kids, length, trace_c = parts
    n = rows.shape[1]
    # shifting y does not change K; centring keeps the sums of squares well conditioned
    rows = np.ascontiguousarray(rows - rows.mean(axis=1, keepdims=True))
    means, quads, ones_prec = _prune_many(ptr, kids, length, rows)
    expected = (trace_c - n / ones_prec) / (n - 1)
    resid_ss = np.sum((rows - means[:, None]) ** 2, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = (resid_ss / quads) / expected
    return k, {"trace_C": trace_c, "ones_Cinv_ones": float(ones_prec), "expected_ratio": float(expected)}


def k_statistics(tree: FlatTree, Y: np.ndarray) -> tuple[np.ndarray, dict[str, float]]:
    """Blomberg's K of every column of ``Y`` (tips in tree order x columns).

    Returns
    -------
    (K, parts)
        ``K`` per column and the tree-only parts: ``trace_C``, ``ones_Cinv_ones`` and
        the Brownian-motion expectation of the ratio, ``expected_ratio``.
    """
    Y = np.asarray(Y, dtype=float)
    if Y.ndim == 1:
        Y = Y[:, None]
    if Y.shape[0] != tree.n_tips:
        raise ValueError("one row of Y per tip expected")
    return _k_of_rows(_tree_parts(tree), Y.T)


@dataclass
class KResult:
    """Blomberg's K of one trait, with its permutation null distribution.

    Attributes
    ----------
    k : float
        Observed K.
    p_value : float
        ``(1 + #{K_perm >= K}) / (permutations + 1)``; NaN without permutations.
    null : ndarray
        K of every permutation (empty without permutations).
    n_species : int
        Species with a value (the others were dropped from this trait's K).
    dropped : list of str
        Species without a value.
    gls_mean : float
        The GLS root mean ``a``.
    """

    k: float
    p_value: float
    null: np.ndarray
    n_species: int
    dropped: list[str] = field(default_factory=list)
    gls_mean: float = float("nan")
    permutations: int = 0
    seed: int | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"K": self.k, "p_value": self.p_value, "n_species": self.n_species,
                "dropped": list(self.dropped), "gls_mean": self.gls_mean,
                "permutations": self.permutations, "seed": self.seed}


def blomberg_k(tree: FlatTree, values: Any, *, permutations: int = 999, seed: int | None = 1,
               chunk: int = 256) -> KResult:
    """Blomberg's K of one trait and its permutation p-value (see the module docstring).

    Parameters
    ----------
    tree : FlatTree
        Tips in the order of ``values``.
    values : array of shape (n_tips,)
        Trait values; NaN marks a species without a value, dropped from K (the
        tree is pruned to the others).
    permutations : int
        Random shuffles of the values across tips (0: no p-value).
    seed : int, optional
        Seed of the shuffles (same seed, same p-value).
    chunk : int
        Permutations evaluated per pass (memory: tips x chunk numbers).

    Raises
    ------
    InputError
        Fewer than 3 species with a value, values without variation, or a zero-length
        branch above a species.
    """
    y = np.asarray(values, dtype=float).reshape(-1)
    if y.shape[0] != tree.n_tips:
        raise InputError(f"one value per species of the tree expected ({tree.n_tips}); got {y.shape[0]}.")
    if np.any(np.isinf(y)):
        raise InputError("trait values must be finite (or NaN where missing).")
    if permutations < 0:
        raise InputError(f"permutations must be 0 or more; got {permutations}.")
    have = ~np.isnan(y)
    dropped = [tree.tip_names[i] for i in np.flatnonzero(~have)]
    if have.sum() < 3:
        raise InputError(f"Blomberg's K needs at least 3 species with a value; this trait has {int(have.sum())}.")
    if dropped:
        keep = [tree.tip_names[i] for i in np.flatnonzero(have)]
        tree = prune_to(tree, keep)  # keeps the tips' order
        y = y[have]
    if np.ptp(y) == 0:
        raise InputError("Blomberg's K is undefined for a trait with the same value in every species.")
    parts = _tree_parts(tree)
    k_obs, _ = _k_of_rows(parts, y[None, :])
    gls = float(_prune_many(parts[0], parts[1], parts[2], np.ascontiguousarray(y[None, :]))[0][0])
    null = np.empty(0)
    p = float("nan")
    if permutations:
        rng = np.random.default_rng(seed)
        chunks = []
        for start in range(0, permutations, chunk):
            m = min(chunk, permutations - start)
            # each row an independent shuffle of the values across the tips
            chunks.append(_k_of_rows(parts, rng.permuted(np.broadcast_to(y, (m, y.size)), axis=1))[0])
        null = np.concatenate(chunks)
        p = float((1 + np.sum(null >= k_obs[0])) / (permutations + 1))
    return KResult(k=float(k_obs[0]), p_value=p, null=null, n_species=int(tree.n_tips), dropped=dropped,
                   gls_mean=gls, permutations=int(permutations), seed=seed)
