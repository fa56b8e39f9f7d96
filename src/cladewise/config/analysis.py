"""Analysis specifications: plain TOML files that say what to analyse and how.

Only the ``[data]`` section is validated here; ``[model]`` and ``[sampling]`` are
kept as raw dictionaries for the model builders, which validate them.

``[data]`` keys (paths are relative to the spec file)::

    tree = "tree.nwk"            # Newick or NEXUS; the first tree is used
    trees = "sample.nex"         # optional tree sample, same species as `tree`
    traits = "species.csv"       # CSV or TSV
    species = "species"          # name of the species column
    specimens = false            # true: one row per specimen
    log = ["body_mass"]          # traits to natural-log transform
    se_suffix = "_se"            # standard-error columns <trait>_se
    n_suffix = "_n"              # sample-size columns <trait>_n
    sd_suffix = "_sd"            # standard-deviation columns <trait>_sd
    drop_unmatched = false       # true: leave out table species absent from the tree
    ultrametric_rtol = 1e-6      # tolerance of the ultrametric check

At least one of ``tree`` and ``trees`` is required; with only ``trees`` the first
tree of the sample is the reference tree.
"""

from __future__ import annotations

import difflib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cladewise.data.summary import DataSummary, summarize
from cladewise.errors import InputError
from cladewise.data.matching import MatchResult, match_names
from cladewise.data.traits import read_traits
from cladewise.data.treefiles import read_trees

__all__ = ["DataSpec", "Spec", "load_spec", "load_data", "prepare_data"]


@dataclass(frozen=True)
class DataSpec:
    """The validated ``[data]`` section (paths resolved and checked to exist)."""

    traits: Path
    tree: Path | None = None
    trees: Path | None = None
    species: str = "species"
    specimens: bool = False
    log: tuple[str, ...] = ()
    se_suffix: str = "_se"
    n_suffix: str = "_n"
    sd_suffix: str = "_sd"
    drop_unmatched: bool = False
    ultrametric_rtol: float = 1e-6


@dataclass(frozen=True)
class Spec:
    """An analysis specification read from TOML."""

    path: Path
    data: DataSpec
    model: dict[str, Any] = field(default_factory=dict)
    sampling: dict[str, Any] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict)


_TYPES: dict[str, tuple[type, ...]] = {
    "tree": (str,),
    "trees": (str,),
    "traits": (str,),
    "species": (str,),
    "specimens": (bool,),
    "log": (list,),
    "se_suffix": (str,),
    "n_suffix": (str,),
    "sd_suffix": (str,),
    "drop_unmatched": (bool,),
    "ultrametric_rtol": (float, int),
}


