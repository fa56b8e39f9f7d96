"""``cladewise grid GRID.toml --out DIR``: many fits through dask.

``--scheduler ADDRESS`` sends the fits to a dask scheduler started on its own
(``dask scheduler`` / ``dask worker``, e.g. on a batch system); ADDRESS is
``tcp://host:port`` or the scheduler file written by ``dask scheduler
--scheduler-file``. Progress: one line per finished fit here, and
``DIR/grid_status.json`` for a grid run in the background.
"""

from __future__ import annotations

import argparse

from cladewise.cli.common import Command

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grid", help="grid file (TOML) with [[fit]] and/or [[cross]] tables; "
                                "format in the docstring of cladewise.studies.grid")
    p.add_argument("--out", required=True, help="folder for one sub-folder per fit (finished fits are skipped)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address (tcp://host:port) or scheduler file of a running dask scheduler whose workers "
                        "have cladewise installed; they need not see your files (default: a local cluster "
                        "on this machine)")
    p.add_argument("--workers", type=int, default=2, metavar="N",
                   help="worker processes of the local cluster (default 2)")


def _run(args: argparse.Namespace) -> int:
    from cladewise.studies.grid import format_status, run_grid

    table = run_grid(args.grid, args.out, scheduler=args.scheduler, n_workers=args.workers)
    print()
    print(format_status(table))
    return 1 if (table["status"] == "failed").any() else 0


COMMAND = Command("grid", "run many fits (specs x tree samples) in parallel, resuming finished ones", _arguments, _run)
