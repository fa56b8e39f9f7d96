"""Simulation-based calibration: correlated BM with known se, regression with an offset predictor, specimens.

Talts, Betancourt, Simpson, Vehtari & Gelman 2018 (arXiv:1804.06788): draw the true
parameters from the model's prior, simulate data from them on a fixed tree, refit the
same compiled model, and rank each true value among L thinned posterior draws. If the
fit is right the ranks are uniform on 0..L and central intervals cover at their
nominal rate. Parameters checked: the evolutionary correlation, both rates and both
root means. The tree is a seeded coalescent-shaped ultrametric tree of height 1; the
known standard errors are drawn once per species and trait in [0.25, 0.75] (the
reference data that scales the prior has a spread of about 1 per trait).

``--model regression``: ``y ~ x`` with x drawn once per species (mean 9, sd 0.5) and
held fixed; checks the slope, the intercept at x = 0, the intercept at the mean of x and
the residual rate (and lambda with ``--evolution lambda``); ``--measurement-error se|none``.
``--model specimens``: two traits measured on the same specimens (3-6 per species,
``--specimens LOW HIGH``) with the within-species correlation drawn from the prior;
checks evo_corr, within_corr and the rates. Its specimen statistics are constants of
the model, so it is built and compiled again per data set (a compile-cache hit).

Besides the coverage table (per parameter, with Monte Carlo se) it prints the share
of divergent draws: overall, per fit (median, largest) and the number of fits with
any; the target is under 0.1% of draws.

Run:  /work/venv/bin/python benchmarks/bench_calibration.py [--model correlated|regression|specimens]
      [--evolution bm|lambda] [--measurement-error se|none] [--n-datasets 200]
      [--draws 500] [--tune 500] [--chains 2] [--target-accept 0.95] [--species 50]
      [--seed 1] [--out DIR]
About 40-90 s to compile, then about 1-2 s per data set on a 2-core machine.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

from cladewise.studies.calibration import run_calibration
from cladewise.inference.sampling import SamplingOptions
from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import parse_newick


def coalescent_tree(n: int, seed: int) -> FlatTree:
    """Kingman-coalescent-shaped ultrametric tree with n tips, scaled to height 1."""
    rng = np.random.default_rng(seed)
    nodes = [(f"s{i}", 0.0) for i in range(n)]  # (newick text, age)
    age = 0.0
    while len(nodes) > 1:
        k = len(nodes)
        age += rng.exponential(2.0 / (k * (k - 1)))
        i, j = rng.choice(k, 2, replace=False)
        (a, ta), (b, tb) = nodes[i], nodes[j]
        nodes = [x for m, x in enumerate(nodes) if m not in (i, j)]
        nodes.append((f"({a}:{age - ta:.10g},{b}:{age - tb:.10g})", age))
    text, height = nodes[0]
    tree = parse_newick(text + ";")
    return FlatTree(tree.parent, tree.length / height, tree.tip_names)


def divergence_table(ranks, draws_per_fit: int) -> str:
    """Share of divergent draws per fit, from the per-data-set rows of the ranks table."""
    per_fit = ranks.groupby("dataset")["divergences"].first().to_numpy(dtype=float) / draws_per_fit
    n = per_fit.size
    # Monte Carlo se of the overall share across fits (fits are independent)
    se = per_fit.std(ddof=1) / np.sqrt(n) if n > 1 else float("nan")
    rows = [
        ("divergent share of all draws", f"{100 * per_fit.mean():.3f}% +- {100 * se:.3f}%"),
        ("median share per fit", f"{100 * np.median(per_fit):.3f}%"),
        ("largest share in one fit", f"{100 * per_fit.max():.3f}%"),
        ("fits with any divergence", f"{int((per_fit > 0).sum())} of {n}"),
        ("target", "under 0.1% of draws"),
    ]
    width = max(len(r[0]) for r in rows)
    return "Divergent draws (per fit of {} draws):\n".format(draws_per_fit) + "\n".join(
        f"  {a:<{width}}  {b}" for a, b in rows)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--model", choices=["correlated", "regression", "specimens"], default="correlated")
    p.add_argument("--evolution", choices=["bm", "lambda"], default="bm")
    p.add_argument("--measurement-error", choices=["se", "none"], default=None,
                   help="correlated and regression only (default se)")
    p.add_argument("--specimens", type=int, nargs=2, default=(3, 6), metavar=("LOW", "HIGH"))
    p.add_argument("--n-datasets", type=int, default=200)
    p.add_argument("--draws", type=int, default=500, help="posterior draws per chain")
    p.add_argument("--tune", type=int, default=500)
    p.add_argument("--chains", type=int, default=2)
    p.add_argument("--target-accept", type=float, default=0.95,
                   help="NUTS target acceptance (0.95 here: at 0.9 about 0.35%% of draws diverged)")
    p.add_argument("--species", type=int, default=50)
    p.add_argument("--rank-draws", type=int, default=99, help="L: thinned draws to rank among")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--out", type=Path, help="folder for ranks.csv, coverage.csv, uniformity.csv")
    args = p.parse_args(argv)

    tree = coalescent_tree(args.species, args.seed)
    opts = SamplingOptions(chains=args.chains, draws=args.draws, tune=args.tune, seed=args.seed, progress=False,
                           target_accept=args.target_accept)
    t0 = time.perf_counter()
    res = run_calibration(tree, args.n_datasets, model=args.model, evolution=args.evolution,
                          measurement_error=args.measurement_error, n_specimens=tuple(args.specimens),
                          n_rank_draws=args.rank_draws, options=opts, seed=args.seed,
                          progress=lambda m: print(m, file=sys.stderr, flush=True))
    print(res.to_text())
    print()
    print(divergence_table(res.ranks, res.settings["draws_per_fit"]))
    print(f"\nTotal {time.perf_counter() - t0:.0f} s (--model {args.model} --evolution {args.evolution}; "
          f"{args.n_datasets} data sets, {args.species} species, "
          f"{args.chains} chains x {args.draws} draws after {args.tune} tuning steps, "
          f"target_accept {args.target_accept:g}).")
    bad = res.coverage[~res.coverage.within_2se]
    if len(bad):
        print(f"{len(bad)} of {len(res.coverage)} coverages are more than 2 Monte Carlo se from nominal "
              "(about 5% are expected by chance alone).")
    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
        res.ranks.to_csv(args.out / "ranks.csv", index=False)
        res.coverage.to_csv(args.out / "coverage.csv", index=False)
        res.uniformity.to_csv(args.out / "uniformity.csv", index=False)
    return 0


if __name__ == "__main__":
    sys.exit(main())
