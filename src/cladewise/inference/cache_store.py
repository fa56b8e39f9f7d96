"""Where compiled models live on disk: folders, their checksums, size bound and clearing.

One entry is one folder named by the model's structure key, holding the numba object
code of the two sampler callbacks (``logp.nbc``, ``expand.nbc``) and ``meta.json``
(checksums, versions, layout). :mod:`cladewise.inference.compile_cache` decides what
goes in; this module only stores, finds, bounds and clears.

Where the cache lives: ``$CLADEWISE_CACHE_DIR/compiled`` if that variable is set,
else ``$XDG_CACHE_HOME/cladewise/compiled`` (``~/.cache/cladewise/compiled``;
``%LOCALAPPDATA%\\cladewise\\compiled`` on Windows). The oldest-used entries are
removed when the total exceeds ``$CLADEWISE_CACHE_MAX_MB`` (default 500).
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import shutil
import sys
import tempfile
import uuid
import warnings
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "DEFAULT_MAX_MB", "FUNCS", "sha", "compile_cache_dir", "compile_cache_info",
    "clear_compile_cache", "prune_compile_cache", "read_entry", "write_entry",
    "find_entry", "update_meta", "EntryCache", "make_cfunc", "nutpie_callbacks",
]

#: default bound on the cache's total size (MB); ``$CLADEWISE_CACHE_MAX_MB`` overrides
DEFAULT_MAX_MB = 500
#: the two compiled callbacks of an entry
FUNCS = ("logp", "expand")


def sha(data: bytes) -> str:
    """SHA-256 of bytes, as hex."""
    return hashlib.sha256(data).hexdigest()


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


def read_entry(path: Path) -> dict[str, Any] | None:
    """Payloads of an entry whose files match their checksums, else None."""
    try:
        meta = json.loads((path / "meta.json").read_text())
        out = {}
        for name in FUNCS:
            data = (path / f"{name}.nbc").read_bytes()
            if sha(data) != meta["sha256"][name]:
                return None
            out[name] = pickle.loads(data)
        return out
    except Exception:  # noqa: BLE001 - missing, truncated or unreadable: rebuild
        return None


def write_entry(root: Path, key: str, blobs: dict[str, bytes], meta: dict[str, Any]) -> None:
    root.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{key[:12]}-{uuid.uuid4().hex[:8]}-", dir=root))
    try:
        for name, data in blobs.items():
            (tmp / f"{name}.nbc").write_bytes(data)
        meta = dict(meta, sha256={n: sha(b) for n, b in blobs.items()})
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


def find_entry(root: Path, field: str, value: str) -> Path | None:
    """The entry whose ``meta.json`` has ``meta[field]["key"] == value`` (None if none)."""
    for entry in _entries(root):
        try:
            meta = json.loads((entry / "meta.json").read_text())
        except (OSError, ValueError):
            continue
        if isinstance(meta.get(field), dict) and meta[field].get("key") == value:
            return entry
    return None


def update_meta(entry: Path, **fields: Any) -> None:
    """Add fields to an entry's ``meta.json`` (atomically; a vanished entry is left alone)."""
    try:
        meta = json.loads((entry / "meta.json").read_text())
        meta.update(fields)
        tmp = entry / f".meta-{uuid.uuid4().hex[:8]}.json"
        tmp.write_text(json.dumps(meta, indent=1))
        os.replace(tmp, entry / "meta.json")
    except (OSError, ValueError):
        pass


# --------------------------------------------------------------------------- numba glue
class EntryCache:
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


def make_cfunc(pyfunc: Any, sig: Any, payload: Any = None) -> tuple[Any, EntryCache]:
    """A numba C callback of ``pyfunc``: loaded from ``payload`` if given and loadable,
    else compiled (its object code is then in ``EntryCache.saved``)."""
    from numba.core import sigutils
    from numba.core.ccallback import CFunc

    args, ret = sigutils.normalize_signature(sig)
    cf = CFunc(pyfunc, (args, ret), locals={}, options={})
    cache = EntryCache(payload)
    cf._cache = cache
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cf.compile()
    return cf, cache


def _placeholder(v: np.ndarray) -> np.ndarray:
    out = np.zeros((1,) * v.ndim, dtype=v.dtype)
    out.flags.writeable = v.flags.writeable
    return out


def nutpie_callbacks(n_dim: int, n_expanded: int, logp_fn: Any, expand_fn: Any, shared_vars: dict,
                     logp_names: list[str], expand_names: list[str]) -> dict[str, Any]:
    """nutpie's shared-data record and the Python sources of its two C callbacks.

    ``logp_fn``/``expand_fn`` (PyTensor's numba functions) are only called if numba
    compiles the callbacks; code loaded from the cache never looks at them.
    """
    from nutpie import compile_pymc as cp

    shared_data = {n: np.array(v.get_value(), order="C", copy=True) for n, v in shared_vars.items()}
    for v in shared_data.values():
        v.flags.writeable = False
    user_data = cp.make_user_data(shared_vars, shared_data)
    # nutpie freezes the arrays it is given into the code as typed placeholders (the real
    # ones come through user_data at run time); numba cannot cache code that points at an
    # array above 1 MB (N > ~60,000 species), so it gets tiny ones of the same type.
    typed = {n: _placeholder(v) for n, v in shared_data.items()}
    logp_raw, logp_sig = cp._make_c_logp_func(n_dim, logp_fn, user_data, logp_names, typed)
    expand_raw, expand_sig = cp._make_c_expand_func(n_dim, n_expanded, expand_fn, user_data,
                                                    expand_names, typed)
    return dict(shared_data=shared_data, user_data=user_data, logp_names=logp_names,
                expand_names=expand_names,
                raw={"logp": (logp_raw, logp_sig), "expand": (expand_raw, expand_sig)})
