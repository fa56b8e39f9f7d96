"""Many fits at once: a grid of (spec, tree sample) jobs run through dask.distributed.

Grid file (TOML; every path is relative to the grid file)::

    # optional: [sampling] overrides applied to every fit (chains, draws, tune,
    # seed, sampler, target_accept)
    [sampling]
    draws = 500
    tune = 500

    # one fit per [[fit]] table
    [[fit]]
    name = "bm_20_trees"          # output folder under --out; default: spec file stem,
                                  # plus "__<trees file stem>" and "__<n>trees" when given
    spec = "models/demo_correlated.toml"
    trees = "data/sample.nex"     # optional: fit over this tree sample (pooled)
    n_trees = 20                  # optional: a seeded random subset of the sample
                                  # (the spec's own [data] trees when `trees` is absent)
    sampling = { seed = 3 }       # optional: overrides for this fit only

    # every spec x every tree file (names built as above)
    [[cross]]
    specs = ["models/a.toml", "models/b.toml"]
    trees = ["data/s1.nex", "data/s2.nex"]   # optional; absent: each spec's own tree
    n_trees = 10                             # optional
    sampling = { draws = 300 }               # optional

Every fit runs through :func:`cladewise.pipeline.fit_from_spec`, as ``cladewise
fit`` does: a fit without ``trees`` and ``n_trees`` is a single-tree fit, with either
it pools over the tree sample.

Each fit writes its own folder ``OUT/<name>`` atomically
(:func:`cladewise.inference.results.atomic_write`: staged in a hidden
``.<name>.partial-*`` sibling, then swapped in). A grid that is stopped and started
again resumes: folders with a valid ``summary.json`` and ``posterior.nc`` are
skipped (never rewritten; delete one to refit it), leftover partial folders are
deleted and their fits redone. One grid run per output folder at a time (a lock
file ``OUT/.grid.lock`` holds the running process id).

The default cluster is a dask ``LocalCluster`` on this machine (2 worker processes,
1 thread each); ``scheduler`` sends the fits to an existing dask scheduler whose
workers can import cladewise and read the same files.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import time
import tomllib
import uuid
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import pandas as pd

from cladewise.errors import InputError
from cladewise.inference.results import atomic_write, check_output_folder, is_cladewise_output, write_marker

__all__ = ["GridJob", "load_grid", "is_finished", "run_job", "run_grid", "format_status", "LOCK_NAME", "STATUS_NAME"]

LOCK_NAME = ".grid.lock"
STATUS_NAME = "grid_status.csv"
_NAME_OK = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")
_FIT_KEYS = {"name", "spec", "trees", "n_trees", "sampling"}
_CROSS_KEYS = {"specs", "trees", "n_trees", "sampling"}
_SAMPLING_KEYS = {"sampler", "chains", "draws", "tune", "seed", "target_accept"}


@dataclass(frozen=True)
class GridJob:
    """One fit of a grid (paths absolute)."""

    name: str
    spec: str
    trees: str | None = None
    n_trees: int | None = None
    sampling: dict[str, Any] = field(default_factory=dict)

    @property
    def pooled(self) -> bool:
        """True when the fit pools over a tree sample."""
        return self.trees is not None or self.n_trees is not None


# =========================================================================== grid file
def _path(base: Path, value: Any, where: str, grid: Path) -> str:
    if not isinstance(value, str) or not value:
        raise InputError(f"{grid}: {where} must be a file path (a string), not {value!r}")
    p = (base / value).resolve()
    if not p.is_file():
        raise InputError(f"{grid}: {where} = \"{value}\" does not exist (looked for {p}); paths are relative to the grid file")
    return str(p)


def _sampling(d: Any, where: str, grid: Path) -> dict[str, Any]:
    if d is None:
        return {}
    if not isinstance(d, dict):
        raise InputError(f"{grid}: {where} must be a table, e.g. sampling = {{ draws = 500 }}")
    bad = sorted(set(d) - _SAMPLING_KEYS)
    if bad:
        raise InputError(f"{grid}: unknown key(s) {bad} in {where}; known: {', '.join(sorted(_SAMPLING_KEYS))}")
    return dict(d)


def _n_trees(v: Any, where: str, grid: Path) -> int | None:
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, int) or v < 1:
        raise InputError(f"{grid}: {where} n_trees must be a positive whole number, not {v!r}")
    return v


def _default_name(spec: str, trees: str | None, n_trees: int | None) -> str:
    name = Path(spec).stem
    if trees:
        name += "__" + Path(trees).stem
    if n_trees:
        name += f"__{n_trees}trees"
    return name


def load_grid(path: str | Path) -> list[GridJob]:
    """Read and validate a grid file (format in the module docstring).

    Raises
    ------
    InputError
        Bad TOML, unknown keys, missing files, duplicate or unusable fit names, or
        no fits at all.
    """
    grid = Path(path).resolve()
    try:
        raw = tomllib.loads(grid.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"grid file not found: {grid}. Check the path.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{grid}: not valid TOML: {exc}. Fix the syntax at that place.") from None
    unknown = sorted(set(raw) - {"fit", "cross", "sampling"})
    if unknown:
        raise InputError(f"{grid}: unknown top-level key(s) {unknown}; use [[fit]], [[cross]] and [sampling]")
    base = grid.parent
    common = _sampling(raw.get("sampling"), "[sampling]", grid)
    jobs: list[GridJob] = []
    fits = raw.get("fit", [])
    crosses = raw.get("cross", [])
    if not isinstance(fits, list) or not isinstance(crosses, list):
        raise InputError(f"{grid}: write fits as [[fit]] and [[cross]] tables (double brackets)")
    for i, f in enumerate(fits, 1):
        where = f"[[fit]] number {i}"
        bad = sorted(set(f) - _FIT_KEYS)
        if bad:
            raise InputError(f"{grid}: unknown key(s) {bad} in {where}; known: {', '.join(sorted(_FIT_KEYS))}")
        if "spec" not in f:
            raise InputError(f"{grid}: {where} needs spec = \"<spec file>\"")
        spec = _path(base, f["spec"], f"{where} spec", grid)
        trees = _path(base, f["trees"], f"{where} trees", grid) if "trees" in f else None
        n = _n_trees(f.get("n_trees"), where, grid)
        name = f.get("name") or _default_name(spec, trees, n)
        jobs.append(GridJob(str(name), spec, trees, n, {**common, **_sampling(f.get("sampling"), f"{where} sampling", grid)}))
    for i, c in enumerate(crosses, 1):
        where = f"[[cross]] number {i}"
        bad = sorted(set(c) - _CROSS_KEYS)
        if bad:
            raise InputError(f"{grid}: unknown key(s) {bad} in {where}; known: {', '.join(sorted(_CROSS_KEYS))}")
        specs = c.get("specs")
        if not isinstance(specs, list) or not specs:
            raise InputError(f"{grid}: {where} needs specs = [\"a.toml\", ...] (a non-empty list)")
        tree_list = c.get("trees", [None])
        if not isinstance(tree_list, list) or not tree_list:
            raise InputError(f"{grid}: {where} trees must be a non-empty list of tree files")
        n = _n_trees(c.get("n_trees"), where, grid)
        samp = {**common, **_sampling(c.get("sampling"), f"{where} sampling", grid)}
        for s in specs:
            sp = _path(base, s, f"{where} specs", grid)
            for t in tree_list:
                tp = _path(base, t, f"{where} trees", grid) if t is not None else None
                jobs.append(GridJob(_default_name(sp, tp, n), sp, tp, n, samp))
    if not jobs:
        raise InputError(f"{grid}: no fits; add [[fit]] or [[cross]] tables (see 'cladewise grid --help')")
    seen: dict[str, int] = {}
    for j in jobs:
        if not _NAME_OK.match(j.name):
            raise InputError(
                f"{grid}: fit name {j.name!r} cannot be a folder name; use letters, digits, '-', '_' and '.'"
            )
        seen[j.name] = seen.get(j.name, 0) + 1
    dup = sorted(n for n, k in seen.items() if k > 1)
    if dup:
        raise InputError(f"{grid}: fit name(s) {dup} occur more than once; give each [[fit]] its own name")
    return jobs


# =========================================================================== one fit
def is_finished(folder: str | Path) -> bool:
    """True when ``folder`` holds a complete fit (valid summary.json and posterior.nc)."""
    f = Path(folder)
    try:
        js = json.loads((f / "summary.json").read_text())
    except (OSError, ValueError):
        return False
    return isinstance(js, dict) and "diagnostics" in js and (f / "posterior.nc").is_file()


def run_job(job: dict[str, Any], out_dir: str) -> dict[str, Any]:
    """Run one grid fit and write ``out_dir/<name>``; never raises (runs on a worker).

    Returns a row of the status table: name, status ("done" or "failed"), seconds,
    n_trees, max_rhat, diagnostics_ok, message.
    """
    j = GridJob(**job)
    t0 = time.perf_counter()
    target = Path(out_dir) / j.name
    row: dict[str, Any] = {"name": j.name, "status": "failed", "seconds": float("nan"),
                           "n_trees": None, "max_rhat": float("nan"), "diagnostics_ok": None, "message": ""}
    command = f"cladewise grid (fit {j.name})"
    try:
        from cladewise.pipeline import fit_from_spec

        res = fit_from_spec(j.spec, out=target, overwrite=True, trees=j.trees, n_trees=j.n_trees,
                            progress=False, command=command, **j.sampling)
        row["n_trees"] = len(getattr(res, "tree_indices", None) or [0])
        row.update(status="done", max_rhat=res.diagnostics.max_rhat, diagnostics_ok=res.diagnostics.ok,
                   message="; ".join(res.diagnostics.problems)[:300])
    except Exception as exc:  # one failed fit must not stop the grid
        row["message"] = f"{type(exc).__name__}: {exc}"[:500]
    row["seconds"] = time.perf_counter() - t0
    return row


# =========================================================================== the grid
def _clean_partials(out: Path) -> list[str]:
    gone = []
    for p in out.iterdir():
        if p.name.startswith(".") and ".partial-" in p.name:
            shutil.rmtree(p, ignore_errors=True) if p.is_dir() else p.unlink(missing_ok=True)
            gone.append(p.name)
    return gone


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _take_lock(out: Path) -> Path:
    lock = out / LOCK_NAME
    host = socket.gethostname()
    if lock.exists():
        try:
            info = json.loads(lock.read_text())
            pid, lhost = int(info["pid"]), info.get("host")
        except (OSError, ValueError, KeyError, TypeError):
            pid, lhost = -1, None
        if pid > 0 and lhost == host and pid != os.getpid() and _pid_alive(pid):
            raise InputError(
                f"another grid run (process {pid}) is writing to {out}; wait for it to end, or use "
                f"another --out folder (delete {lock} if that process is not cladewise)"
            )
    atomic_write(lock, json.dumps({"pid": os.getpid(), "host": host}))
    return lock


def _write_status(out: Path, table: pd.DataFrame) -> None:
    atomic_write(out / STATUS_NAME, table.to_csv(index=False))


def run_grid(
    grid_path: str | Path,
    out_dir: str | Path,
    scheduler: str | None = None,
    n_workers: int = 2,
    echo: Callable[[str], None] | None = None,
) -> pd.DataFrame:
    """Run every fit of a grid file, skipping finished ones; return the status table.

    Parameters
    ----------
    grid_path : path
        Grid file (module docstring).
    out_dir : path
        Folder that receives one sub-folder per fit and ``grid_status.csv``.
    scheduler : str, optional
        Address of a running dask scheduler (``tcp://host:8786``); default: a
        LocalCluster with ``n_workers`` processes of one thread each.
    n_workers : int
        Worker processes of the local cluster.
    echo : callable, optional
        Receives one progress line per event (default: print to stdout).

    Returns
    -------
    DataFrame
        One row per fit: name, status (done, skipped, failed), seconds, n_trees,
        max_rhat, diagnostics_ok, message.
    """
    say = echo or (lambda s: print(s, flush=True))
    if not isinstance(n_workers, int) or n_workers < 1:
        raise InputError(f"--workers must be a positive whole number, not {n_workers!r}")
    jobs = load_grid(grid_path)
    inputs = [grid_path] + [p for j in jobs for p in (j.spec, j.trees) if p]
    out = check_output_folder(out_dir, inputs=inputs, what="grid", add_to=True)
    if not out.exists():
        out.mkdir(parents=True)
    if not is_cladewise_output(out):
        write_marker(out, "grid")
    lock = _take_lock(out)
    try:
        gone = _clean_partials(out)
        if gone:
            say(f"removed {len(gone)} half-written folder(s) from an earlier run: {', '.join(gone)}")
        rows: dict[str, dict[str, Any]] = {}
        todo = []
        for j in jobs:
            if is_finished(out / j.name):
                rows[j.name] = {"name": j.name, "status": "skipped", "seconds": 0.0, "n_trees": None,
                                "max_rhat": float("nan"), "diagnostics_ok": None,
                                "message": "already finished (delete the folder to refit)"}
            else:
                todo.append(j)
        say(f"grid: {len(jobs)} fits, {len(jobs) - len(todo)} already finished, {len(todo)} to run")
        if todo:
            for r in _run_on_dask(todo, out, scheduler, n_workers, say):
                rows[r["name"]] = r
        table = pd.DataFrame([rows[j.name] for j in jobs],
                             columns=["name", "status", "seconds", "n_trees", "max_rhat", "diagnostics_ok", "message"])
        _write_status(out, table)
        return table
    finally:
        lock.unlink(missing_ok=True)


def _run_on_dask(todo: list[GridJob], out: Path, scheduler: str | None, n_workers: int, say) -> list[dict[str, Any]]:
    import logging

    from dask.distributed import Client, LocalCluster, as_completed

    cluster = None
    if scheduler:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot reach the dask scheduler at {scheduler!r} ({exc}); check the address") from None
        say(f"sending {len(todo)} fits to the dask scheduler at {scheduler}")
    else:
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=logging.ERROR)
        client = Client(cluster)
        say(f"started a local dask cluster: {n_workers} worker process(es), 1 thread each")
    results: list[dict[str, Any]] = []
    try:
        token = uuid.uuid4().hex[:8]
        futures = {}
        for j in todo:
            fut = client.submit(run_job, asdict(j), str(out), key=f"cladewise-fit-{j.name}-{token}", pure=False)
            futures[fut] = j
        for k, fut in enumerate(as_completed(futures), 1):
            j = futures[fut]
            try:
                r = fut.result()
            except Exception as exc:  # the worker died or the task could not run
                r = {"name": j.name, "status": "failed", "seconds": float("nan"), "n_trees": None,
                     "max_rhat": float("nan"), "diagnostics_ok": None, "message": f"{type(exc).__name__}: {exc}"[:500]}
            results.append(r)
            extra = "" if r["status"] == "done" else f": {r['message']}"
            say(f"[{k}/{len(todo)}] {r['name']}: {r['status']} in {r['seconds']:.0f} s{extra}")
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return results


def format_status(table: pd.DataFrame) -> str:
    """The status table as text, with counts."""
    view = table[["name", "status", "seconds", "n_trees", "max_rhat", "diagnostics_ok"]].copy()
    counts = table["status"].value_counts()
    head = ", ".join(f"{counts.get(s, 0)} {s}" for s in ("done", "skipped", "failed"))
    with pd.option_context("display.max_rows", 500, "display.width", 160):
        body = view.to_string(index=False, float_format=lambda v: f"{v:.3g}", na_rep="")
    fails = table[table["status"] == "failed"]
    lines = [f"Fits: {head}", body]
    for _, r in fails.iterrows():
        lines.append(f"failed {r['name']}: {r['message']}")
    return "\n".join(lines)
