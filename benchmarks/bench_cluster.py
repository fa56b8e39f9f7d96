"""Many small fits on a dask cluster started outside cladewise (issue 17).

Starts ``dask scheduler`` and ``--workers`` ``dask worker`` processes (one thread
each, each with its own empty compile cache, so each worker compiles the model once),
then runs a grid of ``--fits`` fits of the demo correlated model (invented Vadicola
data) that differ only in their seed, with ``cladewise grid --scheduler``. Prints the
wall time against the serial reference ``fits x one fit + workers x one compile``
measured in this process (one fit: sampling plus the post-processing every fit
does: log-likelihood, predictive draws, summary; one compile: nutpie compile with an
empty cache). Target of issue 17: wall time within 1.3 x the reference.

    python benchmarks/bench_cluster.py [--fits 100] [--workers 2] [--draws 200]
        [--spec models/demo_correlated.toml] [--shared-cache]

``--shared-cache``: the workers share the compile cache this process has just
filled, as workers with one ``CLADEWISE_CACHE_DIR`` on a shared file system do; each
worker then loads the model once instead of compiling it (the reference still counts
``workers x one compile``).

The machine's load matters: the reference is measured just before the grid, on the
same machine.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "src"))


def _dask() -> list[str]:
    exe = Path(sys.executable).parent / "dask"
    return [str(exe)] if exe.is_file() else [sys.executable, "-m", "dask"]


def reference(spec: Path, sampling: dict, n_repeat: int = 3) -> tuple[float, float]:
    """(seconds of one nutpie compile with an empty cache, mean seconds of one fit)."""
    from cladewise.inference import sampling as smp
    from cladewise.inference.compile_cache import compile_cached
    from cladewise.inference.fit import finish_fit
    from cladewise.model.build import build_model
    from cladewise.pipeline import prepare_analysis

    prep = prepare_analysis(spec, progress=False, **sampling)
    built = build_model(prep.model_data, prep.model_spec)
    info: dict = {}
    t0 = time.perf_counter()
    compiled = compile_cached(built.model, info=info)
    t_compile = time.perf_counter() - t0
    assert info.get("status") in ("miss", "uncached"), info
    times = []
    for s in range(n_repeat):
        o = dataclasses.replace(prep.options, seed=1000 + s, progress=False)
        t0 = time.perf_counter()
        idata = smp.sample(built, o, compiled=compiled)
        finish_fit(built, idata, o)
        times.append(time.perf_counter() - t0)
    return t_compile, sum(times) / len(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--fits", type=int, default=100)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--draws", type=int, default=200)
    ap.add_argument("--tune", type=int, default=200)
    ap.add_argument("--spec", default="models/demo_correlated.toml", help="a demo spec (path from the repository)")
    ap.add_argument("--shared-cache", action="store_true", help="workers share this process's compile cache")
    args = ap.parse_args()
    spec = (REPO / args.spec).resolve()
    sampling = {"chains": args.chains, "draws": args.draws, "tune": args.tune}
    home = Path(tempfile.mkdtemp(prefix="cladewise-bench-cluster-"))
    os.environ["CLADEWISE_CACHE_DIR"] = str(home / "cache-reference")
    t_compile, t_fit = reference(spec, sampling)
    print(f"reference in this process: compile {t_compile:.1f} s, one fit {t_fit:.2f} s", flush=True)

    env = {**os.environ, "PYTHONPATH": str(REPO / "src")}
    procs = []
    # a stopped benchmark stops its scheduler and workers too
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(1))
    try:
        sched = home / "scheduler.json"
        procs.append(subprocess.Popen(_dask() + ["scheduler", "--port", "0", "--no-dashboard",
                                                 "--scheduler-file", str(sched)],
                                      cwd=home, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                      start_new_session=True))
        while not sched.is_file():
            time.sleep(0.2)
        address = json.loads(sched.read_text())["address"]
        for i in range(args.workers):
            w = home / f"worker{i}"
            w.mkdir()
            # own empty cache: each worker compiles once; or the one this process filled
            wenv = {**env, "CLADEWISE_CACHE_DIR": str(home / "cache-reference" if args.shared_cache else w / "cache")}
            procs.append(subprocess.Popen(_dask() + ["worker", address, "--nworkers", "1", "--nthreads", "1",
                                                     "--no-dashboard", "--local-directory", str(w)],
                                          cwd=w, env=wenv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                          start_new_session=True))
        from dask.distributed import Client

        with Client(address) as c:
            c.wait_for_workers(args.workers, timeout=300)
        grid = home / "grid.toml"
        grid.write_text("".join(
            f"[[fit]]\nname = \"seed{i:03d}\"\nspec = \"{spec}\"\n"
            f"sampling = {{ seed = {i + 1}, chains = {args.chains}, draws = {args.draws}, tune = {args.tune} }}\n"
            for i in range(args.fits)))
        from cladewise.studies.grid import run_grid

        t0 = time.perf_counter()
        table = run_grid(grid, home / "out", scheduler=address, echo=lambda s: None)
        wall = time.perf_counter() - t0
    finally:
        for p in reversed(procs):
            if p.poll() is None:
                os.killpg(p.pid, signal.SIGTERM)
                p.wait(timeout=30)
    n_done = int((table["status"] == "done").sum())
    ref = args.fits * t_fit + args.workers * t_compile
    compiled = sum(1 for i in range(args.workers) if any((home / f"worker{i}" / "cache" / "compiled").glob("*/meta.json")))
    print()
    print(f"{'fits':>5} {'workers':>7} {'compile s':>9} {'fit s':>6} {'reference s':>11} {'wall s':>7} "
          f"{'wall/ref':>8} {'wall/(fits x fit)':>17} {'done':>5} {'per-fit s (median)':>18}")
    print(f"{args.fits:>5} {args.workers:>7} {t_compile:>9.1f} {t_fit:>6.2f} {ref:>11.1f} {wall:>7.1f} "
          f"{wall / ref:>8.2f} {wall / (args.fits * t_fit):>17.2f} {n_done:>5} {table['seconds'].median():>18.2f}")
    print(f"\nspec {args.spec}, {args.chains} chains x {args.draws} draws (+{args.tune} tuning). "
          f"reference = fits x one fit + workers x one compile (serial, in this process); "
          f"target wall/ref <= 1.3. "
          + ("Workers shared this process's compile cache (each loaded the model once). " if args.shared_cache else
             f"Workers that compiled into their own cache: {compiled}/{args.workers}. ") +
          f"Machine: {os.cpu_count()} CPUs, load {os.getloadavg()[0]:.1f}.")
    shutil.rmtree(home, ignore_errors=True)


if __name__ == "__main__":
    main()
