"""Power and false-positive rate of the correlated model against a Pearson test.

Two trees of the same size: a coalescent-shaped random tree, and a tree of two deep
clades with long stems and short tips, where traits that evolve independently look
correlated to a test that ignores the tree (Felsenstein 1985, Am. Nat. 125:1-15).
For each, ``run_power_study`` simulates data at true evolutionary correlations
0, 0.2, 0.4, 0.6 (rates 1, known standard errors 0.1) and reports the share of fits
whose 95% HDI of the correlation excludes 0, beside the share of Pearson p < 0.05.

Run:  /work/venv/bin/python benchmarks/bench_power.py [--n-datasets 40] [--species 40]
      [--tree coalescent|two_clades|both] [--out DIR]
One compile (about 40-90 s) per tree, then about 1-2 s per fit.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from cladewise.report.study_figures import save_power_figure
from cladewise.studies.power import run_power_study
from cladewise.inference.sampling import SamplingOptions
from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import parse_newick

sys.path.insert(0, str(Path(__file__).parent))
from bench_calibration import coalescent_tree  # noqa: E402


def _clade(names: list[str], height: float) -> str:
    if len(names) == 1:
        return names[0]
    half = len(names) // 2
    child = 0.6 * height
    parts = [f"{_clade(s, child)}:{(height - child) if len(s) > 1 else height:.6g}"
             for s in (names[:half], names[half:])]
    return "(" + ",".join(parts) + ")"


def two_clade_tree(n: int) -> FlatTree:
    """Two clades of n/2 species: stems of length 1, crowns of age 0.1."""
    m = n // 2
    a = _clade([f"a{i}" for i in range(m)], 0.1)
    b = _clade([f"b{i}" for i in range(n - m)], 0.1)
    return parse_newick(f"({a}:1,{b}:1);")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n-datasets", type=int, default=40)
    p.add_argument("--species", type=int, default=40)
    p.add_argument("--tree", choices=["coalescent", "two_clades", "both"], default="both")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--out", type=Path, help="parent folder; writes <tree>/power_table.csv, figures, ...")
    args = p.parse_args(argv)
    trees = {"coalescent": lambda: coalescent_tree(args.species, args.seed),
             "two_clades": lambda: two_clade_tree(args.species)}
    names = list(trees) if args.tree == "both" else [args.tree]
    for name in names:
        t0 = time.perf_counter()
        res = run_power_study(
            trees[name](), n_datasets=args.n_datasets, rates=[1.0, 1.0], se=0.1, seed=args.seed,
            options=SamplingOptions(chains=2, draws=500, tune=500, progress=False),
            progress=lambda m: print(m, file=sys.stderr, flush=True),
        )
        print(f"== tree: {name}")
        print(res.to_text())
        print(f"({time.perf_counter() - t0:.0f} s)\n")
        if args.out:
            res.save(args.out / name, overwrite=True)
            save_power_figure(res, args.out / name)
    return 0


if __name__ == "__main__":
    sys.exit(main())
