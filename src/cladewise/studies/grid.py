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
1 thread each); ``scheduler`` sends the fits to a dask scheduler started on its own
(``dask scheduler`` and ``dask worker`` on a server or a batch system; see
:mod:`cladewise.studies.cluster`). Workers need cladewise installed but not the
client's files: each fit's inputs travel with it and its folder comes back as bytes
(:mod:`cladewise.studies.remote_fit`); only the client writes to ``OUT``. A worker
killed in the middle of a fit: dask runs the fit again on another worker; nothing
half-written reaches ``OUT``.

Progress: one line per finished fit (``echo``), a callback with the counts
(``on_progress``) and ``OUT/grid_status.json``, rewritten atomically after every
change: ``state`` (running, finished), counts total/done/running/failed/skipped/
remaining and each fit's state, so a grid run in the background can be watched.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import time
from pathlib import Path
from typing import Any, Callable

import pandas as pd

from cladewise.config.grid import GridJob, load_grid
from cladewise.studies.cluster import TaskCounts, connect, run_tasks
from cladewise.studies.remote_fit import ROW_COLUMNS, empty_row, pack_job, run_packed_job, write_fit_folder
from cladewise.errors import InputError
from cladewise.inference.results import atomic_write, check_output_folder, is_cladewise_output, write_marker

__all__ = ["is_finished", "run_grid", "format_status", "LOCK_NAME", "STATUS_NAME", "STATUS_JSON"]

LOCK_NAME = ".grid.lock"
STATUS_NAME = "grid_status.csv"
#: live progress of a running grid (rewritten atomically after every change)
STATUS_JSON = "grid_status.json"


# =========================================================================== one fit
def is_finished(folder: str | Path) -> bool:
    """True when ``folder`` holds a complete fit (valid summary.json and posterior.nc)."""
    f = Path(folder)
    try:
        js = json.loads((f / "summary.json").read_text())
    except (OSError, ValueError):
        return False
    return isinstance(js, dict) and "diagnostics" in js and (f / "posterior.nc").is_file()


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
    on_progress: Callable[[TaskCounts], None] | None = None,
) -> pd.DataFrame:
    """Run every fit of a grid file, skipping finished ones; return the status table.

    Parameters
    ----------
    grid_path : path
        Grid file (module docstring).
    out_dir : path
        Folder that receives one sub-folder per fit and ``grid_status.csv``.
    scheduler : str, optional
        Address of a running dask scheduler (``tcp://host:8786``) or its scheduler
        file; default: a LocalCluster with ``n_workers`` processes of one thread each.
    n_workers : int
        Worker processes of the local cluster.
    echo : callable, optional
        Receives one progress line per event (default: print to stdout).
    on_progress : callable, optional
        Called with the :class:`~cladewise.studies.cluster.TaskCounts` (done,
        running, failed, skipped, remaining; each fit's state) after every change.

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
        counts = TaskCounts()
        todo = []
        for j in jobs:
            if is_finished(out / j.name):
                rows[j.name] = {**empty_row(j.name), "status": "skipped", "seconds": 0.0,
                                "message": "already finished (delete the folder to refit)"}
                counts.states[j.name] = "skipped"
            else:
                todo.append(j)
                counts.states[j.name] = "waiting"
        say(f"grid: {len(jobs)} fits, {len(jobs) - len(todo)} already finished, {len(todo)} to run")
        _write_json(out, counts, "running", scheduler)
        try:
            if todo:
                for r in _run_on_dask(todo, out, scheduler, n_workers, say, counts, on_progress):
                    rows[r["name"]] = r
        except BaseException:
            _write_json(out, counts, "stopped", scheduler)
            raise
        _write_json(out, counts, "finished", scheduler)
        table = pd.DataFrame([rows[j.name] for j in jobs], columns=ROW_COLUMNS)
        _write_status(out, table)
        return table
    finally:
        lock.unlink(missing_ok=True)


def _write_json(out: Path, counts: TaskCounts, state: str, scheduler: str | None) -> None:
    doc = {"state": state, **counts.as_dict(), "scheduler": scheduler or "local",
           "pid": os.getpid(), "updated": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
           "fits": dict(counts.states)}
    atomic_write(out / STATUS_JSON, json.dumps(doc, indent=1) + "\n")


def _run_on_dask(todo: list[GridJob], out: Path, scheduler: str | None, n_workers: int, say,
                 counts: TaskCounts, on_progress) -> list[dict[str, Any]]:
    tasks = []
    results: list[dict[str, Any]] = []
    for j in todo:
        try:
            tasks.append((j.name, (pack_job(j),)))
        except (InputError, OSError) as exc:  # an unreadable spec or data file fails this fit only
            results.append({**empty_row(j.name), "message": f"{type(exc).__name__}: {exc}"[:500]})
            counts.states[j.name] = "failed"
            say(f"{j.name}: failed: {results[-1]['message']}")
    last = [0.0]

    def changed(c: TaskCounts) -> None:
        now = time.monotonic()
        if now - last[0] > 0.5 or c.remaining == 0:  # at most two status files a second
            last[0] = now
            _write_json(out, c, "running", scheduler)
        if on_progress is not None:
            on_progress(c)

    k = 0
    if not tasks:
        return results
    with connect(scheduler, n_workers, say) as client:
        if scheduler:
            say(f"sending {len(todo)} fits to the dask scheduler at {scheduler}")
        for name, r, err in run_tasks(client, run_packed_job, tasks, counts=counts, on_change=changed,
                                      state_of=lambda r: r["status"]):
            k += 1
            if err is not None:  # the worker died more often than dask allows, or the task could not run
                r = {**empty_row(name), "message": f"{type(err).__name__}: {err}"[:500]}
            files = r.pop("files", None) or {}
            if r["status"] == "done":
                try:
                    write_fit_folder(out / name, files)
                except OSError as exc:
                    r.update(status="failed", message=f"could not write {out / name}: {exc}")
                    counts.states[name] = "failed"
            results.append(r)
            extra = "" if r["status"] == "done" else f": {r['message']}"
            say(f"[{k}/{len(todo)}] {name}: {r['status']} in {r['seconds']:.0f} s{extra}  ({counts.line()})")
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
