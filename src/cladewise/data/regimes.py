"""Evolutionary regimes painted on a tree.

A *painting* gives every branch of a tree one regime (the branch above node ``v`` is
in regime ``node_regime[v]``, the root edge in ``node_regime[root]``). Regime 0 is the
reference (the background, or the first regime listed); rate ratios and differences
of optima are reported against it.

Two ways to paint:

Named clades (:func:`paint_clades`)
    Each clade is the most recent common ancestor (MRCA) of listed species, or an
    internal node labelled in the tree file. ``starts = "stem"`` puts the clade's own
    stem branch (the branch above its MRCA) in the regime as well as every branch
    below; ``starts = "crown"`` starts the regime at the MRCA, so only the branches
    below it change. Everything else is in the background regime. Clades on a tree
    are either nested or disjoint; nested clades are painted from the largest to the
    smallest, so the inner clade's regime applies inside it (reported in the notes).
    Two clades with the same MRCA are an error, as is a crown clade of one species
    (it has no branch below its MRCA).

A species-level regime column (:func:`paint_from_species`)
    Internal nodes get the regime that needs the fewest changes (Fitch 1971,
    Syst. Zool. 20:406-416; for polytomies the states shared by most children are
    kept, the usual generalisation). In the pass from the root, a node keeps its
    parent's regime when that is among its most-parsimonious ones; otherwise, and at
    the root, a tie is resolved to the regime that comes first in the regime order
    (given, or by default the most common regime among the species, then
    alphabetical). Every tie is counted and reported. A species with no regime
    (empty cell) fits any. A branch takes the regime of its lower end: a change is
    placed at the start of the branch, as with ``starts = "stem"``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from cladewise.data.trees import FlatTree, few_names
from cladewise.errors import InputError

__all__ = [
    "Clade",
    "Painting",
    "paint_clades",
    "paint_from_species",
    "min_branches",
    "check_branch_counts",
    "STARTS",
]

STARTS = ("stem", "crown")


@dataclass(frozen=True)
class Clade:
    """A clade in a regime: MRCA of ``species`` or the internal node labelled ``node``."""

    regime: str
    species: tuple[str, ...] = ()
    node: str | None = None
    starts: str = "stem"

    def describe(self) -> str:
        what = f"node '{self.node}'" if self.node else f"MRCA of {few_names(list(self.species), 3)}"
        return f"{self.regime!r} ({what}, from the {self.starts})"


@dataclass(frozen=True)
class Painting:
    """Regimes on the branches of one tree.

    Attributes
    ----------
    name : str
        Name of this painting (alternatives are compared by name).
    regimes : tuple of str
        Regime names; index 0 is the reference regime.
    node_regime : ndarray of int64, shape (n_nodes,)
        Regime of the branch above every node (the root edge for the root).
    notes : tuple of str
        How the painting was made (ties, nesting), in plain words.
    """

    name: str
    regimes: tuple[str, ...]
    node_regime: np.ndarray
    notes: tuple[str, ...] = field(default=())

    @property
    def n_regimes(self) -> int:
        return len(self.regimes)

    def branch_counts(self, tree: FlatTree) -> np.ndarray:
        """Number of branches of positive length in each regime (root edge excluded)."""
        v = np.arange(tree.n_nodes - 1)
        keep = tree.length[v] > 0
        return np.bincount(self.node_regime[v][keep], minlength=self.n_regimes)

    def tip_regimes(self, tree: FlatTree) -> dict[str, str]:
        """Regime of every species' own branch."""
        return {s: self.regimes[self.node_regime[i]] for i, s in enumerate(tree.tip_names)}


def _descendants_mask(tree: FlatTree, node: int) -> np.ndarray:
    """Nodes below ``node`` (``node`` excluded), by one sweep in post-order."""
    inside = np.zeros(tree.n_nodes, bool)
    inside[node] = True
    for v in range(node - 1, -1, -1):
        inside[v] = inside[tree.parent[v]]
    inside[node] = False
    return inside


def _mrca(tree: FlatTree, tips: Sequence[int]) -> int:
    """Most recent common ancestor of tip indices (the tip itself for one)."""
    count = np.zeros(tree.n_nodes, np.int64)
    count[list(tips)] = 1
    for v in range(tree.n_nodes - 1):
        count[tree.parent[v]] += count[v]
    # the lowest node (smallest index in post-order) holding every listed tip
    return int(np.flatnonzero(count == len(set(tips)))[0])


