"""Grid files: many fits of (spec, tree sample) pairs, read by ``cladewise grid``.

Grid file (TOML; every path is relative to the grid file)::

    # optional: [sampling] overrides applied to every fit (chains, draws, tune,
    # seed, sampler, target_accept)
    [sampling]
    draws = 500
    tune = 500

    # one fit per [[fit]] table
    [[fit]]
    name = "bm_20_trees"          # output folder under --out; default: spec file stem,
                                  # plus "__<trees file stem>" and "__<n>trees" when given
    spec = "models/demo_correlated.toml"
    trees = "data/sample.nex"     # optional: fit over this tree sample (pooled)
    n_trees = 20                  # optional: a seeded random subset of the sample
                                  # (the spec's own [data] trees when `trees` is absent)
    sampling = { seed = 3 }       # optional: overrides for this fit only

    # every spec x every tree file (names built as above)
    [[cross]]
    specs = ["models/a.toml", "models/b.toml"]
    trees = ["data/s1.nex", "data/s2.nex"]   # optional; absent: each spec's own tree
    n_trees = 10                             # optional
    sampling = { draws = 300 }               # optional

A fit without ``trees`` and ``n_trees`` is a single-tree fit (what ``cladewise fit``
does); with either it pools over the tree sample. Running the grid:
:mod:`cladewise.studies.grid`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cladewise.config.analysis import SAMPLING
from cladewise.config.tables import Key, Table, Where, check_sections, read_table, read_toml
from cladewise.errors import InputError

__all__ = ["GridJob", "load_grid", "FIT", "CROSS", "GRID_SAMPLING"]

_NAME_OK = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")


def _folder_name(name: str) -> str:
    if not _NAME_OK.match(name):
        raise InputError(
            f"fit name {name!r} cannot be a folder name; use letters, digits, '-', '_' and '.' "
            "(starting with a letter or digit)"
        )
    return name


#: ``[sampling]`` of a grid file: the spec's sampling keys except the progress bar
GRID_SAMPLING = SAMPLING.without("progress")

_N_TREES = Key("int", "a seeded random subset of this many trees of the sample", min=1, example="20")
_SAMPLING_OVERRIDES = Key("table", "sampling overrides for this fit only", table=GRID_SAMPLING,
                          example="{ seed = 3 }")

#: one ``[[fit]]`` table
FIT = Table("fit", {
    "name": Key("str", "output folder under --out", convert=_folder_name, example='"bm_20_trees"'),
    "spec": Key("str", "the analysis spec file", path=True, required=True, example='"models/demo.toml"'),
    "trees": Key("str", "a tree sample to pool over", path=True, example='"data/sample.nex"'),
    "n_trees": _N_TREES,
    "sampling": _SAMPLING_OVERRIDES,
}, help="one fit")

#: one ``[[cross]]`` table
CROSS = Table("cross", {
    "specs": Key("list[str]", "analysis spec files", path=True, required=True,
                 example='["models/a.toml", "models/b.toml"]'),
    "trees": Key("list[str]", "tree sample files; absent: each spec's own tree", path=True,
                 example='["data/s1.nex"]'),
    "n_trees": _N_TREES,
    "sampling": _SAMPLING_OVERRIDES,
}, help="every spec x every tree file")

_SECTIONS = {"fit": "(one fit, [[fit]])", "cross": "(specs x trees, [[cross]])",
             "sampling": "(overrides for every fit)"}


@dataclass(frozen=True)
class GridJob:
    """One fit of a grid (paths absolute)."""

    name: str
    spec: str
    trees: str | None = None
    n_trees: int | None = None
    sampling: dict[str, Any] = field(default_factory=dict)

    @property
    def pooled(self) -> bool:
        """True when the fit pools over a tree sample."""
        return self.trees is not None or self.n_trees is not None


def _default_name(spec: str, trees: str | None, n_trees: int | None) -> str:
    name = Path(spec).stem
    if trees:
        name += "__" + Path(trees).stem
    if n_trees:
        name += f"__{n_trees}trees"
    return name


def _tables(raw: dict[str, Any], name: str, grid: Path) -> list[Any]:
    items = raw.get(name, [])
    if not isinstance(items, list):
        raise InputError(f"{grid}: write each {name} as a [[{name}]] table (double brackets), not [{name}]")
    return items


def load_grid(path: str | Path) -> list[GridJob]:
    """Read and validate a grid file (format in the module docstring).

    Raises
    ------
    InputError
        Bad TOML, unknown sections or keys (with a suggestion), values of the wrong
        type or range, missing files, duplicate or unusable fit names, or no fits.
    """
    grid = Path(path)
    raw, _ = read_toml(grid, "grid file")
    check_sections(raw, _SECTIONS, grid)
    common = read_table(raw.get("sampling", {}), GRID_SAMPLING, Where(grid, "[sampling]"))
    jobs: list[GridJob] = []
    for i, f in enumerate(_tables(raw, "fit", grid), 1):
        d = read_table(f, FIT, Where(grid, f"[[fit]] number {i}"))
        spec = str(d["spec"])
        trees = str(d["trees"]) if "trees" in d else None
        n = d.get("n_trees")
        name = d.get("name") or _default_name(spec, trees, n)
        jobs.append(GridJob(name, spec, trees, n, {**common, **d.get("sampling", {})}))
    for i, c in enumerate(_tables(raw, "cross", grid), 1):
        d = read_table(c, CROSS, Where(grid, f"[[cross]] number {i}"))
        n = d.get("n_trees")
        samp = {**common, **d.get("sampling", {})}
        for sp in d["specs"]:
            for tp in d.get("trees", [None]):
                t = str(tp) if tp is not None else None
                jobs.append(GridJob(_default_name(str(sp), t, n), str(sp), t, n, samp))
    if not jobs:
        raise InputError(f"{grid}: no fits; add [[fit]] or [[cross]] tables (see 'cladewise grid --help')")
    seen: dict[str, int] = {}
    for j in jobs:
        try:
            _folder_name(j.name)
        except InputError as exc:
            raise InputError(f"{grid}: {exc}") from None
        seen[j.name] = seen.get(j.name, 0) + 1
    dup = sorted(n for n, k in seen.items() if k > 1)
    if dup:
        raise InputError(f"{grid}: fit name(s) {dup} occur more than once; give each [[fit]] its own name")
    return jobs
