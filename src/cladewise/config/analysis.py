"""Analysis specifications: plain TOML files that say what to analyse and how.

Every section is declared here once, as a table of known keys (:data:`DATA`,
:data:`MODEL`, :data:`SAMPLING`), and read by the one table reader of
:mod:`cladewise.config.tables`: types, ranges, choices and file paths are checked
when the spec is read, before any data or model work. To add a ``[model]`` key,
add it to :data:`MODEL` (and the field to :class:`cladewise.model.build.ModelSpec`).

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
    keep_tree_only = false       # true: keep tree tips without a row (their values are predicted)
    ultrametric_rtol = 1e-6      # tolerance of the ultrametric check

At least one of ``tree`` and ``trees`` is required; with only ``trees`` the first
tree of the sample is the reference tree.

``[model]`` and ``[sampling]``: see :data:`MODEL`, :data:`MODEL_PRIORS`,
:data:`MODEL_FIXED` and :data:`SAMPLING` (the printed key lists of
``python -c "from cladewise.config.analysis import MODEL; print(*MODEL.keys)"``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cladewise.config.tables import Key, Table, Where, check_sections, read_table, read_toml, section
from cladewise.data.summary import DataSummary, summarise_data
from cladewise.errors import InputError
from cladewise.data.matching import MatchResult, match_names
from cladewise.data.tables import parse_separator
from cladewise.data.traits import read_traits
from cladewise.model.evolution import MODELS, check_model_name

__all__ = [
    "DataSpec",
    "Spec",
    "load_spec",
    "load_data",
    "prepare_data",
    "DATA",
    "MODEL",
    "MODEL_PRIORS",
    "MODEL_FIXED",
    "MODEL_REGIMES",
    "MODEL_DISCRETE",
    "SAMPLING",
    "SPEC_SECTIONS",
    "KINDS",
    "MEASUREMENT_ERROR",
    "OU_ROOTS",
]

#: model kinds of ``[model] kind``
KINDS = ("correlated", "independent", "regression")
#: measurement-error models of ``[model] measurement_error``
MEASUREMENT_ERROR = ("none", "se", "specimens")
#: root treatments of the Ornstein-Uhlenbeck model
OU_ROOTS = ("fixed", "stationary")

#: top-level sections of a spec file and who reads them
SPEC_SECTIONS: dict[str, str] = {
    "data": "(files)",
    "model": "(what to fit)",
    "sampling": "(how to sample)",
    "simulation": "(read by cladewise simulate)",
    "power": "(read by cladewise power)",
}

DATA = Table("data", {
    "tree": Key("str", "tree file, Newick or NEXUS; the first tree is used", path=True, example='"tree.nwk"'),
    "trees": Key("str", "tree sample file, same species as the tree", path=True, example='"sample.nex"'),
    "traits": Key("str", "trait table, CSV or TSV", path=True, example='"species.csv"'),
    "species": Key("str", "name of the species column", example='"species"'),
    "specimens": Key("bool", "true: one row per specimen", example="false"),
    "log": Key("list[str]", "trait columns to natural-log transform", empty=True, unique=True,
               example='["body_mass"]'),
    "se_suffix": Key("str", "ending of standard-error columns, <trait>_se", example='"_se"'),
    "n_suffix": Key("str", "ending of sample-size columns, <trait>_n", example='"_n"'),
    "sd_suffix": Key("str", "ending of standard-deviation columns, <trait>_sd", example='"_sd"'),
    "drop_unmatched": Key("bool", "true: leave out table species absent from the tree", example="false"),
    "keep_tree_only": Key("bool", "true: keep tree tips that have no row in the table (all traits missing; "
                          "their values are predicted) instead of pruning them", example="false"),
    "ultrametric_rtol": Key("float", "relative tolerance of the ultrametric check", min=0.0, max=1.0,
                            max_open=True, example="1e-6"),
    "separator": Key("str", "column separator of the trait table: auto (detected), comma, semicolon, tab, "
                     "or the character itself", choices=("auto", ",", ";", "\t", "comma", "semicolon", "tab"),
                     example='"auto"'),
    "decimal": Key("str", "decimal mark of the trait table's numbers", choices=(".", ","), example='"."'),
}, help="the files to analyse")


#: ``[model.priors]``: overrides of the default priors (descriptions are shown
#: by the model builder as ``cladewise.model.build.PRIOR_KEYS``)
MODEL_PRIORS = Table("model.priors", {
    "rate_scale": Key("float", "multiplier on the half-normal scale (2 trait sds) of each trait's tip sd (default 1)",
                      min=0, min_open=True, example="1.0"),
    "root_sd": Key("float", "sd of the normal prior on root means, in trait sd units (default 5)",
                   min=0, min_open=True, example="5.0"),
    "lkj_eta": Key("float", "LKJ shape of the evolutionary correlation matrix (default 1: uniform)",
                   min=0, min_open=True, example="1.0"),
    "coef_scale": Key(("float", "str"), "sd of normal priors on regression slopes in units sd(y)/sd(x) "
                      "(default 2.5), or 'flat'", min=0, min_open=True, choices=("flat",), example="2.5"),
    "lambda_beta": Key("list[float]", "[a, b] of a Beta prior on Pagel's lambda (default [1, 1]: uniform)",
                       min=0, min_open=True, sizes=(2,), example="[1.0, 1.0]"),
    "alpha_scale": Key("float", "half-normal sd of OU alpha, in units of 1/tree height (default 3)",
                       min=0, min_open=True, example="3.0"),
    "kappa_max": Key("float", "upper end of the uniform prior on kappa (default 1.5; must exceed 1 so "
                     "that Brownian motion, kappa = 1, is inside)", min=1, min_open=True, example="1.5"),
    "delta_sd": Key("float", "sd of a log-normal prior on delta centred on 1 (default 0.5)",
                    min=0, min_open=True, example="0.5"),
    "rate_change_scale": Key("float", "sd of the normal prior on the early-burst rate change, per tree "
                             "height (default 3)", min=0, min_open=True, example="3.0"),
    "species_scale": Key("float", "multiplier on the half-normal scale of species-level sds (default 1)",
                         min=0, min_open=True, example="1.0"),
}, help="prior settings")

#: ``[model.fixed]``: an evolution-model parameter held at a value instead of estimated
MODEL_FIXED = Table("model.fixed", {
    "lambda": Key("float", "Pagel's lambda", min=0, max=1, example="0.5"),
    "lam": Key("float", "Pagel's lambda (internal name; prefer `lambda`)", min=0, max=1, example="0.5"),
    "alpha": Key("float", "Ornstein-Uhlenbeck pull, per unit time", min=0, min_open=True, example="1.0"),
    "kappa": Key("float", "Pagel's kappa", min=0, min_open=True, example="1.0"),
    "delta": Key("float", "Pagel's delta", min=0, min_open=True, example="1.0"),
    "rate_change": Key("float", "early-burst rate change per unit time", example="-1.0"),
}, help="fixed evolution-model parameters")

#: ``[model.discrete]``: discrete traits (threshold model), each with its states in order
MODEL_DISCRETE = Table("model.discrete", {}, help="discrete traits and their states in order",
                       any_key=Key(("list[str]", "list[int]"), "the trait's states in order (2: binary; "
                                   "3 or more: ordered)", unique=True,
                                   example='["diurnal", "nocturnal"]'))

#: ``[model]``: the one declaration of every model key (fields of ModelSpec)
#: one clade of ``[model.regimes.clades.<name>]`` (the table name is the regime by default)
MODEL_REGIME_CLADE = Table("model.regimes.clades.<name>", {
    "regime": Key("str", "regime of this clade (default: the table's name)", example='"island"'),
    "species": Key("list[str]", "species whose most recent common ancestor is the clade", unique=True,
                   example='["sp_a", "sp_b"]'),
    "node": Key("str", "label of the clade's internal node in the tree file", example='"Insulares"'),
    "starts": Key("str", "where the regime starts: the clade's stem branch or its crown (below its "
                  "most recent common ancestor)", choices=("stem", "crown"), example='"stem"'),
}, help="a clade in a regime")

#: ``[model.regimes]``: evolutionary regimes painted on the tree (model/regimes.py)
MODEL_REGIMES = Table("model.regimes", {
    "name": Key("str", "name of this painting (shown when paintings are compared)", example='"islands"'),
    "column": Key("str", "trait-table column with each species' regime; internal branches by "
                  "parsimony", example='"habitat"'),
    "order": Key("list[str]", "regime order (the first is the reference; parsimony ties go to the "
                 "earlier regime)", unique=True, example='["mainland", "island"]'),
    "background": Key("str", "regime of the branches outside the named clades (the reference)",
                      example='"background"'),
    "clades": Key("table", "named clades, one table each", table=Table(
        "model.regimes.clades", any_key=Key("table", "a clade", table=MODEL_REGIME_CLADE)),
        example='{ island = { species = ["sp_a", "sp_b"], starts = "stem" } }'),
    "rates": Key("str", "own: a rate matrix per regime; scaled: one shared matrix times a ratio per "
                 "regime; shared: one rate (OU optima only)", choices=("own", "scaled", "shared"),
                 example='"own"'),
    "optima": Key("bool", "one Ornstein-Uhlenbeck optimum per regime (evolution = \"ou\")",
                  example="true"),
    "rate_ratio_sd": Key("float", "sd of the normal prior on each log rate ratio (default 1.5)",
                         min=0, min_open=True, example="1.5"),
    "optimum_sd": Key("float", "sd of the normal prior on each optimum's difference from the "
                      "reference, in trait sds (default 2)", min=0, min_open=True, example="2.0"),
}, help="evolutionary regimes on the tree")

MODEL = Table("model", {
    "kind": Key("str", "the model", choices=KINDS, example='"correlated"'),
    "traits": Key("list[str]", "trait columns of the model", unique=True, example='["trait_a", "trait_b"]'),
    "formula": Key("str", "regression formula, response ~ predictors", example='"y ~ x1 + x2"'),
    "evolution": Key("str", "evolution model: " + ", ".join(MODELS), convert=check_model_name,
                     example='"bm"'),
    "ou_root": Key("str", "root treatment of the Ornstein-Uhlenbeck model", choices=OU_ROOTS,
                   example='"fixed"'),
    "measurement_error": Key("str", "measurement-error model", choices=MEASUREMENT_ERROR, example='"none"'),
    "species_covariance": Key("bool", "true: add a species-level (non-phylogenetic) covariance",
                              example="false"),
    "error_correlation": Key(("float", "list[list[float]]"), "correlation of the errors of the species "
                             "means between traits, with measurement_error = \"se\": one number for every "
                             "pair or a k x k matrix in the order of traits (default 0)", min=-1.0, max=1.0,
                             example="0.5"),
    "priors": Key("table", "overrides of the default priors", table=MODEL_PRIORS,
                  example="{ lkj_eta = 2.0 }"),
    "fixed": Key("table", "an evolution-model parameter held fixed", table=MODEL_FIXED,
                 example="{ lambda = 0.5 }"),
    "regimes": Key("table", "evolutionary regimes painted on the tree", table=MODEL_REGIMES,
                   example='{ column = "habitat", rates = "own" }'),
    "discrete": Key("table", "discrete traits (threshold model): trait = [states in order]; list them in "
                    "traits too", table=MODEL_DISCRETE, example='{ nocturnal = ["diurnal", "nocturnal"] }'),
}, help="what to fit")

#: ``[sampling]``: fields of SamplingOptions
SAMPLING = Table("sampling", {
    "sampler": Key("str", "the sampler", choices=("nutpie", "pymc"), example='"nutpie"'),
    "chains": Key("int", "number of chains", min=1, example="4"),
    "draws": Key("int", "draws kept per chain", min=1, example="1000"),
    "tune": Key("int", "tuning steps per chain", min=0, example="1000"),
    "seed": Key("int", "random seed, a whole number >= 0", min=0, example="1"),
    "target_accept": Key("float", "target acceptance rate of NUTS", min=0.5, max=1.0, max_open=True,
                         example="0.9"),
    "progress": Key("bool", "show a progress bar (default: only on a terminal)", example="true"),
}, help="how to sample")


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
    separator: str = "auto"
    keep_tree_only: bool = False
    decimal: str = "."


@dataclass(frozen=True)
class Spec:
    """An analysis specification read from TOML.

    ``model`` and ``sampling`` hold the keys given in the file, already checked
    against :data:`MODEL` and :data:`SAMPLING`.
    """

    path: Path
    data: DataSpec
    model: dict[str, Any] = field(default_factory=dict)
    sampling: dict[str, Any] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict)


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file.

    Raises
    ------
    InputError
        The file is missing or not valid TOML; a section is unknown or not a table;
        ``[data]`` is missing; a key is unknown, of the wrong type or out of range;
        or a named file does not exist. The message names the file, section, key
        and value and says how to fix it.
    """
    shown = Path(path)
    raw, _ = read_toml(shown)
    check_sections(raw, SPEC_SECTIONS, shown)
    data = section(raw, "data", shown, required="Add one with at least `tree = ...` and `traits = ...`.")
    d = read_table(data, DATA, Where(shown, "[data]"))
    if "traits" not in d:
        raise InputError(f"{shown}: [data] needs `traits = \"<table file>\"` (the trait table, CSV or TSV).")
    if "tree" not in d and "trees" not in d:
        raise InputError(f"{shown}: [data] needs `tree = \"<tree file>\"` (or `trees = ...`).")
    suffixes = {k: d.get(k, DataSpec.__dataclass_fields__[k].default) for k in ("se_suffix", "n_suffix", "sd_suffix")}
    if len(set(suffixes.values())) < 3:
        same = ", ".join(f'{k} = "{v}"' for k, v in suffixes.items())
        raise InputError(f"{shown}: [data] {same}: the three column endings must differ; give each its own.")
    if "log" in d:
        d["log"] = tuple(d["log"])
    if "ultrametric_rtol" in d:
        d["ultrametric_rtol"] = float(d["ultrametric_rtol"])
    model = read_table(section(raw, "model", shown) or {}, MODEL, Where(shown, "[model]"))
    sampling = read_table(section(raw, "sampling", shown) or {}, SAMPLING, Where(shown, "[sampling]"))
    return Spec(path=shown.resolve(), data=DataSpec(**d), model=model, sampling=sampling, raw=raw)


