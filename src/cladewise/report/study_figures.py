"""Figures of studies and tree-sample fits: power curves, calibration ranks, per-tree intervals.

The studies (:mod:`cladewise.studies`) and the tree-sample fit
(:mod:`cladewise.inference.treesample`) compute tables; this module draws them, with
the palette and style of every other cladewise figure (:mod:`cladewise.report.style`).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from cladewise.report.style import LINESTYLES, MARKERS, OKABE_ITO, SavedFigure, new_figure, save_figure

__all__ = [
    "plot_power",
    "save_power_figure",
    "plot_calibration_ranks",
    "save_calibration_figure",
    "plot_tree_sample",
]

#: column of the power table with the share of data sets whose HDI excludes zero
_PHYLO, _PHYLO_SE = "share_hdi_excludes_zero", "share_hdi_excludes_zero_mcse"


# --------------------------------------------------------------------------- power
def plot_power(result: Any, ax: Any = None) -> Any:
    """Share of 'significant' results against the true correlation, both methods.

    Okabe-Ito colours with different line styles and markers, so the figure reads in
    greyscale too; bars are +- 1.96 Monte Carlo se, clipped to [0, 1].

    Parameters
    ----------
    result : PowerResult
        From :func:`cladewise.studies.power.run_power_study`.
    ax : matplotlib Axes, optional
        Draw into this axes (default: a new figure).

    Returns
    -------
    matplotlib Figure
    """
    if ax is None:
        fig, ax = new_figure(6.0, 4.2)
    else:
        fig = ax.figure
    t = result.table
    s = result.settings
    x = t["true_correlation"].to_numpy()

    def bars(share: str, se: str) -> np.ndarray:
        p, half = t[share].to_numpy(dtype=float), 1.96 * t[se].to_numpy(dtype=float)
        return np.vstack([np.minimum(half, p), np.minimum(half, 1 - p)])

    ax.errorbar(x, t[_PHYLO].to_numpy(dtype=float), yerr=bars(_PHYLO, _PHYLO_SE), color=OKABE_ITO["blue"],
                linestyle=LINESTYLES[0], marker=MARKERS[0], capsize=3,
                label=f"phylogenetic model ({100 * s['hdi_prob']:.0f}% HDI excludes 0)")
    ax.errorbar(x, t["pearson_share"].to_numpy(dtype=float), yerr=bars("pearson_share", "pearson_mcse"), color=OKABE_ITO["vermillion"],
                linestyle=LINESTYLES[1], marker=MARKERS[1], capsize=3,
                label=f"Pearson test ignoring the tree (p < {s['alpha']:g})")
    ax.axhline(s["alpha"], color=OKABE_ITO["black"], linestyle=LINESTYLES[2], linewidth=1,
               label=f"nominal false-positive rate {s['alpha']:g}")
    ax.set_xlabel("true evolutionary correlation")
    ax.set_ylabel("share of data sets with a 'significant' correlation")
    ax.set_ylim(-0.02, 1.02)
    ax.set_title(f"{s['n_species']} species, {s['n_datasets']} simulated data sets per point", fontsize=10)
    ax.legend(fontsize=8, loc="best", frameon=False)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return fig


def save_power_figure(result: Any, out_dir: str | Path) -> dict[str, Path]:
    """Write ``power.png`` and ``power.svg`` into ``out_dir``; returns ``{"png": ..., "svg": ...}``."""
    saved = save_figure(plot_power(result), Path(out_dir), "power", "Power and false-positive rate",
                        "Share of simulated data sets with a 'significant' correlation.")
    return {"png": saved.png, "svg": saved.svg}


# --------------------------------------------------------------------------- calibration
def plot_calibration_ranks(result: Any) -> Any:
    """Histogram of the ranks of the true values, one panel per parameter.

    Under a calibrated fit the ranks are uniform (Talts et al. 2018): the dotted line
    is the expected count per bin and the band its central 99% binomial range.
    """
    from scipy import stats

    ranks = result.ranks
    s = result.settings
    n_bins = int(s.get("n_bins", 10))
    L = int(s.get("n_rank_draws", int(ranks["rank"].max())))
    params = list(dict.fromkeys(ranks["parameter"]))
    ncol = min(3, len(params))
    nrow = math.ceil(len(params) / ncol)
    fig, axes = new_figure(3.2 * ncol, 2.4 * nrow, nrows=nrow, ncols=ncol, squeeze=False)
    edges = np.linspace(0, L + 1, n_bins + 1)
    for ax, p in zip(axes.flat, params):
        r = ranks.loc[ranks["parameter"] == p, "rank"].to_numpy()
        n = len(r)
        lo, hi = stats.binom(n, 1.0 / n_bins).ppf([0.005, 0.995])
        ax.axhspan(lo, hi, color=OKABE_ITO["sky"], alpha=0.3, linewidth=0)
        ax.hist(r, bins=edges, histtype="step", color=OKABE_ITO["blue"], linewidth=1.4)
        ax.axhline(n / n_bins, color=OKABE_ITO["black"], linestyle=LINESTYLES[2], linewidth=0.8)
        ax.set_title(p, fontsize=8)
        ax.set_xlabel(f"rank of the true value (0..{L})", fontsize=7.5)
    for ax in list(axes.flat)[len(params):]:
        ax.set_visible(False)
    fig.tight_layout()
    return fig


def save_calibration_figure(result: Any, out_dir: str | Path) -> SavedFigure:
    """Write ``calibration_ranks.png`` and ``.svg`` into ``out_dir``."""
    return save_figure(plot_calibration_ranks(result), Path(out_dir), "calibration_ranks",
                       "Simulation-based calibration", "Ranks of the true values among posterior draws.")


# --------------------------------------------------------------------------- tree sample
def plot_tree_sample(
    pooled: Any, path_stem: str | Path, var_names: Sequence[str] | None = None, max_panels: int = 12
) -> list[Path]:
    """Per-tree means and HDIs as horizontal intervals, with the pooled interval on top.

    Parameters
    ----------
    pooled : TreeSampleFit or arviz.InferenceData
        A pooled tree-sample fit.
    path_stem : str or Path
        Writes ``<path_stem>.png`` and ``<path_stem>.svg``.
    var_names : sequence of str, optional
        Variables to draw (default: the summary's).
    max_panels : int

    Returns
    -------
    list of Path
        The PNG and SVG paths.
    """
    import arviz as az

    from cladewise.inference.fit import HDI_PROB, iter_quantities
    from cladewise.inference.treesample import per_tree_summary
    from cladewise.model.quantities import quantity

    idata = pooled.idata if hasattr(pooled, "idata") else pooled
    per = per_tree_summary(pooled, var_names)
    quantities = list(dict.fromkeys(per["quantity"]))[:max_panels]
    trees = list(dict.fromkeys(per["tree"]))
    ncol = min(3, max(1, len(quantities)))
    nrow = max(1, math.ceil(len(quantities) / ncol))
    height = max(2.2, 0.9 + 0.06 * len(trees)) * nrow
    stem = Path(path_stem)
    fig, axes = new_figure(3.2 * ncol, height, nrows=nrow, ncols=ncol, squeeze=False)
    for ax, q in zip(axes.ravel(), quantities):
        g = per[per["quantity"] == q].set_index("tree").loc[trees]
        ypos = np.arange(len(trees))
        ax.hlines(ypos, g["hdi_low"], g["hdi_high"], color=OKABE_ITO["blue"], lw=1.0)
        ax.plot(g["mean"], ypos, MARKERS[0], color=OKABE_ITO["blue"], ms=2.5, label="one tree")
        name = g["variable"].iloc[0]
        for _, label, vals in iter_quantities(idata, [name]):
            if label == q:
                flat = vals.ravel()
                lo, hi = az.hdi(flat, hdi_prob=HDI_PROB)
                ax.hlines(len(trees) + 1, lo, hi, color=OKABE_ITO["vermillion"], lw=2.2)
                ax.plot(flat.mean(), len(trees) + 1, MARKERS[1], color=OKABE_ITO["vermillion"], ms=4,
                        label="pooled")
        entry = quantity(name)
        if entry is not None and entry.signed:
            ax.axvline(0.0, color="#999999", ls=LINESTYLES[1], lw=0.8)
        ax.set_yticks([len(trees) + 1] + ([0, len(trees) - 1] if len(trees) > 1 else [0]))
        ax.set_yticklabels(["pooled"] + ([f"tree {trees[0]}", f"tree {trees[-1]}"] if len(trees) > 1
                                         else [f"tree {trees[0]}"]))
        ax.set_title(q, fontsize=8)
    for ax in axes.ravel()[len(quantities):]:
        ax.set_visible(False)
    fig.suptitle(f"Posterior mean and {int(HDI_PROB * 100)}% HDI on each tree", fontsize=9)
    fig.tight_layout()
    saved = save_figure(fig, stem.parent, stem.with_suffix("").name, "Tree sample",
                        "Posterior mean and HDI of each quantity on each tree, and pooled.")
    return [saved.png, saved.svg]
