"""Compiled nutpie models reused across processes.

``nutpie.compile_pymc_model`` (numba backend) turns the model's log density and
gradient into two numba C callbacks. numba compiles them from scratch in every new
process (about 10-20 s for the demo model) because nutpie's callbacks are closures
over freshly created functions, which numba's own on-disk cache cannot key.

This module builds the same two callbacks as nutpie does, but keys them by the
model's *structure* and stores numba's compiled object code on disk. A later process
with the same structure (same kind, evolution model, measurement-error mode, trait
count, formula terms, priors given as options, and the same array sizes: number of
species, tree nodes and specimen records) loads the object code in a fraction of a
second. Before compiling, the array constants of the model (data-derived: specimen
statistics, data-scaled prior scales, index arrays) are turned into shared
variables, so like ``pm.Data`` (trees, trait values) they are read through nutpie's
data pointers at run time and other data of the same sizes reuses the entry.
Scalar constants stay in the code (some log densities need them constant), so a
scalar that depends on the data also changes the key; that misses, never misleads.

The key is a SHA-256 of: PyTensor's own numba cache key of the logp-and-gradient
graph and of the expansion graph (ops, their properties and every constant), a
printout of both graphs with their types, the number of free and expanded values,
the layout of the shared data, the source of the cladewise likelihood engine, the
versions of Python, cladewise, PyTensor, PyMC, nutpie, numba, llvmlite and numpy, and
the CPU the code was compiled for. Any change of structure or version misses.

Where the cache lives: ``$CLADEWISE_CACHE_DIR/compiled`` if that variable is set,
else ``$XDG_CACHE_HOME/cladewise/compiled`` (``~/.cache/cladewise/compiled``;
``%LOCALAPPDATA%\\cladewise\\compiled`` on Windows). Each entry is one folder of a
few MB; the oldest-used entries are removed when the total exceeds
``$CLADEWISE_CACHE_MAX_MB`` (default 500). :func:`clear_compile_cache` empties it;
``CLADEWISE_COMPILE_CACHE=0`` turns it off.

Safety: each file's SHA-256 is checked before loading, and a loaded entry must
reproduce the log density and gradient of PyMC's own (uncached) functions at two
starting points; an entry that fails either check is deleted and rebuilt.

This relies on nutpie's internal helpers (checked with nutpie 0.16) and numba's
``CFunc``/``CompileResult`` serialisation; if they change, :func:`compile_cached`
falls back to ``nutpie.compile_pymc_model`` (status ``"uncached"``).
"""

from __future__ import annotations

import ctypes
import hashlib
import json
import logging
import os
import pickle
import re
import shutil
import sys
import tempfile
import threading
import time
import uuid
import warnings
from pathlib import Path
from typing import Any, Callable

import numpy as np

__all__ = [
    "compile_cached",
    "compile_cache_dir",
    "clear_compile_cache",
    "compile_cache_info",
    "prune_compile_cache",
    "structure_key",
    "DEFAULT_MAX_MB",
]

#: default bound on the cache's total size (MB); ``$CLADEWISE_CACHE_MAX_MB`` overrides
DEFAULT_MAX_MB = 500
_FORMAT = 1  # bump when the entry layout changes
_FUNCS = ("logp", "expand")
_LOCK = threading.Lock()


# --------------------------------------------------------------------------- folders
def compile_cache_dir() -> Path:
    """The folder holding compiled models (see the module docstring)."""
    root = os.environ.get("CLADEWISE_CACHE_DIR")
    if root:
        base = Path(root).expanduser()
    elif sys.platform == "win32" and os.environ.get("LOCALAPPDATA"):
        base = Path(os.environ["LOCALAPPDATA"]) / "cladewise"
    else:
        xdg = os.environ.get("XDG_CACHE_HOME")
        base = (Path(xdg).expanduser() if xdg else Path.home() / ".cache") / "cladewise"
    return base / "compiled"


