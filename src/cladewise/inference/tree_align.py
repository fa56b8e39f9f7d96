"""Bringing a tree sample to one shape: prune, order, pad, choose.

Trees whose node counts differ (different polytomies) are brought to one shape by
:func:`pad_tree`: zero-length single-child nodes are added above the root, which
changes neither the tip covariance nor any branch-length transform, so one compiled
model serves every tree of a sample (:mod:`cladewise.inference.pooled`).
"""

from __future__ import annotations

import dataclasses
from typing import Sequence

import numpy as np

from cladewise.data.trees import FlatTree, order_tips, prune_to
from cladewise.errors import InputError
from cladewise.model.build import BuiltModel, ModelData, ModelSpec, build_model

__all__ = ["pad_tree", "align_trees", "choose_trees", "build_for_sample"]


def pad_tree(tree: FlatTree, n_nodes: int) -> FlatTree:
    """Add zero-length single-child nodes above the root up to ``n_nodes`` nodes.

    The old root hangs below a chain of new nodes by zero-length branches and the
    root edge moves to the new root, so every tip's root distance, the shared path
    of every pair of tips (hence the covariance under any transform of
    :mod:`cladewise.model.evolution`) and the likelihood are unchanged.

    Raises
    ------
    ValueError
        ``n_nodes`` is smaller than the tree's node count.
    """
    extra = int(n_nodes) - tree.n_nodes
    if extra < 0:
        raise ValueError(f"cannot pad a tree of {tree.n_nodes} nodes to {n_nodes}")
    if extra == 0:
        return tree
    n = tree.n_nodes
    parent = np.concatenate([tree.parent, np.arange(n + 1, n + extra + 1)])
    parent[-1] = -1
    parent[n - 1] = n
    length = np.concatenate([tree.length, np.zeros(extra)])
    length[-1] = tree.length[tree.root]  # the root edge stays on the (new) root
    length[n - 1] = 0.0
    labels = tuple(tree.node_labels) + (None,) * extra
    return FlatTree(parent, length, tree.tip_names, labels)


def align_trees(trees: Sequence[FlatTree], species: Sequence[str]) -> list[FlatTree]:
    """Prune (if needed) and order every tree's tips as ``species``.

    Raises
    ------
    InputError
        A tree lacks some of the species.
    """
    species = list(species)
    want = set(species)
    out = []
    for i, t in enumerate(trees):
        tips = set(t.tip_names)
        if tips != want:
            missing = sorted(want - tips)
            if missing:
                raise InputError(
                    f"tree {i + 1} of the sample lacks {len(missing)} species of the data "
                    f"(e.g. {', '.join(missing[:5])}); use a tree sample with the same species as the tree"
                )
            t = prune_to(t, species)
        out.append(order_tips(t, species) if list(t.tip_names) != species else t)
    return out


def choose_trees(n_sample: int, n_trees: int | None, seed: int) -> np.ndarray:
    """Sample indices of the trees to fit: all of them, or ``n_trees`` drawn without
    replacement with ``numpy.random.default_rng(seed)`` (sorted)."""
    if n_trees is None or n_trees == n_sample:
        return np.arange(n_sample)
    if not isinstance(n_trees, (int, np.integer)) or not 1 <= n_trees <= n_sample:
        raise InputError(
            f"n_trees = {n_trees!r}: choose a whole number from 1 to {n_sample} (the size of the tree sample)"
        )
    return np.sort(np.random.default_rng(seed).choice(n_sample, size=int(n_trees), replace=False))


def build_for_sample(
    data: ModelData, spec: ModelSpec, trees: Sequence[FlatTree], likelihood: str = "tree"
) -> tuple[BuiltModel, list[FlatTree]]:
    """Build one model that serves every tree of ``trees``.

    The reference tree (``data.tree``, it sets the prior scales) and every tree of the
    sample are padded to the largest node count (:func:`pad_tree`).

    Returns
    -------
    (BuiltModel, list of FlatTree)
        The model (built on the padded reference tree) and the padded, aligned trees.
    """
    if not trees:
        raise InputError("the tree sample is empty; give a file with at least one tree")
    aligned = align_trees(trees, data.species)
    n_max = max([data.tree.n_nodes] + [t.n_nodes for t in aligned])
    padded = [pad_tree(t, n_max) for t in aligned]
    ref = dataclasses.replace(data, tree=pad_tree(data.tree, n_max), notes=list(data.notes))
    # OU needs its exact per-tip rescaling in the graph if any tree of the sample is not ultrametric
    ultra = data.tree.is_ultrametric() and all(t.is_ultrametric() for t in aligned)
    built = build_model(ref, spec, likelihood=likelihood, ultrametric=ultra)
    return built, padded
