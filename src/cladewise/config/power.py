"""The ``[power]`` table, read by ``cladewise power SPEC --out DIR``.

SPEC is a TOML file. Only ``tree`` is read from ``[data]`` (the other ``[data]``
keys are accepted unchecked, so a fit spec with a ``[power]`` table added works
too)::

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

The study itself: :func:`cladewise.studies.power.run_power_study`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cladewise.config.analysis import DATA, SAMPLING, SPEC_SECTIONS
from cladewise.config.tables import Key, Table, Where, check_sections, read_table, read_toml, section
from cladewise.data.treefiles import read_tree
from cladewise.errors import InputError

__all__ = ["POWER", "POWER_KEYS", "POWER_SAMPLING_DEFAULTS", "PowerSpec", "load_power_spec"]

_NUMBERS = ("float", "list[float]")

#: ``[power]``
POWER = Table("power", {
    "traits": Key("list[str]", "two trait labels", sizes=(2,), unique=True, default=["trait_1", "trait_2"],
                  example='["head_width", "prey_size"]'),
    "correlations": Key(_NUMBERS, "true evolutionary correlations, strictly between -1 and 1",
                        min=-1, max=1, min_open=True, max_open=True, default=[0.0, 0.2, 0.4, 0.6],
                        example="[0.0, 0.2, 0.4, 0.6]"),
    "n_datasets": Key("int", "simulated data sets per correlation", min=2, default=100, example="100"),
    "rates": Key(_NUMBERS, "Brownian rate (variance per unit branch length) of each trait, > 0",
                 min=0, min_open=True, sizes=(1, 2), required=True, example="[0.04, 0.09]"),
    "root_means": Key(_NUMBERS, "values at the root", sizes=(1, 2), default=0.0, example="[0.0, 0.0]"),
    "standard_errors": Key(("float", "list[float]", "list[list[float]]"),
                           "known standard errors: one number or one per trait", min=0, example="[0.05, 0.1]"),
    "within_variance": Key(_NUMBERS, "variance among specimens of a species, per trait", min=0,
                           sizes=(1, 2), example="[0.02, 0.05]"),
    "specimens_per_species": Key(("int", "list[int]", "table"),
                                 "a number, [low, high] or a table species -> number",
                                 min=1, sizes=(2,), example="5",
                                 table=Table("power.specimens_per_species",
                                             any_key=Key("int", "specimens of this species", min=1))),
    "hdi_prob": Key("float", "HDI that must exclude 0", min=0.5, max=1, min_open=True, max_open=True,
                    default=0.95, example="0.95"),
    "alpha": Key("float", "level of the Pearson test", min=0, max=0.5, min_open=True, max_open=True,
                 default=0.05, example="0.05"),
    "seed": Key("int", "random seed", min=0, default=1, example="1"),
}, help="a power study")

#: keys of the ``[power]`` table
POWER_KEYS = tuple(POWER.keys)

#: ``[sampling]`` defaults of a study (a spec's ``[sampling]`` replaces them)
POWER_SAMPLING_DEFAULTS = {"chains": 2, "draws": 500, "tune": 500, "progress": False}


@dataclass
class PowerSpec:
    """A validated power spec: the tree, keyword arguments and sampling options."""

    path: Path
    tree: Any
    kwargs: dict[str, Any] = field(default_factory=dict)
    options: Any = None
    text: str = ""


def load_power_spec(path: str | Path) -> PowerSpec:
    """Read and validate a power spec (format in the module docstring).

    ``kwargs`` are the keyword arguments of
    :func:`cladewise.studies.power.run_power_study` (all but ``tree`` and ``options``).

    Raises
    ------
    InputError
        When the file, the tree or any setting is wrong; the message says how to fix it.
    """
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.studies.power import measurement_se

    shown = Path(path)
    doc, text = read_toml(shown)
    check_sections(doc, SPEC_SECTIONS, shown)
    data_raw = section(doc, "data", shown, required='Add [data] with tree = "path/to/tree.nwk".')
    data = read_table(data_raw, DATA.only("tree", required=("tree",)), Where(shown, "[data]"))
    power_raw = section(doc, "power", shown, required="Add a [power] table (see `cladewise power --help`).")
    where = Where(shown, "[power]")
    p = read_table(power_raw, POWER, where, defaults=True)
    if "species" in p["traits"]:
        raise InputError(f"{where.at('traits')}: traits must be two different names (not 'species').")
    spec_n = p.get("specimens_per_species")
    if isinstance(spec_n, list):
        spec_n = tuple(spec_n)
    kw: dict[str, Any] = {
        "traits": list(p["traits"]),
        "correlations": [float(c) for c in (p["correlations"] if isinstance(p["correlations"], list)
                                            else [p["correlations"]])],
        "n_datasets": p["n_datasets"],
        "rates": _pair(p["rates"]),
        "root_means": _pair(p["root_means"]),
        "se": p.get("standard_errors"),
        "within_variance": p.get("within_variance"),
        "specimens": spec_n,
        "hdi_prob": float(p["hdi_prob"]),
        "alpha": float(p["alpha"]),
        "seed": p["seed"],
    }
    tree = read_tree(data["tree"])
    # the error model is checked here, so a bad table fails before the long compile
    try:
        measurement_se(tree, kw["se"], kw["within_variance"], kw["specimens"], seed=0)
    except InputError as exc:
        raise InputError(f"{shown}: [power] {exc}") from None
    sampling = read_table(section(doc, "sampling", shown) or {}, SAMPLING, Where(shown, "[sampling]"))
    options = SamplingOptions.from_dict({**POWER_SAMPLING_DEFAULTS, **sampling})
    return PowerSpec(path=shown, tree=tree, kwargs=kw, options=options, text=text)


def _pair(v: Any) -> list[float]:
    vals = [float(x) for x in (v if isinstance(v, list) else [v])]
    return vals * 2 if len(vals) == 1 else vals
