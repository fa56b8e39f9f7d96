"""The ``[simulation]`` table, read by ``cladewise simulate SPEC --out DIR``.

SPEC is a TOML file::

    # Invented example.
    [data]
    tree = "tree.nwk"              # relative to this file; the first tree is used

    [simulation]
    traits = ["mass", "speed"]     # trait (column) names, k of them
    rates = [0.04, 0.09]           # Brownian rate per trait: variance per unit
                                   # branch length (diagonal of R)
    correlation = 0.6              # evolutionary correlation: one number (k = 2)
                                   # or a k x k matrix as nested lists; default 0
    root_means = [2.0, 1.0]        # root value per trait; default 0
    species_variance = [0.01, 0.01]     # optional: diagonal of E (species-level,
    species_correlation = 0.0           # non-phylogenetic), correlation as above
    within_variance = [0.02, 0.05]      # variance among specimens of a species
    specimens_per_species = [3, 12]     # an integer, or [low, high]: drawn
                                        # uniformly per species, both included
    # standard_errors = [0.05, 0.1]     # instead of specimens: known se per trait
    missing_share = 0.1                 # share of species x trait cells left blank
    missing_specimen_share = 0.0        # share of single specimen cells left blank
    seed = 1
    replicates = 1                      # > 1 writes DIR/replicate_0001, ...
    model = "bm"                        # bm, lambda, ou, kappa, delta, early_burst
    model_parameters = {}               # the evolution model's parameter:
                                        # { lambda = 0.5 } (lambda), { alpha = 1.0 }
                                        # (ou, optional ou_root = "stationary"),
                                        # { kappa = .. }, { delta = .. },
                                        # { rate_change = .. } (early_burst)

Output folder: ``species.csv`` (``species``, trait columns, ``<trait>_se``,
``<trait>_n``), ``specimens.csv`` (``species`` and trait columns, one row per
individual) when specimens were drawn, ``true_means.csv`` (the true species means Y),
``truth.json`` (every setting and parameter) and ``tree.nwk``. The simulation
itself: :mod:`cladewise.studies.simulate`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from cladewise.config.analysis import DATA, MODEL_REGIME_CLADE, OU_ROOTS, SPEC_SECTIONS
from cladewise.config.tables import (
    Key,
    Table,
    Where,
    check_sections,
    check_value,
    read_table,
    read_toml,
    section,
    toml_value,
)
from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import read_tree
from cladewise.errors import InputError
from cladewise.model.evolution import MODELS, check_model_name

__all__ = ["SIMULATION", "MODEL_PARAMETERS", "SimulationSpec", "load_simulation_spec"]

#: user names of evolution-model parameters -> the names the branch-length
#: transforms take (``lambda`` is a Python keyword, so the transform says ``lam``)
_INTERNAL = {"lambda": "lam"}

#: ``[simulation] model_parameters``
MODEL_PARAMETERS = Table("simulation.model_parameters", {
    "lambda": Key("float", "Pagel's lambda", min=0, max=1, example="0.5"),
    "lam": Key("float", "Pagel's lambda (internal name; `lambda` reads better)", min=0, max=1, example="0.5"),
    "alpha": Key("float", "Ornstein-Uhlenbeck pull, per unit time", min=0, min_open=True, example="1.0"),
    "kappa": Key("float", "Pagel's kappa", min=0, min_open=True, example="1.0"),
    "delta": Key("float", "Pagel's delta", min=0, min_open=True, example="1.0"),
    "rate_change": Key("float", "early-burst rate change per unit time", example="-1.0"),
    "ou_root": Key("str", "root treatment of the Ornstein-Uhlenbeck model", choices=OU_ROOTS,
                   example='"stationary"'),
})

_PER_TRAIT = ("float", "list[float]")
_CORR = ("float", "list[list[float]]")

#: ``[simulation.regimes]``: a rate shift in named clades (multi-rate Brownian motion)
SIMULATION_REGIMES = Table("simulation.regimes", {
    "background": Key("str", "regime outside the clades (rate ratio 1)", example='"background"'),
    "clades": Key("table", "named clades, one table each (as in [model.regimes.clades])", required=True,
                  table=Table("simulation.regimes.clades", any_key=Key("table", "a clade",
                                                                         table=MODEL_REGIME_CLADE)),
                  example='{ fast = { species = ["sp_a", "sp_b"] } }'),
    "rate_ratios": Key("table", "rate multiplier of each clade regime, by regime name", required=True,
                       table=Table("simulation.regimes.rate_ratios",
                                   any_key=Key("float", "rate ratio", min=0, min_open=True)),
                       example="{ fast = 4.0 }"),
}, help="regimes painted on the tree")

#: ``[simulation]``
SIMULATION = Table("simulation", {
    "traits": Key("list[str]", "trait (column) names", required=True, unique=True, example='["mass", "speed"]'),
    "rates": Key(_PER_TRAIT, "Brownian rate per trait, variance per unit branch length", min=0,
                 required=True, example="[0.04, 0.09]"),
    "correlation": Key(_CORR, "evolutionary correlation: one number or a k x k matrix", min=-1, max=1,
                       default=0.0, example="0.6"),
    "root_means": Key(_PER_TRAIT, "root value per trait", default=0.0, example="[2.0, 1.0]"),
    "species_variance": Key(_PER_TRAIT, "species-level (non-phylogenetic) variance per trait", min=0,
                            example="[0.01, 0.01]"),
    "species_correlation": Key(_CORR, "correlation of the species-level deviations", min=-1, max=1,
                               default=0.0, example="0.0"),
    "within_variance": Key(("float", "list[float]", "list[list[float]]"),
                           "variance among specimens of a species: per trait, or a k x k matrix",
                           example="[0.02, 0.05]"),
    "specimens_per_species": Key(("int", "list[int]"), "specimens per species: a number or [low, high]",
                                 min=1, sizes=(2,), example="[3, 12]"),
    "standard_errors": Key(_PER_TRAIT, "known standard error per trait", min=0, example="[0.05, 0.1]"),
    "missing_share": Key("float", "share of species x trait cells left blank", min=0, max=1, max_open=True,
                         default=0.0, example="0.1"),
    "missing_specimen_share": Key("float", "share of single specimen cells left blank", min=0, max=1,
                                  max_open=True, default=0.0, example="0.0"),
    "seed": Key("int", "random seed", min=0, default=0, example="1"),
    "replicates": Key("int", "number of data sets", min=1, default=1, example="1"),
    "model": Key("str", "evolution model: " + ", ".join(MODELS), convert=check_model_name, default="bm",
                 example='"bm"'),
    "model_parameters": Key("table", "the evolution model's parameter", table=MODEL_PARAMETERS,
                            default={}, example="{ lambda = 0.5 }"),
    "regimes": Key("table", "a rate shift in named clades", table=SIMULATION_REGIMES,
                   example='{ clades = { fast = { species = ["sp_a", "sp_b"] } }, rate_ratios = { fast = 4.0 } }'),
}, help="settings of simulated data sets")


@dataclass
class SimulationSpec:
    """A validated ``[simulation]`` spec.

    ``settings`` are keyword arguments of
    :func:`cladewise.studies.simulate.simulate_dataset` (all but ``tree`` and ``seed``).
    """

    path: Path
    tree: FlatTree
    settings: dict[str, Any] = field(default_factory=dict)
    seed: int = 0
    replicates: int = 1


def _matrix(sim: dict[str, Any], var_key: str, cor_key: str, k: int, where: Where) -> np.ndarray | None:
    if var_key not in sim:
        return None
    var = np.broadcast_to(np.asarray(sim[var_key], dtype=float), (k,))
    cor = np.asarray(sim[cor_key], dtype=float)
    if cor.ndim == 0:
        if k > 2 and float(cor) != 0.0:
            raise InputError(f"{where.at(cor_key)}: give a {k} x {k} matrix for more than two traits.")
        cor = np.eye(k) + float(cor) * (1 - np.eye(k))
    if cor.shape != (k, k) or np.any(np.diag(cor) != 1) or not np.allclose(cor, cor.T):
        raise InputError(
            f"{where.at(cor_key)}: must be one number in [-1, 1] or a symmetric {k} x {k} "
            "correlation matrix with ones on the diagonal."
        )
    sd = np.sqrt(var)
    return cor * np.outer(sd, sd)


def _per_trait(sim: dict[str, Any], k: int, where: Where) -> None:
    for key in ("rates", "root_means", "species_variance", "standard_errors", "within_variance"):
        v = sim.get(key)
        if isinstance(v, list) and v and not isinstance(v[0], list) and len(v) not in (1, k):
            raise InputError(
                f"{where.at(key)} = {toml_value(v)}: give one number or {k} (one per trait of "
                f"traits = {toml_value(sim['traits'])})."
            )
    w = sim.get("within_variance")
    if isinstance(w, list) and w and isinstance(w[0], list):
        if np.shape(w) != (k, k):
            raise InputError(f"{where.at('within_variance')}: a matrix must be {k} x {k} (one row per trait).")
    elif w is not None and np.any(np.asarray(w, dtype=float) < 0):
        raise InputError(f"{where.at('within_variance')} = {toml_value(w)}: variances must be >= 0.")


def _model_parameters(sim: dict[str, Any], where: Where) -> dict[str, Any]:
    params = dict(sim["model_parameters"])
    for user, internal in _INTERNAL.items():
        if user in params and internal in params:
            raise InputError(f"{where.at('model_parameters')}: give {user} or {internal}, not both.")
        if user in params:
            params[internal] = params.pop(user)
    model = sim["model"]
    wanted = {_INTERNAL.get(p, p) for p in MODELS[model]}
    public = {v: k for k, v in _INTERNAL.items()}
    given = set(params) - {"ou_root"}
    extra = sorted(public.get(p, p) for p in given - wanted)
    if extra:
        names = ", ".join(public.get(p, p) for p in MODELS[model]) or "no parameter"
        raise InputError(
            f"{where.at('model_parameters')}: {', '.join(extra)} is not a parameter of model = \"{model}\", "
            f"which takes {names}."
        )
    missing = sorted(public.get(p, p) for p in wanted - given)
    if missing:
        raise InputError(
            f"{where.at('model_parameters')}: model = \"{model}\" needs "
            + ", ".join(f"{m} = <value>" for m in missing) + f", e.g. model_parameters = {{ {missing[0]} = 0.5 }}."
        )
    if "ou_root" in params and model != "ou":
        raise InputError(f"{where.at('model_parameters')}: ou_root is only used by model = \"ou\".")
    return params


def _regimes(reg: dict[str, Any], tree: FlatTree, where: Where) -> dict[str, Any]:
    """Painting and per-regime rate multipliers of ``[simulation.regimes]``."""
    from cladewise.model.regimes import painting_from_spec

    painting = painting_from_spec(reg, tree)
    ratios = dict(reg["rate_ratios"])
    missing = [r for r in painting.regimes[1:] if r not in ratios]
    extra = sorted(set(ratios) - set(painting.regimes[1:]))
    if missing or extra:
        raise InputError(f"{where.at('regimes')}: rate_ratios must give one ratio per clade regime "
                         f"({', '.join(painting.regimes[1:])})" + (f"; unknown: {extra}" if extra else "") + ".")
    return {"regime": painting.node_regime,
            "regime_rate_ratios": [1.0] + [float(ratios[r]) for r in painting.regimes[1:]]}


def load_simulation_spec(path: str | Path, seed: int | None = None) -> SimulationSpec:
    """Read and validate a simulation spec (format in the module docstring).

    Parameters
    ----------
    path : path
        The TOML file.
    seed : int, optional
        Replaces ``[simulation] seed``.

    Raises
    ------
    InputError
        The file, the tree or a setting is wrong; the message says how to fix it.
    """
    shown = Path(path)
    if seed is not None:
        seed = check_value("--seed", seed, SIMULATION.keys["seed"], Where(None, ""))
    doc, _ = read_toml(shown)
    check_sections(doc, SPEC_SECTIONS, shown)
    data_raw = section(doc, "data", shown, required='Add [data] with tree = "path/to/tree".')
    data = read_table(data_raw, DATA.only("tree", required=("tree",)), Where(shown, "[data]"))
    sim_raw = section(doc, "simulation", shown,
                      required="Add a [simulation] table (see `cladewise simulate --help`).")
    where = Where(shown, "[simulation]")
    sim = read_table(sim_raw, SIMULATION, where, defaults=True)
    traits = sim["traits"]
    if "species" in traits:
        raise InputError(f"{where.at('traits')}: 'species' names the species column; call the trait otherwise.")
    k = len(traits)
    if "specimens_per_species" in sim and "standard_errors" in sim:
        raise InputError(
            f"{shown}: [simulation] give either specimens_per_species (se computed from specimens) or "
            "standard_errors (known se), not both."
        )
    if "within_variance" in sim and "specimens_per_species" not in sim:
        raise InputError(f"{shown}: [simulation] within_variance needs specimens_per_species.")
    if "specimens_per_species" in sim and "within_variance" not in sim:
        raise InputError(f"{shown}: [simulation] specimens_per_species needs within_variance "
                         "(the variance among specimens of a species).")
    n_spec = sim.get("specimens_per_species")
    if isinstance(n_spec, list):
        if n_spec[1] < n_spec[0]:
            raise InputError(f"{where.at('specimens_per_species')} = {toml_value(n_spec)}: give [low, high] "
                             "with low <= high.")
        n_spec = (n_spec[0], n_spec[1])
    if sim["missing_specimen_share"] and n_spec is None:
        raise InputError(f"{where.at('missing_specimen_share')}: needs specimens_per_species (specimen rows).")
    _per_trait(sim, k, where)
    params = _model_parameters(sim, where)
    settings = dict(
        traits=traits,
        R=_matrix(sim, "rates", "correlation", k, where),
        mu=sim["root_means"],
        E=_matrix(sim, "species_variance", "species_correlation", k, where),
        within_var=sim.get("within_variance"),
        n_specimens=n_spec,
        se=sim.get("standard_errors"),
        missing_share=float(sim["missing_share"]),
        missing_specimen_share=float(sim["missing_specimen_share"]),
        model=sim["model"],
        model_params=params,
    )
    tree = read_tree(data["tree"])
    if "regimes" in sim:
        settings.update(_regimes(sim["regimes"], tree, where))
    return SimulationSpec(path=shown, tree=tree, settings=settings,
                          seed=int(seed if seed is not None else sim["seed"]),
                          replicates=int(sim["replicates"]))
