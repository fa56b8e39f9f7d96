"""A tiny invented data set (8 species, two traits) and spec writer for command-line tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

# Invented tree: 8 species, ultrametric (every tip at height 4).
TREE = "((((a:1,b:1):1,c:2):1,(d:1.5,e:1.5):1.5):1,((f:2,g:2):1,h:3):1);\n"
SPECIES = list("abcdefgh")


def write_tiny(folder: Path, *, model: str | None = None, sampling: str = "", columns=("x", "y")) -> Path:
    """Write tree.nwk, traits.csv (invented values) and spec.toml into ``folder``; return the spec path."""
    rng = np.random.default_rng(11)
    values = rng.normal(size=(len(SPECIES), len(columns)))
    values[:, 1] += 0.8 * values[:, 0]  # some correlation, so the model has something to find
    (folder / "tree.nwk").write_text(TREE)
    rows = [",".join(["species", *columns])]
    rows += [",".join([s, *(f"{v:.4f}" for v in row)]) for s, row in zip(SPECIES, values)]
    (folder / "traits.csv").write_text("\n".join(rows) + "\n")
    if model is None:
        model = f'kind = "correlated"\ntraits = ["{columns[0]}", "{columns[1]}"]\n'
    spec = folder / "spec.toml"
    spec.write_text(
        '# Invented data for a command-line test.\n[data]\ntree = "tree.nwk"\ntraits = "traits.csv"\n\n'
        f"[model]\n{model}\n[sampling]\nsampler = \"nutpie\"\nchains = 2\nseed = 3\n{sampling}"
    )
    return spec


@pytest.fixture(scope="session")
def tiny():
    """The writer :func:`write_tiny` (fixtures share helpers without importing conftest)."""
    return write_tiny
