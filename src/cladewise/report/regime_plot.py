"""The tree with its evolutionary regimes: one colour and line style per regime."""

from __future__ import annotations

from typing import Sequence

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from cladewise.data.trees import FlatTree
from cladewise.report.style import LINESTYLES, SERIES, new_figure
from cladewise.report.tree_plot import COMPACT_ABOVE, tree_layout

__all__ = ["plot_regimes", "regime_figure"]


def plot_regimes(tree: FlatTree, node_regime: np.ndarray, regimes: Sequence[str],
                 title: str | None = None) -> Figure:
    """Rectangular phylogram, each branch in its regime's colour and line style.

    A vertical connector takes the regime of its node (the branches start there).
    """
    n = tree.n_tips
    compact = n > COMPACT_ABOVE
    x, y = tree_layout(tree)
    height = 7.5 if compact else min(max(2.5, 0.16 * n + 1.0), 26.0)
    fig, ax = new_figure(7.5, height)
    lw = (0.4 if n > 600 else 0.7) if compact else 1.3
    par = tree.parent[:-1]
    child = np.arange(tree.n_nodes - 1)
    node_regime = np.asarray(node_regime)
    lo = np.full(tree.n_nodes, np.inf)
    hi = np.full(tree.n_nodes, -np.inf)
    np.minimum.at(lo, par, y[child])
    np.maximum.at(hi, par, y[child])
    handles = []
    for r, name in enumerate(regimes):
        colour, style = SERIES[r % len(SERIES)], LINESTYLES[r % len(LINESTYLES)]
        c = child[node_regime[child] == r]
        segs = [[(x[par[i]], y[i]), (x[i], y[i])] for i in c]
        internal = [v for v in np.flatnonzero(np.isfinite(lo)) if node_regime[v] == r]
        segs += [[(x[v], lo[v]), (x[v], hi[v])] for v in internal]
        if segs:
            ax.add_collection(LineCollection(segs, colors=colour, linewidths=lw, linestyles=style))
        handles.append(Line2D([0], [0], color=colour, linestyle=style, linewidth=1.5,
                              label=f"{name} ({int(np.sum(node_regime[child] == r))} branches)"))
    xmax = float(x.max()) if x.max() > 0 else 1.0
    ax.set_ylim(n - 0.5, -0.5)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    ax.set_xlabel("distance from the root (branch-length units)")
    if compact:
        ax.set_xlim(-0.02 * xmax, 1.01 * xmax)
    else:
        ax.set_xlim(-0.02 * xmax, 1.45 * xmax)
        for i in range(n):
            ax.text(x[i] + 0.015 * xmax, y[i], tree.tip_names[i], va="center", ha="left",
                    fontsize=7 if n > 40 else 8)
    ax.legend(handles=handles, loc="lower left", fontsize=8, frameon=False, title="regime")
    if title:
        fig.suptitle(title)
    return fig


def regime_figure(view):
    """Report figure: the painted regimes of a regime model (skipped otherwise)."""
    from cladewise.report.figures import Skip

    reg = (view.info or {}).get("regimes")
    if not reg:
        why = Skip("the model has no regimes")
        why.quiet = True
        raise why
    if view.tree is None or list(view.tree.parent) != list(reg["parent"]):
        raise Skip("the stored tree does not match the tree the regimes were painted on")
    fig = plot_regimes(view.tree, np.asarray(reg["node_regime"]), reg["regimes"])
    cap = (f"Regimes of painting '{reg['name']}': each branch is drawn in the colour and line style "
           f"of its regime; '{reg['regimes'][0]}' is the reference of the rate ratios and optimum "
           "differences. A painting is an assumption of the analysis, not a result.")
    return fig, cap
