"""Value + gradient of the tree likelihood per trait count: general kernels vs per-k entry points.

Invented data: random bifurcating tree (``cladewise.engine.testing.random_tree``),
measurement error on every cell, 5% missing cells, a random well-conditioned R.
For each k the general kernels (``kernels.value_and_grad_regimes_kernel``, which run
the k = 1, k = 2 closed forms or the general O(k^3) passes) and the entry point a
model uses (``entries.kernel_for("value_and_grad", k)``: the same closed forms for
k = 1, 2, the generated straight-line kernels ``kernels_k3`` ... ``kernels_k6`` for
k = 3..6) are timed, best of several calls, after compiling.

"first compile" is the time numba takes to compile the per-k value-and-gradient entry
point in a fresh process with an empty cache (``NUMBA_CACHE_DIR`` set to a new
temporary folder): what a fit with k traits waits for on a fresh install.

Run:  PYTHONPATH=src python benchmarks/bench_engine_k.py [--n 10000] [--ks 2 3 4 5 6]
      [--no-compile]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

from cladewise.engine import entries, kernels
from cladewise.engine.testing import random_rate_matrix, random_tree


def problem(n: int, k: int, seed: int = 0) -> tuple:
    rng = np.random.default_rng(seed)
    parent, lengths = random_tree(n, rng)
    R = random_rate_matrix(k, rng)[None].copy()
    err = np.zeros((n, k, k))
    idx = np.arange(k)
    err[:, idx, idx] = rng.uniform(0.01, 0.2, (n, k))
    observed = rng.random((n, k)) > 0.05
    y = np.where(observed, rng.normal(size=(n, k)), 0.0)
    regime = np.zeros(parent.shape[0], np.int64)
    return (np.ascontiguousarray(parent, np.int64), lengths, y, observed, R, regime,
            np.zeros((k, k)), err, np.zeros(k))


def best_ms(fn, args, reps: int) -> float:
    fn(*args)  # compile or load
    best = np.inf
    for _ in range(reps):
        t = time.perf_counter()
        fn(*args)
        best = min(best, time.perf_counter() - t)
    return 1e3 * best


_COMPILE = """
import time
from cladewise.engine import entries
from bench_engine_k import problem
fn, extra = entries.kernel_for("value_and_grad", {k})
args = problem(20, {k})
t = time.perf_counter()
fn(*args, *extra)
print(time.perf_counter() - t)
"""


def first_compile_s(k: int) -> float:
    """Seconds to compile the per-k value-and-gradient entry point with an empty cache."""
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        env["PYTHONPATH"] = os.pathsep.join(
            [os.path.dirname(os.path.abspath(__file__))] + sys.path)
        out = subprocess.run([sys.executable, "-c", _COMPILE.format(k=k)], env=env,
                             capture_output=True, text=True, check=True)
    return float(out.stdout.split()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--ks", type=int, nargs="+", default=[2, 3, 4, 5, 6])
    ap.add_argument("--reps", type=int, default=20)
    ap.add_argument("--no-compile", action="store_true", help="skip the first-compile column")
    a = ap.parse_args()
    print(f"value + gradient at {a.n} tips, best of {a.reps} (ms); first compile of the "
          "per-k entry point with an empty numba cache (s)")
    print(f"{'k':>3} {'general':>10} {'per-k entry':>12} {'speed-up':>9} {'ns/node':>8} "
          f"{'compile':>8}  path")
    for k in a.ks:
        args = problem(a.n, k)
        fn, extra = entries.kernel_for("value_and_grad", k)
        g = best_ms(kernels.value_and_grad_regimes_kernel, args, a.reps)
        e = best_ms(lambda *x: fn(*x, *extra), args, a.reps)
        per_node = 1e6 * e / args[0].shape[0]
        comp = "-" if a.no_compile else f"{first_compile_s(k):.1f}"
        print(f"{k:>3} {g:>10.3f} {e:>12.3f} {g / e:>9.1f} {per_node:>8.0f} {comp:>8}  "
              f"{entries.path_name(k)}", flush=True)


if __name__ == "__main__":
    main()
