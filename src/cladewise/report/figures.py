"""The figures of a fit report, each from a :class:`~cladewise.report.data.FitView`.

Every function returns ``(figure, caption)`` or raises :class:`Skip` with the
reason the figure cannot be drawn for this fit (the report prints the reason).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from cladewise.model.quantities import QUANTITIES, iter_elements, plain_words
from cladewise.report.data import FitView
from cladewise.report.style import LINESTYLES, MARKERS, OKABE_ITO, SERIES, new_figure
from cladewise.report.tree_plot import COMPACT_ABOVE, plot_tree

__all__ = [
    "Skip",
    "posterior_densities",
    "data_scatter",
    "contrasts_plot",
    "tree_figure",
    "pareto_k_plot",
    "predictive_check",
    "rank_plots",
    "main_quantities",
    "effect_draws",
    "trait_label",
]

HDI_PROB = 0.95
CONTRAST_SEED = 20240611  # fixed: the random resolution of polytomies is reproducible


class Skip(Exception):
    """A figure that does not apply to this fit (message: why)."""


def trait_label(view, name: str) -> str:
    """Axis label of a trait: 'log(name)' when the analysis log-transformed it."""
    summary = (view.info or {}).get("data_summary") or {}
    logged = {t.get("name") for t in summary.get("traits", []) if isinstance(t, dict) and t.get("logged")}
    return f"log({name})" if name in logged else name


def _flat(da) -> np.ndarray:
    return np.asarray(da.values, dtype=float).reshape(-1)


def _hdi(x: np.ndarray) -> tuple[float, float]:
    import arviz as az

    lo, hi = az.hdi(x, hdi_prob=HDI_PROB)
    return float(lo), float(hi)


def _elements(view: FitView, names) -> list[tuple[str, str, np.ndarray]]:
    """(variable, catalogue label, draws as chain x draw) of every element of ``names``."""
    return list(iter_elements(view.posterior, names))


def _is_intercept(label: str) -> bool:
    return label.lower().endswith("[intercept]")


def effect_draws(view: FitView) -> list[tuple[str, np.ndarray]]:
    """(words, draws) of every signed quantity (correlations, slopes, coefficients), intercepts left out."""
    names = [q.name for q in QUANTITIES if q.signed]
    return [(plain_words(label, name), v.reshape(-1))
            for name, label, v in _elements(view, names) if not _is_intercept(label)]


def posterior_densities(view: FitView):
    """Posterior density of each correlation, slope and coefficient, HDI and zero marked."""
    items = effect_draws(view)
    if not items:
        raise Skip("this model has no correlation, slope or regression coefficient")
    m = len(items)
    ncol = min(m, 3)
    nrow = int(np.ceil(m / ncol))
    fig, axes = new_figure(3.3 * ncol, 2.4 * nrow, nrows=nrow, ncols=ncol, squeeze=False)
    for ax, (label, x) in zip(axes.flat, items):
        x = x[np.isfinite(x)]
        lo, hi = _hdi(x)
        grid = np.linspace(min(x.min(), lo), max(x.max(), hi), 256)
        dens = stats.gaussian_kde(x)(grid) if np.ptp(x) > 0 else np.zeros_like(grid)
        ax.plot(grid, dens, color=OKABE_ITO["blue"], linestyle="-", linewidth=1.5, label="posterior")
        inside = (grid >= lo) & (grid <= hi)
        ax.fill_between(grid[inside], dens[inside], color=OKABE_ITO["sky"], alpha=0.45,
                        hatch="///", edgecolor=OKABE_ITO["blue"], linewidth=0,
                        label=f"{int(HDI_PROB * 100)}% HDI")
        ax.axvline(0.0, color=OKABE_ITO["vermillion"], linestyle="--", linewidth=1.2, label="zero")
        ax.plot([x.mean()], [0], marker="^", color="black", markersize=6, linestyle="none",
                clip_on=False, label="mean")
        ax.set_title(_wrap(label), fontsize=8.5)
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        ax.set_ylim(bottom=0)
        ax.text(0.02, 0.95, f"P(>0) = {np.mean(x > 0):.2f}\nHDI [{lo:.3g}, {hi:.3g}]",
                transform=ax.transAxes, va="top", ha="left", fontsize=7.5)
    for ax in list(axes.flat)[m:]:
        ax.set_visible(False)
    axes.flat[0].legend(loc="upper right", fontsize=7, frameon=False)
    fig.tight_layout()
    cap = (f"Posterior densities. The hatched band is the {int(HDI_PROB * 100)}% highest-density "
           "interval (HDI), the dashed vertical line marks zero, the triangle the posterior mean. "
           "P(>0) is the share of draws above zero.")
    return fig, cap


def _hdi_columns(a: np.ndarray, prob: float = HDI_PROB) -> np.ndarray:
    """Narrowest interval holding ``prob`` of the rows, for every column: shape (cols, 2)."""
    srt = np.sort(a, axis=0)
    n = srt.shape[0]
    m = max(int(np.floor(prob * n)), 1)
    if m >= n:
        return np.stack([srt[0], srt[-1]], axis=1)
    width = srt[m:] - srt[: n - m]
    start = np.argmin(width, axis=0)
    cols = np.arange(srt.shape[1])
    return np.stack([srt[start, cols], srt[start + m, cols]], axis=1)


def _wrap(text: str, width: int = 38) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(text, width)) or text


def _xy_pair(view: FitView):
    """(x, y, x_se, y_se, x_name, y_name, lines) for the scatter and contrasts.

    ``lines`` is ``(intercepts, slopes)`` over posterior draws of the evolutionary
    regression of y on x, or None.
    """
    post = view.posterior
    if view.y is None:
        raise Skip("the fit folder holds no observed data")
    if view.kind == "regression":
        if view.design is None:
            raise Skip("the predictor values are not stored in the fit folder and the data "
                       "files of the spec could not be read")
        terms = [c for c in view.design.columns if str(c).lower() != "intercept"]
        if not terms:
            raise Skip("the regression has no predictor besides the intercept")
        xname = terms[0]
        x = view.design[xname].to_numpy(dtype=float)
        y = view.y[:, 0]
        yname = view.traits[0]
        x_se = None
        y_se = None if view.se is None else view.se[:, 0]
        lines = None
        if "coef" in post:
            da = post["coef"]
            dim = [d for d in da.dims if d not in ("chain", "draw")][0]
            names = [str(t) for t in da[dim].values]
            if xname in names:
                b = da.isel({dim: names.index(xname)}).values.reshape(-1)
                a = np.zeros_like(b)
                for j, t in enumerate(names):
                    if t == xname:
                        continue
                    cj = da.isel({dim: j}).values.reshape(-1)
                    if t.lower() == "intercept":
                        a = a + cj
                    elif t in view.design.columns:
                        # other predictors held at their mean
                        a = a + cj * float(np.nanmean(view.design[t].to_numpy(dtype=float)))
                lines = (a, b)
        return x, y, x_se, y_se, xname, yname, lines
    if view.y.shape[1] < 2:
        raise Skip("only one trait: there is no pair of traits to plot")
    x, y = view.y[:, 0], view.y[:, 1]
    xname, yname = view.traits[0], view.traits[1]
    x_se = y_se = None
    if view.se is not None:
        x_se, y_se = view.se[:, 0], view.se[:, 1]
    lines = None
    if "evo_slope" in post and "root_mean" in post:
        sl = post["evo_slope"]
        d1, d2 = [d for d in sl.dims if d not in ("chain", "draw")][:2]
        b = sl.isel({d1: 1, d2: 0}).values.reshape(-1)  # slope of trait 2 (row) on trait 1 (column)
        rm = post["root_mean"]
        rdim = [d for d in rm.dims if d not in ("chain", "draw")][0]
        mx = rm.isel({rdim: 0}).values.reshape(-1)
        my = rm.isel({rdim: 1}).values.reshape(-1)
        lines = (my - b * mx, b)
    return x, y, x_se, y_se, xname, yname, lines


def data_scatter(view: FitView):
    """Species values with error bars, the evolutionary regression and the naive OLS line."""
    x, y, x_se, y_se, xname, yname, lines = _xy_pair(view)
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 3:
        raise Skip("fewer than 3 species have both values")
    fig, ax = new_figure(5.6, 4.4)
    xe = None if x_se is None else np.where(np.isfinite(x_se[ok]), x_se[ok], 0.0)
    ye = None if y_se is None else np.where(np.isfinite(y_se[ok]), y_se[ok], 0.0)
    ax.errorbar(x[ok], y[ok], xerr=xe, yerr=ye, fmt="o", color=OKABE_ITO["black"], ecolor="#888888",
                elinewidth=0.8, markersize=3.5, markerfacecolor="white", label="species (± 1 se)"
                if (xe is not None or ye is not None) else "species")
    grid = np.linspace(np.nanmin(x[ok]), np.nanmax(x[ok]), 100)
    if lines is not None:
        a, b = lines
        keep = np.isfinite(a) & np.isfinite(b)
        a, b = a[keep], b[keep]
        if len(a) > 1000:  # a thinned set of draws is enough for a band
            pick = np.linspace(0, len(a) - 1, 1000).astype(int)
            a, b = a[pick], b[pick]
        fits = a[:, None] + b[:, None] * grid[None, :]
        band = _hdi_columns(fits)  # per-x interval over draws
        ax.fill_between(grid, band[:, 0], band[:, 1], color=OKABE_ITO["sky"], alpha=0.35,
                        linewidth=0, label=f"{int(HDI_PROB * 100)}% credible band")
        ax.plot(grid, np.median(fits, axis=0), color=OKABE_ITO["blue"], linestyle="-", linewidth=2,
                label="evolutionary regression (posterior median)")
    ols = stats.linregress(x[ok], y[ok])
    ax.plot(grid, ols.intercept + ols.slope * grid, color=OKABE_ITO["vermillion"], linestyle="--",
            linewidth=1.5, label=f"ordinary least squares, ignores the tree (slope {ols.slope:.3g})")
    ax.set_xlabel(trait_label(view, xname))
    ax.set_ylabel(trait_label(view, yname))
    ax.legend(fontsize=7, frameon=False, loc="upper left")
    fig.tight_layout()
    if view.kind == "regression":
        what = ("the solid line is the fitted phylogenetic regression (posterior median of intercept + "
                f"slope x {xname}; other predictors at their mean)")
    else:
        what = ("the solid line is the evolutionary regression of "
                f"{yname} on {xname}: slope R[y,x]/R[x,x] through the root means, from the posterior draws")
    se_note = ("Bars are ± 1 standard error of the species means."
               if (xe is not None or ye is not None)
               else "No standard errors are available in the fit folder, so no error bars are drawn.")
    cap = (f"Species data ({int(ok.sum())} species with both values). {what.capitalize()}; the shaded "
           f"band its {int(HDI_PROB * 100)}% credible band. The dashed line is ordinary least squares on "
           f"the species values, shown for contrast: it treats species as independent. {se_note}")
    if lines is None:
        cap += " The posterior regression line could not be drawn for this model."
    return fig, cap


def contrasts_plot(view: FitView):
    """Standardized independent contrasts with the regression through the origin."""
    from cladewise.evaluation.contrasts import independent_contrasts
    from cladewise.data.trees import prune_to

    if view.tree is None:
        raise Skip("the tree is not stored in the fit folder")
    x, y, _, _, xname, yname, _ = _xy_pair(view)
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 3:
        raise Skip("fewer than 3 species have both values")
    tree = view.tree
    names = [tree.tip_names[i] for i in np.flatnonzero(ok)]
    note = ""
    if ok.sum() < tree.n_tips:
        tree = prune_to(tree, names)
        note = f" {tree.n_tips} of {view.tree.n_tips} species have both values; the others were pruned."
    pos = {s: i for i, s in enumerate(view.species)}
    idx = np.array([pos[s] for s in tree.tip_names])
    vals = np.column_stack([x[idx], y[idx]])
    res = independent_contrasts(tree, vals, traits=["x", "y"], resolve=True, seed=CONTRAST_SEED)
    cx = res.nodes["x_standardized"].to_numpy()
    cy = res.nodes["y_standardized"].to_numpy()
    # contrasts have arbitrary sign; by convention x is made positive (Garland et al. 1992)
    flip = np.where(cx < 0, -1.0, 1.0)
    cx, cy = cx * flip, cy * flip
    slope = float(np.sum(cx * cy) / np.sum(cx * cx)) if np.sum(cx * cx) > 0 else np.nan
    fig, ax = new_figure(5.0, 4.0)
    ax.plot(cx, cy, MARKERS[1], color=OKABE_ITO["green"], markersize=4, markerfacecolor="none",
            linestyle="none", label=f"{len(cx)} standardized contrasts")
    g = np.linspace(0, max(cx.max(), 1e-12) * 1.05, 50)
    ax.plot(g, slope * g, color=OKABE_ITO["black"], linestyle="-", linewidth=1.5,
            label=f"regression through the origin (slope {slope:.3g})")
    ax.axhline(0, color="#999999", linewidth=0.6, linestyle=":")
    ax.set_xlabel(f"standardized contrast of {trait_label(view, xname)}")
    ax.set_ylabel(f"standardized contrast of {trait_label(view, yname)}")
    ax.legend(fontsize=7, frameon=False)
    fig.tight_layout()
    cap = ("Standardized independent contrasts (Felsenstein 1985) on the fitted tree with its original "
           "branch lengths (Brownian motion), signs set so the x contrast is positive; the line is the "
           "least-squares regression through the origin." + note)
    if res.notes:
        cap += (f" Polytomies were resolved at random with zero-length branches (fixed seed "
                f"{CONTRAST_SEED}): " + "; ".join(res.notes) + ".")
    return fig, cap


#: above this many species the report leaves the tree figure out (with a note)
TREE_FIGURE_MAX = 20_000


def tree_figure(view: FitView, compact: bool | None = None):
    """The tree with the trait values beside the tips."""
    if view.tree is None:
        raise Skip("the tree is not stored in the fit folder")
    if view.tree.n_tips > TREE_FIGURE_MAX:
        # hundreds of thousands of line segments: an unreadable picture and a huge file
        raise Skip(f"the tree has {view.tree.n_tips} species, more than {TREE_FIGURE_MAX} cannot be drawn "
                   "legibly; the tree facts are in the data section")
    vals, names = view.y, list(view.traits)
    if view.kind == "regression" and view.design is not None and vals is not None:
        extra = [c for c in view.design.columns if str(c).lower() != "intercept"]
        vals = np.column_stack([vals] + [view.design[c].to_numpy(dtype=float) for c in extra])
        names += extra
    fig = plot_tree(view.tree, vals, [trait_label(view, n) for n in names], compact=compact)
    if fig.cladewise_compact:
        cap = (f"The tree ({view.tree.n_tips} species, more than {COMPACT_ABOVE}: compact view without "
               "names). Beside the tips, one column per trait scaled from its minimum (dark) to its "
               "maximum (light); white cells are missing values.")
    else:
        cap = ("The tree drawn to scale, with the observed species values beside the tips; "
               "a grey cross marks a missing value.")
    return fig, cap


def pareto_k_plot(view: FitView):
    """Pareto k of each species from PSIS-LOO; species above 0.7 labelled."""
    import warnings

    if not view.has("log_likelihood"):
        raise Skip("the fit folder has no log-likelihood group, so LOO cannot be computed")
    from cladewise.evaluation.loo import loo_species

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # per tree and mixed for fits pooled over trees; species without data left out
        loo = loo_species(view.idata).elpd_data
    k = np.asarray(loo.pareto_k.values, dtype=float)
    sp = [str(s) for s in loo.pareto_k[loo.pareto_k.dims[0]].values] if loo.pareto_k.dims else view.species
    fig, ax = new_figure(6.4, 3.2)
    idx = np.arange(len(k))
    high = k > 0.7
    ax.plot(idx[~high], k[~high], "o", color=OKABE_ITO["blue"], markersize=3, linestyle="none",
            label="k ≤ 0.7")
    ax.plot(idx[high], k[high], "X", color=OKABE_ITO["vermillion"], markersize=6, linestyle="none",
            label="k > 0.7")
    for v, style in ((0.5, ":"), (0.7, "--"), (1.0, "-")):
        ax.axhline(v, color="#777777", linestyle=style, linewidth=0.8)
    order = np.argsort(-k)
    for i in order[: 12]:
        if high[i]:
            ax.annotate(sp[i], (idx[i], k[i]), xytext=(3, 3), textcoords="offset points", fontsize=7)
    ax.set_xlabel("species (in tree order)")
    ax.set_ylabel("Pareto k")
    ax.legend(fontsize=7, frameon=False, loc="upper left")
    fig.tight_layout()
    n_high = int(high.sum())
    cap = (f"Pareto k per species from leave-one-species-out PSIS-LOO (Vehtari, Gelman & Gabry 2017). "
           f"Above 0.7 (dashed line) the LOO estimate for that species is unreliable; {n_high} species "
           f"are above it{' (the 12 highest labelled)' if n_high > 12 else ''}. "
           f"ELPD-LOO = {float(loo.elpd_loo):.1f} (se {float(loo.se):.1f}), p_loo = {float(loo.p_loo):.1f}.")
    fig.cladewise_loo = (loo, sp, k)
    return fig, cap


_EXACT_KDE_MAX = 2_000


def _density(x: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Gaussian kernel density of ``x`` on the even ``grid`` (Scott's bandwidth, as scipy).

    Up to a few thousand values scipy's exact ``gaussian_kde``; above, the binned
    estimate (counts on the grid convolved with the kernel; Silverman 1982, Appl.
    Stat. 31:93), which costs O(len(x)) instead of O(len(x) * len(grid)).
    """
    if x.size <= _EXACT_KDE_MAX:
        return stats.gaussian_kde(x)(grid)
    bw = float(np.std(x, ddof=1)) * x.size ** (-0.2)
    step = float(grid[1] - grid[0])
    counts, _ = np.histogram(x, bins=grid.size, range=(grid[0] - step / 2, grid[-1] + step / 2))
    half = min(grid.size, int(np.ceil(4 * bw / step)))
    kern = np.exp(-0.5 * (np.arange(-half, half + 1) * step / bw) ** 2)
    dens = np.convolve(counts, kern)[half:half + grid.size]
    return dens / (x.size * bw * np.sqrt(2 * np.pi))


