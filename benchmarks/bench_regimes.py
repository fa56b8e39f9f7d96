"""Fit time of a two-regime bivariate Brownian model beside the single-regime model.

Setting (invented data): ultrametric random trees of N species scaled to height 1;
two traits with evolutionary correlation 0.5; one clade holding 20-40% of the
species evolves 4 times faster (rates = "own": its own rate matrix, so both rates
and the correlation may differ); no measurement error. Each model is fitted with
nutpie, 2 chains x 500 draws after 500 tuning steps; the time is wall-clock of
``cladewise.inference.fit.fit`` (building, compiling, sampling, post-processing
without predictive draws), one run per cell.

Run: ``python benchmarks/bench_regimes.py [N ...]`` (default 1000 10000).
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

from cladewise.data.regimes import Clade, paint_clades
from cladewise.data.trees import FlatTree
from cladewise.inference.fit import fit
from cladewise.inference.sampling import SamplingOptions
from cladewise.model.build import ModelData, ModelSpec
from cladewise.model.simulate import simulate_traits


def ultrametric_tree(n: int, rng: np.random.Generator) -> FlatTree:
    """Coalescent-like ultrametric tree (random joins), height 1."""
    parent = np.full(2 * n - 1, -1, np.int64)
    age = np.zeros(2 * n - 1)
    active = list(range(n))
    node, t = n, 0.0
    while len(active) > 1:
        t += rng.exponential(1.0 / len(active))
        a, b = sorted(rng.choice(len(active), 2, replace=False), reverse=True)
        ia, ib = active.pop(a), active.pop(b)
        parent[ia] = parent[ib] = node
        age[node] = t
        active.append(node)
        node += 1
    length = np.zeros(2 * n - 1)
    length[:-1] = age[parent[:-1]] - age[:-1]
    return FlatTree(parent, length / age[-1], tuple(f"sp{i}" for i in range(n)))


def problem(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    tree = ultrametric_tree(n, rng)
    below = tree.tips_below()
    v = max((u for u in range(n, tree.root) if 0.2 * n <= len(below[u]) <= 0.4 * n),
            key=lambda u: len(below[u]), default=None)
    if v is None:  # no clade of that size: take the largest below 40%
        v = max((u for u in range(n, tree.root) if len(below[u]) <= 0.4 * n), key=lambda u: len(below[u]))
    names = [tree.tip_names[i] for i in below[v]]
    painting = paint_clades(tree, [Clade("fast", tuple(names))])
    R = np.array([[1.0, 0.5], [0.5, 1.0]])
    x = simulate_traits(tree, np.stack([R, 4.0 * R]), [0.0, 0.0], rng=rng, regime=painting.node_regime)
    vals = pd.DataFrame(x, index=list(tree.tip_names), columns=["a", "b"])
    return ModelData(tree, vals), names


def main(sizes: list[int]) -> None:
    opts = SamplingOptions(chains=2, draws=500, tune=500, seed=1, progress=False)
    rows = []
    for n in sizes:
        data, names = problem(n)
        for label, regimes in (("one regime", {}),
                               ("two regimes", {"clades": {"fast": {"species": names}}, "rates": "own"})):
            spec = ModelSpec(kind="correlated", traits=["a", "b"], regimes=regimes)
            t0 = time.perf_counter()
            res = fit(data, spec, opts, predictive_draws=0)
            dt = time.perf_counter() - t0
            extra = ""
            if regimes:
                rr = res.idata.posterior["rate_ratio"].values.reshape(-1, 2)
                extra = f"rate ratio median {np.median(rr[:, 0]):.2f}, {np.median(rr[:, 1]):.2f} (true 4)"
            rows.append((n, label, len(names), dt, extra))
            print(f"{n:>6} {label:<12} clade {len(names):>5}  {dt:8.1f} s  {extra}", flush=True)
    print()
    print(f"{'species':>7} | {'model':<12} | {'clade':>5} | {'fit s':>8} | note")
    for n, label, c, dt, extra in rows:
        print(f"{n:>7} | {label:<12} | {c:>5} | {dt:8.1f} | {extra}")


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [1000, 10000])
