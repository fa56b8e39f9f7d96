"""Fitting a model over a sample of trees: tree uncertainty carried into the answer.

A dating analysis gives a posterior *sample* of trees, not one tree. The posterior of
the model's parameters under tree uncertainty is the equal-weight mixture of the
posteriors given each tree of the sample (de Villemereuil et al. 2012, BMC Evol.
Biol. 12:102). :func:`fit_tree_sample` fits every tree (or a seeded random subset),
compiling the model once: the tree enters the PyMC model as ``pm.Data``, so only
the data change from one tree to the next.

Trees whose node counts differ (different polytomies) are brought to one shape by
:func:`pad_tree`: zero-length single-child nodes are added above the root, which
changes neither the tip covariance nor any branch-length transform.

The pooled result is one InferenceData whose ``chain`` dimension runs over
tree x chain, with a ``tree`` coordinate on ``chain`` giving the sample index of the
tree each chain came from. The ``log_likelihood`` group holds each draw's
leave-one-species-out conditional computed on its own tree, so ``arviz.loo`` works
on the pooled fit. Convergence is judged within each tree (R-hat across trees is
inflated on purpose, since different trees give different posteriors).
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from cladewise.inference import sampling
from cladewise.model.build import BuiltModel, ModelData, ModelSpec, build_model, tree_data_values
from cladewise.errors import InputError
from cladewise.inference.fit import (
    HDI_PROB,
    FitResult,
    check_output_folder,
    finish_fit,
    iter_quantities,
    json_default,
    summarise,
)
from cladewise.inference.sampling import RHAT_MAX, ESS_MIN, BFMI_MIN, Diagnostics, SamplingOptions
from cladewise.data.trees import FlatTree, order_tips, prune_to

__all__ = [
    "TreeSampleFit",
    "pad_tree",
    "align_trees",
    "choose_trees",
    "build_for_sample",
    "fit_tree_sample",
    "pool_tree_fits",
    "tree_variance_share",
    "per_tree_summary",
    "tree_disagreement",
    "plot_tree_sample",
    "fit_spec_tree_sample",
]

#: quantities whose sign and "HDI excludes zero" verdict are checked across trees
SIGNED_VARS = ("evo_corr", "evo_slope", "coef", "species_corr")

# Okabe & Ito 2008 colour-universal palette
_BLUE, _VERMILLION, _GREY = "#0072B2", "#D55E00", "#999999"


# =========================================================================== trees
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
    built = build_model(ref, spec, likelihood=likelihood)
    return built, padded


# =========================================================================== result
@dataclass
class TreeSampleFit(FitResult):
    """A fit pooled over trees: a :class:`~cladewise.inference.fit.FitResult` plus per-tree facts.

    ``idata`` chains run over tree x chain (coordinate ``tree`` on ``chain``);
    ``diagnostics`` are the worst within-tree values (ESS: summed over trees);
    ``per_tree`` is the per-tree summary table, ``variance_share`` the share of
    posterior variance due to the tree, ``warnings`` the disagreements found.
    """

    tree_indices: list[int] = field(default_factory=list)
    seeds: list[int] = field(default_factory=list)
    n_sample: int = 0
    tree_diagnostics: list[Diagnostics] = field(default_factory=list)
    per_tree: pd.DataFrame | None = None
    variance_share: pd.DataFrame | None = None
    warnings: list[str] = field(default_factory=list)
    compiled: Any = field(default=None, repr=False)

    def save(self, out_dir: str | Path, overwrite: bool = False, figures: bool = True) -> Path:
        """Write the files of :meth:`FitResult.save` plus ``per_tree.csv``,
        ``tree_variance.csv`` and ``tree_sample.png``/``.svg``, all at once.

        Everything is staged in a hidden sibling folder and renamed into place.
        """
        out = Path(out_dir)
        check_output_folder(out, overwrite)
        out.parent.mkdir(parents=True, exist_ok=True)
        holder = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
        try:
            stage = holder / "fit"
            FitResult.save(self, stage)
            if self.per_tree is not None:
                self.per_tree.to_csv(stage / "per_tree.csv", index=False)
            if self.variance_share is not None:
                self.variance_share.to_csv(stage / "tree_variance.csv", index=False)
            if figures:
                plot_tree_sample(self, stage / "tree_sample")
            if out.exists():
                shutil.rmtree(out)
            os.replace(stage, out)
        finally:
            shutil.rmtree(holder, ignore_errors=True)
        return out

    def to_json(self) -> dict[str, Any]:
        """summary.json contents, with a ``tree_sample`` section added."""
        d = super().to_json()
        vs = self.variance_share
        d["tree_sample"] = {
            "n_trees": len(self.tree_indices),
            "n_sample": self.n_sample,
            "tree_indices": [int(i) for i in self.tree_indices],
            "seeds": [int(s) for s in self.seeds],
            "pooling": "equal-weight mixture of per-tree posteriors (chain = tree x chain)",
            "variance_share": [] if vs is None else vs.replace({np.nan: None}).to_dict(orient="records"),
            "warnings": list(self.warnings),
            "per_tree_diagnostics": [dg.to_dict() for dg in self.tree_diagnostics],
        }
        return d

    def to_text(self) -> str:
        """Results in words, with the tree-uncertainty section."""
        lines = [super().to_text(), "", (
            f"Tree uncertainty: pooled over {len(self.tree_indices)} of {self.n_sample} trees "
            "(equal-weight mixture; R-hat judged within each tree, ESS summed over trees)."
        )]
        if self.variance_share is not None and len(self.variance_share):
            view = self.variance_share[["quantity", "tree_share", "between_sd", "total_sd"]]
            lines += ["Share of posterior variance due to the tree (law of total variance):",
                      view.to_string(index=False, float_format=lambda v: f"{v:.3g}")]
        if self.warnings:
            lines += ["Trees disagree:"] + [f"  - {w}" for w in self.warnings]
        return "\n".join(lines)


# =========================================================================== fitting
def _filter_values(values: dict[str, np.ndarray], compiled: Any) -> dict[str, np.ndarray]:
    # nutpie knows only the shared variables the compiled graph reads (a Brownian
    # model never reads the node heights), and refuses any other name
    known = getattr(compiled, "shared_data", None)
    return values if known is None else {k: v for k, v in values.items() if k in known}


def fit_tree_sample(
    data: ModelData,
    spec: ModelSpec,
    trees: Sequence[FlatTree],
    options: SamplingOptions | None = None,
    n_trees: int | None = None,
    seed: int | None = None,
    likelihood: str = "tree",
    *,
    built: BuiltModel | None = None,
    compiled: Any = None,
    predictive_draws: int = 200,
    progress: bool | None = None,
) -> TreeSampleFit:
    """Fit a model on every tree of a sample (or a seeded subset) and pool the draws.

    Parameters
    ----------
    data : ModelData
        Matched data; ``data.tree`` is the reference tree (it sets prior scales).
    spec : ModelSpec
        The model.
    trees : sequence of FlatTree
        The tree sample (tips: the data's species, any order; extra tips are pruned).
    options : SamplingOptions, optional
        Sampler settings for each tree.
    n_trees : int, optional
        Fit a random subset of this many trees (default: all).
    seed : int, optional
        Base seed (default ``options.seed``). The subset is drawn with it and tree
        ``i`` of the sample is sampled with seed ``seed + i``, so a tree's draws do
        not depend on which other trees were chosen.
    likelihood : {"tree", "dense"}
        Engine (see :func:`cladewise.model.build.build_model`).
    built, compiled : optional
        A model from :func:`build_for_sample` on the same trees and its compiled
        form, to skip building/compiling (nutpie only for ``compiled``).
    predictive_draws : int
        Posterior predictive draws in total (spread evenly over the trees).
    progress : bool, optional
        Print one line per tree (default: when stderr is a terminal).

    Returns
    -------
    TreeSampleFit
    """
    import sys

    opts = options or SamplingOptions()
    opts.validate()
    base = int(opts.seed if seed is None else seed)
    chosen = choose_trees(len(trees), n_trees, base)
    show = sys.stderr.isatty() if progress is None else bool(progress)
    t0 = time.perf_counter()
    if built is None:
        built, padded_all = build_for_sample(data, spec, [trees[i] for i in chosen], likelihood)
    else:
        padded_all = align_trees([trees[i] for i in chosen], built.species)
        n_model = built.data.tree.n_nodes
        if any(t.n_nodes > n_model for t in padded_all):
            raise InputError("a tree of the sample has more nodes than the given model; build it with build_for_sample")
        padded_all = [pad_tree(t, n_model) for t in padded_all]
    t_build = time.perf_counter() - t0
    t0 = time.perf_counter()
    if compiled is None and opts.sampler == "nutpie":
        compiled = sampling.compile_model(built, "nutpie")
    t_compile = time.perf_counter() - t0

    per_tree_pp = max(1, math.ceil(predictive_draws / len(chosen))) if predictive_draws else 0
    engine_fn = built.engine_function()  # compiled once; reads the tree data at call time
    own_values = tree_data_values(built, built.data.tree)
    fits: list[FitResult] = []
    seeds: list[int] = []
    t_sample: list[float] = []
    t_post: list[float] = []
    try:
        for a, (i, tree) in enumerate(zip(chosen, padded_all)):
            values = tree_data_values(built, tree)
            s = base + int(i)
            o = dataclasses.replace(opts, seed=s, progress=False if not show else opts.progress)
            ts = time.perf_counter()
            idata = sampling.sample(built, o, compiled=compiled, tree_values=_filter_values(values, compiled))
            ts = time.perf_counter() - ts
            tp = time.perf_counter()
            # the per-draw log-likelihood and replicates must use this draw's own tree
            _set_tree_data(built, values)
            bt = dataclasses.replace(built, data=dataclasses.replace(built.data, tree=tree, notes=list(built.data.notes)))
            bt.engine_function = lambda: engine_fn  # type: ignore[method-assign]
            res = finish_fit(bt, idata, o, timing={"sample": ts}, predictive_draws=per_tree_pp)
            tp = time.perf_counter() - tp
            fits.append(res)
            seeds.append(s)
            t_sample.append(ts)
            t_post.append(tp)
            if show:
                print(f"tree {a + 1}/{len(chosen)} (sample index {i}): sampled in {ts:.1f} s; "
                      f"R-hat max {res.diagnostics.max_rhat:.3f}", file=sys.stderr)
    finally:
        _set_tree_data(built, own_values)
    timing = {"build": t_build, "compile": t_compile, "sample_total": float(sum(t_sample)),
              "postprocess_total": float(sum(t_post)), "sample_per_tree": t_sample}
    pooled = pool_tree_fits(fits, [int(i) for i in chosen], seeds, built=built, options=opts,
                            n_sample=len(trees), timing=timing)
    pooled.compiled = compiled
    return pooled


def _set_tree_data(built: BuiltModel, values: dict[str, np.ndarray]) -> None:
    import pymc as pm

    with built.model:
        pm.set_data(values)


# =========================================================================== pooling
def _stack_chains(parts: list[xr.Dataset], tree_indices: Sequence[int]) -> xr.Dataset:
    out, start = [], 0
    for ds, t in zip(parts, tree_indices):
        nc = ds.sizes["chain"]
        ds = ds.assign_coords(chain=np.arange(start, start + nc), tree=("chain", np.full(nc, int(t))))
        if "draw" in ds.dims:
            # predictive draws are a per-tree random subset: renumber so trees line up
            ds = ds.assign_coords(draw=np.arange(ds.sizes["draw"]))
        out.append(ds)
        start += nc
    pooled = xr.concat(out, dim="chain", combine_attrs="override")
    return pooled


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    """Equal arrays, NaN equal to NaN (observed data keep NaN at missing cells)."""
    if a.dtype.kind == "f" and b.dtype.kind == "f":
        return bool(np.array_equal(a, b, equal_nan=True))
    return bool(np.array_equal(a, b))


def _stack_constants(parts: list[xr.Dataset], tree_indices: Sequence[int]) -> xr.Dataset:
    first = parts[0]
    out = {}
    for name, da in first.data_vars.items():
        if all(_same(p[name].values, da.values) for p in parts[1:]):
            out[name] = da
        else:
            out[name] = xr.concat([p[name] for p in parts], dim="tree").assign_coords(tree=list(tree_indices))
    return xr.Dataset(out, attrs=first.attrs)


def pool_tree_fits(
    fits: Sequence[FitResult],
    tree_indices: Sequence[int],
    seeds: Sequence[int],
    built: BuiltModel | None = None,
    options: SamplingOptions | None = None,
    n_sample: int | None = None,
    timing: dict[str, Any] | None = None,
) -> TreeSampleFit:
    """Pool finished per-tree fits into one equal-weight mixture.

    Every group with a ``chain`` dimension is concatenated along ``chain`` (with a
    ``tree`` coordinate on it); constant data that differ between trees (the tree
    arrays) gain a ``tree`` dimension. All fits must have the same number of chains
    and draws, so that each tree has equal weight (de Villemereuil et al. 2012).
    """
    if not fits:
        raise InputError("no per-tree fits to pool")
    if len(fits) != len(tree_indices) or len(fits) != len(seeds):
        raise ValueError("one tree index and one seed per fit expected")
    shapes = {(f.idata.posterior.sizes["chain"], f.idata.posterior.sizes["draw"]) for f in fits}
    if len(shapes) != 1:
        raise InputError(f"per-tree fits differ in chains x draws {sorted(shapes)}; equal weights need equal sizes")
    groups: dict[str, xr.Dataset] = {}
    for g in fits[0].idata.groups():
        parts = [getattr(f.idata, g) for f in fits]
        if "chain" in parts[0].dims:
            groups[g] = _stack_chains(parts, tree_indices)
        else:
            groups[g] = _stack_constants(parts, tree_indices)
    idata = az.InferenceData(**groups)
    built = built or fits[0].built
    info = dict(fits[0].info)
    info["timing"] = dict(timing or {})
    info["tree_sample"] = {"tree_indices": list(map(int, tree_indices)), "seeds": list(map(int, seeds))}
    idata.posterior.attrs["cladewise_info"] = json.dumps(info, default=json_default)
    var_names = built.summary_vars if built is not None else None
    summary = summarise(idata, built, var_names=var_names)
    summary = _within_tree_columns(summary, fits)
    diag = _pooled_diagnostics([f.diagnostics for f in fits], summary, list(tree_indices))
    if options is not None:
        info["sampling"] = options.__dict__
    res = TreeSampleFit(
        idata=idata, summary=summary, diagnostics=diag, built=built, info=info,
        tree_indices=[int(i) for i in tree_indices], seeds=[int(s) for s in seeds],
        n_sample=int(n_sample if n_sample is not None else len(fits)),
        tree_diagnostics=[f.diagnostics for f in fits],
    )
    res.per_tree = per_tree_summary(idata, var_names)
    res.variance_share = tree_variance_share(idata, var_names)
    res.warnings = tree_disagreement(res.per_tree)
    res.info["notes"] = list(res.info.get("notes", [])) + res.warnings
    return res


def _within_tree_columns(summary: pd.DataFrame, fits: Sequence[FitResult]) -> pd.DataFrame:
    """R-hat: worst within-tree value; ESS: summed over trees (independent runs)."""
    per = [f.summary.set_index("quantity") for f in fits]
    out = summary.copy()
    q = out["quantity"]
    rh = pd.concat([p["r_hat"] for p in per], axis=1)
    out["r_hat"] = rh.max(axis=1, skipna=True).reindex(q).to_numpy() if rh.notna().any().any() else np.nan
    for col in ("ess_bulk", "ess_tail"):
        out[col] = pd.concat([p[col] for p in per], axis=1).sum(axis=1, min_count=1).reindex(q).to_numpy()
    return out


def _pooled_diagnostics(diags: list[Diagnostics], summary: pd.DataFrame, tree_indices: list[int]) -> Diagnostics:
    rh = np.array([d.max_rhat for d in diags], dtype=float)
    max_rhat = float(np.nanmax(rh)) if np.isfinite(rh).any() else float("nan")
    eb = summary["ess_bulk"].to_numpy(dtype=float) if len(summary) else np.array([np.nan])
    et = summary["ess_tail"].to_numpy(dtype=float) if len(summary) else np.array([np.nan])
    min_eb = float(np.nanmin(eb)) if np.isfinite(eb).any() else float("nan")
    min_et = float(np.nanmin(et)) if np.isfinite(et).any() else float("nan")
    div = int(sum(d.divergences for d in diags))
    bf = np.array([d.min_bfmi for d in diags], dtype=float)
    min_bfmi = float(np.nanmin(bf)) if np.isfinite(bf).any() else float("nan")
    n_draws = int(sum(d.n_draws for d in diags))
    problems = []
    bad = [(t, r) for t, r in zip(tree_indices, rh) if r > RHAT_MAX]
    if bad:
        listed = ", ".join(f"tree {t} ({r:.3f})" for t, r in bad[:5]) + (" ..." if len(bad) > 5 else "")
        problems.append(f"R-hat > {RHAT_MAX} within {len(bad)} of {len(diags)} trees: {listed}; run longer")
    if min_eb < ESS_MIN:
        problems.append(f"bulk ESS {min_eb:.0f} (summed over trees) < {ESS_MIN}: draw more")
    if min_et < ESS_MIN:
        problems.append(f"tail ESS {min_et:.0f} (summed over trees) < {ESS_MIN}: draw more")
    if div:
        n_t = sum(1 for d in diags if d.divergences)
        problems.append(f"{div} divergent transitions on {n_t} trees: raise target_accept or reparametrise")
    if np.isfinite(min_bfmi) and min_bfmi < BFMI_MIN:
        problems.append(f"E-BFMI {min_bfmi:.2f} < {BFMI_MIN} on some tree (common practice threshold)")
    if any(d.n_draws and "only one chain" in " ".join(d.problems) for d in diags):
        problems.append("one chain per tree: R-hat cannot check convergence; use 2 or more chains per tree")
    return Diagnostics(max_rhat, min_eb, min_et, div, min_bfmi, n_draws, problems)


# =========================================================================== how much the tree matters
def _as_idata(pooled: Any) -> az.InferenceData:
    return pooled.idata if hasattr(pooled, "idata") else pooled


def _default_vars(pooled: Any, idata: az.InferenceData) -> list[str]:
    built = getattr(pooled, "built", None)
    if built is not None:
        return list(built.summary_vars)
    order = ("evo_corr", "evo_slope", "evo_rate", "evo_sd", "coef", "species_corr", "phylo_share",
             "lambda", "alpha", "half_life", "kappa", "delta", "rate_change", "root_mean", "within_sd")
    names = [v for v in order if v in idata.posterior]
    return names or list(idata.posterior.data_vars)


def _tree_groups(idata: az.InferenceData) -> tuple[np.ndarray, np.ndarray]:
    post = idata.posterior
    if "tree" not in post.coords:
        raise InputError("this InferenceData has no 'tree' coordinate; pool it with fit_tree_sample first")
    tree_of_chain = np.asarray(post.coords["tree"].values)
    return tree_of_chain, np.unique(tree_of_chain)


def tree_variance_share(pooled: Any, var_names: Sequence[str] | None = None) -> pd.DataFrame:
    """Share of posterior variance due to tree uncertainty, per reported quantity.

    By the law of total variance, Var(theta) = E_tree[Var(theta | tree)] +
    Var_tree(E[theta | tree]); the share is the second term over the total, with
    every tree weighted equally (as in the pooled mixture). Zero when all trees give
    the same posterior, one when the tree alone decides the value.

    Parameters
    ----------
    pooled : TreeSampleFit or arviz.InferenceData
        A pooled fit (its posterior carries the ``tree`` coordinate on ``chain``).
    var_names : sequence of str, optional
        Posterior variables (default: the summary's variables).

    Returns
    -------
    DataFrame
        Columns quantity, variable, total_sd, within_sd (root mean within-tree
        variance), between_sd (sd of the tree means), tree_share.
    """
    idata = _as_idata(pooled)
    names = list(var_names) if var_names else _default_vars(pooled, idata)
    tree_of_chain, trees = _tree_groups(idata)
    rows = []
    for name, label, vals in iter_quantities(idata, names):
        groups = [vals[tree_of_chain == t].ravel() for t in trees]
        means = np.array([g.mean() for g in groups])
        within = np.array([g.var() for g in groups])
        between = float(means.var())  # equal weights, population variance
        within_mean = float(within.mean())
        total = between + within_mean
        rows.append({
            "quantity": label, "variable": name,
            "total_sd": math.sqrt(total), "within_sd": math.sqrt(within_mean),
            "between_sd": math.sqrt(between),
            "tree_share": between / total if total > 0 else float("nan"),
        })
    return pd.DataFrame(rows, columns=["quantity", "variable", "total_sd", "within_sd", "between_sd", "tree_share"])


def per_tree_summary(pooled: Any, var_names: Sequence[str] | None = None) -> pd.DataFrame:
    """Mean, sd, HDI and P(>0) of every quantity on every tree (long format).

    Columns: tree (sample index), quantity, variable, mean, sd, hdi_low, hdi_high,
    prob_positive (correlations, slopes, coefficients only).
    """
    idata = _as_idata(pooled)
    names = list(var_names) if var_names else _default_vars(pooled, idata)
    tree_of_chain, trees = _tree_groups(idata)
    rows = []
    for name, label, vals in iter_quantities(idata, names):
        for t in trees:
            flat = vals[tree_of_chain == t].ravel()
            hdi = az.hdi(flat, hdi_prob=HDI_PROB)
            rows.append({
                "tree": int(t), "quantity": label, "variable": name,
                "mean": float(flat.mean()), "sd": float(flat.std(ddof=1)) if flat.size > 1 else float("nan"),
                "hdi_low": float(hdi[0]), "hdi_high": float(hdi[1]),
                "prob_positive": float((flat > 0).mean()) if name in SIGNED_VARS else float("nan"),
            })
    return pd.DataFrame(rows, columns=["tree", "quantity", "variable", "mean", "sd", "hdi_low",
                                       "hdi_high", "prob_positive"])


def tree_disagreement(per_tree: pd.DataFrame) -> list[str]:
    """Warnings where trees disagree on the sign of a correlation, slope or coefficient,
    or on whether its 95% HDI excludes zero."""
    out = []
    sub = per_tree[per_tree["variable"].isin(SIGNED_VARS)]
    for q, g in sub.groupby("quantity", sort=False):
        m = len(g)
        pos = int((g["mean"] > 0).sum())
        neg = int((g["mean"] < 0).sum())
        if pos and neg:
            out.append(f"{q}: the posterior mean is positive on {pos} and negative on {neg} of {m} trees")
        excl = ((g["hdi_low"] > 0) | (g["hdi_high"] < 0)).to_numpy()
        if excl.any() and not excl.all():
            out.append(
                f"{q}: the {int(HDI_PROB * 100)}% HDI excludes zero on {int(excl.sum())} of {m} trees "
                "but not on the others; the conclusion depends on the tree"
            )
    return out


def plot_tree_sample(
    pooled: Any, path_stem: str | Path, var_names: Sequence[str] | None = None, max_panels: int = 12
) -> list[Path]:
    """Per-tree means and HDIs as horizontal intervals, with the pooled interval on top.

    Writes ``<path_stem>.png`` and ``<path_stem>.svg`` and returns both paths.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    idata = _as_idata(pooled)
    names = list(var_names) if var_names else _default_vars(pooled, idata)
    per = per_tree_summary(idata, names)
    quantities = list(dict.fromkeys(per["quantity"]))[:max_panels]
    trees = list(dict.fromkeys(per["tree"]))
    ncol = min(3, max(1, len(quantities)))
    nrow = max(1, math.ceil(len(quantities) / ncol))
    height = max(2.2, 0.9 + 0.06 * len(trees)) * nrow
    stem = Path(path_stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    with plt.rc_context({"font.size": 8, "axes.spines.top": False, "axes.spines.right": False,
                         "svg.fonttype": "path", "svg.hashsalt": "cladewise"}):
        fig, axes = plt.subplots(nrow, ncol, figsize=(3.2 * ncol, height), squeeze=False)
        for ax, q in zip(axes.ravel(), quantities):
            g = per[per["quantity"] == q].set_index("tree").loc[trees]
            ypos = np.arange(len(trees))
            ax.hlines(ypos, g["hdi_low"], g["hdi_high"], color=_BLUE, lw=1.0)
            ax.plot(g["mean"], ypos, "o", color=_BLUE, ms=2.5, label="one tree")
            name = g["variable"].iloc[0]
            for _, label, vals in iter_quantities(idata, [name]):
                if label == q:
                    flat = vals.ravel()
                    lo, hi = az.hdi(flat, hdi_prob=HDI_PROB)
                    ax.hlines(len(trees) + 1, lo, hi, color=_VERMILLION, lw=2.2)
                    ax.plot(flat.mean(), len(trees) + 1, "s", color=_VERMILLION, ms=4, label="pooled")
            if name in SIGNED_VARS:
                ax.axvline(0.0, color=_GREY, ls="--", lw=0.8)
            ax.set_yticks([len(trees) + 1] + ([0, len(trees) - 1] if len(trees) > 1 else [0]))
            ax.set_yticklabels(["pooled"] + ([f"tree {trees[0]}", f"tree {trees[-1]}"] if len(trees) > 1 else [f"tree {trees[0]}"]))
            ax.set_title(q, fontsize=8)
        for ax in axes.ravel()[len(quantities):]:
            ax.set_visible(False)
        fig.suptitle(f"Posterior mean and {int(HDI_PROB * 100)}% HDI on each tree", fontsize=9)
        fig.tight_layout()
        paths = [stem.with_suffix(".png"), stem.with_suffix(".svg")]
        for p in paths:
            fig.savefig(p, dpi=110)
        plt.close(fig)
    return paths


# =========================================================================== spec files
def fit_spec_tree_sample(
    spec_path: str | Path,
    out_dir: str | Path | None = None,
    trees: str | Path | None = None,
    n_trees: int | None = None,
    overwrite: bool = False,
    command: str | None = None,
    progress: bool | None = None,
    **sampling_overrides: Any,
) -> TreeSampleFit:
    """Fit a spec's model over its tree sample (``[data] trees``, or the file ``trees``).

    ``sampling_overrides`` replace ``[sampling]`` values (``None`` ignored); the
    sampling seed also draws the subset when ``n_trees`` is given. ``progress``
    switches both the sampler's progress bar and the per-tree lines (default: on a
    terminal).
    """
    from cladewise.pipeline import dropped_notes, environment
    from cladewise.config.analysis import load_data, load_spec

    spec = load_spec(spec_path)
    if trees is not None:
        p = Path(trees).resolve()
        if not p.is_file():
            raise InputError(f"tree sample file not found: {trees}. Check the path.")
        spec = dataclasses.replace(spec, data=dataclasses.replace(spec.data, trees=p))
    if spec.data.trees is None:
        raise InputError(
            f"{spec.path.name} names no tree sample: add `trees = \"<file>\"` to [data] or give --trees FILE"
        )
    if not spec.model:
        raise InputError(f"{spec.path.name} has no [model] section; add one (see the demo specs in models/)")
    if out_dir is not None:
        out = Path(out_dir)
        check_output_folder(out, overwrite)
    model_spec = ModelSpec.from_dict(dict(spec.model))
    samp = dict(spec.sampling)
    samp.update({k: v for k, v in sampling_overrides.items() if v is not None})
    if progress is not None:
        samp["progress"] = bool(progress)
    options = SamplingOptions.from_dict(samp)
    match, summary = load_data(spec)
    data = ModelData.from_match(match)
    data.notes.extend(dropped_notes(match))
    result = fit_tree_sample(data, model_spec, match.trees, options, n_trees=n_trees, progress=progress)
    result.info["spec_path"] = str(spec.path)
    result.info["spec_text"] = spec.path.read_text()
    result.info["data_summary"] = summary.to_dict()
    result.info["environment"] = environment()
    result.info["command"] = command or ""
    result.info["trees_path"] = str(spec.data.trees)
    if out_dir is not None:
        result.save(out_dir, overwrite=overwrite)
    return result