def predictive_check(view: FitView, max_lines: int = 60):
    """Observed distribution of each trait against replicated data sets."""
    if not view.has("posterior_predictive") or "y_rep" not in view.idata.posterior_predictive:
        raise Skip("the fit folder has no posterior predictive draws")
    if view.y is None:
        raise Skip("the fit folder holds no observed data")
    yrep = view.idata.posterior_predictive["y_rep"].values
    yrep = yrep.reshape((-1,) + yrep.shape[2:])
    if yrep.ndim == 2:
        yrep = yrep[..., None]
    k = min(yrep.shape[-1], view.y.shape[1])
    fig, axes = new_figure(3.4 * k, 2.8, ncols=k, squeeze=False)
    rng = np.random.default_rng(0)
    pick = rng.choice(yrep.shape[0], size=min(max_lines, yrep.shape[0]), replace=False)
    for j, ax in enumerate(axes.flat[:k]):
        obs = view.y[:, j]
        ok = np.isfinite(obs)
        o = obs[ok]
        reps = yrep[pick][:, ok, j]
        lo = min(o.min(), np.percentile(reps, 0.5))
        hi = max(o.max(), np.percentile(reps, 99.5))
        grid = np.linspace(lo, hi, 200)
        for r, rep in enumerate(reps):
            if np.ptp(rep) > 0:
                ax.plot(grid, _density(rep, grid), color=OKABE_ITO["sky"], linewidth=0.6,
                        alpha=0.35, linestyle="-", label="replicated data" if r == 0 else None)
        if np.ptp(o) > 0:
            ax.plot(grid, _density(o, grid), color="black", linewidth=2, linestyle="--",
                    label="observed")
        ax.set_title(view.traits[j] if j < len(view.traits) else f"trait {j + 1}")
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
    axes.flat[0].legend(fontsize=7, frameon=False)
    fig.tight_layout()
    cap = (f"Posterior predictive check: the density of the observed species values (dashed black) against "
           f"{len(pick)} data sets replicated from the fitted model (thin blue). The observed curve should "
           "look like one of the replicates; a systematic difference (heavier tails, a shifted centre, "
           "two peaks) points to a model that misses a feature of the data.")
    return fig, cap