def _clade_node(tree: FlatTree, clade: Clade) -> int:
    if clade.node is not None:
        if clade.species:
            raise InputError(f"clade {clade.regime!r}: give either species or node, not both")
        hits = [tree.n_tips + i for i, lab in enumerate(tree.node_labels) if lab == clade.node]
        if not hits:
            labels = [lab for lab in tree.node_labels if lab]
            raise InputError(
                f"clade {clade.regime!r}: no internal node of the tree is labelled {clade.node!r}"
                + (f"; labels in the tree: {few_names(labels)}" if labels
                   else "; the tree file has no node labels (name the clade by species instead)")
            )
        if len(hits) > 1:
            raise InputError(f"clade {clade.regime!r}: {len(hits)} nodes are labelled {clade.node!r}")
        return hits[0]
    if not clade.species:
        raise InputError(f"clade {clade.regime!r} lists no species and no node label")
    index = {s: i for i, s in enumerate(tree.tip_names)}
    absent = [s for s in clade.species if s not in index]
    if absent:
        raise InputError(
            f"clade {clade.regime!r} names species that are not in the tree (after matching "
            f"to the trait table): {few_names(absent)}. Check their spelling or remove them."
        )
    return _mrca(tree, [index[s] for s in clade.species])


def paint_clades(
    tree: FlatTree, clades: Sequence[Clade], background: str = "background", name: str = "clades"
) -> Painting:
    """Paint named clades on ``tree``; see the module docstring for the rules.

    Parameters
    ----------
    tree : FlatTree
    clades : sequence of Clade
    background : str
        Name of the regime of every branch outside the clades (regime 0).
    name : str
        Name of the painting.
    """
    if not clades:
        raise InputError(f"painting {name!r} defines no clade")
    regimes = [background]
    for c in clades:
        if c.starts not in STARTS:
            raise InputError(f"clade {c.regime!r}: starts must be 'stem' or 'crown'; got {c.starts!r}")
        if c.regime not in regimes:
            regimes.append(c.regime)
    if len(regimes) < 2:
        raise InputError(f"painting {name!r}: every clade is in the background regime "
                         f"{background!r}; give the clades another regime name")
    nodes = [_clade_node(tree, c) for c in clades]
    seen: dict[int, Clade] = {}
    for c, v in zip(clades, nodes):
        if v in seen:
            raise InputError(
                f"clades {seen[v].describe()} and {c.describe()} have the same most recent "
                "common ancestor; give each regime its own clade"
            )
        seen[v] = c
        if c.starts == "crown" and v < tree.n_tips:
            raise InputError(
                f"clade {c.describe()} is a single species: it has no crown; use starts = 'stem'"
            )
    node_regime = np.zeros(tree.n_nodes, np.int64)
    masks = [_descendants_mask(tree, v) for v in nodes]
    notes = []
    # largest first, so that a nested clade's regime applies inside it
    order = sorted(range(len(clades)), key=lambda i: -int(masks[i].sum()))
    for i in order:
        c, v = clades[i], nodes[i]
        r = regimes.index(c.regime)
        node_regime[masks[i]] = r
        if c.starts == "stem":
            node_regime[v] = r
        for j in range(len(clades)):
            if j != i and masks[i][nodes[j]]:
                notes.append(f"clade {clades[j].describe()} lies inside clade {c.describe()}: "
                             "its own regime applies inside it")
    if node_regime[tree.root] != 0 and tree.length[tree.root] > 0:
        notes.append("the root edge is in regime " + repr(regimes[node_regime[tree.root]]))
    return Painting(name, tuple(regimes), node_regime, tuple(notes))


