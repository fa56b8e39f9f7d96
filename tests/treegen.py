"""Random trees for tests (a plain coalescent-like construction)."""

from __future__ import annotations

import numpy as np

from cladewise.data.trees import FlatTree


def random_tree(n_tips: int, rng: np.random.Generator, ultrametric: bool = False,
                root_edge: float = 0.0) -> FlatTree:
    """Random bifurcating tree built by joining pairs (coalescent-like).

    The one random-tree helper of the tests: ``ultrametric=False`` adds a random
    length to every tip branch; ``root_edge`` puts a branch above the root.
    """
    active = list(range(n_tips))
    parent = np.full(2 * n_tips - 1, -1)
    height = np.zeros(2 * n_tips - 1)
    node = n_tips
    t = 0.0
    while len(active) > 1:
        t += rng.exponential(1.0)
        a, b = rng.choice(len(active), 2, replace=False)
        ia, ib = active[a], active[b]
        parent[ia] = parent[ib] = node
        height[node] = t
        active = [x for j, x in enumerate(active) if j not in (a, b)] + [node]
        node += 1
    # convert "age" (time before present) into branch lengths
    length = np.zeros(2 * n_tips - 1)
    length[:-1] = height[parent[:-1]] - height[:-1]
    if not ultrametric:
        length[:n_tips] += rng.uniform(0, 1.0, n_tips)
    length[-1] = root_edge
    return FlatTree(parent, length, tuple(f"s{i}" for i in range(n_tips)))


def shared_path_cov(tree: FlatTree) -> np.ndarray:
    """C_ij = length of the path tips i and j share from the root (root edge included):
    the Brownian-motion covariance at unit rate, built here from the parent array alone."""
    n = tree.n_tips
    paths = []
    for i in range(n):
        v, p = i, set()
        while v != -1:
            p.add(v)
            v = tree.parent[v]
        paths.append(p)
    return np.array([[sum(tree.length[v] for v in paths[i] & paths[j]) for j in range(n)] for i in range(n)])
