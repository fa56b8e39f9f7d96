"""The tree drawn from its flat arrays, with trait values beside the tips.

No recursion anywhere: tip order comes from an iterative pre-order walk, node
heights from one loop over the parent array, and all branches go into two
``LineCollection`` objects, so a 2,000-tip tree draws in well under a second.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure

from cladewise.report.style import MARKERS, SEQUENTIAL, SERIES, new_figure
from cladewise.data.trees import FlatTree

__all__ = ["COMPACT_ABOVE", "tree_layout", "plot_tree"]

#: Above this many tips the tree is drawn in compact mode (no labels, heat strip).
COMPACT_ABOVE = 150


def tree_layout(tree: FlatTree) -> tuple[np.ndarray, np.ndarray]:
    """x (distance from the root) and y (tip rank) of every node.

    Tips get y = 0, 1, ... in the order a pre-order walk meets them (children in
    index order, first child on top); an internal node sits midway between its
    first and last child.
    """
    n, N = tree.n_tips, tree.n_nodes
    x = tree.heights()
    ptr, kids = tree.children()
    y = np.zeros(N)
    rank = 0
    stack = [tree.root]
    while stack:
        v = stack.pop()
        if v < n:
            y[v] = rank
            rank += 1
        else:
            # reversed so the first child is visited first
            stack.extend(kids[ptr[v]:ptr[v + 1]][::-1].tolist())
    lo = np.full(N, np.inf)
    hi = np.full(N, -np.inf)
    lo[:n] = hi[:n] = y[:n]
    par = tree.parent
    for i in range(N - 1):  # post-order: children before parents
        p = par[i]
        if i >= n:
            y[i] = 0.5 * (lo[i] + hi[i])
        lo[p] = min(lo[p], y[i])
        hi[p] = max(hi[p], y[i])
    if N > n:
        y[N - 1] = 0.5 * (lo[N - 1] + hi[N - 1])
    return x, y


def _segments(tree: FlatTree, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    par = tree.parent[:-1]
    child = np.arange(tree.n_nodes - 1)
    horiz = np.stack([np.stack([x[par], y[child]], 1), np.stack([x[child], y[child]], 1)], 1)
    lo = np.full(tree.n_nodes, np.inf)
    hi = np.full(tree.n_nodes, -np.inf)
    np.minimum.at(lo, par, y[child])
    np.maximum.at(hi, par, y[child])
    internal = np.flatnonzero(np.isfinite(lo))
    vert = np.stack([np.stack([x[internal], lo[internal]], 1),
                     np.stack([x[internal], hi[internal]], 1)], 1)
    return horiz, vert


def plot_tree(
    tree: FlatTree,
    values: np.ndarray | None = None,
    trait_names: Sequence[str] | None = None,
    compact: bool | None = None,
    title: str | None = None,
) -> Figure:
    """Draw a rectangular phylogram with the trait values beside the tips.

    Parameters
    ----------
    tree : FlatTree
    values : ndarray, shape (n_tips, k), optional
        Trait values in ``tree.tip_names`` order; NaN where missing.
    trait_names : sequence of str, optional
    compact : bool, optional
        Compact mode (no tip labels, thin lines, values as a heat strip, one
        column per trait scaled to its own range). Default: on above
        :data:`COMPACT_ABOVE` tips.
    title : str, optional

    Returns
    -------
    matplotlib Figure
        ``fig.cladewise_compact`` tells which mode was used.
    """
    n = tree.n_tips
    if compact is None:
        compact = n > COMPACT_ABOVE
    vals = None if values is None else np.asarray(values, dtype=float).reshape(n, -1)
    k = 0 if vals is None else vals.shape[1]
    names = list(trait_names) if trait_names is not None else [f"trait {j + 1}" for j in range(k)]
    x, y = tree_layout(tree)
    horiz, vert = _segments(tree, x, y)
    xmax = float(x.max()) if x.max() > 0 else 1.0

    if compact:
        height = 7.5
        strip = 0.35 * max(k, 1)
        widths = [6.0] + ([strip] if k else [])
        fig, axes = new_figure(sum(widths) + 0.8, height, ncols=len(widths), sharey=True,
                               gridspec_kw={"width_ratios": widths, "wspace": 0.02})
        lw = 0.3 if n > 600 else 0.5
    else:
        height = min(max(2.5, 0.16 * n + 1.0), 26.0)
        widths = [5.0] + [1.6] * k
        fig, axes = new_figure(sum(widths) + 1.5, height, ncols=len(widths), sharey=True,
                               gridspec_kw={"width_ratios": widths, "wspace": 0.05})
        lw = 1.0
    axes = np.atleast_1d(axes)
    ax = axes[0]
    ax.add_collection(LineCollection(horiz, colors="black", linewidths=lw))
    ax.add_collection(LineCollection(vert, colors="black", linewidths=lw))
    ax.set_ylim(n - 0.5, -0.5)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    ax.set_xlabel("distance from the root (branch-length units)")
    tips_y = y[:n]
    if compact:
        ax.set_xlim(-0.02 * xmax, 1.01 * xmax)
        if k:
            order = np.argsort(tips_y)
            grid = vals[order]
            lo = np.nanmin(grid, axis=0)
            span = np.nanmax(grid, axis=0) - lo
            scaled = (grid - lo) / np.where(span > 0, span, 1.0)
            sax = axes[1]
            masked = np.ma.masked_invalid(scaled)
            sax.imshow(masked, aspect="auto", cmap=SEQUENTIAL, interpolation="nearest",
                       extent=(-0.5, k - 0.5, n - 0.5, -0.5), vmin=0, vmax=1)
            sax.set_facecolor("#ffffff")  # missing values show as white gaps
            sax.set_xticks(range(k))
            sax.set_xticklabels(names, rotation=90)
            sax.tick_params(axis="y", left=False)
            for s in sax.spines.values():
                s.set_visible(False)
    else:
        # labels need room on the right of the tips
        ax.set_xlim(-0.02 * xmax, 1.45 * xmax)
        for i in range(n):
            ax.text(x[i] + 0.015 * xmax, tips_y[i], tree.tip_names[i], va="center", ha="left",
                    fontsize=7 if n > 40 else 8)
        for j in range(k):
            tax = axes[1 + j]
            v = vals[:, j]
            ok = np.isfinite(v)
            colour = SERIES[j % len(SERIES)]
            base = np.nanmin(v) if ok.any() else 0.0
            tax.hlines(tips_y[ok], base, v[ok], colors=colour, linewidth=0.8, alpha=0.6)
            tax.plot(v[ok], tips_y[ok], MARKERS[j % len(MARKERS)], color=colour, markersize=3.5,
                     linestyle="none")
            if (~ok).any():
                tax.plot(np.full((~ok).sum(), base), tips_y[~ok], "x", color="#777777", markersize=4,
                         linestyle="none", label="missing")
                tax.legend(loc="lower right", fontsize=7, frameon=False)
            tax.set_xlabel(names[j])
            tax.tick_params(axis="y", left=False)
            tax.spines["left"].set_visible(False)
    if title:
        fig.suptitle(title)
    fig.cladewise_compact = bool(compact)
    return fig
