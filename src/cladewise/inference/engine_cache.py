"""numba's on-disk cache of the likelihood engine: where it is, what it holds, clearing it.

numba keeps each ``cache=True`` kernel's machine code in ``$NUMBA_CACHE_DIR`` when
that is set, else in the ``__pycache__`` folder beside the engine's source (or a
user cache folder when that one is not writable). Files are named after the module
and function (``kernels_k4.value_and_grad_k4-....nbc``); the index files
(``.nbi``) record the source file's time stamp, so an edited engine recompiles.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

__all__ = ["engine_cache_dirs", "engine_cache_files", "engine_cache_info", "clear_engine_cache"]

_PREFIXES = ("kernels.", "kernels_k", "entries.")


def engine_cache_dirs() -> list[Path]:
    """Folders that may hold the engine's numba cache files."""
    import cladewise.engine as engine

    src = Path(engine.__file__).resolve().parent
    dirs = [src / "__pycache__"]
    if os.environ.get("NUMBA_CACHE_DIR"):
        root = Path(os.environ["NUMBA_CACHE_DIR"]).expanduser()
        # numba mirrors the source path below NUMBA_CACHE_DIR
        dirs.append(root / src.relative_to(src.anchor))
        dirs.append(root)
    return [d for d in dirs if d.is_dir()]


def engine_cache_files() -> list[Path]:
    """The engine's numba cache files (``.nbi`` indexes and ``.nbc`` code)."""
    out: list[Path] = []
    for d in engine_cache_dirs():
        out += [f for f in d.iterdir()
                if f.suffix in (".nbi", ".nbc") and f.name.startswith(_PREFIXES)]
    return sorted(set(out))


def engine_cache_info() -> dict[str, Any]:
    """Folder, number of files, bytes, and the trait counts with compiled k = 3..6 kernels."""
    files = engine_cache_files()
    dirs = engine_cache_dirs()
    counts: set[int] = set()
    for f in files:
        if f.suffix == ".nbc" and f.name.startswith(("entries.value_and_grad_k1", "entries.value_and_grad_k2")):
            counts.add(int(f.name.split("value_and_grad_k")[1][0]))
    counts |= _small_counts()
    return {"path": str(dirs[0]) if dirs else "(not created yet)", "files": len(files),
            "bytes": sum(f.stat().st_size for f in files), "trait_counts": sorted(counts)}


def _small_counts() -> set[int]:
    # the k = 3..6 kernels: one module per k, kernels_k{k}.py
    return {int(f.name[len("kernels_k")]) for f in engine_cache_files()
            if f.suffix == ".nbc" and f.name.startswith("kernels_k") and ".value_and_grad_k" in f.name}


def clear_engine_cache() -> int:
    """Delete the engine's numba cache files; returns how many were removed."""
    n = 0
    for f in engine_cache_files():
        try:
            f.unlink()
            n += 1
        except OSError:
            pass
    return n


# --------------------------------------------------------------------------- first run
#: what a fit needs from the engine: value and gradient (sampling), LOO densities (after)
FIT_TASKS = ("value_and_grad", "loo_logdens_draws")


def _is_compiled(fn: Any, k: int) -> bool:
    """Whether numba has ``fn`` for ``k`` traits in memory or in its disk cache.

    Reads numba's cache index (an internal API); when it cannot be read the answer
    is True, so at worst a compile goes unannounced.
    """
    try:
        if fn.signatures:
            return True
        index = fn._cache._cache_file._load_index()  # {} when stale or absent
    except Exception:  # noqa: BLE001
        return True
    # every entry point serves one k (the k = 3..6 kernels are one module per k)
    return bool(index)


def _tiny_inputs(task: str, k: int) -> tuple:
    """A 3-species problem with the argument types a fit uses, to trigger compiling."""
    import numpy as np

    parent = np.array([3, 3, 4, 4, -1], np.int64)
    lengths = np.ones(5)
    y = np.zeros((3, k))
    observed = np.ones((3, k), bool)
    R = np.eye(k)[None].copy()
    regime = np.zeros(5, np.int64)
    E = np.zeros((k, k))
    err = np.broadcast_to(0.1 * np.eye(k), (3, k, k)).copy()
    mu = np.zeros(k)
    if task == "loo_logdens_draws":
        return (parent, lengths[None].copy(), y, observed, R[None].copy(), regime[None].copy(),
                E[None].copy(), err[None].copy(), mu[None].copy())
    return parent, lengths, y, observed, R, regime, E, err, mu


def prepare_engine(k: int, tasks: tuple[str, ...] = FIT_TASKS, on_compile: Any = None) -> bool:
    """Compile (or load) the engine kernels a fit with ``k`` traits uses.

    Only the kernels of this k are compiled (:func:`cladewise.engine.entries.kernel_for`).
    When numba has no cached copy, ``on_compile`` (if given) is called with a sentence
    before the compile starts, and the same sentence is logged at INFO level on the
    ``cladewise`` logger. Returns whether anything had to be compiled.
    """
    import logging

    from cladewise.engine import entries

    todo = []
    for task in tasks:
        fn, extra = entries.kernel_for(task, k)
        if not _is_compiled(fn, k):
            todo.append((task, fn, extra))
    if not todo:
        return False
    msg = (f"compiling the likelihood engine for k={k} ({entries.path_name(k)}; first run only, "
           "kept for later runs)...")
    logging.getLogger("cladewise").info(msg)
    if on_compile is not None:
        on_compile(msg)
    for task, fn, extra in todo:
        fn(*_tiny_inputs(task, k), *extra)
    return True
