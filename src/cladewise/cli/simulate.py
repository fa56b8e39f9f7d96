"""``cladewise simulate SPEC --out DIR``: simulate trait data from a ``[simulation]`` table.

The spec format and the files written are described in :mod:`cladewise.studies.simulate`.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from cladewise.cli.common import Command

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", type=Path, help="TOML file with [data] tree and [simulation]")
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace files in a non-empty output folder")
    p.add_argument("--seed", type=int, default=None, help="override the spec's seed")


def _run(args: argparse.Namespace) -> int:
    import numpy as np

    from cladewise.config.simulation import load_simulation_spec
    from cladewise.inference.results import check_output_folder, write_marker
    from cladewise.model.evolution import model_warnings
    from cladewise.studies.simulate import simulate_dataset, write_dataset

    spec = load_simulation_spec(Path(args.spec), args.seed)
    kwargs, tree, reps, seed = spec.settings, spec.tree, spec.replicates, spec.seed
    out = Path(args.out)
    check_output_folder(out, overwrite=args.overwrite, inputs=[args.spec], what="data set", add_to=reps > 1)
    if reps > 1:
        out.mkdir(parents=True, exist_ok=True)
        write_marker(out, "simulate")
    # One generator across replicates so they are independent yet reproducible.
    gen = np.random.default_rng(seed)
    for msg in model_warnings(tree, kwargs["model"]):
        print(f"warning: {msg}")
    for r in range(reps):
        sim = simulate_dataset(tree, seed=gen, **kwargs)
        sim.truth["seed"] = seed
        sim.truth["replicate"] = r + 1
        target = out if reps == 1 else out / f"replicate_{r + 1:04d}"
        write_dataset(sim, target, overwrite=args.overwrite, inputs=[args.spec])
    where = out if reps == 1 else f"{out} ({reps} replicate folders)"
    print(f"simulated {tree.n_tips} species x {len(kwargs['traits'])} traits -> {where}")
    return 0


COMMAND = Command("simulate", "simulate trait data on a tree from a spec's [simulation] table", _arguments, _run)
