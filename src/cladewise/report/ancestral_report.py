"""Report section: ancestral values painted on the tree, named nodes, predicted cells.

Reads only the fit folder (the ``ancestral`` and ``predictions`` groups of
posterior.nc, written by :mod:`cladewise.inference.ancestral`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.collections import LineCollection

from cladewise.data.trees import FlatTree
from cladewise.report.html import esc, figure_html, table_html
from cladewise.report.style import SavedFigure, new_figure, save_figure, value_colormap
from cladewise.report.tree_plot import COMPACT_ABOVE, tree_layout

__all__ = ["ancestral_section", "plot_values_on_tree", "named_nodes"]

#: pieces per branch: the colour runs from the parent's value to the child's
_PIECES = 8
#: traits drawn at most (one figure each)
_MAX_TRAITS = 4
#: nodes listed when the tree has no node labels: the root and the next deepest ones
_DEEPEST = 5


def plot_values_on_tree(tree: FlatTree, node_values: np.ndarray, tip_values: np.ndarray,
                        predicted: np.ndarray, label: str, title: str | None = None):
    """Rectangular tree whose branches carry a value on our lightness-monotone scale.

    Parameters
    ----------
    tree : FlatTree
    node_values : (n_nodes - n_tips,) reconstructed values of the internal nodes
    tip_values : (n_tips,) observed (or predicted) species values
    predicted : (n_tips,) bool, species whose value is a prediction (open circles)
    label : colour-bar label
    """
    n, N = tree.n_tips, tree.n_nodes
    v = np.concatenate([np.asarray(tip_values, float), np.asarray(node_values, float)])
    x, y = tree_layout(tree)
    finite = v[np.isfinite(v)]
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    hi = hi if hi > lo else lo + 1.0
    child = np.arange(N - 1)
    par = tree.parent[:-1]
    t = np.linspace(0.0, 1.0, _PIECES + 1)
    xs = x[par][:, None] + (x[child] - x[par])[:, None] * t[None, :]
    vals = v[par][:, None] + (v[child] - v[par])[:, None] * (0.5 * (t[1:] + t[:-1]))[None, :]
    vals = np.where(np.isfinite(v[child])[:, None], vals, v[par][:, None])
    segs = np.stack([np.stack([xs[:, :-1], np.repeat(y[child][:, None], _PIECES, 1)], -1),
                     np.stack([xs[:, 1:], np.repeat(y[child][:, None], _PIECES, 1)], -1)], 2).reshape(-1, 2, 2)
    compact = n > COMPACT_ABOVE
    height = 7.5 if compact else min(max(3.0, 0.16 * n + 1.2), 26.0)
    fig, ax = new_figure(7.5, height)
    cmap = value_colormap()
    lw = (0.6 if n > 600 else 1.0) if compact else 2.2
    # projecting caps close the hairline gaps between the pieces of a branch
    lc = LineCollection(segs, cmap=cmap, linewidths=lw, capstyle="projecting")
    lc.set_array(vals.reshape(-1))
    lc.set_clim(lo, hi)
    ax.add_collection(lc)
    # vertical connectors in the parent's colour
    lo_y = np.full(N, np.inf)
    hi_y = np.full(N, -np.inf)
    np.minimum.at(lo_y, par, y[child])
    np.maximum.at(hi_y, par, y[child])
    inner = np.flatnonzero(np.isfinite(lo_y))
    vert = np.stack([np.stack([x[inner], lo_y[inner]], 1), np.stack([x[inner], hi_y[inner]], 1)], 1)
    vc = LineCollection(vert, cmap=cmap, linewidths=lw)
    vc.set_array(v[inner])
    vc.set_clim(lo, hi)
    ax.add_collection(vc)
    xmax = float(x.max()) if x.max() > 0 else 1.0
    pred = np.asarray(predicted, bool)
    if pred.any():
        ax.scatter(x[:n][pred], y[:n][pred], s=22 if not compact else 8, facecolors="white",
                   edgecolors="black", linewidths=0.8, zorder=3, label="predicted (no data)")
        ax.legend(loc="lower left", fontsize=7, frameon=False)
    if not compact:
        for i in range(n):
            ax.text(x[i] + 0.015 * xmax, y[i], tree.tip_names[i], va="center", ha="left",
                    fontsize=7 if n > 40 else 8, style="italic" if pred[i] else "normal")
        ax.set_xlim(-0.02 * xmax, 1.4 * xmax)
    else:
        ax.set_xlim(-0.02 * xmax, 1.02 * xmax)
    ax.set_ylim(n - 0.5, -0.5)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    ax.set_xlabel("distance from the root (branch-length units)")
    bar = fig.colorbar(lc, ax=ax, fraction=0.04, pad=0.02)
    bar.set_label(label)
    if title:
        ax.set_title(title)
    return fig


def named_nodes(nodes: pd.DataFrame) -> pd.DataFrame:
    """Rows of labelled nodes; without labels, the root and the next deepest nodes."""
    lab = nodes["label"].fillna("").astype(str)
    if (lab != "").any():
        return nodes[lab != ""]
    order = nodes.drop_duplicates("node").sort_values(["height", "node"], ascending=[True, False])
    keep = order["node"].head(_DEEPEST)
    return nodes[nodes["node"].isin(keep)]


def _node_table(ds) -> pd.DataFrame:
    rows = []
    node = ds["node"].values
    labels = ds["node_label"].values
    ta, tb = ds["tip_a"].values, ds["tip_b"].values
    tree = _tree(ds)
    h = tree.heights()
    below = np.zeros(tree.n_nodes, dtype=int)
    below[: tree.n_tips] = 1
    for i in range(tree.n_nodes - 1):
        below[tree.parent[i]] += below[i]
    for a, v in enumerate(node):
        for j, t in enumerate(ds["trait"].values):
            rows.append({"node": int(v), "label": str(labels[a]), "tip_a": str(ta[a]), "tip_b": str(tb[a]),
                         "n_species": int(below[v]), "height": float(h[v]), "trait": str(t),
                         "mean": float(ds["node_mean"].values[a, j]), "sd": float(ds["node_sd"].values[a, j]),
                         "hdi_low": float(ds["node_hdi_low"].values[a, j]),
                         "hdi_high": float(ds["node_hdi_high"].values[a, j])})
    return pd.DataFrame(rows)


def _tree(ds) -> FlatTree:
    names = tuple(str(s) for s in ds["tip_name"].values)
    return FlatTree(np.asarray(ds["tree_parent"].values), np.asarray(ds["tree_length"].values), names)


def ancestral_section(view, fig_dir: Path, tables: dict[str, pd.DataFrame]
                      ) -> tuple[str, list[SavedFigure]]:
    """HTML of the ancestral-values section and the figures it saved."""
    idata = view.idata
    if "ancestral" not in idata.groups():
        return ('<p class="skip">No ancestral values in this fit folder (turned off with --no-ancestral, '
                "or the fit was made before they existed).</p>"), []
    ds = idata["ancestral"]
    tree = _tree(ds)
    n = tree.n_tips
    info = view.info.get("ancestral") or {}
    hdi = int(round(float(ds.attrs.get("hdi_prob", 0.95)) * 100))
    parts = [f"<p>Reconstructed {esc(ds.attrs.get('what', 'values'))}, from {esc(ds.attrs.get('n_draws'))} "
             "posterior draws: for each draw one value per node is drawn from its distribution given the data "
             "and that draw's parameters, so the intervals carry both the uncertainty of the node given the "
             "parameters and the uncertainty of the parameters. Ancestral values are model-based "
             "estimates, only as good as the model of evolution and the tree.</p>"]
    for note in info.get("notes") or []:
        parts.append(f'<p class="skip">{esc(note)}</p>')
    pred = idata["predictions"] if "predictions" in idata.groups() else None
    species = list(tree.tip_names)
    sp_index = {s: i for i, s in enumerate(species)}
    figs: list[SavedFigure] = []
    traits = [str(t) for t in ds["trait"].values]
    for j, trait in enumerate(traits[:_MAX_TRAITS]):
        tips = np.full(n, np.nan)
        is_pred = np.zeros(n, bool)
        if view.y is not None and view.species == species and view.kind != "regression":
            tips = np.asarray(view.y[:, j], dtype=float).copy()
        if pred is not None and view.kind != "regression":
            for c in range(pred.sizes["cell"]):
                if str(pred["cell_trait"].values[c]) == trait:
                    i = sp_index[str(pred["cell_species"].values[c])]
                    tips[i] = float(pred["predicted_mean"].values[c])
                    is_pred[i] = True
        if view.kind == "regression":
            tips = np.full(n, np.nan)  # residuals at the tips are not shown; branches end at their node
        from cladewise.report.figures import trait_label

        shown = trait_label(view, trait) if view.kind != "regression" else trait
        fig = plot_values_on_tree(tree, ds["node_mean"].values[:, j], tips, is_pred,
                                  f"{shown} (posterior mean)")
        cap = (f"Posterior mean of {trait} at every ancestor, painted along the branches (dark: low, "
               "light: high; the scale is monotone in lightness and reads in greyscale). Each branch runs "
               "from its parent's value to its child's" + (": open circles mark species whose value is a "
               "prediction, not an observation." if is_pred.any() else ".") +
               f" See ancestral.csv for every node's {hdi}% HDI.")
        figs.append(save_figure(fig, fig_dir, f"ancestral_{j + 1}", f"Ancestral values: {trait}", cap))
    if len(traits) > _MAX_TRAITS:
        parts.append(f'<p class="skip">Figures are drawn for the first {_MAX_TRAITS} traits; '
                     "ancestral.csv holds all.</p>")
    parts += [figure_html(f) for f in figs]
    nodes = _node_table(ds)
    tables["ancestral_values"] = nodes
    shown = named_nodes(nodes).copy()
    labelled = (shown["label"] != "").any()
    shown.insert(0, "node", shown.pop("node"))
    shown["clade"] = [lab if lab else f"{a} + {b}" for lab, a, b in zip(shown["label"], shown["tip_a"], shown["tip_b"])]
    shown = shown[["node", "clade", "n_species", "trait", "mean", "sd", "hdi_low", "hdi_high"]]
    heading = "Named nodes" if labelled else f"The root and the {_DEEPEST - 1} next deepest nodes"
    parts.append(f"<h3>{esc(heading)}</h3><p>A clade is named by its label in the tree file, or by two "
                 "species whose most recent common ancestor it is.</p>"
                 + table_html(shown, numeric=("mean", "sd", "hdi_low", "hdi_high"),
                              headers={"hdi_low": f"{hdi}% HDI low", "hdi_high": f"{hdi}% HDI high",
                                       "n_species": "species"}))
    if pred is not None and pred.sizes.get("cell", 0):
        pt = pd.DataFrame({
            "species": pred["cell_species"].values.astype(str), "trait": pred["cell_trait"].values.astype(str),
            "predicted mean": pred["predicted_mean"].values, "sd": pred["predicted_sd"].values,
            "hdi_low": pred["predicted_hdi_low"].values, "hdi_high": pred["predicted_hdi_high"].values})
        tables["predictions"] = pt
        parts.append("<h3>Predictions for species without data (not observations)</h3>"
                     '<div class="banner note"><b>These values are PREDICTIONS</b>, not data: the model\'s '
                     "estimate of each species' true mean for a trait it has no value for, given its other traits "
                     "and its relatives. Measurement error is not added. Do not use them as if they were "
                     "measured.</div>"
                     + table_html(pt.head(200), numeric=("predicted mean", "sd", "hdi_low", "hdi_high"),
                                  headers={"hdi_low": f"{hdi}% HDI low", "hdi_high": f"{hdi}% HDI high"}))
        if len(pt) > 200:
            parts.append(f'<p class="skip">The first 200 of {len(pt)} predicted cells are shown; '
                         "predictions.csv holds all.</p>")
    parts.append(_state_tables(view, tables))
    return "".join(parts), figs


def _state_tables(view, tables: dict[str, pd.DataFrame]) -> str:
    """Discrete traits: predicted state probabilities and the root's, from the fit folder's CSVs."""
    out = []
    pred_file, node_file = Path(view.folder) / "state_predictions.csv", Path(view.folder) / "ancestral_states.csv"
    if pred_file.is_file():
        sp = pd.read_csv(pred_file)
        tables["state_predictions"] = sp
        probs = tuple(c for c in sp.columns if c.startswith("P("))
        out.append("<h3>Predicted states of species without one (not observations)</h3>"
                   '<div class="banner note"><b>These are PREDICTED probabilities</b> of each state for species '
                   "whose state is unknown, from the threshold model given their relatives and their own "
                   "continuous traits; they are not data.</div>"
                   + table_html(sp.head(200), numeric=probs))
    if node_file.is_file():
        ns = pd.read_csv(node_file)
        tables["ancestral_states"] = ns
        root = ns.loc[ns.groupby("trait")["node"].idxmax()]  # the root is the last node
        probs = tuple(c for c in root.columns if c.startswith("P("))
        out.append("<h3>State probabilities at the root</h3><p>From the root's liability given all data; "
                   "ancestral_states.csv holds every node. Deep nodes are weakly informed.</p>"
                   + table_html(root.drop(columns=[c for c in ("tip_a", "tip_b") if c in root.columns])
                                , numeric=probs))
    return "".join(out)
