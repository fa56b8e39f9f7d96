"""Traits measured on the same specimens: engine cost of a full error covariance, and
interval coverage of the specimens model with correlated within-species error.

Table 1: the engine kernel the PyTensor Op calls (value + full gradient), k = 2,
with each species' error covariance diagonal (what models without within-species
correlation pass) or full (correlation 0.8), on the random trees of
bench_engine.py (invented data).

Table 2: simulated data sets in the setting of issue 12 part 1 (150 species,
3 specimens each, within-species correlation 0.8, evolutionary rates 0.05 on a
unit-height coalescent-shaped tree of bench_calibration.py, within-species variance 0.1); the true
evolutionary correlation alternates between 0 and 0.6. Each data set is fitted
with measurement_error = "specimens" (full within-species covariance) and the
table says whether the 95% HDIs of evo_corr and within_corr cover the truth, plus
the same for the model that treats the errors of the means as independent.

Run:  /work/venv/bin/python benchmarks/bench_within_species.py [--datasets 6]
      [--draws 500] [--seed 1] [--skip-fits]
About 1 minute per data set (two fits, each with its own compile) on 2 cores.
"""

from __future__ import annotations

import argparse
import math
import sys
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_calibration import coalescent_tree  # noqa: E402
from bench_engine import make_problem, median_time  # noqa: E402

from cladewise.engine import kernels  # noqa: E402
from cladewise.model import within_species as ws  # noqa: E402
from cladewise.model.build import ModelData, ModelSpec, build_model  # noqa: E402


def engine_table() -> None:
    print("k=2 value + gradient per call (kernels.value_and_grad_kernel), ms")
    print(f"{'N':>7} {'diagonal':>10} {'full':>10} {'full/diag':>10}")
    for n in [1_000, 10_000, 50_000]:
        parent, lengths, y, observed, R, E, err_var, mu = make_problem(n)
        diag = err_var[:, :, None] * np.eye(2)[None, :, :]
        sd = np.sqrt(err_var)
        full = sd[:, :, None] * sd[:, None, :] * np.array([[1.0, 0.8], [0.8, 1.0]])
        times = []
        for err in (diag, full):
            args = (parent, lengths, y, observed, R, E, err, mu)
            kernels.value_and_grad_kernel(*args)
            times.append(median_time(lambda: kernels.value_and_grad_kernel(*args)))
        print(f"{n:>7} {1e3 * times[0]:10.3f} {1e3 * times[1]:10.3f} {times[1] / times[0]:10.2f}")


def simulate(evo_corr: float, seed: int):
    rng = np.random.default_rng(seed)
    tree = coalescent_tree(150, seed)
    R = 0.05 * np.array([[1.0, evo_corr], [evo_corr, 1.0]])
    W = 0.1 * np.array([[1.0, 0.8], [0.8, 1.0]])
    rows = ws.simulate_specimens(tree, R, np.zeros(2), W, 3, rng, ["x", "y"])
    names = list(tree.tip_names)
    g = rows.groupby("species", sort=False)
    data = ModelData(tree, g[["x", "y"]].mean().reindex(names),
                     n=g[["x", "y"]].count().reindex(names).astype(float),
                     sample_var=g[["x", "y"]].var(ddof=1).reindex(names), specimens=rows)
    return data


def fit_table(n_datasets: int, draws: int, seed: int) -> None:
    from cladewise.inference.fit import summarise
    from cladewise.inference.sampling import SamplingOptions, diagnose, sample

    spec = ModelSpec(kind="correlated", traits=["x", "y"], measurement_error="specimens")
    opts = SamplingOptions(chains=2, draws=draws, tune=draws, seed=seed, progress=False)
    print()
    print("150 species x 3 specimens, within-species correlation 0.8; 95% HDI covers the truth?")
    print(f"{'set':>4} {'true r':>7} {'evo_corr (full)':>22} {'cov':>4} {'within_corr':>22} {'cov':>4} "
          f"{'div':>4} {'evo_corr (independent errors)':>30} {'cov':>4}")
    hits = {"evo": [], "within": [], "indep": []}
    for d in range(n_datasets):
        truth = 0.0 if d % 2 == 0 else 0.6
        data = simulate(truth, seed + d)
        res = {}
        for label, dd in (("full", data), ("indep", ModelData(data.tree, data.values, n=data.n,
                                                               sample_var=data.sample_var))):
            built = build_model(dd, spec)
            idata = sample(built, opts)
            res[label] = (summarise(idata, built).set_index("quantity"),
                          diagnose(idata, built.summary_vars).divergences)
        s, div = res["full"]
        e, w = s.loc["evo_corr[x, y]"], s.loc["within_corr[x, y]"]
        i = res["indep"][0].loc["evo_corr[x, y]"]
        ce = e.hdi_low <= truth <= e.hdi_high
        cw = w.hdi_low <= 0.8 <= w.hdi_high
        ci = i.hdi_low <= truth <= i.hdi_high
        hits["evo"].append(ce)
        hits["within"].append(cw)
        hits["indep"].append(ci)
        fmt = lambda r: f"{r['mean']:6.2f} [{r['hdi_low']:5.2f}, {r['hdi_high']:5.2f}]"  # noqa: E731
        print(f"{d:>4} {truth:7.1f} {fmt(e):>22} {'yes' if ce else 'no':>4} {fmt(w):>22} "
              f"{'yes' if cw else 'no':>4} {div:>4} {fmt(i):>30} {'yes' if ci else 'no':>4}")
    for name, h in hits.items():
        p = float(np.mean(h))
        se = math.sqrt(0.95 * 0.05 / len(h))
        label = {"evo": "evo_corr, full within-species covariance", "within": "within_corr",
                 "indep": "evo_corr, independent errors of the means"}[name]
        print(f"coverage {label}: {p:.2f} (nominal 0.95, Monte Carlo se {se:.2f})")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--datasets", type=int, default=6)
    p.add_argument("--draws", type=int, default=500)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--skip-fits", action="store_true", help="engine timings only")
    args = p.parse_args(argv)
    # R-hat of a constant (a correlation matrix's diagonal) is 0/0: not news
    warnings.simplefilter("ignore", RuntimeWarning)
    warnings.simplefilter("ignore", UserWarning)
    engine_table()
    if not args.skip_fits:
        fit_table(args.datasets, args.draws, args.seed)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
