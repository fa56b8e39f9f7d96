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

Where the cache lives, its size bound and clearing: :mod:`cladewise.inference.cache_store`
(``~/.cache/cladewise/compiled`` by default; ``CLADEWISE_COMPILE_CACHE=0`` turns it off).

Finding an entry fast: computing the key above means rewriting the graph and setting
up PyTensor's numba functions, seconds for a model with specimens. So each entry also
records a *quick key*: the SHA-256 of the unrewritten log density and stored-value
graphs (:func:`cladewise.inference.graph_print.structure_text`: every op with its
parameters, the wiring, every type, scalar constants by value, shared data by name),
the shapes of the parameters and of the shared data, the PyTensor settings and the
versions above, with the entry's layout (parameter slices, shared-data order). A
later process first looks up its quick key; on a match it rebuilds the sampler's
model from that layout and the stored code without compiling anything, and only
otherwise takes the full path.

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
import re
import shutil
import sys
import threading
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from cladewise.inference.cache_store import (
    DEFAULT_MAX_MB,
    FUNCS,
    clear_compile_cache,
    compile_cache_dir,
    compile_cache_info,
    find_entry,
    prune_compile_cache,
    read_entry,
    sha,
    update_meta,
    make_cfunc,
    nutpie_callbacks,
    write_entry,
)

__all__ = [
    "compile_cached",
    "compile_cache_dir",
    "clear_compile_cache",
    "compile_cache_info",
    "prune_compile_cache",
    "structure_key",
    "quick_key",
    "DEFAULT_MAX_MB",
]

_FORMAT = 1  # bump when the entry layout changes
_LOCK = threading.Lock()


# --------------------------------------------------------------------------- keys
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
    return sha(f"{pt_key}\n{printed}".encode())


# --------------------------------------------------------------------------- checks


def _reference(model: Any, logp: Any = None, rewrite: bool = False) -> Any:
    """PyMC's own log density and gradient, interpreted (no numba, no cache).

    The graph is run as PyMC wrote it, op by op in Python, without PyTensor's
    rewrites: independent of everything the compiled code went through, and quick
    to set up. ``logp`` is ``model.logp()`` when the caller has it already.
    """
    import pytensor
    import pytensor.tensor as pt
    from pytensor.compile.mode import Mode

    # nutpie orders the flat vector by model.free_RVs; so does this gradient
    value_vars = [model.rvs_to_values[rv] for rv in model.free_RVs]
    logp = model.logp(jacobian=True) if logp is None else logp
    grad = pt.concatenate([g.ravel() for g in pytensor.grad(logp, value_vars)])
    if not rewrite:
        try:
            return pytensor.function(value_vars, [logp, grad], on_unused_input="ignore",
                                     mode=Mode(linker="py", optimizer=None))
        except Exception:  # noqa: BLE001 - an op that must be rewritten first
            pass
    return pytensor.function(value_vars, [logp, grad], mode="FAST_COMPILE", on_unused_input="ignore")


def _agrees(compiled: Any, model: Any, logp_graph: Any = None, n_points: int = 2) -> bool:
    """Do the compiled callbacks give PyMC's log density and gradient at start points?

    The compiled model may order its parameters differently (it is built from an
    equivalent copy of ``model``), so values are matched by name.
    """
    names, slices, shapes = compiled.shape_info
    layout = {n: (s, tuple(sh)) for n, s, sh in zip(names, slices, shapes)}
    value_names = [model.rvs_to_values[rv].name for rv in model.free_RVs]
    if set(value_names) != {n for n, (s, _) in layout.items() if s.stop <= compiled.n_dim}:
        return False
    ref = _reference(model, logp_graph)
    fn = compiled.compiled_logp_func.ctypes
    dptr = ctypes.POINTER(ctypes.c_double)
    compared = 0
    for seed in range(n_points):
        x = np.ascontiguousarray(compiled.initial_point_func(seed), dtype=np.float64)
        grad = np.zeros(compiled.n_dim)
        logp = np.zeros(1)
        rc = fn(compiled.n_dim, x.ctypes.data_as(dptr), grad.ctypes.data_as(dptr),
                logp.ctypes.data_as(dptr), ctypes.c_void_p(compiled.user_data.ctypes.data))
        args = [x[layout[n][0]].reshape(layout[n][1]) for n in value_names]
        try:
            want, want_grad = ref(*args)
        except Exception:  # noqa: BLE001 - an op without a Python implementation
            ref = _reference(model, logp_graph, rewrite=True)
            want, want_grad = ref(*args)
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
                sig = (str(var.type), sha(np.ascontiguousarray(data).tobytes()))
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

    def __init__(self, model: Any, lift: "_SharedArrays") -> None:
        self._model = model
        self._lift = lift

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


