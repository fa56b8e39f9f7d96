"""``cladewise simulate SPEC --out DIR``: simulate trait data from a ``[simulation]`` table.

The spec format and the files written are described in :mod:`cladewise.studies.simulate`.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from cladewise.cli.common import Command
from cladewise.errors import InputError

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", type=Path, help="TOML file with [data] tree and [simulation]")
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace files in a non-empty output folder")
    p.add_argument("--seed", type=int, default=None, help="override the spec's seed")


def _run(args: argparse.Namespace) -> int:
    import numpy as np

    from cladewise.model.evolution import model_warnings
    from cladewise.studies.simulate import dataset_from_spec, simulate_dataset, write_dataset

    kwargs, tree = dataset_from_spec(Path(args.spec), args.seed)
    reps = kwargs.pop("replicates")
    out = Path(args.out)
    if out.is_dir() and any(out.iterdir()) and not args.overwrite:
        raise InputError(f"output folder {out} is not empty; choose a new folder or pass --overwrite.")
    # One generator across replicates so they are independent yet reproducible.
    gen = np.random.default_rng(kwargs["seed"])
    seed = kwargs.pop("seed")
    for msg in model_warnings(tree, kwargs["model"]):
        print(f"warning: {msg}")
    for r in range(reps):
        sim = simulate_dataset(tree, seed=gen, **kwargs)
        sim.truth["seed"] = seed
        sim.truth["replicate"] = r + 1
        target = out if reps == 1 else out / f"replicate_{r + 1:04d}"
        write_dataset(sim, target, overwrite=args.overwrite)
    where = out if reps == 1 else f"{out} ({reps} replicate folders)"
    print(f"simulated {tree.n_tips} species x {len(kwargs['traits'])} traits -> {where}")
    return 0


COMMAND = Command("simulate", "simulate trait data on a tree from a spec's [simulation] table", _arguments, _run)