def paint_from_species(
    tree: FlatTree,
    species_regime: Mapping[str, str | None],
    order: Sequence[str] | None = None,
    name: str = "species",
) -> Painting:
    """Internal regimes by Fitch parsimony from a regime per species.

    Parameters
    ----------
    tree : FlatTree
    species_regime : mapping species -> regime name (None or "" when unknown)
        Every tip of ``tree`` should appear; species not in the mapping are unknown.
    order : sequence of str, optional
        Regime order: regime 0 first, and ties go to the earlier regime. Default: by
        number of species (most first), then alphabetical.
    name : str
        Name of the painting.
    """
    states = [species_regime.get(s) for s in tree.tip_names]
    states = [None if (s is None or (isinstance(s, float) and np.isnan(s)) or str(s).strip() == "")
              else str(s).strip() for s in states]
    known = [s for s in states if s is not None]
    if not known:
        raise InputError(f"painting {name!r}: no species of the tree has a regime")
    if order is None:
        names, counts = np.unique(known, return_counts=True)
        regimes = [str(n) for _, n in sorted(zip(-counts, names))]
    else:
        regimes = [str(r) for r in order]
        extra = sorted(set(known) - set(regimes))
        if extra:
            raise InputError(f"painting {name!r}: regimes {extra} are not in the given order {regimes}")
    if len(set(known)) < 2:
        raise InputError(f"painting {name!r}: every species has the same regime ({known[0]!r}); "
                         "a regime model needs at least two regimes")
    R = len(regimes)
    n = tree.n_nodes
    # up pass: per node, the set of most-parsimonious regimes (boolean row)
    sets = np.zeros((n, R), bool)
    for i, s in enumerate(states):
        if s is None:
            sets[i] = True
        else:
            sets[i, regimes.index(s)] = True
    counts = np.zeros((n, R), np.int64)
    for v in range(n):
        # post-order: every child of v has been added to counts[v] already
        if v >= tree.n_tips:
            c = counts[v]
            sets[v] = c == c.max()
        if v < n - 1:
            counts[tree.parent[v]] += sets[v]
    # down pass
    node_regime = np.zeros(n, np.int64)
    ties = 0
    tie_regimes: set[str] = set()
    root = n - 1
    first = int(np.flatnonzero(sets[root])[0])
    if sets[root].sum() > 1:
        ties += 1
        tie_regimes.update(regimes[j] for j in np.flatnonzero(sets[root]))
    node_regime[root] = first
    for v in range(n - 2, -1, -1):
        p = node_regime[tree.parent[v]]
        if sets[v, p]:
            node_regime[v] = p
        else:
            options = np.flatnonzero(sets[v])
            if len(options) > 1:
                ties += 1
                tie_regimes.update(regimes[j] for j in options)
            node_regime[v] = int(options[0])
    changes = int(sum(node_regime[v] != node_regime[tree.parent[v]] for v in range(n - 1)))
    notes = [f"internal branches assigned by parsimony (Fitch 1971): {changes} regime change(s)"]
    if ties:
        notes.append(
            f"{ties} node(s) had tied most-parsimonious regimes ({', '.join(sorted(tie_regimes))}); "
            f"resolved by keeping the parent's regime, else the first in the order {regimes}. "
            "Consider comparing alternative paintings."
        )
    unknown = [tree.tip_names[i] for i, s in enumerate(states) if s is None]
    if unknown:
        notes.append(f"{len(unknown)} species without a regime took the parsimonious one: "
                     + few_names(unknown))
    return Painting(name, tuple(regimes), node_regime, tuple(notes))


def min_branches(k: int, own_matrix: bool) -> int:
    """Fewest branches a regime needs for its own parameters (common practice).

    A regime's own k x k rate matrix has k(k+1)/2 parameters; we ask for two branches
    more than that. A regime that only scales a shared matrix (or an OU optimum)
    needs 3 branches.
    """
    return k * (k + 1) // 2 + 2 if own_matrix else 3


def check_branch_counts(painting: Painting, tree: FlatTree, k: int, own_matrix: bool) -> None:
    """Raise :class:`InputError` when a regime has too few branches for its parameters."""
    need = min_branches(k, own_matrix)
    counts = painting.branch_counts(tree)
    few = [(painting.regimes[r], int(c)) for r, c in enumerate(counts) if c < need]
    if few:
        listed = ", ".join(f"{r!r} has {c}" for r, c in few)
        hint = (" or let regimes scale one shared rate matrix (rates = 'scaled')"
                if own_matrix else "")
        raise InputError(
            f"painting {painting.name!r}: too few branches to estimate a regime's own "
            f"parameters ({listed}; at least {need} are needed for "
            f"{'its own ' + str(k) + ' x ' + str(k) + ' rate matrix' if own_matrix else 'a regime'}). "
            f"Merge regimes, paint a larger clade{hint}."
        )


def regime_names_for(tree: FlatTree, painting: Painting) -> list[str]:
    """Regime name of every node (for figures and tables)."""
    return [painting.regimes[r] for r in painting.node_regime]