def _suggest(key: str, options) -> str:
    close = difflib.get_close_matches(key, list(options), n=1, cutoff=0.5)
    return f" Did you mean '{close[0]}'?" if close else ""


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file.

    Raises
    ------
    InputError
        The file is missing or not valid TOML, ``[data]`` is missing, has unknown
        keys or values of the wrong type, or names files that do not exist.
    """
    path = Path(path).resolve()
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"spec file not found: {path}. Check the path.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML: {exc}. Fix the syntax at that place.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read spec file {path}: {exc}") from None
    data = raw.get("data")
    if not isinstance(data, dict):
        raise InputError(
            f"{path}: no [data] section. Add one with at least `tree = ...` and `traits = ...`."
        )
    for key, value in data.items():
        if key not in _TYPES:
            raise InputError(
                f"{path}: unknown key '{key}' in [data].{_suggest(key, _TYPES)} "
                f"Known keys: {', '.join(_TYPES)}."
            )
        if not isinstance(value, _TYPES[key]) or (isinstance(value, bool) and bool not in _TYPES[key]):
            want = " or ".join(t.__name__ for t in _TYPES[key])
            raise InputError(f"{path}: [data] {key} must be a {want}, not {value!r}.")
    log = data.get("log", [])
    if not all(isinstance(x, str) for x in log):
        raise InputError(f"{path}: [data] log must be a list of trait names (strings).")
    if "traits" not in data:
        raise InputError(f"{path}: [data] needs `traits = \"<table file>\"`.")
    if "tree" not in data and "trees" not in data:
        raise InputError(f"{path}: [data] needs `tree = \"<tree file>\"` (or `trees = ...`).")
    base = path.parent

    def resolve(key: str) -> Path | None:
        if key not in data:
            return None
        p = (base / data[key]).resolve()
        if not p.is_file():
            raise InputError(
                f"{path}: [data] {key} = \"{data[key]}\" does not exist (looked for {p}). "
                "Paths are relative to the spec file."
            )
        return p

    rtol = float(data.get("ultrametric_rtol", 1e-6))
    if not 0 <= rtol < 1:
        raise InputError(f"{path}: [data] ultrametric_rtol must be between 0 and 1.")
    ds = DataSpec(
        traits=resolve("traits"),  # type: ignore[arg-type]
        tree=resolve("tree"),
        trees=resolve("trees"),
        species=data.get("species", "species"),
        specimens=data.get("specimens", False),
        log=tuple(log),
        se_suffix=data.get("se_suffix", "_se"),
        n_suffix=data.get("n_suffix", "_n"),
        sd_suffix=data.get("sd_suffix", "_sd"),
        drop_unmatched=data.get("drop_unmatched", False),
        ultrametric_rtol=rtol,
    )
    model = raw.get("model", {})
    sampling = raw.get("sampling", {})
    for name, sec in (("model", model), ("sampling", sampling)):
        if not isinstance(sec, dict):
            raise InputError(f"{path}: [{name}] must be a table (a section), not a value.")
    return Spec(path=path, data=ds, model=model, sampling=sampling, raw=raw)


def prepare_data(
    traits: str | Path,
    tree: str | Path | None = None,
    *,
    trees: str | Path | None = None,
    species: str = "species",
    specimens: bool = False,
    log: tuple[str, ...] | list[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    drop_unmatched: bool = False,
    ultrametric_rtol: float = 1e-6,
) -> tuple[MatchResult, DataSummary]:
    """Files to a validated, matched tree and trait table, and its summary.

    The Python counterpart of a spec's ``[data]`` section (same arguments). When
    the ``tree`` file holds several trees the first is used and the summary says
    so; give the file as ``trees`` to use the whole sample.
    """
    if tree is None and trees is None:
        raise InputError("give a tree file (tree) or a tree sample (trees).")
    warns: list[str] = []
    sample: list = []
    if trees is not None:
        sample = read_trees(trees)
    if tree is not None:
        in_file = read_trees(tree)
        ref = in_file[0]
        if len(in_file) > 1:
            warns.append(
                f"{tree} holds {len(in_file)} trees; the first is used. Give the file as "
                "`trees` to use them all."
            )
    else:
        ref = sample[0]
    if sample and set(sample[0].tip_names) != set(ref.tip_names):
        a, b = set(ref.tip_names), set(sample[0].tip_names)
        only_ref, only_s = sorted(a - b)[:5], sorted(b - a)[:5]
        raise InputError(
            f"the tree sample {trees} and the tree {tree} do not hold the same tips"
            + (f"; only in the tree: {', '.join(only_ref)}" if only_ref else "")
            + (f"; only in the sample: {', '.join(only_s)}" if only_s else "")
            + ". Use a tree and a sample from the same analysis."
        )
    td = read_traits(
        traits,
        species=species,
        specimens=specimens,
        log=tuple(log),
        se_suffix=se_suffix,
        n_suffix=n_suffix,
        sd_suffix=sd_suffix,
    )
    match = match_names(ref, td, drop_unmatched=drop_unmatched, trees=sample)
    summary = summarize(
        match,
        tree_source=str(tree if tree is not None else f"{trees} (tree 1)"),
        rtol=ultrametric_rtol,
        trees_source=str(trees) if trees is not None else None,
        extra_warnings=warns,
    )
    return match, summary


def load_data(spec: Spec) -> tuple[MatchResult, DataSummary]:
    """Read, check and match the files of a spec's ``[data]`` section."""
    d = spec.data
    return prepare_data(
        d.traits,
        d.tree,
        trees=d.trees,
        species=d.species,
        specimens=d.specimens,
        log=d.log,
        se_suffix=d.se_suffix,
        n_suffix=d.n_suffix,
        sd_suffix=d.sd_suffix,
        drop_unmatched=d.drop_unmatched,
        ultrametric_rtol=d.ultrametric_rtol,
    )
