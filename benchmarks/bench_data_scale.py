"""Log density and gradient at the model's starting point across data scales.

The readers accept tree heights in ``cladewise.data.trees.HEIGHT_RANGE`` and trait
values in ``cladewise.data.tables.VALUE_RANGE``. This script builds a correlated BM
model (30 species, invented data, fixed seed) at the ends of those ranges and at
ordinary scales, and prints the log density at PyMC's initial point and whether
its gradient is finite. A finite value at the range ends shows the limits keep
the model computable; a log density far from O(number of species) shows how far
the starting point is from the data's scale.

Run:  /work/venv/bin/python benchmarks/bench_data_scale.py
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

from cladewise.data.matching import match_names
from cladewise.data.traits import read_traits
from cladewise.data.treefiles import format_newick, read_tree
from cladewise.model.build import ModelData, ModelSpec, build_model

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from treegen import random_tree  # noqa: E402

CASES = [
    (1.0, 1.0),
    (1.0, 1e3),
    (1e3, 1.0),
    (1e-3, 1.0),
    (1.1e-12, 2e99),  # smallest height, largest values
    (0.9e12, 2e99),
    (1.1e-12, 1e-100),
    (0.9e12, 1e-100),
]


def main() -> None:
    rng = np.random.default_rng(0)
    print(f"{'height':>9} {'values':>9} {'logp at start':>15} {'finite gradient':>16}")
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        for height, scale in CASES:
            t = random_tree(30, rng, ultrametric=True)
            t = t.with_lengths(t.length * height / t.tip_heights().max())
            x = (rng.normal(size=(30, 2)) * 0.3 + 3) * scale
            (d / "t.nwk").write_text(format_newick(t))
            rows = "".join(f"{n},{float(a)!r},{float(b)!r}\n" for n, (a, b) in zip(t.tip_names, x))
            (d / "x.csv").write_text("species,a,b\n" + rows)
            match = match_names(read_tree(d / "t.nwk"), read_traits(d / "x.csv"))
            spec = ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"], "evolution": "bm"})
            model = build_model(ModelData.from_match(match), spec).model
            start = model.initial_point()
            logp = float(model.compile_logp()(start))
            grad_ok = bool(np.all(np.isfinite(model.compile_dlogp()(start))))
            print(f"{height:>9.2g} {scale:>9.2g} {logp:>15.4g} {str(grad_ok):>16}", flush=True)


if __name__ == "__main__":
    main()
