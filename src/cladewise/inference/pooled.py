"""Fitting a model over a sample of trees: tree uncertainty carried into the answer.

A dating analysis gives a posterior *sample* of trees, not one tree. The posterior of
the model's parameters under tree uncertainty is the equal-weight mixture of the
posteriors given each tree of the sample (de Villemereuil et al. 2012, BMC Evol.
Biol. 12:102). :func:`fit_tree_sample` fits every tree (or a seeded random subset),
compiling the model once: the tree enters the PyMC model as ``pm.Data``, so only
the data change from one tree to the next (trees are brought to one shape by
:mod:`cladewise.inference.tree_align`).

The pooled result is one InferenceData whose ``chain`` dimension runs over
tree x chain, with a ``tree`` coordinate on ``chain`` giving the sample index of the
tree each chain came from. The ``log_likelihood`` group holds each draw's
leave-one-species-out conditional computed on its own tree, so ``arviz.loo`` works
on the pooled fit. Convergence is judged within each tree
(:func:`cladewise.inference.diagnostics.diagnose`). How much the tree matters is
measured by :mod:`cladewise.inference.treesample`.
"""

from __future__ import annotations

import dataclasses
import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import format_newick
from cladewise.errors import FitInterrupted, InputError
from cladewise.inference import sampling
from cladewise.inference.diagnostics import Diagnostics, diagnose
from cladewise.inference.draws import EngineDraws
from cladewise.inference.fit import FitResult, finish_fit, json_default, summarise
from cladewise.inference.results import atomic_write, check_output_folder
from cladewise.inference.sampling import SamplingOptions
from cladewise.inference.startcheck import check_starting_point
from cladewise.inference.tree_align import align_trees, build_for_sample, choose_trees, pad_tree
from cladewise.inference.treesample import (
    per_tree_summary,
    tree_disagreement,
    tree_variance_share,
)
from cladewise.model.build import BuiltModel, ModelData, ModelSpec, tree_data_values

__all__ = ["TreeSampleFit", "fit_tree_sample", "pool_tree_fits", "fit_one_tree"]


