"""Many fits at once: a grid of (spec, tree sample) jobs run through dask.distributed.

The grid file format and its reader are in :mod:`cladewise.config.grid`.

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
import shutil
import socket
import time
import uuid
from dataclasses import asdict
from pathlib import Path
from typing import Any, Callable

import pandas as pd

from cladewise.config.grid import GridJob, load_grid
from cladewise.errors import InputError
from cladewise.inference.results import atomic_write, check_output_folder, is_cladewise_output, write_marker

__all__ = ["is_finished", "run_job", "run_grid", "format_status", "LOCK_NAME", "STATUS_NAME"]

LOCK_NAME = ".grid.lock"
STATUS_NAME = "grid_status.csv"


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