def _max_bytes() -> int:
    try:
        mb = float(os.environ.get("CLADEWISE_CACHE_MAX_MB", DEFAULT_MAX_MB))
    except ValueError:
        mb = DEFAULT_MAX_MB
    return int(mb * 1024 * 1024)


def _entries(root: Path) -> list[Path]:
    if not root.is_dir():
        return []
    # names starting with "." are entries still being written by some process
    return [p for p in root.iterdir()
            if p.is_dir() and not p.name.startswith(".") and (p / "meta.json").exists()]


def _size(path: Path) -> int:
    return sum(f.stat().st_size for f in path.iterdir() if f.is_file())


def compile_cache_info() -> dict[str, Any]:
    """Where the cache is, how many entries it holds and their total size in bytes."""
    root = compile_cache_dir()
    entries = _entries(root)
    return {
        "path": str(root),
        "entries": len(entries),
        "bytes": sum(_size(e) for e in entries),
        "max_bytes": _max_bytes(),
    }


def clear_compile_cache() -> int:
    """Delete every cached compiled model; returns how many entries were removed."""
    root = compile_cache_dir()
    if not root.is_dir():
        return 0
    n = 0
    for p in list(root.iterdir()):
        if p.is_dir():
            n += (p / "meta.json").exists()
            shutil.rmtree(p, ignore_errors=True)
        else:
            p.unlink(missing_ok=True)
    return n


def prune_compile_cache(max_bytes: int | None = None, keep: str | None = None) -> int:
    """Remove least recently used entries until the cache is at most ``max_bytes``.

    ``max_bytes`` defaults to ``$CLADEWISE_CACHE_MAX_MB`` (or :data:`DEFAULT_MAX_MB`);
    the entry named ``keep`` is never removed. Returns how many entries were removed.
    """
    root = compile_cache_dir()
    limit = _max_bytes() if max_bytes is None else int(max_bytes)
    entries = sorted(_entries(root), key=lambda e: (e / "meta.json").stat().st_mtime)
    sizes = {e: _size(e) for e in entries}
    total = sum(sizes.values())
    removed = 0
    for e in entries:
        if total <= limit:
            break
        if e.name == keep:
            continue
        shutil.rmtree(e, ignore_errors=True)
        total -= sizes[e]
        removed += 1
    return removed


# --------------------------------------------------------------------------- keys
def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _versions() -> dict[str, str]:
    import llvmlite
    import numba
    import nutpie
    import pymc
    import pytensor

    import cladewise

    return {
        "format": str(_FORMAT), "python": sys.version, "cladewise": cladewise.__version__,
        "pytensor": pytensor.__version__, "pymc": pymc.__version__,
        "nutpie": nutpie.__version__, "numba": numba.__version__,
        "llvmlite": llvmlite.__version__, "numpy": np.__version__,
    }


def _engine_source_hash() -> str:
    # PyTensor keys the engine Op by its type and properties only; hashing the
    # engine's source makes an edited kernel miss instead of loading old code.
    import cladewise.engine as engine

    h = hashlib.sha256()
    for f in sorted(Path(engine.__file__).parent.glob("*.py")):
        h.update(f.name.encode())
        h.update(f.read_bytes())
    return h.hexdigest()


def _graph_key(fn: Any) -> str | None:
    """PyTensor's numba cache key of a compiled function plus a typed printout."""
    import pytensor
    from pytensor.link.numba.cache import CACHED_SRC_FUNCTIONS

    jit_fn = fn.vm.jit_fn
    pt_key = CACHED_SRC_FUNCTIONS.get(getattr(jit_fn, "py_func", None))
    if pt_key is None:
        return None  # some op cannot be cached by PyTensor: do not cache either
    printed = pytensor.printing.debugprint(fn.maker.fgraph, file="str", print_type=True)
    # names of temporaries inside fused scalar graphs vary from run to run
    printed = re.sub(r"'t\d+'", "'t'", printed)
    return _sha(f"{pt_key}\n{printed}".encode())


