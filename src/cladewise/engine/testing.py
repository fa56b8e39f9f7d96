"""Random trees and data in FlatTree form, for tests and benchmarks of the engine.

Everything here is invented data.
"""

from __future__ import annotations

import numpy as np

__all__ = ["random_tree", "random_rate_matrix"]


def random_tree(
    n_tips: int,
    rng: np.random.Generator,
    max_children: int = 2,
    zero_internal: float = 0.0,
    root_edge: float = 0.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Random rooted tree by repeatedly joining random groups of current lineages.

    Parameters
    ----------
    n_tips : int
    rng : numpy Generator
    max_children : int
        Each join takes 2..max_children lineages (> 2 gives polytomies).
    zero_internal : float
        Probability that an internal branch has length 0.
    root_edge : float
        Length of the root edge.

    Returns
    -------
    parent, lengths : FlatTree arrays (tips first, post-order, root last).
        Branch lengths are exponential, so the tree is not ultrametric.
    """
    if n_tips == 1:
        return np.array([-1], np.int64), np.array([root_edge])
    parent = np.full(2 * n_tips - 1, -1, np.int64)
    active = list(range(n_tips))
    nxt = n_tips
    while len(active) > 1:
        m = 2 if max_children <= 2 else int(rng.integers(2, max_children + 1))
        m = min(m, len(active))
        for _ in range(m):
            j = int(rng.integers(len(active)))
            parent[active[j]] = nxt
            active[j] = active[-1]
            active.pop()
        active.append(nxt)
        nxt += 1
    parent = parent[:nxt]
    parent[-1] = -1
    lengths = rng.exponential(1.0, nxt)
    if zero_internal > 0:
        internal = np.arange(n_tips, nxt - 1)
        lengths[internal[rng.random(internal.size) < zero_internal]] = 0.0
    lengths[-1] = root_edge
    return parent, lengths


def random_rate_matrix(k: int, rng: np.random.Generator, scale: float = 1.0) -> np.ndarray:
    """Random well-conditioned positive definite k x k matrix."""
    A = rng.normal(size=(k, k))
    return scale * (A @ A.T / k + 0.5 * np.eye(k))
