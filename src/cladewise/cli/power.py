"""``cladewise power SPEC --out DIR``: power and false-positive rate on your own tree.

For each true evolutionary correlation, two traits are simulated on the tree many
times by bivariate Brownian motion, the correlated model is fitted to every data set
(one compiled model for the whole study), and the command reports how often the 95%
HDI of the evolutionary correlation excludes zero, beside how often a Pearson test
that ignores the tree gives p < 0.05 on the same data. At a true correlation of 0 the
share is the false-positive rate. See :func:`cladewise.studies.power.run_power_study`.

SPEC is a TOML file. Only ``tree`` is read from ``[data]`` (other keys are ignored,
so a fit spec with a ``[power]`` table added works too)::

    # Invented example.
    [data]
    tree = "tree.nwk"                  # relative to this file; the first tree is used

    [power]
    traits = ["head_width", "prey_size"]   # two labels; default ["trait_1", "trait_2"]
    correlations = [0.0, 0.2, 0.4, 0.6]    # true evolutionary correlations (default)
    n_datasets = 100                   # simulated data sets per correlation (default 100)
    rates = [0.04, 0.09]               # Brownian rate per trait: variance per unit
                                       # branch length (required; one number for both)
    root_means = [0.0, 0.0]            # values at the root (default 0)
    # Measurement error of the species means (optional; none by default), either
    standard_errors = [0.05, 0.1]      # known se: one number or one per trait
    # or a within-species variance with the number of specimens per species:
    # within_variance = [0.02, 0.05]
    # specimens_per_species = 5        # a number, [low, high] (drawn once per
    #                                  # species) or a table { species_a = 3, ... }
    hdi_prob = 0.95                    # HDI that must exclude 0 (default 0.95)
    alpha = 0.05                       # level of the Pearson test (default 0.05)
    seed = 1

    [sampling]                         # optional, as in a fit spec; default for a
    chains = 2                         # study: 2 chains, 500 draws, 500 tuning steps
    draws = 500
    tune = 500

Output folder (an existing non-empty folder is refused unless ``--overwrite``):
``power_table.csv`` (one row per correlation: shares and Monte Carlo standard
errors), ``power_fits.csv`` (one row per data set), ``power.json`` (settings, priors,
the spec text and the table), ``power.png`` and ``power.svg`` (the figure).
"""

from __future__ import annotations

import argparse
import sys
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cladewise.cli.common import Command
from cladewise.errors import InputError

__all__ = ["COMMAND", "PowerSpec", "load_power_spec", "POWER_KEYS"]

#: keys of the ``[power]`` table
POWER_KEYS = (
    "traits", "correlations", "n_datasets", "rates", "root_means", "standard_errors",
    "within_variance", "specimens_per_species", "hdi_prob", "alpha", "seed",
)


@dataclass
class PowerSpec:
    """A validated power spec: the tree, keyword arguments and sampling options."""

    path: Path
    tree: Any
    kwargs: dict[str, Any] = field(default_factory=dict)
    options: Any = None
    text: str = ""


def _number_or_list(value: Any, key: str) -> Any:
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    if isinstance(value, list):
        ok = bool(value) and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
    if not ok:
        raise InputError(f"[power] {key} must be a number or a list of numbers; got {value!r}")
    return value