# --------------------------------------------------------------------------- numba glue
class _EntryCache:
    """A numba cache object for one ``CFunc``: loads from / records into memory.

    ``CFunc.compile`` asks ``load_overload`` first and calls ``save_overload`` after
    compiling; files are written by :func:`compile_cached` once both are done.
    """

    def __init__(self, payload: Any = None) -> None:
        self.payload = payload
        self.saved: bytes | None = None
        self.loaded = False

    def load_overload(self, sig: Any, target_context: Any) -> Any:
        if self.payload is None:
            return None
        from numba.core.compiler import CompileResult

        target_context.refresh()
        try:
            cres = CompileResult._rebuild(target_context, *self.payload)
        except Exception:  # noqa: BLE001 - an unreadable entry is rebuilt
            return None
        self.loaded = True
        return cres

    def save_overload(self, sig: Any, cres: Any) -> None:
        from numba.core.serialize import dumps

        if cres.library.has_dynamic_globals or any(not x.can_cache for x in cres.lifted):
            return
        self.saved = dumps(cres._reduce())


def _make_cfunc(pyfunc: Any, sig: Any, payload: Any = None) -> tuple[Any, _EntryCache]:
    from numba.core import sigutils
    from numba.core.ccallback import CFunc

    args, ret = sigutils.normalize_signature(sig)
    cf = CFunc(pyfunc, (args, ret), locals={}, options={})
    cache = _EntryCache(payload)
    cf._cache = cache
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cf.compile()
    return cf, cache


# --------------------------------------------------------------------------- checks


def _reference(model: Any) -> Any:
    """PyMC's own log density and gradient, interpreted (no numba, no cache)."""
    import pytensor
    import pytensor.tensor as pt

    # nutpie orders the flat vector by model.free_RVs; so does this gradient
    value_vars = [model.rvs_to_values[rv] for rv in model.free_RVs]
    logp = model.logp(jacobian=True)
    grad = pt.concatenate([g.ravel() for g in pytensor.grad(logp, value_vars)])
    fn = pytensor.function(value_vars, [logp, grad], mode="FAST_COMPILE", on_unused_input="ignore")
    return fn


def _agrees(compiled: Any, model: Any, n_points: int = 2) -> bool:
    """Do the compiled callbacks give PyMC's log density and gradient at start points?

    The compiled model may order its parameters differently (it is built from an
    equivalent copy of ``model``), so values are matched by name.
    """
    names, slices, shapes = compiled.shape_info
    layout = {n: (s, tuple(sh)) for n, s, sh in zip(names, slices, shapes)}
    value_names = [model.rvs_to_values[rv].name for rv in model.free_RVs]
    if set(value_names) != {n for n, (s, _) in layout.items() if s.stop <= compiled.n_dim}:
        return False
    ref = _reference(model)
    fn = compiled.compiled_logp_func.ctypes
    dptr = ctypes.POINTER(ctypes.c_double)
    compared = 0
    for seed in range(n_points):
        x = np.ascontiguousarray(compiled.initial_point_func(seed), dtype=np.float64)
        grad = np.zeros(compiled.n_dim)
        logp = np.zeros(1)
        rc = fn(compiled.n_dim, x.ctypes.data_as(dptr), grad.ctypes.data_as(dptr),
                logp.ctypes.data_as(dptr), ctypes.c_void_p(compiled.user_data.ctypes.data))
        want, want_grad = ref(*[x[layout[n][0]].reshape(layout[n][1]) for n in value_names])
        want = float(want)
        if not np.isfinite(want):
            continue  # nothing to compare at this point
        got_grad = np.concatenate([grad[layout[n][0]] for n in value_names])
        if rc != 0 or want_grad.shape != got_grad.shape:
            return False
        if abs(logp[0] - want) > 1e-7 * max(1.0, abs(want)):
            return False
        scale = max(1.0, float(np.max(np.abs(want_grad))))
        if np.max(np.abs(got_grad - want_grad)) > 1e-6 * scale:
            return False
        compared += 1
    return compared > 0  # no finite point to compare: do not trust the entry


