"""Where a user's time goes, step by step, from files to report (issue: speed).

One table. Each case runs the whole path of ``cladewise fit`` + ``cladewise report``
in a fresh process with a fresh compile cache (``CLADEWISE_CACHE_DIR`` in a temporary
folder): read files and match (``read``), build the model and check the start
(``build``), compile for nutpie (``cold compile``), sample, postprocess (pointwise
log-likelihood, posterior predictive, summaries), save the fit folder, write the
report. A second fresh process then builds and compiles the same model again with
the cache the first one left (``warm compile``). Peak memory is the first process's
peak resident set (VmHWM). ``ESS/s`` is the minimum bulk ESS over the reported
quantities divided by the sampling time.

Cases: the demo model (models/demo_correlated.toml, 82 invented species,
measurement error from specimens); invented data on random trees for N = 1,000,
10,000, 100,000 species (k = 2, correlated BM, Pagel's lambda, known standard
errors); k = 4 at N = 10,000. Trees are random coalescent-like, scaled to height 1.

Run:  python benchmarks/bench_speed.py [--cases demo n1000 n10000 n100000 k4]
      [--chains 4 --draws 1000 --tune 1000] [--compile-only]
``--compile-only`` fills the columns up to the warm compile (minutes instead of hours).
The numba engine cache of the checkout is used as it is; the first run on a fresh
install (empty numba cache too) is measured by ``benchmarks/bench_compile.py --first-run``.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
CASES = {
    "demo": ("demo", 82, 2),
    "n1000": ("lambda+se", 1000, 2),
    "n10000": ("lambda+se", 10_000, 2),
    "n100000": ("lambda+se", 100_000, 2),
    "k4": ("lambda+se", 10_000, 4),
}
STEPS = ("read", "build", "compile", "sample", "postprocess", "save", "report")


# --------------------------------------------------------------------------- data
def random_tree_linear(n: int, rng: np.random.Generator):
    """Coalescent-like random tree in O(n): join two random lineages at a time."""
    from cladewise.data.trees import FlatTree

    parent = np.full(2 * n - 1, -1)
    height = np.zeros(2 * n - 1)
    active = np.arange(n)
    m = n
    node = n
    t = 0.0
    while m > 1:
        t += rng.exponential(1.0 / (m * (m - 1) / 2))
        # move two random lineages to the end, join them, keep the new node in their place
        a = rng.integers(m)
        active[a], active[m - 1] = active[m - 1], active[a]
        b = rng.integers(m - 1)
        active[b], active[m - 2] = active[m - 2], active[b]
        parent[active[m - 1]] = parent[active[m - 2]] = node
        height[node] = t
        active[m - 2] = node
        m -= 1
        node += 1
    length = np.zeros(2 * n - 1)
    length[:-1] = height[parent[:-1]] - height[:-1]
    length /= height[-1]
    return FlatTree(parent, length, tuple(f"sp{i:06d}" for i in range(n)))


def write_case(folder: Path, n: int, k: int, seed: int = 1) -> Path:
    """Tree, trait table with standard errors and a spec for one invented case."""
    from cladewise.data.treefiles import format_newick
    from cladewise.model.evolution import transformed_lengths
    from cladewise.model.simulate import simulate_traits

    rng = np.random.default_rng(seed)
    tree = random_tree_linear(n, rng)
    traits = [f"t{j}" for j in range(k)]
    R = 0.2 * (0.5 * np.eye(k) + 0.5)
    lam = transformed_lengths(tree, "lambda", lam=0.8)
    x = simulate_traits(tree, R, np.zeros(k), lengths=lam, rng=rng)
    se = np.full((n, k), 0.1)
    y = x + rng.standard_normal((n, k)) * se
    (folder / "tree.nwk").write_text(format_newick(tree))
    cols = ",".join(traits + [f"{t}_se" for t in traits])
    rows = "\n".join(f"{name}," + ",".join(f"{v:.6g}" for v in np.r_[y[i], se[i]])
                     for i, name in enumerate(tree.tip_names))
    (folder / "traits.csv").write_text(f"species,{cols}\n{rows}\n")
    (folder / "spec.toml").write_text(
        '[data]\ntree = "tree.nwk"\ntraits = "traits.csv"\n\n'
        f'[model]\nkind = "correlated"\ntraits = {json.dumps(traits)}\n'
        'evolution = "lambda"\nmeasurement_error = "se"\n'
    )
    return folder / "spec.toml"


# --------------------------------------------------------------------------- worker
def _peak_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def worker(spec: str, out: str, chains: int, draws: int, tune: int, compile_only: bool) -> dict:
    from cladewise.inference.compile_cache import compile_cached
    from cladewise.inference.fit import finish_fit
    from cladewise.inference.sampling import SamplingOptions, diagnose, sample
    from cladewise.inference.startcheck import check_starting_point
    from cladewise.model.build import build_model
    from cladewise.pipeline import prepare_analysis
    from cladewise.report import write_fit_report

    times: dict[str, float] = {}

    def done(step: str) -> None:  # progress on stderr: a long run shows where it is
        print(f"  [{Path(spec).parent.name}] {step}: {times[step]:.3g} s, peak {_peak_mb():.0f} MB",
              file=sys.stderr, flush=True)

    t = time.perf_counter()
    prep = prepare_analysis(spec, chains=chains, draws=draws, tune=tune, seed=1, progress=False)
    times["read"] = time.perf_counter() - t
    done("read")
    t = time.perf_counter()
    built = build_model(prep.model_data, prep.model_spec)
    check_starting_point(built)
    times["build"] = time.perf_counter() - t
    done("build")
    t = time.perf_counter()
    compiled = compile_cached(built.model)
    times["compile"] = time.perf_counter() - t
    done("compile")
    if compile_only:
        return {"times": times, "peak_mb": _peak_mb()}
    opts: SamplingOptions = prep.options
    t = time.perf_counter()
    idata = sample(built, opts, compiled=compiled)
    times["sample"] = time.perf_counter() - t
    done("sample")
    t = time.perf_counter()
    result = finish_fit(built, idata, opts)
    times["postprocess"] = time.perf_counter() - t
    done("postprocess")
    t = time.perf_counter()
    result.save(out, overwrite=True, inputs=prep.input_paths)
    times["save"] = time.perf_counter() - t
    done("save")
    t = time.perf_counter()
    write_fit_report(out)
    times["report"] = time.perf_counter() - t
    done("report")
    d = diagnose(result.idata, built.summary_vars)
    return {"times": times, "peak_mb": _peak_mb(), "min_ess_bulk": d.min_ess_bulk,
            "divergences": d.divergences, "max_rhat": d.max_rhat}


def run_worker(spec: Path, out: Path, cache: Path, a, compile_only: bool) -> dict:
    env = {**os.environ, "CLADEWISE_CACHE_DIR": str(cache),
           "PYTHONPATH": str(ROOT / "src") + os.pathsep + os.environ.get("PYTHONPATH", "")}
    cmd = [sys.executable, __file__, "--worker", str(spec), "--out", str(out), "--chains", str(a.chains),
           "--draws", str(a.draws), "--tune", str(a.tune)] + (["--compile-only"] if compile_only else [])
    t = time.perf_counter()
    proc = subprocess.run(cmd, env=env, stdout=subprocess.PIPE, text=True)
    wall = time.perf_counter() - t
    if proc.returncode != 0:
        raise RuntimeError(f"worker failed with status {proc.returncode} (its messages are above)")
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    res["wall"] = wall
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", nargs="+", default=list(CASES), choices=list(CASES))
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--tune", type=int, default=1000)
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--out", help=argparse.SUPPRESS)
    ap.add_argument("--compile-only", action="store_true",
                    help="measure read, build, cold and warm compile only (no sampling)")
    a = ap.parse_args()
    if a.worker:
        res = worker(a.worker, a.out, a.chains, a.draws, a.tune, a.compile_only)
        print(json.dumps(res))
        return
    cols = ["case", "N", "k", "read", "build", "cold compile", "warm compile", "sample", "postprocess",
            "save", "report", "peak MB", "min ESS/s"]
    print(f"chains x draws (tune): {a.chains} x {a.draws} ({a.tune}); times in seconds", flush=True)
    print(" ".join(f"{c:>12}" for c in cols), flush=True)
    for name in a.cases:
        kind, n, k = CASES[name]
        with tempfile.TemporaryDirectory() as tmp:
            tmp = Path(tmp)
            if kind == "demo":
                spec = ROOT / "models" / "demo_correlated.toml"
            else:
                spec = write_case(tmp, n, k)
            cache = tmp / "cache"
            cold = run_worker(spec, tmp / "fit", cache, a, compile_only=a.compile_only)
            warm = run_worker(spec, tmp / "fit2", cache, a, compile_only=True)
        t = cold["times"]
        ess_s = cold["min_ess_bulk"] / t["sample"] if "sample" in t else "-"
        vals = [name, n, k, t["read"], t["build"], t["compile"], warm["times"]["compile"],
                *(t.get(s, "-") for s in STEPS[3:]), cold["peak_mb"], ess_s]
        print(" ".join(f"{v:>12.3g}" if isinstance(v, float) else f"{v!s:>12}" for v in vals), flush=True)


if __name__ == "__main__":
    main()
