"""Trees as flat arrays.

Every tree inside cladewise is a :class:`FlatTree`: a handful of numpy arrays in a
fixed order that the likelihood engine walks with plain loops.

Conventions (the engine, simulation and contrasts code rely on them):

* nodes are numbered ``0 .. n_nodes - 1``;
* tips come first: nodes ``0 .. n_tips - 1`` are the tips, in the order of
  ``tip_names``;
* internal nodes follow in post-order, so ``parent[i] > i`` for every node but the
  root; the root is the last node and ``parent[root] == -1``;
* ``length[i]`` is the length of the branch above node ``i``; ``length[root]`` is
  the root edge (0 unless the file gives one). A root edge adds ``length[root] * R``
  of variance shared by every species.

A pruning pass is therefore ``for i in range(n_nodes - 1): combine i into
parent[i]`` and a pre-order pass is the same loop backwards.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["FlatTree"]


@dataclass(frozen=True, eq=False)
class FlatTree:
    """A rooted tree stored as flat arrays (see the module docstring).

    Parameters
    ----------
    parent : ndarray of int64, shape (n_nodes,)
        Parent index of every node, ``-1`` for the root.
    length : ndarray of float64, shape (n_nodes,)
        Branch length above every node.
    tip_names : tuple of str
        Names of nodes ``0 .. n_tips - 1``.
    node_labels : tuple of str or None, optional
        Labels of the internal nodes ``n_tips .. n_nodes - 1`` (clade names from the
        file), ``None`` where unlabelled.
    """

    parent: np.ndarray
    length: np.ndarray
    tip_names: tuple[str, ...]
    node_labels: tuple[str | None, ...] = field(default=())

    def __post_init__(self) -> None:
        parent = np.ascontiguousarray(self.parent, dtype=np.int64)
        length = np.ascontiguousarray(self.length, dtype=np.float64)
        object.__setattr__(self, "parent", parent)
        object.__setattr__(self, "length", length)
        object.__setattr__(self, "tip_names", tuple(self.tip_names))
        n_int = parent.shape[0] - len(self.tip_names)
        labels = tuple(self.node_labels) if self.node_labels else (None,) * n_int
        object.__setattr__(self, "node_labels", labels)
        self._check_invariants()

    def _check_invariants(self) -> None:
        n = self.parent.shape[0]
        if self.length.shape != (n,):
            raise ValueError("parent and length must have the same length")
        if len(self.node_labels) != n - self.n_tips:
            raise ValueError("one label per internal node expected")
        if n == 0 or self.parent[-1] != -1:
            raise ValueError("the root must be the last node")
        idx = np.arange(n - 1)
        if np.any(self.parent[:-1] <= idx) or np.any(self.parent[:-1] >= n):
            raise ValueError("nodes must be in post-order (parent[i] > i)")
        if self.n_tips > 0 and np.any(self.parent[: n - 1] < self.n_tips):
            raise ValueError("tips must be the first n_tips nodes")

    # ------------------------------------------------------------------ shape
    @property
    def n_tips(self) -> int:
        """Number of tips (species)."""
        return len(self.tip_names)

    @property
    def n_nodes(self) -> int:
        """Number of nodes, tips included."""
        return int(self.parent.shape[0])

    @property
    def root(self) -> int:
        """Index of the root (always the last node)."""
        return self.n_nodes - 1

    def n_children(self) -> np.ndarray:
        """Number of children of every node (0 for tips)."""
        return np.bincount(self.parent[:-1], minlength=self.n_nodes)

    def children(self) -> tuple[np.ndarray, np.ndarray]:
        """Children in compressed form: children of ``v`` are ``idx[ptr[v]:ptr[v+1]]``."""
        counts = self.n_children()
        ptr = np.zeros(self.n_nodes + 1, dtype=np.int64)
        np.cumsum(counts, out=ptr[1:])
        order = np.argsort(self.parent[:-1], kind="stable")
        return ptr, order.astype(np.int64)

    # ---------------------------------------------------------------- heights
    def heights(self) -> np.ndarray:
        """Distance from the root to every node (the root edge is not counted)."""
        h = np.zeros(self.n_nodes)
        par = self.parent
        ln = self.length
        for i in range(self.n_nodes - 2, -1, -1):
            h[i] = h[par[i]] + ln[i]
        return h

    def tip_heights(self) -> np.ndarray:
        """Root-to-tip distance of every tip."""
        return self.heights()[: self.n_tips]

    def is_ultrametric(self, rtol: float = 1e-6) -> bool:
        """True when all root-to-tip distances agree within ``rtol`` of the longest."""
        th = self.tip_heights()
        return bool(th.max() - th.min() <= rtol * max(th.max(), 1e-300))

    def with_lengths(self, length: np.ndarray) -> "FlatTree":
        """The same topology with new branch lengths."""
        return FlatTree(self.parent, length, self.tip_names, self.node_labels)

    def tips_below(self) -> list[np.ndarray]:
        """For every node, the indices of the tips below it (tips: themselves)."""
        below: list[list[int]] = [[i] for i in range(self.n_tips)] + [
            [] for _ in range(self.n_nodes - self.n_tips)
        ]
        for i in range(self.n_nodes - 1):
            below[self.parent[i]].extend(below[i])
        return [np.asarray(b, dtype=np.int64) for b in below]


def covariance(tree: FlatTree) -> np.ndarray:
    """Brownian-motion covariance of the tips: shared path length from the root.

    Includes the root edge. Dense ``n_tips x n_tips``: a reference for small and
    medium trees, never used on the large-tree path.
    """
    n = tree.n_tips
    h = tree.heights() + tree.length[tree.root]
    # Shared path of tips i, j = height of their most recent common ancestor.
    # Walk every internal node once and fill the block of tip pairs it joins.
    cov = np.zeros((n, n))
    ptr, kids = tree.children()
    below = tree.tips_below()
    for v in range(n, tree.n_nodes):
        ch = kids[ptr[v] : ptr[v + 1]]
        for a in range(len(ch)):
            ta = below[ch[a]]
            for b in range(a + 1, len(ch)):
                tb = below[ch[b]]
                cov[np.ix_(ta, tb)] = h[v]
                cov[np.ix_(tb, ta)] = h[v]
    cov[np.diag_indices(n)] = h[:n]
    return cov