# --------------------------------------------------------------------------- entries


def _read_entry(path: Path) -> dict[str, Any] | None:
    """Payloads of an entry whose files match their checksums, else None."""
    try:
        meta = json.loads((path / "meta.json").read_text())
        out = {}
        for name in _FUNCS:
            data = (path / f"{name}.nbc").read_bytes()
            if _sha(data) != meta["sha256"][name]:
                return None
            out[name] = pickle.loads(data)
        return out
    except Exception:  # noqa: BLE001 - missing, truncated or unreadable: rebuild
        return None


def _write_entry(root: Path, key: str, blobs: dict[str, bytes], meta: dict[str, Any]) -> None:
    root.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{key[:12]}-{uuid.uuid4().hex[:8]}-", dir=root))
    try:
        for name, data in blobs.items():
            (tmp / f"{name}.nbc").write_bytes(data)
        meta = dict(meta, sha256={n: _sha(b) for n, b in blobs.items()})
        (tmp / "meta.json").write_text(json.dumps(meta, indent=1))
        final = root / key
        if final.exists():
            shutil.rmtree(final, ignore_errors=True)
        try:
            os.replace(tmp, final)  # atomic: readers see all files or none
        except OSError:
            pass  # another process wrote the same entry meanwhile
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    prune_compile_cache(keep=key)


# --------------------------------------------------------------------------- compile


class _SharedArrays:
    """Replaces array constants of graphs by shared variables, the same one per value.

    The model builder puts data-derived arrays (specimen statistics, data-scaled
    prior scales, index arrays) into the graph as constants, which numba would bake
    into the compiled code. As shared variables they are read through nutpie's data
    pointers instead, so other data of the same sizes reuses the compiled code.
    Types (static shapes) are kept; scalars stay constants because some log
    densities need them constant (e.g. the LKJ shape).
    """

    def __init__(self) -> None:
        self.by_value: dict[tuple, Any] = {}

    def __call__(self, outputs: Any) -> Any:
        import pytensor
        from pytensor.graph.basic import Constant
        from pytensor.graph.traversal import ancestors

        single = not isinstance(outputs, (list, tuple))
        outs = [outputs] if single else list(outputs)
        replace = {}
        for var in ancestors(outs):
            if isinstance(var, Constant) and getattr(var.type, "ndim", 0) > 0:
                data = np.asarray(var.data)
                sig = (str(var.type), _sha(np.ascontiguousarray(data).tobytes()))
                if sig not in self.by_value:
                    self.by_value[sig] = pytensor.shared(
                        data.copy(), name=f"cladewise_const_{len(self.by_value)}",
                        shape=var.type.shape,
                    )
                replace[var] = self.by_value[sig]
        new = pytensor.clone_replace(outs, replace=replace) if replace else outs
        return new[0] if single else list(new)


class _LiftedModel:
    """The model as nutpie's compiler sees it, with array constants lifted.

    Only the graphs compiled to numba (log density and the values stored per draw)
    change; everything else (shapes, initial points, names) is the model's own.
    """

    def __init__(self, model: Any) -> None:
        self._model = model
        self._lift = _SharedArrays()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._model, name)

    def __enter__(self) -> Any:
        return self._model.__enter__()

    def __exit__(self, *exc: Any) -> Any:
        return self._model.__exit__(*exc)

    def logp(self, *args: Any, **kwargs: Any) -> Any:
        return self._lift(self._model.logp(*args, **kwargs))

    @property
    def unobserved_value_vars(self) -> list:
        return self._lift(self._model.unobserved_value_vars)


