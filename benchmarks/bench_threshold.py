"""Threshold-model benchmark (issue 15): one binary and one continuous trait.

Data simulated on random ultrametric trees (unit height) under bivariate Brownian
motion with evolutionary correlation 0.6 between the continuous trait and the
liability (liability tip variance 1, threshold 0). For each N: build, compile and
sampling times, minimum bulk ESS over the reported quantities (correlation, slopes,
probit coefficient, rates, root means), min bulk ESS per second of sampling wall time,
divergences, and whether the 95% HDI of the correlation covers 0.6.

Run:  python benchmarks/bench_threshold.py [--sizes 300 1000 5000] [--chains 2 --draws 500 --tune 500]
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
from cladewise.inference.fit import summarise  # noqa: E402
from cladewise.model.simulate import simulate_traits  # noqa: E402
from treegen import random_tree  # noqa: E402

RHO = 0.6


def dataset(n: int, seed: int) -> ModelData:
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, True)
    tree = tree.with_lengths(tree.length / tree.tip_heights().max())  # unit height: tip variance = rate
    R = np.array([[1.0, RHO], [RHO, 1.0]])
    y = simulate_traits(tree, R, [0.0, 0.0], rng=rng)
    names = list(tree.tip_names)
    state = np.where(y[:, 1] > 0, "yes", "no")
    return ModelData(tree, pd.DataFrame({"size": y[:, 0]}, index=names),
                     extra=pd.DataFrame({"state": state}, index=names))


def run(n: int, opts: SamplingOptions) -> dict:
    data = dataset(n, seed=n)
    spec = ModelSpec(kind="correlated", traits=["size", "state"], discrete={"state": ["no", "yes"]})
    t0 = time.perf_counter()
    built = build_model(data, spec)
    t1 = time.perf_counter()
    compiled = compile_model(built)
    t2 = time.perf_counter()
    idata = sample(built, opts, compiled=compiled)
    t3 = time.perf_counter()
    d = diagnose(idata, built.summary_vars)
    s = summarise(idata, built)
    row = s[s["quantity"] == "evo_corr[size, state]"].iloc[0]
    return {"N": n, "build_s": t1 - t0, "compile_s": t2 - t1, "sample_s": t3 - t2,
            "min_ess_bulk": d.min_ess_bulk, "ess_per_s": d.min_ess_bulk / (t3 - t2),
            "divergences": d.divergences, "corr_mean": row["mean"],
            "hdi_covers_0.6": bool(row["hdi_low"] <= RHO <= row["hdi_high"])}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[300, 1000, 5000])
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--tune", type=int, default=500)
    a = ap.parse_args()
    opts = SamplingOptions(chains=a.chains, draws=a.draws, tune=a.tune, seed=1, progress=False)
    rows = []
    for n in a.sizes:
        rows.append(run(n, opts))
        print(pd.DataFrame(rows[-1:]).to_string(index=False, float_format=lambda v: f"{v:.3g}"), flush=True)
    print()
    print(f"One binary + one continuous trait, {a.chains} chains x {a.draws} draws ({a.tune} tuning):")
    print(pd.DataFrame(rows).to_string(index=False, float_format=lambda v: f"{v:.3g}"))


if __name__ == "__main__":
    main()
