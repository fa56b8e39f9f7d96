"""Compile-cache benchmark (issue 16, part 1): how long until sampling starts.

For the demo model (models/demo_correlated.toml: correlated evolution of two traits,
measurement error from specimens, 80 species) every row runs in a NEW Python process,
as a user's ``cladewise fit`` would:

  uncached    nutpie.compile_pymc_model as before (CLADEWISE_COMPILE_CACHE=0)
  cold        empty cache: compile and store
  warm same   second process, same data
  warm other  second process, other trait values, specimen variances and branch lengths
              (same species, same structure)

Columns: cache status, compile seconds, sampling seconds (2 chains x 1000 tuning +
1000 draws), warm compile + sampling, minimum bulk ESS of the reported quantities and
minimum bulk ESS per second of sampling. Target: warm compile + sampling under 5 s.

With --first-run it instead measures the first demo fit on a fresh install (empty
numba, PyTensor and cladewise caches, issue 16 part 2) and lists the numba functions
that compiled, longest first (inclusive seconds; nested calls overlap).

Run:  python benchmarks/bench_compile.py [--cache-dir DIR] [--skip-uncached] [--first-run]
(uses a fresh temporary cache unless --cache-dir is given). Timings depend on the
machine's load; the table prints the 1-minute load average beside them.
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

ROOT = Path(__file__).resolve().parents[1]


def child(variant: str) -> None:
    import warnings

    warnings.filterwarnings("ignore")
    import numpy as np

    t0 = time.perf_counter()
    from cladewise.pipeline import prepare_analysis
    from cladewise.model.build import build_model
    from cladewise.inference.compile_cache import compile_cached
    from cladewise.inference.sampling import SamplingOptions, diagnose, sample

    prep = prepare_analysis(ROOT / "models" / "demo_correlated.toml")
    data = prep.model_data
    if variant == "other":
        import dataclasses

        rng = np.random.default_rng(11)
        data = dataclasses.replace(
            data,
            values=data.values * 1.1 + 0.2,
            sample_var=None if data.sample_var is None else data.sample_var * 1.3,
            tree=data.tree.with_lengths(data.tree.length * rng.uniform(0.5, 1.5, data.tree.length.size)),
        )
    built = build_model(data, prep.model_spec)
    t1 = time.perf_counter()
    info: dict = {}
    c1 = time.process_time()
    from numba.core import event

    with event.install_recorder("numba:compile") as rec:
        compiled = compile_cached(built.model, info=info)
    t2 = time.perf_counter()
    c2 = time.process_time()
    starts: dict = {}
    compiles: dict = {}
    for stamp, ev in rec.buffer:
        disp = ev.data["dispatcher"]
        name = f"{disp.py_func.__module__}.{disp.py_func.__qualname__}"
        if ev.is_start:
            starts[id(ev.data)] = stamp
        else:
            compiles[name] = compiles.get(name, 0.0) + stamp - starts.pop(id(ev.data), stamp)
    opts = SamplingOptions(chains=2, draws=1000, tune=1000, seed=1, progress=False)
    idata = sample(built, opts, compiled=compiled)
    t3 = time.perf_counter()
    d = diagnose(idata, built.summary_vars)
    print("RESULT" + json.dumps({
        "status": info.get("status"), "setup_s": t1 - t0, "compile_s": t2 - t1, "compile_cpu_s": c2 - c1,
        "sample_s": t3 - t2, "min_ess_bulk": d.min_ess_bulk,
        "load": os.getloadavg()[0], "import_build_s": t1 - t0,
        "numba_compiles": sorted(compiles.items(), key=lambda kv: -kv[1]),
    }))


def run(variant: str, cache: Path, enabled: bool = True, fresh: bool = False) -> dict:
    env = dict(os.environ, CLADEWISE_CACHE_DIR=str(cache), PYTHONWARNINGS="ignore")
    if fresh:  # every compiler cache empty, as on a new install
        env["NUMBA_CACHE_DIR"] = str(cache / "numba")
        env["PYTENSOR_FLAGS"] = f"base_compiledir={cache / 'pytensor'}"
        env["PYTHONDONTWRITEBYTECODE"] = "1"
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT / "src"), env.get("PYTHONPATH")]))
    if not enabled:
        env["CLADEWISE_COMPILE_CACHE"] = "0"
    out = subprocess.run([sys.executable, __file__, "--child", variant], env=env,
                         capture_output=True, text=True)
    if out.returncode != 0:
        raise SystemExit(out.stderr[-4000:])
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT")][-1]
    return json.loads(line[len("RESULT"):])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cache-dir", type=Path, default=None)
    ap.add_argument("--skip-uncached", action="store_true")
    ap.add_argument("--first-run", action="store_true")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child)
        return
    tmp = None
    if args.cache_dir is None:
        tmp = tempfile.TemporaryDirectory(prefix="cladewise-bench-")
        cache = Path(tmp.name)
    else:
        cache = args.cache_dir
    if args.first_run:
        first_run(cache)
        if tmp is not None:
            tmp.cleanup()
        return
    rows = []
    if not args.skip_uncached:
        rows.append(("uncached", run("same", cache, enabled=False)))
    rows.append(("cold", run("same", cache)))
    rows.append(("warm same", run("same", cache)))
    rows.append(("warm other", run("other", cache)))

    head = f"{'run (new process)':<18}{'status':>9}{'compile s':>11}{'(cpu s)':>9}{'sample s':>10}" \
           f"{'compile+sample':>16}{'min ESS':>9}{'ESS/s':>8}{'load':>6}"
    print("Demo model (demo_correlated.toml), 2 chains x (1000 tune + 1000 draws)")
    print(head)
    print("-" * len(head))
    for name, r in rows:
        both = r["compile_s"] + r["sample_s"]
        print(f"{name:<18}{r['status']:>9}{r['compile_s']:>11.2f}{r['compile_cpu_s']:>9.2f}{r['sample_s']:>10.2f}{both:>16.2f}"
              f"{r['min_ess_bulk']:>9.0f}{r['min_ess_bulk'] / r['sample_s']:>8.0f}{r['load']:>6.1f}")
    warm = [r for name, r in rows if name.startswith("warm")]
    best = min(r["compile_s"] + r["sample_s"] for r in warm)
    print(f"\nwarm compile + sampling: {best:.2f} s (target < 5 s): {'met' if best < 5 else 'NOT met'}")
    print("compile (cpu s) is the process's CPU time while compiling: wall time on an idle machine "
          "is about that; 'load' is the 1-minute load average (2 cores here)")
    if tmp is not None:
        tmp.cleanup()


def first_run(cache: Path) -> None:
    r = run("same", cache, fresh=True)
    print("First demo fit with empty numba, PyTensor and cladewise caches (new install)")
    print(f"imports + data + model build {r['import_build_s']:.1f} s, compile {r['compile_s']:.1f} s "
          f"({r['status']}), sampling {r['sample_s']:.1f} s, load average {r['load']:.1f}")
    print(f"\n{'numba function compiled (inclusive s)':<78}{'s':>8}")
    for name, secs in r["numba_compiles"][:25]:
        print(f"{name[-78:]:<78}{secs:>8.1f}")
    r2 = run("same", cache, fresh=True)
    print(f"\nsecond process, same caches: compile {r2['compile_s']:.1f} s ({r2['status']}), "
          f"sampling {r2['sample_s']:.1f} s")


if __name__ == "__main__":
    main()
