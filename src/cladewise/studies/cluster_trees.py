"""A fit over a tree sample with one task per tree on a dask cluster, pooled at home.

The same fit as :func:`cladewise.inference.pooled.fit_tree_sample`, split up: the
client chooses the trees and their seeds (tree ``i`` of the sample is sampled with
seed ``seed + i``, as in one process), each worker builds and compiles the model
once for the sample (:func:`cladewise.studies.cluster.worker_memo`; the tree is
data, so every tree of the sample reuses it), samples its trees and sends the
per-tree fits home, where they are pooled by
:func:`cladewise.inference.pooled.pool_tree_fits`. Same seeds, same draws: the
pooled fit equals the one-process fit.
"""

from __future__ import annotations

import dataclasses
import math
import threading
import time
from typing import Any, Callable, Sequence

from cladewise.data.trees import FlatTree
from cladewise.inference.fit import FitResult
from cladewise.inference.sampling import SamplingOptions
from cladewise.model.build import ModelData, ModelSpec

__all__ = ["fit_tree_sample_on_cluster"]


@dataclasses.dataclass
class _TreeState:
    built: Any
    padded: list
    compiled: Any
    engine: Any
    lock: threading.Lock


def _make_state(data: ModelData, spec: ModelSpec, chosen_trees: list, likelihood: str, sampler: str) -> _TreeState:
    from cladewise.inference import sampling
    from cladewise.inference.draws import EngineDraws
    from cladewise.inference.tree_align import build_for_sample

    built, padded = build_for_sample(data, spec, chosen_trees, likelihood)
    compiled = sampling.compile_model(built, sampler)
    return _TreeState(built, padded, compiled, EngineDraws(built), threading.Lock())


def _tree_task(key: str, setup: tuple, position: int, seed: int, predictive_draws: int,
               tag: Any = None) -> tuple:
    """Fit tree ``position`` of the chosen trees on a worker; returns the fit's parts."""
    from cladewise.inference.pooled import fit_one_tree
    from cladewise.studies.cluster import report_start, worker_memo

    report_start(tag)
    data, spec, chosen_trees, likelihood, opts = setup
    st = worker_memo(key, lambda: _make_state(data, spec, chosen_trees, likelihood, opts.sampler))
    o = dataclasses.replace(opts, seed=int(seed), progress=False)
    with st.lock:  # the tree data live in the shared model: one tree at a time per worker
        res, ts, tp = fit_one_tree(st.built, st.compiled, st.engine, st.padded[position], o, predictive_draws)
    return res.idata, res.summary, res.diagnostics, res.info, ts, tp


def fit_tree_sample_on_cluster(
    data: ModelData,
    spec: ModelSpec,
    trees: Sequence[FlatTree],
    options: SamplingOptions | None = None,
    n_trees: int | None = None,
    seed: int | None = None,
    likelihood: str = "tree",
    *,
    predictive_draws: int = 200,
    scheduler: str | None = None,
    n_workers: int = 2,
    progress: Callable[[str], None] | None = None,
) -> Any:
    """Fit a model over a tree sample with one dask task per tree; pool the draws here.

    Arguments as :func:`cladewise.inference.pooled.fit_tree_sample`, plus
    ``scheduler`` (address or scheduler file of a running dask scheduler; default a
    local cluster of ``n_workers`` processes) and ``progress`` (one line every ten
    trees). Returns the same :class:`~cladewise.inference.pooled.TreeSampleFit` as
    the one-process fit with the same seed.
    """
    from cladewise.data.treefiles import format_newick
    from cladewise.inference.pooled import pool_tree_fits
    from cladewise.inference.startcheck import check_starting_point
    from cladewise.inference.tree_align import build_for_sample, choose_trees
    from cladewise.model.build import tree_data_values
    from cladewise.studies.cluster import map_study, memo_key

    opts = options or SamplingOptions()
    opts.validate()
    base = int(opts.seed if seed is None else seed)
    chosen = choose_trees(len(trees), n_trees, base)
    t0 = time.perf_counter()
    chosen_trees = [trees[i] for i in chosen]
    built, padded = build_for_sample(data, spec, chosen_trees, likelihood)  # for pooling; never compiled here
    check_starting_point(built, [tree_data_values(built, t) for t in padded])
    t_build = time.perf_counter() - t0
    per_tree_pp = max(1, math.ceil(predictive_draws / len(chosen))) if predictive_draws else 0
    setup = (data, spec, chosen_trees, likelihood, opts)
    key = memo_key("tree-sample", *setup)
    seeds = [base + int(i) for i in chosen]
    items = [(key, setup, a, s, per_tree_pp) for a, s in enumerate(seeds)]
    parts = map_study(_tree_task, items, scheduler=scheduler, n_workers=n_workers, progress=progress,
                      what="trees")
    fits = [FitResult(idata=p[0], summary=p[1], diagnostics=p[2], built=None, info=p[3]) for p in parts]
    timing = {"build": t_build, "compile": float("nan"), "sample_total": float(sum(p[4] for p in parts)),
              "postprocess_total": float(sum(p[5] for p in parts)), "sample_per_tree": [p[4] for p in parts],
              "wall": time.perf_counter() - t0}
    res = pool_tree_fits(fits, [int(i) for i in chosen], seeds, built=built, options=opts,
                         n_sample=len(trees), timing=timing)
    res.info["tree_newick"] = format_newick(data.tree, digits=17)
    res.info["trees_newick"] = [format_newick(t, digits=17) for t in chosen_trees]
    return res
