"""Time reading and flattening a large Newick tree (covariance not included).

Generates a random 50,000-tip tree (fixed seed), writes it to a temporary file and
times: the syntax scan, the ete3 parse, the flattening into a FlatTree, the whole
``read_trees`` call, and the tree operations used on the way to a model.

Run:  /work/venv/bin/python benchmarks/bench_read_tree.py [n_tips]
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from cladewise.data import treefiles as F
from cladewise.data import trees as T


def random_newick(n: int, seed: int = 1) -> str:
    rng = np.random.default_rng(seed)
    nodes = [f"sp{i}:{rng.uniform(0.01, 1):.5f}" for i in range(n)]
    while len(nodes) > 1:
        i, j = rng.choice(len(nodes), 2, replace=False)
        a, b = nodes[i], nodes[j]
        for k in sorted((i, j), reverse=True):
            nodes[k] = nodes[-1]
            nodes.pop()
        nodes.append(f"({a},{b}):{rng.uniform(0.01, 1):.5f}")
    return nodes[0][: nodes[0].rindex(":")] + ";"


def timed(f, *args):
    t0 = time.perf_counter()
    out = f(*args)
    return out, time.perf_counter() - t0


def main() -> None:
    import ete3

    n = int(sys.argv[1]) if len(sys.argv) > 1 else 50_000
    text = random_newick(n)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "big.nwk"
        path.write_text(text)
        rows = []
        chunks, t = timed(F._scan_newick, text, "big.nwk")
        rows.append(("scan (checks, positions)", t))
        et, t = timed(lambda: ete3.Tree(chunks[0].text, format=1, quoted_node_names=True))
        rows.append(("ete3 parse", t))
        tree, t = timed(F._from_ete, et, chunks[0])
        rows.append(("flatten to FlatTree", t))
        trees, t = timed(F.read_trees, path)
        rows.append(("read_trees total", t))
        tree = trees[0]
        _, t = timed(T.describe_tree, tree)
        rows.append(("describe_tree", t))
        keep = list(tree.tip_names[::2])
        pruned, t = timed(T.prune_to, tree, keep)
        rows.append(("prune_to half the tips", t))
        _, t = timed(T.order_tips, pruned, sorted(keep))
        rows.append(("order_tips", t))
        _, t = timed(F.format_newick, tree)
        rows.append(("format_newick", t))
    print(f"{n} tips, {len(text) / 1e6:.1f} MB of Newick")
    print(f"{'step':<28} {'seconds':>8}")
    for name, t in rows:
        print(f"{name:<28} {t:>8.3f}")


if __name__ == "__main__":
    main()
