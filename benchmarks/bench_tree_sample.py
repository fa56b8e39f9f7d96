"""Cost of fitting over a tree sample against fitting each tree on its own.

Runs the demo correlated model (models/demo_correlated.toml, invented data) once on
the reference tree (build, compile, sample, post-process) and then over N trees of
the demo's 100-tree sample with one compile (cladewise.inference.treesample.fit_tree_sample).
Prints the wall times, the compile share of each and the ratios

    tree run / (N x single-tree fit)                 (what compiling once saves)
    tree run / (N x single-tree sampling + compile)  (target: <= 1, up to post-processing)

Usage::

    /work/venv/bin/python benchmarks/bench_tree_sample.py --n-trees 20
    /work/venv/bin/python benchmarks/bench_tree_sample.py            # all 100 trees
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from cladewise.pipeline import prepare_analysis
from cladewise.model.build import build_model
from cladewise.inference.fit import finish_fit
from cladewise.inference.sampling import compile_model, sample
from cladewise.inference.pooled import fit_tree_sample

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n-trees", type=int, default=100, help="trees of the sample to fit (default 100)")
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--draws", type=int, default=300)
    ap.add_argument("--tune", type=int, default=300)
    ap.add_argument("--spec", default=str(ROOT / "models" / "demo_correlated.toml"))
    args = ap.parse_args()

    prep = prepare_analysis(args.spec, chains=args.chains, draws=args.draws, tune=args.tune, progress=False)
    trees = prep.match.trees
    print(f"spec {Path(args.spec).name}: {len(prep.model_data.species)} species, sample of {len(trees)} trees; "
          f"{args.chains} chains x {args.draws} draws (+{args.tune} tuning) per tree")

    # --- one tree, the ordinary way
    t = time.perf_counter()
    built = build_model(prep.model_data, prep.model_spec)
    t_build = time.perf_counter() - t
    t = time.perf_counter()
    compiled = compile_model(built)
    t_compile = time.perf_counter() - t
    t = time.perf_counter()
    idata = sample(built, prep.options, compiled=compiled)
    t_sample = time.perf_counter() - t
    t = time.perf_counter()
    finish_fit(built, idata, prep.options)
    t_post = time.perf_counter() - t
    single = t_build + t_compile + t_sample + t_post
    print(f"single tree: total {single:.1f} s = build {t_build:.1f} + compile {t_compile:.1f} + "
          f"sample {t_sample:.1f} + post-process {t_post:.1f} (compile share {t_compile / single:.0%})")

    # --- the sample, compiled once
    n = args.n_trees
    t = time.perf_counter()
    res = fit_tree_sample(prep.model_data, prep.model_spec, trees, prep.options,
                          n_trees=None if n == len(trees) else n, progress=False)
    total = time.perf_counter() - t
    tm = res.info["timing"]
    pool = total - tm["build"] - tm["compile"] - tm["sample_total"] - tm["postprocess_total"]
    print(f"{n} trees: total {total:.1f} s = build {tm['build']:.1f} + compile {tm['compile']:.1f} + "
          f"sample {tm['sample_total']:.1f} + post-process {tm['postprocess_total']:.1f} + pooling {pool:.1f} "
          f"(compile share {tm['compile'] / total:.1%})")
    per = tm["sample_per_tree"]
    print(f"sampling per tree: mean {sum(per) / len(per):.2f} s, min {min(per):.2f}, max {max(per):.2f} "
          f"(single-tree run: {t_sample:.2f} s)")
    print(f"ratio tree run / ({n} x single-tree fit)                    = {total / (n * single):.3f}")
    target = n * t_sample + t_compile
    print(f"ratio tree run / ({n} x single-tree sampling + one compile) = {total / target:.3f}"
          f"  (target <= 1; post-processing {tm['postprocess_total']:.1f} s is extra work both ways)")
    print(f"pooled: {res.idata.posterior.sizes['chain']} chains x {res.idata.posterior.sizes['draw']} draws; "
          f"worst within-tree R-hat {res.diagnostics.max_rhat:.3f}")
    vs = res.variance_share[["quantity", "tree_share"]]
    print("share of posterior variance due to the tree:")
    print(vs.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    for w in res.warnings:
        print("warning:", w)


if __name__ == "__main__":
    main()