def _prepare(model: Any, quick: dict[str, Any]) -> dict[str, Any]:
    """Everything nutpie's numba path builds before compiling its two callbacks."""
    from nutpie import compile_pymc as cp

    pymc_ipf = quick["pymc_ipf"]
    # the lifting that made the quick key names the shared arrays here too
    n_dim, n_expanded, logp_pt, expand_pt, ipf, shape_info = cp._make_functions(
        _LiftedModel(model, quick["lift"]), mode="NUMBA", compute_grad=True, join_expanded=True,
        pymc_initial_point_fn=pymc_ipf, var_names=None,
    )
    shared_vars: dict[str, Any] = {}
    for val in [*logp_pt.get_shared(), *expand_pt.get_shared()]:
        if val.name in shared_vars and shared_vars[val.name] is not val:
            raise ValueError(f"Shared variables must have unique names: {val.name}")
        shared_vars[val.name] = val
    logp_names = [v.name for v in logp_pt.get_shared()]
    expand_names = [v.name for v in expand_pt.get_shared()]
    prep = dict(n_dim=n_dim, n_expanded=n_expanded, logp_pt=logp_pt, expand_pt=expand_pt,
                initial_point_fn=ipf, shape_info=shape_info)
    prep.update(nutpie_callbacks(n_dim, n_expanded, logp_pt.vm.jit_fn, expand_pt.vm.jit_fn,
                           shared_vars, logp_names, expand_names))
    return prep


# --------------------------------------------------------------------------- quick key
def _quick(model: Any) -> dict[str, Any]:
    """The quick key of a model, with what the quick path needs to rebuild it.

    Lifts array constants exactly as :func:`_prepare` will (same object, same names),
    so an entry's shared-data names mean the same arrays on both paths.
    """
    import pytensor
    from nutpie import compile_pymc as cp
    from pymc.initial_point import make_initial_point_fn
    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.traversal import graph_inputs

    from cladewise.inference.graph_print import structure_text

    lift = _SharedArrays()
    pymc_ipf = cp._wrap_with_lock(make_initial_point_fn(
        model=model, overrides=None, default_strategy="support_point",
        jitter_rvs=set(model.free_RVs), return_transformed=True,
    ))
    logp = model.logp()
    out = {"lift": lift, "pymc_ipf": pymc_ipf, "key": None, "shared": {}, "logp": logp}
    graphs = [lift(logp), *lift(model.unobserved_value_vars)]
    text = structure_text(graphs)
    if text is None:
        return out
    shared = {v.name: v for v in graph_inputs(graphs) if isinstance(v, SharedVariable)}
    point = pymc_ipf(0)
    cfg = pytensor.config
    desc = {
        "graphs": sha(text.encode()),
        "free": [model.rvs_to_values[rv].name for rv in model.free_RVs],
        "point": {n: list(np.shape(v)) for n, v in sorted(point.items())},
        "shared": {n: [str(v.type), list(np.shape(v.get_value(borrow=True)))]
                   for n, v in sorted(shared.items())},
        "check_bounds": bool(model.check_bounds),
        "config": [str(cfg.floatX), str(cfg.numba__fastmath), str(cfg.optimizer),
                   str(cfg.optimizer_including), str(cfg.optimizer_excluding)],
        "engine": _engine_source_hash(), "versions": _versions(),
    }
    try:
        from numba.core.registry import cpu_target

        desc["cpu"] = str(cpu_target.target_context.codegen().magic_tuple())
    except Exception:  # noqa: BLE001 - without the CPU, no quick key
        return out
    out.update(key=sha(json.dumps(desc, sort_keys=True).encode()), shared=shared)
    return out


def _layout(prep: dict[str, Any]) -> dict[str, Any]:
    """What the quick path reads from an entry to rebuild the compiled model."""
    names, slices, shapes = prep["shape_info"]
    return {
        "n_dim": int(prep["n_dim"]), "n_expanded": int(prep["n_expanded"]),
        "names": [str(n) for n in names], "slices": [[int(s.start), int(s.stop)] for s in slices],
        "shapes": [list(map(int, sh)) for sh in shapes],
        "logp_names": prep["logp_names"], "expand_names": prep["expand_names"],
        "user_data": str(prep["user_data"].dtype.descr),
    }


def _not_compiled(*args: Any) -> Any:  # pragma: no cover - only numba would call it
    raise RuntimeError("a cached callback was to be compiled again")