def load_power_spec(path: str | Path) -> PowerSpec:
    """Read and validate a power spec (see the module docstring for the format).

    Raises
    ------
    InputError
        When the file, the tree or any setting is wrong; the message says how to fix it.
    """
    import difflib

    from cladewise.studies.power import check_study_tree, measurement_se, trait_names, trait_pair
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.data.trees import read_tree

    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise InputError(f"spec file {path} not found") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path} is not valid TOML: {exc}") from None
    data = doc.get("data")
    if not isinstance(data, dict) or not isinstance(data.get("tree"), str):
        raise InputError(f'{path} needs a [data] table with tree = "path/to/tree.nwk"')
    tree_path = (path.parent / data["tree"]).resolve()
    if not tree_path.is_file():
        raise InputError(f"tree file {tree_path} (from [data] tree in {path}) not found")
    power = doc.get("power")
    if not isinstance(power, dict):
        raise InputError(f"{path} needs a [power] table (see `cladewise power --help`)")
    unknown = sorted(set(power) - set(POWER_KEYS))
    if unknown:
        hints = [u + (f" (did you mean {m[0]!r}?)" if (m := difflib.get_close_matches(u, POWER_KEYS, 1)) else "")
                 for u in unknown]
        raise InputError(f"unknown key(s) in [power]: {', '.join(hints)}; known keys: {', '.join(POWER_KEYS)}")
    if "rates" not in power:
        raise InputError("[power] needs rates = [r1, r2]: the Brownian rate (variance per unit branch length) "
                         "of each trait")

    tree = read_tree(tree_path)
    check_study_tree(tree)
    kw: dict[str, Any] = {}
    kw["traits"] = trait_names(power.get("traits", ["trait_1", "trait_2"]))
    corrs = power.get("correlations", [0.0, 0.2, 0.4, 0.6])
    if not isinstance(corrs, list):
        corrs = [corrs]
    _number_or_list(corrs, "correlations")
    if any(not -1.0 < float(c) < 1.0 for c in corrs):
        raise InputError(f"[power] correlations must be strictly between -1 and 1; got {corrs}")
    kw["correlations"] = [float(c) for c in corrs]
    n = power.get("n_datasets", 100)
    if not isinstance(n, int) or isinstance(n, bool) or n < 2:
        raise InputError(f"[power] n_datasets must be a whole number >= 2; got {n!r}")
    kw["n_datasets"] = n
    kw["rates"] = trait_pair(_number_or_list(power["rates"], "rates"), "[power] rates", positive=True).tolist()
    kw["root_means"] = trait_pair(_number_or_list(power.get("root_means", 0.0), "root_means"),
                             "[power] root_means").tolist()
    for key in ("standard_errors", "within_variance"):
        if key in power:
            _number_or_list(power[key], key)
    spec_n = power.get("specimens_per_species")
    if isinstance(spec_n, list) and len(spec_n) != 2:
        raise InputError("[power] specimens_per_species must be a number, [low, high] or a table species -> number")
    if isinstance(spec_n, list):
        spec_n = tuple(spec_n)
    kw["se"] = power.get("standard_errors")
    kw["within_variance"] = power.get("within_variance")
    kw["specimens"] = spec_n
    for key, lo, hi in (("hdi_prob", 0.5, 1.0), ("alpha", 0.0, 0.5)):
        v = power.get(key, 0.95 if key == "hdi_prob" else 0.05)
        if not isinstance(v, (int, float)) or isinstance(v, bool) or not lo < float(v) < hi:
            raise InputError(f"[power] {key} must be a number between {lo} and {hi}; got {v!r}")
        kw[key] = float(v)
    seed = power.get("seed", 1)
    if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
        raise InputError(f"[power] seed must be a whole number >= 0; got {seed!r}")
    kw["seed"] = seed
    # the error model is checked here, so a bad table fails before the long compile
    measurement_se(tree, kw["se"], kw["within_variance"], kw["specimens"], seed=0)

    sampling = doc.get("sampling", {})
    if not isinstance(sampling, dict):
        raise InputError("[sampling] must be a table")
    defaults = {"chains": 2, "draws": 500, "tune": 500, "progress": False}
    options = SamplingOptions.from_dict({**defaults, **sampling})
    return PowerSpec(path=path, tree=tree, kwargs=kw, options=options, text=text)


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="TOML file with [data] tree and a [power] table (see the docs of cladewise.cli.power)")
    p.add_argument("--out", required=True, help="folder for power_table.csv, power_fits.csv, power.json, power.png/.svg")
    p.add_argument("--overwrite", action="store_true", help="replace files in an existing non-empty folder")
    p.add_argument("--n-datasets", type=int, help="override [power] n_datasets")
    p.add_argument("--seed", type=int, help="override [power] seed")


def _run(args: argparse.Namespace) -> int:
    from cladewise.studies.power import prepare_output_folder, run_power_study

    spec = load_power_spec(args.spec)
    if args.n_datasets is not None:
        if args.n_datasets < 2:
            raise InputError("--n-datasets must be at least 2")
        spec.kwargs["n_datasets"] = args.n_datasets
    if args.seed is not None:
        spec.kwargs["seed"] = args.seed
    # refuse a used folder now rather than after an hour of fitting
    prepare_output_folder(args.out, args.overwrite)

    def say(msg: str) -> None:
        print(msg, file=sys.stderr, flush=True)

    result = run_power_study(spec.tree, options=spec.options, progress=say, **spec.kwargs)
    result.settings.update({
        "spec_path": str(spec.path), "spec_text": spec.text,
        "command": args.command_line,
    })
    paths = result.save(args.out, overwrite=True)
    print(result.to_text())
    print("\nSaved: " + ", ".join(str(p) for p in paths.values()))
    return 0


COMMAND = Command("power", "power and false-positive rate of the correlated model on your tree, by simulation",
                  _arguments, _run)