def prepare_data(
    traits: str | Path | Any,
    tree: str | Path | Any = None,
    *,
    trees: str | Path | Any = None,
    species: str = "species",
    specimens: bool = False,
    log: tuple[str, ...] | list[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    drop_unmatched: bool = False,
    ultrametric_rtol: float = 1e-6,
    separator: str | None = "auto",
    decimal: str = ".",
    keep_tree_only: bool = False,
) -> tuple[MatchResult, DataSummary]:
    """Files to a validated, matched tree and trait table, and its summary.

    The Python counterpart of a spec's ``[data]`` section (same arguments). When
    the ``tree`` file holds several trees the first is used and the summary says
    so; give the file as ``trees`` to use the whole sample. From Python, ``traits``
    may be a pandas DataFrame and ``tree``/``trees`` a Newick string or read trees
    (:mod:`cladewise.data.inputs`); they go through the same readers and checks.
    """
    from cladewise.data.inputs import trees_from

    if tree is None and trees is None:
        raise InputError("give a tree file (tree) or a tree sample (trees).")
    warns: list[str] = []
    sample: list = []
    tree_name, trees_name = tree, trees
    if trees is not None:
        sample, trees_name = trees_from(trees)
    if tree is not None:
        in_file, tree_name = trees_from(tree)
        ref = in_file[0]
        if len(in_file) > 1:
            warns.append(
                f"{tree_name} holds {len(in_file)} trees; the first is used. Give the file as "
                "`trees` to use them all."
            )
    else:
        ref = sample[0]
    if sample and set(sample[0].tip_names) != set(ref.tip_names):
        a, b = set(ref.tip_names), set(sample[0].tip_names)
        only_ref, only_s = sorted(a - b)[:5], sorted(b - a)[:5]
        raise InputError(
            f"the tree sample {trees_name} and the tree {tree_name} do not hold the same tips"
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
        separator=parse_separator(separator),
        decimal=decimal,
    )
    match = match_names(ref, td, drop_unmatched=drop_unmatched, trees=sample, keep_tree_only=keep_tree_only)
    summary = summarise_data(
        match,
        tree_source=str(tree_name if tree is not None else f"{trees_name} (tree 1)"),
        rtol=ultrametric_rtol,
        trees_source=str(trees_name) if trees is not None else None,
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
        separator=d.separator,
        decimal=d.decimal,
        keep_tree_only=d.keep_tree_only,
    )
