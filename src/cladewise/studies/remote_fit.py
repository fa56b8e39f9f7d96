"""One grid fit that travels: inputs packed on the client, fitted anywhere, folder sent home.

A worker of a cluster started elsewhere (``dask worker`` on another machine) need
not see the client's files. :func:`pack_job` reads every input of a grid fit (spec
text, trait table, tree file, tree sample) into the task; :func:`run_packed_job`
writes them to a private temporary folder on the worker, runs the one spec-to-fit
path (:func:`cladewise.pipeline.fit_from_spec`), saves the fit folder there and
returns its files as bytes; :func:`write_fit_folder` writes them into the client's
output folder atomically. Nothing is written on the worker outside its temporary
folder, and nothing reaches the output folder until the whole fit is home, so a
worker killed mid-fit leaves nothing behind and its fit is simply run again.

Paths recorded in summary.json (spec, tree sample, data sources) are the client's
own paths, not the worker's temporary copies.
"""

from __future__ import annotations

import dataclasses
import tempfile
import time
from pathlib import Path
from typing import Any

from cladewise.config.analysis import load_spec
from cladewise.config.grid import GridJob
from cladewise.inference.results import MARKER, atomic_write

__all__ = ["pack_job", "run_packed_job", "write_fit_folder", "worker_models", "empty_row", "ROW_COLUMNS"]

#: columns of the grid's status table (one row per fit)
ROW_COLUMNS = ["name", "status", "seconds", "n_trees", "max_rhat", "diagnostics_ok", "message"]


def empty_row(name: str) -> dict[str, Any]:
    """A status row of a fit that has not succeeded (yet)."""
    return {"name": name, "status": "failed", "seconds": float("nan"), "n_trees": None,
            "max_rhat": float("nan"), "diagnostics_ok": None, "message": ""}


def pack_job(job: GridJob) -> dict[str, Any]:
    """Everything a worker needs for one grid fit, file contents included.

    Raises
    ------
    InputError
        The spec cannot be read (the same message ``cladewise fit`` gives).
    """
    spec = load_spec(job.spec)
    files: dict[str, bytes] = {}
    origin: dict[str, str] = {}
    keys: dict[Path, str] = {}

    def add(p: Any) -> str | None:
        if p is None:
            return None
        p = Path(p).resolve()
        if p not in keys:
            k = f"{len(keys)}_{p.name}"
            keys[p] = k
            files[k] = p.read_bytes()
            origin[k] = str(p)
        return keys[p]

    d = spec.data
    return {
        "name": job.name, "spec": spec, "spec_file": add(spec.path), "traits": add(d.traits),
        "tree": add(d.tree), "trees": add(d.trees), "job_trees": add(job.trees),
        "n_trees": job.n_trees, "sampling": dict(job.sampling), "files": files, "origin": origin,
    }


def _unpack(payload: dict[str, Any], root: Path) -> tuple[Any, Path | None, dict[str, str]]:
    local: dict[str, Path] = {}
    for k, data in payload["files"].items():
        local[k] = root / k
        local[k].write_bytes(data)

    def loc(k: str | None) -> Path | None:
        return None if k is None else local[k]

    spec = payload["spec"]
    data = dataclasses.replace(spec.data, traits=loc(payload["traits"]), tree=loc(payload["tree"]),
                               trees=loc(payload["trees"]))
    spec = dataclasses.replace(spec, path=loc(payload["spec_file"]), data=data)
    back = {str(local[k]): payload["origin"][k] for k in local}
    return spec, loc(payload["job_trees"]), back


def _home_paths(obj: Any, back: dict[str, str]) -> Any:
    """Replace the worker's temporary paths by the client's inside strings of ``obj``."""
    if isinstance(obj, str):
        for here, there in back.items():
            obj = obj.replace(here, there)
        return obj
    if isinstance(obj, dict):
        return {k: _home_paths(v, back) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_home_paths(v, back) for v in obj]
    return obj


def worker_models(prep: Any) -> tuple[Any, Any]:
    """(built, compiled) for a prepared single-tree analysis, made once per worker process.

    Keyed by the matched data, the model and the sampler, so fits that differ only in
    seed or sampler settings (chains, draws) share one compiled model; other data of
    the same structure still load from the on-disk compile cache.
    """
    from cladewise.inference.sampling import compile_model
    from cladewise.inference.startcheck import check_starting_point
    from cladewise.model.build import build_model
    from cladewise.studies.cluster import memo_key, worker_memo

    def make() -> tuple[Any, Any]:
        built = build_model(prep.model_data, prep.model_spec)
        check_starting_point(built)
        return built, compile_model(built, prep.options.sampler)

    key = memo_key("single-fit", prep.model_data, prep.model_spec, prep.options.sampler)
    return worker_memo(key, make)


def run_packed_job(payload: dict[str, Any], tag: Any = None) -> dict[str, Any]:
    """Fit one packed grid job in a private temporary folder; never raises.

    Returns a status row (``ROW_COLUMNS``) plus ``files``: the fit folder's files
    as ``{relative path: bytes}`` (empty when the fit failed).
    """
    from cladewise.studies.cluster import report_start

    name = payload["name"]
    report_start(tag)
    t0 = time.perf_counter()
    row = empty_row(name)
    row["files"] = {}
    try:
        from cladewise.pipeline import fit_from_spec

        with tempfile.TemporaryDirectory(prefix="cladewise-job-") as tmp:
            root = Path(tmp)
            (root / "in").mkdir()
            spec, trees, back = _unpack(payload, root / "in")
            res = fit_from_spec(spec, trees=trees, n_trees=payload["n_trees"], progress=False,
                                command=f"cladewise grid (fit {name})", models=worker_models,
                                **payload["sampling"])
            res.info = _home_paths(res.info, back)
            folder = res.save(root / "fit")
            row["files"] = {str(f.relative_to(folder)): f.read_bytes()
                            for f in sorted(folder.rglob("*")) if f.is_file() and f.name != MARKER}
        row["n_trees"] = len(getattr(res, "tree_indices", None) or [0])
        row.update(status="done", max_rhat=res.diagnostics.max_rhat, diagnostics_ok=res.diagnostics.ok,
                   message="; ".join(res.diagnostics.problems)[:300])
    except Exception as exc:  # one failed fit must not stop the grid
        row["message"] = f"{type(exc).__name__}: {exc}"[:500]
    row["seconds"] = time.perf_counter() - t0
    return row


def write_fit_folder(target: str | Path, files: dict[str, bytes]) -> Path:
    """Write a fit folder sent home by :func:`run_packed_job`, all at once."""

    def fill(folder: Path) -> None:
        for rel, data in files.items():
            p = folder / rel
            p.parent.mkdir(parents=True, exist_ok=True)
            p.write_bytes(data)

    return atomic_write(target, fill, what="fit")
