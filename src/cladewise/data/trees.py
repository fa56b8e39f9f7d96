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
from typing import Iterable, Sequence

import numpy as np

from cladewise.errors import InputError

__all__ = [
    "FlatTree",
    "HEIGHT_RANGE",
    "TreeFacts",
    "check_scale",
    "covariance",
    "describe_tree",
    "few_names",
    "order_tips",
    "prune_to",
]


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
    length_error : ndarray of float64, shape (n_nodes,), or None, optional
        Largest error of each branch length from the rounding of the tree file (half
        a unit of the last printed decimal, e.g. ``5e-7`` for lengths written with 6
        decimals); None (the default) when the lengths are exact or their precision
        is unknown. The ultrametric check allows for it.
    """

    parent: np.ndarray
    length: np.ndarray
    tip_names: tuple[str, ...]
    node_labels: tuple[str | None, ...] = field(default=())
    length_error: np.ndarray | None = None

    def __post_init__(self) -> None:
        parent = np.ascontiguousarray(self.parent, dtype=np.int64)
        length = np.ascontiguousarray(self.length, dtype=np.float64)
        object.__setattr__(self, "parent", parent)
        object.__setattr__(self, "length", length)
        object.__setattr__(self, "tip_names", tuple(self.tip_names))
        n_int = parent.shape[0] - len(self.tip_names)
        labels = tuple(self.node_labels) if self.node_labels else (None,) * n_int
        object.__setattr__(self, "node_labels", labels)
        if self.length_error is not None:
            err = np.ascontiguousarray(self.length_error, dtype=np.float64)
            if err.shape != parent.shape or not np.all(err >= 0):
                raise ValueError("length_error must hold one value >= 0 per node")
            object.__setattr__(self, "length_error", err)
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

    def tip_height_error(self) -> np.ndarray:
        """Largest error of each root-to-tip distance due to the rounding of the
        lengths in the file: the sum of :attr:`length_error` along the path."""
        if self.length_error is None:
            return np.zeros(self.n_tips)
        e = np.zeros(self.n_nodes)
        par, le = self.parent, self.length_error
        for i in range(self.n_nodes - 2, -1, -1):
            e[i] = e[par[i]] + le[i]
        return e[: self.n_tips]

    def is_ultrametric(self, rtol: float = 1e-6) -> bool:
        """True when all root-to-tip distances agree within ``rtol`` of the longest,
        once the rounding of the printed lengths is allowed for.

        With rounding, tip ``i``'s true height lies within ``e_i`` of its computed
        height ``h_i`` (:meth:`tip_height_error`); the tips can share one true height
        when ``max(h - e) <= min(h + e)``; ``rtol`` is added on top.
        """
        th = self.tip_heights()
        err = self.tip_height_error()
        spread = float(np.max(th - err) - np.min(th + err))
        return bool(spread <= rtol * max(th.max(), 1e-300))

    def with_lengths(self, length: np.ndarray) -> "FlatTree":
        """The same topology with new branch lengths (exact: no rounding recorded)."""
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


# Tree heights the models can start from. Variances are rate x length; the default
# rate priors scale with 1 / height, so the numbers stay far inside double precision
# (about 1e-308 to 1e308) for any height in this range and trait values within
# traits.VALUE_RANGE. Dated trees in years (up to ~4e9) and substitution trees
# (~1e-3 and up) both fit.
HEIGHT_RANGE = (1e-12, 1e12)


def check_scale(tree: FlatTree, source: str) -> None:
    """Refuse a tree whose scale no model can start from.

    The tree is not rescaled silently: rates are reported per unit of branch
    length, so rescaling would change the units of the results without the user
    knowing. Single branches of any length are fine; the tree's height (longest
    root-to-tip distance) and root edge must lie within :data:`HEIGHT_RANGE`.

    Raises
    ------
    InputError
        Every branch has length zero, or the height or root edge lies outside
        :data:`HEIGHT_RANGE`.
    """
    if tree.n_tips < 2:
        return
    height = float(tree.tip_heights().max())
    root_edge = float(tree.length[tree.root])
    lo, hi = HEIGHT_RANGE
    if height == 0.0:
        raise InputError(
            f"{source}: every branch length is 0 (the tree has no height), so it says nothing "
            "about how related the species are. Use a tree with branch lengths."
        )
    fix = (
        "Rescale the branch lengths: convert them to other units (for example years to "
        "millions of years), or divide every length by the tree height; rates are then "
        "per that unit."
    )
    if not lo <= height <= hi:
        raise InputError(
            f"{source}: the tree height (longest root-to-tip distance) is {height:.3g}, outside "
            f"the range {lo:g} to {hi:g} that the models can compute with. {fix}"
        )
    if root_edge > hi:
        raise InputError(
            f"{source}: the root edge is {root_edge:.3g}, above {hi:g}, the largest length the "
            f"models can compute with. {fix}"
        )


def few_names(names: Sequence[str], k: int = 5) -> str:
    """Up to ``k`` quoted names and how many more, for messages."""
    shown = ", ".join(f"'{n}'" for n in names[:k])
    return shown + (f" and {len(names) - k} more" if len(names) > k else "")


# =================================================================== operations
def prune_to(tree: FlatTree, keep_names: Iterable[str]) -> FlatTree:
    """Keep only the named tips.

    Internal nodes left with one child are removed and their branch added to the
    child's, so the shared path lengths, hence :func:`covariance`, of the kept tips
    are unchanged. If the old root is left with one child, the path down to the new
    root is added to the root edge for the same reason. Tips keep their order.

    Raises
    ------
    InputError
        A name is not a tip of the tree, or no tip would be kept.
    """
    keep = list(dict.fromkeys(keep_names))
    pos = {nm: i for i, nm in enumerate(tree.tip_names)}
    unknown = [nm for nm in keep if nm not in pos]
    if unknown:
        raise InputError(f"cannot keep {few_names(unknown)}: not tips of the tree.")
    if not keep:
        raise InputError("pruning would leave no tip.")
    n, nt = tree.n_nodes, tree.n_tips
    par, ln = tree.parent, tree.length
    alive_below = np.zeros(n, dtype=np.int64)  # kept tips below each node
    alive_below[[pos[nm] for nm in keep]] = 1
    n_live_kids = np.zeros(n, dtype=np.int64)
    for i in range(n - 1):
        if alive_below[i]:
            alive_below[par[i]] += alive_below[i]
            n_live_kids[par[i]] += 1
    survive = np.zeros(n, dtype=bool)
    survive[:nt] = alive_below[:nt] > 0
    survive[nt:] = n_live_kids[nt:] >= 2
    if len(keep) == 1:
        survive[pos[keep[0]]] = True
    # nearest surviving ancestor and the path length to it, root to tips
    up = np.full(n, -1, dtype=np.int64)
    acc = np.zeros(n)
    acc[n - 1] = ln[n - 1]
    for i in range(n - 2, -1, -1):
        p = par[i]
        if survive[p]:
            up[i], acc[i] = p, ln[i]
        else:
            up[i], acc[i] = up[p], ln[i] + acc[p]
    err = None
    if tree.length_error is not None:
        # a merged branch carries the rounding of every branch it replaces
        le = tree.length_error
        err = np.zeros(n)
        err[n - 1] = le[n - 1]
        for i in range(n - 2, -1, -1):
            err[i] = le[i] if survive[par[i]] else le[i] + err[par[i]]
    old = np.flatnonzero(survive)
    kept_err = None if err is None else err[old]
    new_id = np.full(n, -1, dtype=np.int64)
    new_id[old] = np.arange(old.size)
    new_par = np.where(up[old] >= 0, new_id[np.maximum(up[old], 0)], -1)
    tip_names = [tree.tip_names[i] for i in old if i < nt]
    labels = [tree.node_labels[i - nt] for i in old if i >= nt]
    if len(keep) == 1:
        return FlatTree(np.array([-1]), np.array([acc[old[0]]]), tip_names, (), kept_err)
    return FlatTree(new_par, acc[old], tip_names, labels, kept_err)


def order_tips(tree: FlatTree, names: Sequence[str]) -> FlatTree:
    """Renumber the tips so that ``tip_names == names``; internal nodes unchanged.

    Raises
    ------
    InputError
        ``names`` is not exactly the tree's set of tip names.
    """
    names = list(names)
    if len(names) != tree.n_tips or set(names) != set(tree.tip_names) or len(set(names)) != len(names):
        missing = sorted(set(tree.tip_names) - set(names))
        extra = sorted(set(names) - set(tree.tip_names))
        raise InputError(
            "the names given do not match the tree's tips"
            + (f"; missing {few_names(missing)}" if missing else "")
            + (f"; not in the tree {few_names(extra)}" if extra else "")
            + ("; duplicates given" if len(set(names)) != len(names) else "")
            + "."
        )
    nt = tree.n_tips
    where = {nm: i for i, nm in enumerate(names)}
    perm = np.array([where[nm] for nm in tree.tip_names], dtype=np.int64)  # old -> new
    new_par = tree.parent.copy()
    new_len = tree.length.copy()
    new_par[perm] = tree.parent[:nt]
    new_len[perm] = tree.length[:nt]
    new_err = None
    if tree.length_error is not None:
        new_err = tree.length_error.copy()
        new_err[perm] = tree.length_error[:nt]
    return FlatTree(new_par, new_len, names, tree.node_labels, new_err)


# ======================================================================== facts
@dataclass(frozen=True)
class TreeFacts:
    """Plain facts about a tree, for the data summary.

    ``rooted`` is False when the root has three or more children: a basal
    trifurcation is the usual mark of an unrooted tree written as Newick
    (common practice). ``n_polytomies`` counts internal nodes with more than two
    children, the root included. ``rounding`` is the largest error of a
    root-to-tip distance that the rounding of the printed branch lengths can explain
    (0 when the lengths are exact); the ultrametric check allows for it.
    """

    n_tips: int
    n_nodes: int
    rooted: bool
    ultrametric: bool
    rtol: float
    n_polytomies: int
    n_zero_length: int
    n_zero_length_tips: int
    height: float
    min_tip_height: float
    root_edge: float
    warnings: tuple[str, ...] = ()
    rounding: float = 0.0


def describe_tree(tree: FlatTree, rtol: float = 1e-6) -> TreeFacts:
    """Facts about a tree: size, rooting, ultrametricity (within ``rtol``),
    polytomies, zero-length branches and height (longest root-to-tip path, root
    edge not counted)."""
    kids = tree.n_children()
    nt = tree.n_tips
    n_root_kids = int(kids[tree.root]) if tree.n_nodes > 1 else 0
    rooted = n_root_kids <= 2
    n_poly = int(np.sum(kids[nt:] > 2))
    zero = tree.length[:-1] == 0.0
    n_zero = int(zero.sum())
    n_zero_tips = int(zero[:nt].sum()) if tree.n_nodes > 1 else 0
    th = tree.tip_heights() if tree.n_nodes > 1 else np.zeros(1)
    ultra = tree.is_ultrametric(rtol) if tree.n_nodes > 1 else True
    rounding = float(tree.tip_height_error().max()) if tree.n_nodes > 1 else 0.0
    warns: list[str] = []
    if not rooted:
        warns.append(
            f"the root has {n_root_kids} children: the tree looks unrooted; it is used "
            "as rooted at this node. Root it on purpose if that matters."
        )
    if n_poly:
        warns.append(f"{n_poly} polytom{'y' if n_poly == 1 else 'ies'} (nodes with more than two children).")
    if n_zero:
        warns.append(f"{n_zero} zero-length branch{'es' if n_zero != 1 else ''}.")
    if n_zero_tips:
        warns.append(
            f"{n_zero_tips} tip branch{'es' if n_zero_tips != 1 else ''} of length zero: "
            "such species are identical to their relatives under Brownian motion unless "
            "measurement error or a species-level term is modelled."
        )
    if not ultra:
        warns.append(
            f"not ultrametric (root-to-tip distances range {th.min():.6g} to {th.max():.6g}, "
            f"relative tolerance {rtol:g}"
            + (f", plus up to {rounding:.3g} for the rounding of the printed lengths" if rounding else "")
            + ")."
        )
    return TreeFacts(
        n_tips=nt,
        n_nodes=tree.n_nodes,
        rooted=rooted,
        ultrametric=ultra,
        rtol=rtol,
        n_polytomies=n_poly,
        n_zero_length=n_zero,
        n_zero_length_tips=n_zero_tips,
        height=float(th.max()),
        min_tip_height=float(th.min()),
        root_edge=float(tree.length[tree.root]),
        warnings=tuple(warns),
        rounding=rounding,
    )
