"""End-to-end fit benchmark (issue: models and fitting).

Bivariate correlated Brownian motion with Pagel's lambda and known measurement error,
on data simulated on random ultrametric trees. For each N: build, compile and sample
times, minimum bulk ESS over the reported quantities, and min bulk ESS per second of
(tune + draw) wall time. A plain dense-covariance PyMC model of the same data
(likelihood="dense", same sampler) runs beside it where feasible.

Run:  python benchmarks/bench_fit.py [--sizes 100 1000 10000] [--dense-max 1000]
      [--chains 4 --draws 1000 --tune 1000]
Prints a table; the last lines state the ESS/s ratio at N=1000 and the N=10,000 wall time.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from cladewise.model.build import ModelData, ModelSpec, build_model  # noqa: E402
from cladewise.inference.sampling import SamplingOptions, compile_model, diagnose, sample  # noqa: E402
from cladewise.model.simulate import simulate_traits  # noqa: E402
from treegen import random_tree  # noqa: E402


def dataset(n: int, seed: int) -> ModelData:
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, True)
    tree = tree.with_lengths(tree.length / tree.tip_heights().max())  # unit height
    R = np.array([[1.0, 0.5], [0.5, 1.0]]) * 0.2
    from cladewise.model.evolution import transformed_lengths

    x = simulate_traits(tree, R, [0.0, 0.0], lengths=transformed_lengths(tree, "lambda", lam=0.8), rng=rng)
    se = np.full((n, 2), 0.1)
    y = x + rng.standard_normal((n, 2)) * se
    names = list(tree.tip_names)
    return ModelData(tree, pd.DataFrame(y, index=names, columns=["a", "b"]),
                     se=pd.DataFrame(se, index=names, columns=["a", "b"]))


def run(n: int, likelihood: str, opts: SamplingOptions) -> dict:
    data = dataset(n, seed=n)
    spec = ModelSpec(kind="correlated", traits=["a", "b"], evolution="lambda", measurement_error="se")
    t0 = time.perf_counter()
    built = build_model(data, spec, likelihood=likelihood)
    t1 = time.perf_counter()
    compiled = compile_model(built)
    t2 = time.perf_counter()
    idata = sample(built, opts, compiled=compiled)
    t3 = time.perf_counter()
    d = diagnose(idata, built.summary_vars)
    return {"N": n, "likelihood": likelihood, "build_s": t1 - t0, "compile_s": t2 - t1,
            "sample_s": t3 - t2, "total_s": t3 - t0, "min_ess_bulk": d.min_ess_bulk,
            "ess_per_s": d.min_ess_bulk / (t3 - t2), "divergences": d.divergences,
            "max_rhat": d.max_rhat}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[100, 1000, 10000])
    ap.add_argument("--dense-max", type=int, default=1000)
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--tune", type=int, default=1000)
    ap.add_argument("--dense-draws", type=int, default=200, help="shorter dense runs (ESS/s is a rate)")
    a = ap.parse_args()
    rows = []
    for n in a.sizes:
        opts = SamplingOptions(chains=a.chains, draws=a.draws, tune=a.tune, seed=1, progress=False)
        rows.append(run(n, "tree", opts))
        print(pd.DataFrame(rows[-1:]).to_string(index=False), flush=True)
        if n <= a.dense_max:
            dopts = SamplingOptions(chains=2, draws=a.dense_draws, tune=a.dense_draws, seed=1, progress=False)
            rows.append(run(n, "dense", dopts))
            print(pd.DataFrame(rows[-1:]).to_string(index=False), flush=True)
    df = pd.DataFrame(rows)
    print()
    print(df.to_string(index=False, float_format=lambda v: f"{v:.3g}"))
    for n in a.sizes:
        t = df[(df.N == n) & (df.likelihood == "tree")]
        dn = df[(df.N == n) & (df.likelihood == "dense")]
        if len(t) and len(dn):
            print(f"ESS/s ratio tree/dense at N={n}: {t.ess_per_s.iloc[0] / dn.ess_per_s.iloc[0]:.1f}x")
    big = df[(df.likelihood == "tree") & (df.N == max(a.sizes))]
    if len(big):
        print(f"wall time at N={max(a.sizes)} ({a.chains} chains x {a.draws} draws): {big.total_s.iloc[0]:.0f} s")


if __name__ == "__main__":
    main()
