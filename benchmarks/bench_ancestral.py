"""Time and peak memory of ancestral values and predictions over 1,000 posterior draws.

Setting (invented): random bifurcating non-ultrametric trees, k = 2 traits, a
correlated model with Pagel's lambda and known standard errors, 10% missing cells
(every species with a missing cell gets a prediction). The posterior is 1,000 prior
draws of the model's parameters (the cost does not depend on where the draws come
from). Timed: :func:`cladewise.inference.ancestral.reconstruct` (per draw: the
compiled parameter -> engine mapping, the engine's conditionals at every node, one
draw per node, then summaries and HDIs). Peak memory: tracemalloc (numpy arrays
included) during that call. Model building and compiling are not timed. CPU time
(process time) is printed beside wall time: on a shared machine it is the fairer measure.

Run: ``PYTHONPATH=src python benchmarks/bench_ancestral.py`` (a few minutes on 2 cores).
"""

from __future__ import annotations

import time
import tracemalloc

import arviz as az
import numpy as np
import pandas as pd
import pymc as pm

from cladewise.data.trees import FlatTree
from cladewise.engine.testing import random_tree
from cladewise.inference.ancestral import reconstruct
from cladewise.model.build import ModelData, ModelSpec, build_model

SIZES = [1_000, 10_000]
DRAWS = 1_000


def problem(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    parent, lengths = random_tree(n, rng)
    tree = FlatTree(parent, lengths, tuple(f"sp{i}" for i in range(n)))
    y = rng.normal(size=(n, 2))
    y[rng.random((n, 2)) < 0.1] = np.nan
    values = pd.DataFrame(y, index=list(tree.tip_names), columns=["a", "b"])
    se = pd.DataFrame(rng.uniform(0.05, 0.2, (n, 2)), index=values.index, columns=["a", "b"])
    data = ModelData(tree=tree, values=values, se=se)
    spec = ModelSpec(kind="correlated", traits=["a", "b"], evolution="lambda", measurement_error="se")
    built = build_model(data, spec)
    free = built.model.free_RVs
    drawn = pm.draw(free, draws=DRAWS, random_seed=seed)
    post = {rv.name: np.asarray(v)[None] for rv, v in zip(free, drawn)}
    return built, az.from_dict(posterior=post)


def main() -> None:
    rows = []
    for n in SIZES:
        built, idata = problem(n)
        reconstruct(built, idata, max_draws=5)  # warm-up: compile the mapping and the engine
        tracemalloc.start()
        t0, c0 = time.perf_counter(), time.process_time()
        rec = reconstruct(built, idata, max_draws=DRAWS)
        dt, cpu = time.perf_counter() - t0, time.process_time() - c0
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        rows.append({"tips": n, "draws": DRAWS, "internal nodes": rec.ancestral.sizes["node"],
                     "predicted cells": len(rec.predictions), "wall s": round(dt, 2), "CPU s": round(cpu, 2),
                     "CPU ms per draw": round(1000 * cpu / DRAWS, 2), "peak MB": round(peak / 2**20, 1),
                     "node draws kept": "node_value" in rec.ancestral})
    print(pd.DataFrame(rows).to_string(index=False))


if __name__ == "__main__":
    main()
