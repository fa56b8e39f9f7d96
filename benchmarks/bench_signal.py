"""Time Blomberg's K and its permutation p-value on large random trees.

For each tree size: one K (the pruning pass, no N x N matrix), K with 999
permutations, and the memory peak of the permutation run (tracemalloc, numpy
arrays only). The dense formula would need an N x N matrix (800 MB at 10,000 tips).
The first row includes numba's compile (cached afterwards).

Run:  /work/venv/bin/python benchmarks/bench_signal.py [n_tips ...]
"""

from __future__ import annotations

import sys
import time
import tracemalloc

import numpy as np

from cladewise.data.trees import FlatTree
from cladewise.evaluation.blomberg import blomberg_k


def random_tree(n: int, seed: int = 1) -> FlatTree:
    """Random joins of two lineages, random branch lengths in [0.01, 1]."""
    rng = np.random.default_rng(seed)
    active = list(range(n))
    parent = np.full(2 * n - 1, -1)
    for node in range(n, 2 * n - 1):
        for _ in range(2):
            j = int(rng.integers(len(active)))
            active[j], active[-1] = active[-1], active[j]
            parent[active.pop()] = node
        active.append(node)
    length = rng.uniform(0.01, 1.0, 2 * n - 1)
    length[-1] = 0.0
    return FlatTree(parent, length, tuple(f"sp{i}" for i in range(n)))


def main(sizes: list[int]) -> None:
    blomberg_k(random_tree(10), np.arange(10.0), permutations=9)  # compile (or load the cache)
    print(f"{'tips':>8} {'K (s)':>8} {'K + 999 perm. (s)':>18} {'peak MB':>8} {'K':>7} {'p':>6}")
    for n in sizes:
        tree = random_tree(n)
        y = np.random.default_rng(2).normal(size=n)
        t0 = time.perf_counter()
        blomberg_k(tree, y, permutations=0)
        t1 = time.perf_counter()
        tracemalloc.start()
        res = blomberg_k(tree, y, permutations=999, seed=1)
        peak = tracemalloc.get_traced_memory()[1] / 1e6
        tracemalloc.stop()
        t2 = time.perf_counter()
        print(f"{n:>8} {t1 - t0:>8.3f} {t2 - t1:>18.2f} {peak:>8.1f} {res.k:>7.3f} {res.p_value:>6.3f}")


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [1_000, 10_000, 50_000])