@dataclass(repr=False)  # printed as FitResult.to_text, not field by field
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

    def save(self, out_dir: str | Path, overwrite: bool = False, inputs: Sequence[str | Path] = (),
             figures: bool = True) -> Path:
        """Write the files of :meth:`FitResult.save` plus ``per_tree.csv``,
        ``tree_variance.csv`` and ``tree_sample.png``/``.svg``, all at once.

        Everything is staged beside the folder and swapped into place.
        """
        check_output_folder(out_dir, overwrite=overwrite, inputs=inputs, what="fit")
        return atomic_write(out_dir, lambda folder: self._write(folder, figures), what="fit")

    def write_files(self, folder: Path) -> None:
        """Write the fit's files, tables and figure into an existing (staging) folder."""
        self._write(Path(folder), True)

    def _write(self, folder: Path, figures: bool) -> None:
        FitResult.write_files(self, folder)
        if self.per_tree is not None:
            self.per_tree.to_csv(folder / "per_tree.csv", index=False)
        if self.variance_share is not None:
            self.variance_share.to_csv(folder / "tree_variance.csv", index=False)
        if figures:
            # figures belong to report/; imported here so inference never loads matplotlib
            from cladewise.report.study_figures import plot_tree_sample

            plot_tree_sample(self, folder / "tree_sample")

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
            "trees_newick": list(self.info.get("trees_newick", [])),
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
    check_start: bool = True,
    keep_partial: bool = False,
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
    check_start : bool
        Check that the log density and gradient are finite at the starting point
        on every tree before compiling (:mod:`cladewise.inference.startcheck`).
    keep_partial : bool
        On Ctrl-C, pool the trees finished so far into a fit marked partial and
        attach it to the exception (``partial``).

    Returns
    -------
    TreeSampleFit

    Raises
    ------
    FitInterrupted
        Ctrl-C; ``partial`` holds the finished trees pooled (marked partial) or None.
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
    if check_start:
        check_starting_point(built, [tree_data_values(built, t) for t in padded_all])
    t0 = time.perf_counter()
    if compiled is None and opts.sampler == "nutpie":
        compiled = sampling.compile_model(built, "nutpie")
    t_compile = time.perf_counter() - t0

    per_tree_pp = max(1, math.ceil(predictive_draws / len(chosen))) if predictive_draws else 0
    engine = EngineDraws(built)  # compiled once; reads the tree data at call time
    own_values = tree_data_values(built, built.data.tree)
    fits: list[FitResult] = []
    seeds: list[int] = []
    t_sample: list[float] = []
    t_post: list[float] = []

    def pooled_so_far(partial: bool) -> TreeSampleFit:
        timing = {"build": t_build, "compile": t_compile, "sample_total": float(sum(t_sample)),
                  "postprocess_total": float(sum(t_post)), "sample_per_tree": t_sample}
        done = [int(i) for i in chosen[:len(fits)]]
        res = pool_tree_fits(fits, done, seeds, built=built, options=opts, n_sample=len(trees), timing=timing)
        res.compiled = compiled
        res.info["tree_newick"] = format_newick(data.tree, digits=17)
        res.info["trees_newick"] = [format_newick(trees[i], digits=17) for i in done]
        if partial:
            res.mark_partial(f"sampling was interrupted after {len(fits)} of {len(chosen)} trees; "
                             "only the finished trees are pooled")
        return res

    try:
        for a, (i, tree) in enumerate(zip(chosen, padded_all)):
            s = base + int(i)
            o = dataclasses.replace(opts, seed=s, progress=False if not show else opts.progress)
            res, ts, tp = fit_one_tree(built, compiled, engine, tree, o, per_tree_pp)
            fits.append(res)
            seeds.append(s)
            t_sample.append(ts)
            t_post.append(tp)
            if show:
                print(f"tree {a + 1}/{len(chosen)} (sample index {i}): sampled in {ts:.1f} s; "
                      f"R-hat max {res.diagnostics.max_rhat:.3f}", file=sys.stderr)
    except FitInterrupted as exc:
        _set_tree_data(built, own_values)
        raise FitInterrupted(str(exc), partial=pooled_so_far(True) if fits and keep_partial else None) from None
    finally:
        _set_tree_data(built, own_values)
    return pooled_so_far(False)


def fit_one_tree(built: BuiltModel, compiled: Any, engine: EngineDraws, tree: FlatTree,
                 options: SamplingOptions, predictive_draws: int) -> tuple[FitResult, float, float]:
    """Sample one (padded) tree of a sample with the shared compiled model; finish its fit.

    ``options.seed`` is this tree's seed. Returns the fit and the seconds spent
    sampling and post-processing. Leaves the tree's data set in ``built``.
    """
    values = tree_data_values(built, tree)
    ts = time.perf_counter()
    idata = sampling.sample(built, options, compiled=compiled, tree_values=_filter_values(values, compiled))
    ts = time.perf_counter() - ts
    tp = time.perf_counter()
    # the per-draw log-likelihood and replicates must use this draw's own tree
    _set_tree_data(built, values)
    bt = dataclasses.replace(built, data=dataclasses.replace(built.data, tree=tree, notes=list(built.data.notes)))
    if built.painting is not None:  # regimes repainted on this tree (tree_data_values)
        bt.painting = dataclasses.replace(built.painting, node_regime=values[built.tree_data["regime"]])
    res = finish_fit(bt, idata, options, timing={"sample": ts}, predictive_draws=predictive_draws, engine=engine)
    return res, ts, time.perf_counter() - tp


def _set_tree_data(built: BuiltModel, values: dict[str, np.ndarray]) -> None:
    import pymc as pm

    with built.model:
        pm.set_data(values)


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
    diag = diagnose(idata, list(var_names) if var_names else list(idata.posterior.data_vars))
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