def _from_layout(model: Any, quick: dict[str, Any], layout: dict[str, Any]) -> dict[str, Any] | None:
    """The :func:`_prepare` result rebuilt from an entry's layout, without PyTensor compiles."""
    from nutpie import compile_pymc as cp

    wanted = list(dict.fromkeys([*layout["logp_names"], *layout["expand_names"]]))
    if any(n not in quick["shared"] for n in wanted):
        return None
    n_dim = layout["n_dim"]
    names = layout["names"]
    slices = [slice(a, b) for a, b in layout["slices"]]
    shapes = [tuple(sh) for sh in layout["shapes"]]
    free = [(n, sh) for n, s, sh in zip(names, slices, shapes) if s.stop <= n_dim]
    ipf = cp._rv_dict_to_flat_array_wrapper(
        quick["pymc_ipf"], names=[n for n, _ in free], shapes=[sh for _, sh in free])
    prep = dict(n_dim=n_dim, n_expanded=layout["n_expanded"], logp_pt=None, expand_pt=None,
                initial_point_fn=ipf, shape_info=(names, slices, shapes))
    prep.update(nutpie_callbacks(n_dim, layout["n_expanded"], _not_compiled, _not_compiled,
                           {n: quick["shared"][n] for n in wanted},
                           layout["logp_names"], layout["expand_names"]))
    if str(prep["user_data"].dtype.descr) != layout["user_data"]:
        return None
    return prep


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
    return sha(json.dumps(desc, sort_keys=True).encode()), desc


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
    for name in FUNCS:
        raw, sig = prep["raw"][name]
        cfuncs[name], caches[name] = make_cfunc(raw, sig, (payloads or {}).get(name))
    return _assemble(model, prep, cfuncs), caches


def _quick_hit(model: Any, quick: dict[str, Any], root: Path) -> tuple[Any, Path] | None:
    """The compiled model from the entry recorded under the quick key, if it checks out.

    An entry whose code does not load, or does not reproduce PyMC's log density and
    gradient, is deleted; the caller then takes the full path.
    """
    entry = find_entry(root, "quick", quick["key"])
    if entry is None:
        return None
    try:
        layout = json.loads((entry / "meta.json").read_text())["quick"]
        payloads = read_entry(entry)
        prep = _from_layout(model, quick, layout) if payloads is not None else None
        if prep is not None:
            compiled, caches = _compile(model, prep, payloads)
            if all(c.loaded for c in caches.values()) and _agrees(compiled, model, quick["logp"]):
                os.utime(entry / "meta.json")  # most recently used: evicted last
                return compiled, entry
    except Exception:  # noqa: BLE001 - any failure: the full path decides
        pass
    shutil.rmtree(entry, ignore_errors=True)
    quick["dropped"] = True
    return None


def quick_key(model: Any) -> str | None:
    """The quick key of a PyMC model (see the module docstring); ``None`` if it has none."""
    return _quick(model)["key"]


def structure_key(model: Any) -> str | None:
    """The cache key of a PyMC model: equal for models that share compiled code.

    ``None`` when the model cannot be cached (PyTensor cannot key one of its ops).
    """
    return _key(_prepare(model, _quick(model)))[0]


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
        entry, or ``"uncached"``), ``key``, ``path``, ``seconds`` and ``quick``
        (True when the entry was found by its quick key, without PyTensor compiles).
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

        quick = _quick(model)
    except Exception as err:  # noqa: BLE001 - a real model error is raised again by nutpie
        return plain(f"cache unavailable for this model: {err!r}")
    root = compile_cache_dir()
    if quick["key"] is not None:
        with _LOCK:
            found = _quick_hit(model, quick, root)
        if found is not None:
            compiled, entry = found
            info.update(status="hit", key=entry.name, path=str(entry), quick=True,
                        seconds=time.perf_counter() - t0)
            return compiled
    try:
        prep = _prepare(model, quick)
        key, desc = _key(prep)
    except Exception as err:  # noqa: BLE001 - a real model error is raised again by nutpie
        return plain(f"cache unavailable for this model: {err!r}")
    if key is None:
        return plain("PyTensor cannot key this graph")

    entry = root / key
    info.update(key=key, path=str(entry), quick=False)
    quick_meta = {"key": quick["key"], **_layout(prep)} if quick["key"] is not None else None
    with _LOCK:
        status = "rebuilt" if quick.get("dropped") else "miss"
        if entry.exists():
            payloads = read_entry(entry)
            if payloads is not None:
                compiled, caches = _compile(model, prep, payloads)
                if all(c.loaded for c in caches.values()) and _agrees(compiled, model, quick["logp"]):
                    os.utime(entry / "meta.json")  # most recently used: evicted last
                    if quick_meta is not None:  # found the slow way: let the next one be quick
                        update_meta(entry, quick=quick_meta)
                    info.update(status="hit", seconds=time.perf_counter() - t0)
                    return compiled
            shutil.rmtree(entry, ignore_errors=True)
            status = "rebuilt"
        announce("first time for this model structure" if status == "miss"
                 else "the cached copy failed its checks and is rebuilt")
        compiled, caches = _compile(model, prep, None)
        if not _agrees(compiled, model, quick["logp"]):
            return plain("the shared-data form of the model disagreed with PyMC")
        blobs = {n: c.saved for n, c in caches.items()}
        if all(b is not None for b in blobs.values()):
            meta = {"created": time.time(), "n_dim": desc["n_dim"], "versions": desc["versions"],
                    "names": desc["names"], "quick": quick_meta}
            try:
                write_entry(root, key, blobs, meta)
            except OSError as err:  # read-only or full disk: work without the cache
                info["reason"] = f"could not write the cache: {err}"
        else:
            info["reason"] = "numba could not serialise the compiled code"
        info.update(status=status, seconds=time.perf_counter() - t0)
        return compiled