def _prepare(model: Any) -> dict[str, Any]:
    """Everything nutpie's numba path builds before compiling its two callbacks."""
    from nutpie import compile_pymc as cp
    from pymc.initial_point import make_initial_point_fn

    pymc_ipf = cp._wrap_with_lock(make_initial_point_fn(
        model=model, overrides=None, default_strategy="support_point",
        jitter_rvs=set(model.free_RVs), return_transformed=True,
    ))
    n_dim, n_expanded, logp_pt, expand_pt, ipf, shape_info = cp._make_functions(
        _LiftedModel(model), mode="NUMBA", compute_grad=True, join_expanded=True,
        pymc_initial_point_fn=pymc_ipf, var_names=None,
    )
    shared_data: dict[str, np.ndarray] = {}
    shared_vars: dict[str, Any] = {}
    for val in [*logp_pt.get_shared(), *expand_pt.get_shared()]:
        if val.name in shared_vars and shared_vars[val.name] is not val:
            raise ValueError(f"Shared variables must have unique names: {val.name}")
        shared_data[val.name] = np.array(val.get_value(), order="C", copy=True)
        shared_vars[val.name] = val
    for v in shared_data.values():
        v.flags.writeable = False
    user_data = cp.make_user_data(shared_vars, shared_data)
    logp_names = [v.name for v in logp_pt.get_shared()]
    expand_names = [v.name for v in expand_pt.get_shared()]
    logp_raw, logp_sig = cp._make_c_logp_func(n_dim, logp_pt.vm.jit_fn, user_data, logp_names, shared_data)
    expand_raw, expand_sig = cp._make_c_expand_func(
        n_dim, n_expanded, expand_pt.vm.jit_fn, user_data, expand_names, shared_data
    )
    return dict(
        n_dim=n_dim, n_expanded=n_expanded, logp_pt=logp_pt, expand_pt=expand_pt,
        initial_point_fn=ipf, shape_info=shape_info, shared_data=shared_data,
        user_data=user_data, logp_names=logp_names, expand_names=expand_names,
        raw={"logp": (logp_raw, logp_sig), "expand": (expand_raw, expand_sig)},
    )


def _key(prep: dict[str, Any]) -> tuple[str | None, dict[str, Any]]:
    import pytensor
    from numba.core.registry import cpu_target

    graphs = {"logp": _graph_key(prep["logp_pt"]), "expand": _graph_key(prep["expand_pt"])}
    if None in graphs.values():
        return None, {}
    desc = {
        "graphs": graphs,
        "n_dim": int(prep["n_dim"]), "n_expanded": int(prep["n_expanded"]),
        "user_data": str(prep["user_data"].dtype.descr),
        "logp_shared": prep["logp_names"], "expand_shared": prep["expand_names"],
        "shared": {n: [str(v.dtype), v.ndim] for n, v in prep["shared_data"].items()},
        "names": [str(n) for n in prep["shape_info"][0]],
        "shapes": [list(map(int, s)) for s in prep["shape_info"][2]],
        "engine": _engine_source_hash(),
        "versions": _versions(),
        "fastmath": str(pytensor.config.numba__fastmath),
        "cpu": str(cpu_target.target_context.codegen().magic_tuple()),
    }
    return _sha(json.dumps(desc, sort_keys=True).encode()), desc


def _assemble(model: Any, prep: dict[str, Any], cfuncs: dict[str, Any]) -> Any:
    from nutpie import compile_pymc as cp

    dims, coords = cp._prepare_dims_and_coords(model, prep["shape_info"])
    return cp.CompiledPyMCModel(
        _n_dim=prep["n_dim"], dims=dims, _coords=coords,
        _shapes={name: tuple(shape) for name, _, shape in zip(*prep["shape_info"])},
        compiled_logp_func=cfuncs["logp"], compiled_expand_func=cfuncs["expand"],
        initial_point_func=prep["initial_point_fn"], shared_data=prep["shared_data"],
        user_data=prep["user_data"], n_expanded=prep["n_expanded"],
        shape_info=prep["shape_info"], logp_func=prep["logp_pt"], expand_func=prep["expand_pt"],
    )


def _compile(model: Any, prep: dict[str, Any], payloads: dict[str, Any] | None):
    cfuncs, caches = {}, {}
    for name in _FUNCS:
        raw, sig = prep["raw"][name]
        cfuncs[name], caches[name] = _make_cfunc(raw, sig, (payloads or {}).get(name))
    return _assemble(model, prep, cfuncs), caches