_RANK_ORDER = {"effect": 0, "evolution": 1}


def main_quantities(view: FitView, limit: int = 6) -> dict[str, np.ndarray]:
    """Up to ``limit`` scalar quantities (chain, draw) for convergence plots, by catalogue label.

    Effects first, then evolution-model parameters, then the rest in catalogue order
    (derived quantities such as the half-life are left out).
    """
    entries = [q for q in QUANTITIES if q.role != "derived"]
    entries.sort(key=lambda q: _RANK_ORDER.get(q.role, 2))  # stable: catalogue order within a role
    out: dict[str, np.ndarray] = {}
    for name, label, v in _elements(view, [q.name for q in entries]):
        if len(out) >= limit:
            break
        out[label] = v
    return out


def rank_plots(view: FitView):
    """Rank histograms per chain for the main quantities (Vehtari et al. 2021)."""
    q = main_quantities(view)
    if not q:
        raise Skip("no quantity to check")
    chains = next(iter(q.values())).shape[0]
    if chains < 2:
        raise Skip("rank plots compare chains, and this fit has one chain")
    m = len(q)
    fig, axes = new_figure(3.2 * min(m, 3), 2.3 * int(np.ceil(m / 3)), nrows=int(np.ceil(m / 3)),
                           ncols=min(m, 3), squeeze=False)
    for ax, (label, v) in zip(axes.flat, q.items()):
        flat = v.reshape(-1)
        ranks = stats.rankdata(flat).reshape(v.shape)
        n_bins = 20
        edges = np.linspace(0.5, flat.size + 0.5, n_bins + 1)
        for c in range(chains):
            counts, _ = np.histogram(ranks[c], bins=edges)
            ax.stairs(counts, edges, color=SERIES[c % len(SERIES)],
                      linestyle=LINESTYLES[c % len(LINESTYLES)], linewidth=1.3, label=f"chain {c + 1}")
        ax.axhline(v.shape[1] / n_bins, color="#777777", linewidth=0.8, linestyle=":")
        ax.set_title(_wrap(label, 40), fontsize=8)
        ax.set_yticks([])
        ax.set_xlabel("rank of draw among all chains", fontsize=7.5)
    for ax in list(axes.flat)[m:]:
        ax.set_visible(False)
    axes.flat[0].legend(fontsize=7, frameon=False)
    fig.tight_layout()
    cap = ("Rank plots: every draw is ranked among all chains, and the ranks of each chain are counted in "
           "20 bins. Chains that mix well give flat, overlapping outlines near the dotted line; a chain "
           "stuck high or low shows as a slope or a bump.")
    return fig, cap
