"""``cladewise cache``: where compiled code is kept, how big it is, and clearing it.

Two caches make later runs start fast: compiled models for the sampler (one entry
per model structure, :mod:`cladewise.inference.compile_cache`) and numba's
machine code of the likelihood engine (compiled once per install and trait count).
"""

from __future__ import annotations

import argparse

from cladewise.cli.common import Command

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--clear", action="store_true",
                   help="delete every compiled model (the next fit of each model compiles again)")
    p.add_argument("--clear-engine", action="store_true",
                   help="also delete numba's compiled likelihood engine (the next fit recompiles it)")


def _mb(n: int) -> str:
    return f"{n / 1024 / 1024:.1f} MB"


def _run(args: argparse.Namespace) -> int:
    from cladewise.inference.compile_cache import clear_compile_cache, compile_cache_info
    from cladewise.inference.engine_cache import clear_engine_cache, engine_cache_info

    if args.clear or args.clear_engine:
        n = clear_compile_cache()
        print(f"Removed {n} compiled model{'s' if n != 1 else ''}.")
    if args.clear_engine:
        files = clear_engine_cache()
        print(f"Removed {files} compiled engine file{'s' if files != 1 else ''}.")
    info = compile_cache_info()
    eng = engine_cache_info()
    print(f"Compiled models: {info['path']}")
    print(f"  {info['entries']} entr{'ies' if info['entries'] != 1 else 'y'}, {_mb(info['bytes'])} "
          f"(limit {_mb(info['max_bytes'])}; set CLADEWISE_CACHE_MAX_MB to change, "
          "CLADEWISE_CACHE_DIR to move, CLADEWISE_COMPILE_CACHE=0 to turn off)")
    print(f"Likelihood engine (numba): {eng['path']}")
    print(f"  {eng['files']} files, {_mb(eng['bytes'])}; trait counts compiled: "
          f"{', '.join(map(str, eng['trait_counts'])) or 'none yet'}")
    return 0


COMMAND = Command("cache", "show or clear the compiled-code caches that make later fits start fast",
                  _arguments, _run)