def structure_key(model: Any) -> str | None:
    """The cache key of a PyMC model: equal for models that share compiled code.

    ``None`` when the model cannot be cached (PyTensor cannot key one of its ops).
    """
    return _key(_prepare(model))[0]


def compile_cached(
    model: Any,
    *,
    info: dict[str, Any] | None = None,
    on_compile: Callable[[str], None] | None = None,
) -> Any:
    """Compile a PyMC model for nutpie, reusing a compiled model of the same structure.

    Parameters
    ----------
    model : pymc.Model
        The model (``BuiltModel.model``).
    info : dict, optional
        Filled with ``status`` (``"hit"``, ``"miss"``, ``"rebuilt"`` after a bad
        entry, or ``"uncached"``), ``key``, ``path`` and ``seconds``.
    on_compile : callable, optional
        Called with a sentence just before a slow numba compile starts (not on a
        cache hit), so a command line can say why it is waiting.

    Returns
    -------
    nutpie.compile_pymc.CompiledPyMCModel
        Equivalent to ``nutpie.compile_pymc_model(model)``; ``with_data`` works as usual.
    """
    import nutpie

    t0 = time.perf_counter()
    info = {} if info is None else info
    info.clear()

    def announce(why: str) -> None:  # logged on the "cladewise" logger (the command line shows it)
        msg = (f"compiling the model for the sampler ({why}); about half a minute. Compiled "
               f"models are kept in {compile_cache_dir()} ('cladewise cache' shows or clears them).")
        logging.getLogger("cladewise").info(msg)
        on_compile(msg) if on_compile is not None else None

    def plain(reason: str) -> Any:
        announce(reason)
        info.update(status="uncached", reason=reason)
        out = nutpie.compile_pymc_model(model)
        info["seconds"] = time.perf_counter() - t0
        return out

    if os.environ.get("CLADEWISE_COMPILE_CACHE", "1").strip().lower() in ("0", "no", "false", "off"):
        return plain("CLADEWISE_COMPILE_CACHE is off")
    try:
        from cladewise.inference import numba_ops  # noqa: F401  (numba versions of object-mode Ops)

        prep = _prepare(model)
        key, desc = _key(prep)
    except Exception as err:  # noqa: BLE001 - a real model error is raised again by nutpie
        return plain(f"cache unavailable for this model: {err!r}")
    if key is None:
        return plain("PyTensor cannot key this graph")

    root = compile_cache_dir()
    entry = root / key
    info.update(key=key, path=str(entry))
    with _LOCK:
        status = "miss"
        if entry.exists():
            payloads = _read_entry(entry)
            if payloads is not None:
                compiled, caches = _compile(model, prep, payloads)
                if all(c.loaded for c in caches.values()) and _agrees(compiled, model):
                    os.utime(entry / "meta.json")  # most recently used: evicted last
                    info.update(status="hit", seconds=time.perf_counter() - t0)
                    return compiled
            shutil.rmtree(entry, ignore_errors=True)
            status = "rebuilt"
        announce("first time for this model structure" if status == "miss"
                 else "the cached copy failed its checks and is rebuilt")
        compiled, caches = _compile(model, prep, None)
        if not _agrees(compiled, model):
            return plain("the shared-data form of the model disagreed with PyMC")
        blobs = {n: c.saved for n, c in caches.items()}
        if all(b is not None for b in blobs.values()):
            meta = {"created": time.time(), "n_dim": desc["n_dim"], "versions": desc["versions"],
                    "names": desc["names"]}
            try:
                _write_entry(root, key, blobs, meta)
            except OSError as err:  # read-only or full disk: work without the cache
                info["reason"] = f"could not write the cache: {err}"
        else:
            info["reason"] = "numba could not serialise the compiled code"
        info.update(status=status, seconds=time.perf_counter() - t0)
        return compiled
