"""PyMC model builders: an analysis specification becomes a PyMC model.

The specification (:class:`ModelSpec`) is plain data; :func:`build_model` turns it and
the matched data (:class:`ModelData`) into a PyMC model whose likelihood is the
tree likelihood engine (or, for small checks, a dense multivariate normal).

Model kinds
-----------
``correlated``
    k traits evolve by multivariate Brownian motion (or another evolution model) with
    rate matrix ``R = diag(sigma) Omega diag(sigma)``, LKJ prior on ``Omega``
    (Lewandowski, Kurowicka & Joe 2009). Reported: evolutionary correlations
    ``evo_corr``, rates ``evo_rate`` (the diagonal of R) and structural slopes
    ``evo_slope[y, x] = R_yx / R_xx`` (Ives, Midford & Garland 2007, Syst. Biol.
    56:252-270), which stay unbiased when x carries measurement error.
``independent``
    The same with a diagonal R: the null of no evolutionary correlation.
``regression``
    Phylogenetic regression from a formula (Wilkinson notation, parsed by
    ``formulaic``): the response given the predictors has residuals that evolve on the
    tree (Grafen 1989; PGLS). Predictors are taken as measured without error; use the
    ``correlated`` model's structural slope when they are not.

Optional for every kind: a species-level (non-phylogenetic) covariance ``E`` beside
``R`` (``species_covariance = true``), reported as ``species_corr`` and as the
phylogenetic share of variance per trait, ``phylo_share = R_jj t / (R_jj t + E_jj)``
with t the mean root-to-tip distance of the (transformed) tree.

Measurement error: ``none``; ``se`` (known standard errors from the table, variance
``se^2``, independent across traits unless ``error_correlation`` is given);
``specimens`` (a within-species variance per species and trait, partially pooled
across species on the log scale; each species' sample variance s^2 from n >= 2
specimens adds the likelihood term ``(n-1) s^2 / sigma_w^2 ~ chi^2(n-1)``, and the
error variance of the species mean is ``sigma_w^2 / n``). With two or more traits
and the specimen rows, the specimens model estimates the full within-species
covariance (shared correlation ``within_corr``, Wishart terms, correlated errors of
the means): see :mod:`cladewise.model.within_species`.

Default priors are weakly informative and scaled to the data (see :mod:`cladewise.model.priors`
and :func:`build_model`); every prior used is listed in ``BuiltModel.priors``.
"""

from __future__ import annotations

from dataclasses import dataclass, field, asdict
from typing import Any

import numpy as np
import pandas as pd
import pymc as pm
import pytensor
import pytensor.tensor as pt

from cladewise.config.analysis import KINDS, MEASUREMENT_ERROR, MODEL
from cladewise.config.tables import read_table
from cladewise.errors import InputError
from cladewise.model import regimes as rg
from cladewise.model.design import regression_data
from cladewise.model.measurement import check_error_correlation_spec, error_blocks, measurement_error
from cladewise.model.evolution import (
    MODELS,
    check_model_name,
    lengths_from_arrays,
    model_warnings,
    ou_rescaled_inputs,
    ou_tip_scale,
    tree_arrays,
)
from cladewise.data.trees import FlatTree
from cladewise.model.quantities import summary_names
from cladewise.model.threshold import (DiscreteSetup, check_discrete_spec, continuous_error, discrete_notes,
                                       discrete_terms, prepare_discrete, probit_regression_terms)
from cladewise.model.priors import (
    PARAMETER_NAMES,
    PRIOR_KEYS,
    PriorInfo,
    evolution_parameters,
    rate_terms,
    regression_terms,
    scale_facts,
    species_terms,
)

__all__ = [
    "ModelData",
    "ModelSpec",
    "PriorInfo",
    "BuiltModel",
    "build_model",
    "tree_data_values",
    "KINDS",
    "MEASUREMENT_ERROR",
    "PRIOR_KEYS",
]


# --------------------------------------------------------------------------- data
@dataclass
class ModelData:
    """Matched, validated data ready for a model (species order = tree tip order).

    Parameters
    ----------
    tree : FlatTree
        Tree whose tips are exactly ``species`` in that order.
    values : DataFrame
        Species means, one row per species (index = species), NaN where missing.
    se : DataFrame, optional
        Standard errors of the means (same shape), NaN where unknown.
    n : DataFrame, optional
        Number of specimens behind each mean.
    sample_var : DataFrame, optional
        Within-species sample variance (NaN where fewer than 2 specimens).
    extra : DataFrame, optional
        The table's text columns (index = species), e.g. the states of discrete traits.
    specimens : DataFrame, optional
        The specimen rows (column ``species`` and one per trait), which give the
        within-species covariance between traits.
    notes : list of str
        Plain-language notes gathered on the way (dropped species, imputed errors).
    """

    tree: FlatTree
    values: pd.DataFrame
    se: pd.DataFrame | None = None
    n: pd.DataFrame | None = None
    sample_var: pd.DataFrame | None = None
    notes: list[str] = field(default_factory=list)
    specimens: pd.DataFrame | None = None
    extra: pd.DataFrame | None = None  # text columns by species (e.g. a regime column)

    def __post_init__(self) -> None:
        if list(self.values.index) != list(self.tree.tip_names):
            raise ValueError("ModelData: rows must follow the tree's tip order")

    @property
    def species(self) -> list[str]:
        return list(self.values.index)

    @classmethod
    def from_match(cls, match: Any) -> "ModelData":
        """Build from the result of :func:`cladewise.config.analysis.load_data`."""
        td = match.traits
        species = list(td.species)
        cols = list(td.traits)

        def frame(arr: Any) -> pd.DataFrame | None:
            if arr is None:
                return None
            return pd.DataFrame(np.asarray(arr, dtype=float), index=species, columns=cols)

        return cls(
            tree=match.tree,
            values=frame(td.mean),
            se=frame(getattr(td, "se", None)),
            n=frame(getattr(td, "n", None)),
            sample_var=frame(getattr(td, "within_var", None)),
            notes=list(getattr(match, "notes", []) or []),
            specimens=getattr(td, "specimens", None),
            extra=None if getattr(td, "extra", None) is None else td.extra.set_axis(species),
        )


# --------------------------------------------------------------------------- spec
@dataclass
class ModelSpec:
    """What to fit: plain data, validated by :meth:`from_dict`."""

    kind: str = "correlated"
    traits: list[str] = field(default_factory=list)
    formula: str | None = None
    evolution: str = "bm"
    ou_root: str = "fixed"
    measurement_error: str = "none"
    species_covariance: bool = False
    error_correlation: Any = None
    priors: dict[str, Any] = field(default_factory=dict)
    fixed: dict[str, float] = field(default_factory=dict)
    regimes: dict[str, Any] = field(default_factory=dict)  # [model.regimes] (model/regimes.py)
    #: discrete traits (threshold model): trait -> its states in order (model/threshold.py)
    discrete: dict[str, list[Any]] = field(default_factory=dict)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "ModelSpec":
        """Validate a ``[model]`` table (unknown keys and values are errors)."""
        # keys, types, ranges and choices are declared once, in config.analysis.MODEL
        spec = cls(**read_table(d, MODEL))
        spec.validate()
        return spec

    def validate(self) -> None:
        if self.kind not in KINDS:
            raise InputError(f"[model] kind = {self.kind!r} is not known; choose one of {', '.join(KINDS)}")
        self.evolution = check_model_name(self.evolution)
        if self.measurement_error not in MEASUREMENT_ERROR:
            raise InputError(
                f"[model] measurement_error = {self.measurement_error!r} is not known; "
                f"choose one of {', '.join(MEASUREMENT_ERROR)}"
            )
        if self.ou_root not in ("fixed", "stationary"):
            raise InputError("[model] ou_root must be 'fixed' or 'stationary'")
        if self.kind == "regression":
            if not self.formula or "~" not in str(self.formula):
                raise InputError(
                    "a regression needs a formula such as formula = \"prey_size ~ head_width + temperature\""
                )
        else:
            if self.formula:
                raise InputError(f"a formula is only used by kind = 'regression', not {self.kind!r}")
            if not isinstance(self.traits, (list, tuple)) or len(self.traits) < (2 if self.kind == "correlated" else 1):
                raise InputError(
                    f"kind = {self.kind!r} needs traits = [...] with at least "
                    f"{2 if self.kind == 'correlated' else 1} trait names"
                )
            if len(set(self.traits)) != len(self.traits):
                raise InputError("[model] traits lists a trait twice")
        allowed = {"lambda": "lambda", "lam": "lambda", "alpha": "alpha", "kappa": "kappa",
                   "delta": "delta", "rate_change": "rate_change"}
        for key, value in self.fixed.items():
            if allowed.get(key) != PARAMETER_NAMES.get(MODELS[self.evolution][0] if MODELS[self.evolution] else ""):
                raise InputError(
                    f"[model.fixed] {key!r} is not a parameter of the {self.evolution!r} evolution model"
                )
            if not isinstance(value, (int, float)):
                raise InputError(f"[model.fixed] {key} must be a number")
        check_error_correlation_spec(self)
        if self.regimes:
            rg.check_regime_spec(self)
        check_discrete_spec(self)
        if self.regimes and self.discrete:
            raise InputError("regimes and discrete traits cannot be combined in one model yet; fit the "
                             "regime model on the continuous traits, or drop [model.regimes]")
        bad = sorted(set(self.priors) - set(PRIOR_KEYS))
        if bad:
            raise InputError(
                f"unknown prior setting(s) {bad}; known: " + ", ".join(sorted(PRIOR_KEYS))
            )

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class BuiltModel:
    """A PyMC model plus everything needed to summarise and cross-validate it."""

    model: pm.Model
    spec: ModelSpec
    data: ModelData
    traits: list[str]
    y: np.ndarray  # (N, k) observed values, NaN where unobserved
    observed: np.ndarray  # (N, k) bool
    priors: list[PriorInfo]
    summary_vars: list[str]
    # tensors: lengths, y, R, E, err_var, mu, log_scale. Under OU on a non-ultrametric tree
    # y, E and err_var are those of y' = mu + (y - mu) / D and log_scale = log D (else 0):
    # a log-likelihood over some cells subtracts log_scale once per observed cell.
    # node_scale (n_nodes): OU's D_v, trait = mu + D_v (engine value - mu) at every node
    # (1 otherwise); E_species: the species-level covariance before any OU rescaling
    engine_inputs: dict[str, Any]
    tree_data: dict[str, str]  # tree array name -> pm.Data name
    likelihood: str
    notes: list[str] = field(default_factory=list)
    predictors: list[str] = field(default_factory=list)
    design: np.ndarray | None = None  # regression design matrix (N, p); rows with a missing predictor are 0
    design_ok: np.ndarray | None = None  # (N,) bool: the species has every predictor
    painting: Any = None  # data.regimes.Painting of a regime model; engine R is then (regimes, k, k)
    discrete: Any = None  # DiscreteSetup of the threshold model (y holds state codes there)

    @property
    def species(self) -> list[str]:
        return self.data.species

    @property
    def loglik_kind(self) -> str:
        """'joint' (all traits of a species) or 'conditional' (response given predictors)."""
        return "conditional" if self.spec.kind == "regression" else "joint"

    def engine_function(self, extra: tuple[str, ...] = ()):
        """Compiled function: free random variables -> engine inputs (numpy).

        Used to evaluate per-draw quantities (pointwise log-likelihood, predictive
        draws) after sampling without storing large arrays in the posterior.
        ``extra`` adds other entries of ``engine_inputs`` (e.g. ``"node_scale"``).
        """
        names = ["lengths", "y", "R", "E", "err_var", "mu", "log_scale", *extra]
        names += [n for n in ("tip_mean", "fitted") if n in self.engine_inputs and n not in names]
        outs = [pt.as_tensor_variable(self.engine_inputs[k]) for k in names]
        fn = pytensor.function(self.model.free_RVs, outs, on_unused_input="ignore")
        rv_names = [rv.name for rv in self.model.free_RVs]

        def call(point: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
            vals = fn(*[point[n] for n in rv_names])
            return dict(zip(names, vals))

        return call


def tree_data_values(built: "BuiltModel", tree: FlatTree) -> dict[str, np.ndarray]:
    """Values of a model's tree ``pm.Data`` for another tree with the same species.

    Pass the result as ``tree_values`` to :func:`cladewise.inference.sampling.sample` (or to
    ``nutpie``'s ``with_data``) to fit that tree without recompiling.
    """
    if list(tree.tip_names) != built.species:
        raise InputError("the tree's tips must be the model's species in the same order (use order_tips)")
    if tree.n_nodes != built.data.tree.n_nodes:
        raise InputError(
            "this tree has a different number of nodes than the compiled model's tree "
            f"({tree.n_nodes} vs {built.data.tree.n_nodes}); polytomies differ, so it needs its own compile"
        )
    values = {built.tree_data[name]: arr for name, arr in tree_arrays(tree).items()}
    values[built.tree_data["parent"]] = tree.parent
    values[built.tree_data["tip_weights"]] = _mean_tip_weights(tree)
    if built.painting is not None:
        values[built.tree_data["regime"]] = rg.painting_from_spec(
            built.spec.regimes, tree, built.data.extra, built.data.values).node_regime
    return values


# --------------------------------------------------------------------------- helpers
def _mean_tip_weights(tree: FlatTree) -> np.ndarray:
    """w with w . lengths = mean root-to-tip distance (root edge included)."""
    below = np.zeros(tree.n_nodes)
    below[: tree.n_tips] = 1.0
    for i in range(tree.n_nodes - 1):
        below[tree.parent[i]] += below[i]
    return below / tree.n_tips


def _path_matrix(tree: FlatTree) -> np.ndarray:
    """Tips x nodes 0/1 matrix of the branches on each root-to-tip path (dense check only)."""
    Z = np.zeros((tree.n_tips, tree.n_nodes))
    for i in range(tree.n_tips):
        v = i
        while v != -1:
            Z[i, v] = 1.0
            v = tree.parent[v]
    return Z


def _likelihood(tree: FlatTree, parent, lengths, y, observed, R, E, err_var, mu, likelihood: str,
                regime=None, n_regimes: int = 1):
    if likelihood == "tree":
        from cladewise.engine import tree_loglik

        return tree_loglik(pt.cast(parent, "int64"), lengths, y, observed, R, E, err_var, mu,
                           regime=regime)
    if likelihood != "dense":
        raise InputError("likelihood must be 'tree' (fast) or 'dense' (reference)")
    # Dense multivariate normal: O(N^3), only for checks and benchmarks.
    Z = _path_matrix(tree)
    n, k = observed.shape
    if regime is None:
        C = pt.dot(Z * lengths[None, :], Z.T)
        phylo = pt.linalg.kron(C, R)
    else:  # O'Meara et al. 2006: sum over regimes of C_r (x) R_r
        phylo = sum(pt.linalg.kron(pt.dot(Z * (lengths * pt.eq(regime, r))[None, :], Z.T), R[r])
                    for r in range(n_regimes))
    full = phylo + pt.linalg.kron(pt.eye(n), E) + error_blocks(err_var, n, k)
    idx = np.flatnonzero(observed.ravel())
    cov = full[idx][:, idx]
    mean = pt.flatten(pt.outer(pt.ones(n), mu))[idx]
    value = pt.flatten(y)[idx]
    return pm.logp(pm.MvNormal.dist(mu=mean, cov=cov), value)


# --------------------------------------------------------------------------- build
def build_model(
    data: ModelData, spec: ModelSpec, likelihood: str = "tree", ultrametric: bool | None = None
) -> BuiltModel:
    """Turn data and a specification into a PyMC model.

    Parameters
    ----------
    data : ModelData
        Matched data; the tree's tips are the species.
    spec : ModelSpec
        What to fit.
    likelihood : {"tree", "dense"}
        ``"tree"``: the linear-time engine (default). ``"dense"``: a dense
        multivariate normal, for checks on small trees and benchmarks.
    ultrametric : bool, optional
        Whether every tree the model will serve is ultrametric (default: whether
        ``data.tree`` is). Under OU a non-ultrametric tree adds an exact per-tip
        rescaling; a tree sample passes False when any of its trees needs it.

    Returns
    -------
    BuiltModel
    """
    spec.validate()
    tree = data.tree
    if tree.n_tips < 3:
        raise InputError(
            f"only {tree.n_tips} species matched between tree and table; a comparative "
            "analysis needs at least 3 (and many more for useful intervals)"
        )
    # OU on a non-ultrametric tree: exact through a per-tip rescaling (model/evolution.py);
    # a species-level covariance joins each species' error as E / D_i^2
    if ultrametric is None:
        ultrametric = tree.is_ultrametric()
    exact_ou = spec.evolution == "ou" and not ultrametric
    notes = list(data.notes) + model_warnings(tree, spec.evolution, exact_ou=exact_ou, ultrametric=ultrametric)
    pri = dict(spec.priors)
    priors: list[PriorInfo] = []
    weights = _mean_tip_weights(tree)
    tbar = float(weights @ tree.length)
    height = float(tree.tip_heights().max())
    if not tbar > 0:
        raise InputError("the tree has zero height: every branch length is 0")

    disc, design_ok = None, None
    if spec.kind == "regression":
        y, observed, traits, X, predictors, err_cols, found, disc_response = regression_data(data, spec)
        design_ok = np.all(np.isfinite(X), axis=1)
        X = np.where(design_ok[:, None], X, 0.0)
        if found:
            notes += [t.summary_line() for t in found]
        if disc_response is not None:  # probit regression: the response's liability (model/threshold.py)
            disc = DiscreteSetup([t for t in found if t.name == disc_response], [0])
            notes += discrete_notes(regression=True)
    elif spec.discrete:
        traits = list(spec.traits)
        y, observed, disc = prepare_discrete(data, spec, traits)
        notes += [t.summary_line() for t in disc.traits] + discrete_notes()
        X, predictors, err_cols = None, [], traits
    else:
        missing = [t for t in spec.traits if t not in data.values.columns]
        if missing:
            raise InputError(
                f"trait(s) {missing} are not columns of the trait table; available: "
                + ", ".join(map(str, data.values.columns))
            )
        traits = list(spec.traits)
        y = data.values[traits].to_numpy(dtype=float)
        observed = np.isfinite(y)
        X, predictors, err_cols = None, [], traits
    n, k = y.shape
    for j, t in enumerate(traits):
        if observed[:, j].sum() < 2:
            raise InputError(f"trait {t!r} has fewer than two observed species")

    painting = None
    if spec.regimes:
        painting = rg.painting_from_spec(spec.regimes, tree, data.extra, data.values)
        rg.check_painting(spec, painting, tree, k, notes)
    coords = {"species": data.species, "trait": traits, "trait_": traits}
    err_dims = ("trait", "trait_")
    if disc is not None and spec.kind != "regression" and spec.measurement_error != "none":
        cont_names = [t for j, t in enumerate(traits) if j not in disc.columns]
        coords.update(continuous=cont_names, continuous_=cont_names)
        err_dims = ("continuous", "continuous_")
    if predictors:
        coords["term"] = predictors
    with pm.Model(coords=coords) as model:
        arrays = tree_arrays(tree)
        tree_data = {name: f"tree_{name}" for name in arrays}
        tensors = {name: pm.Data(tree_data[name], arr) for name, arr in arrays.items()}
        parent = pm.Data("tree_parent", tree.parent)
        tree_data["parent"] = "tree_parent"
        w_data = pm.Data("tree_tip_weights", weights)
        tree_data["tip_weights"] = "tree_tip_weights"

        # --- evolution model parameters -> branch lengths
        evo = evolution_parameters(spec, pri, height, priors)
        lengths = lengths_from_arrays(tensors, spec.evolution, ou_root=spec.ou_root, **evo)
        t_mean = pt.dot(w_data, lengths)

        # --- rates and the response/trait means
        E, fitted = None, None  # species-level covariance of a threshold model; a probit regression's X beta
        if spec.kind == "regression" and disc is not None:
            R, mu, y_t, E, fitted = probit_regression_terms(spec, disc, observed, X, predictors, t_mean, pri, priors)
        elif spec.kind == "regression":
            ymean, ysd = scale_facts(y[observed[:, 0], 0])
            R, mu, y_t = regression_terms(y, observed, X, predictors, ymean, ysd, t_mean, pri, priors)
        elif disc is not None:  # threshold model: liabilities as exactly observed columns
            R, mu, y_t, E = discrete_terms(spec, disc, y, observed, traits, t_mean, pri, priors)
        else:
            R, mu = rate_terms(spec, y, observed, traits, t_mean, pri, priors)
            y_t = pm.Data("obs_values", np.where(observed, y, 0.0))

        # --- regimes: one rate matrix per regime (and OU optima); model/regimes.py
        regime, tip_mean = None, None
        if painting is not None:
            regime = pm.Data("tree_regime", painting.node_regime)
            tree_data["regime"] = "tree_regime"
            R, tip_mean = rg.regime_terms(spec, painting, tensors, parent, regime, R, mu, evo, y, observed,
                                          traits, pri, priors, PriorInfo)

        # --- species-level covariance
        if spec.species_covariance:
            if E is None:
                E = species_terms(y, observed, traits, pri, priors)
            share = pt.diag(R) * t_mean / (pt.diag(R) * t_mean + pt.diag(E))
            pm.Deterministic("phylo_share", share, dims="trait")
        else:
            E = pt.zeros((k, k))

        # --- measurement error
        if disc is not None and spec.kind != "regression":  # liabilities carry no measurement error
            err_var = continuous_error(
                lambda cols, obs: measurement_error(spec, data, cols, obs, priors, notes, dims=err_dims),
                traits, observed, disc)
        else:
            err_var = measurement_error(spec, data, err_cols, observed, priors, notes)

        # --- exact OU on a non-ultrametric tree: engine inputs of y' = mu + (y - mu) / D
        ey, e_err, e_E, log_scale, e_mu = y_t, err_var, E, pt.zeros(n), mu
        # OU: node values are mu + D_v (z_v - mu), z Brownian on the OU lengths (model/evolution.py)
        node_scale = ou_tip_scale(tensors, evo["alpha"]) if spec.evolution == "ou" else pt.ones(tree.n_nodes)
        if tip_mean is not None:
            # multi-optimum OU: the engine sees y minus each tip's expected value, root mean 0
            tip_scale = node_scale[:n] if exact_ou else pt.ones(n)
            ey = pt.where(observed, y_t - tip_scale[:, None] * tip_mean, 0.0)
            e_mu = pt.zeros(k)
        if exact_ou:
            ey, e_err, e_E, log_scale = ou_rescaled_inputs(node_scale, ey, observed, e_mu, err_var, E)
        obs_t = observed if likelihood == "dense" else pm.Data("obs_mask", observed.astype(np.int8))
        # From the data tensor, not a numpy constant: an N-long constant would be frozen
        # into the compiled code (no reuse across data sets; not cacheable above 1 MB).
        jacobian = -pt.dot(pt.sum(obs_t, axis=1).astype("float64"), log_scale) if exact_ou else 0.0
        pm.Potential(
            "tree_loglik",
            _likelihood(tree, parent, lengths, ey, obs_t, R, e_E, e_err, e_mu, likelihood, regime,
                        painting.n_regimes if painting is not None else 1) + jacobian,
        )

    summary_vars = summary_names(model.named_vars)  # catalogue order (model/quantities.py)
    return BuiltModel(
        model=model, spec=spec, data=data, traits=traits,
        y=np.where(observed, y, np.nan), observed=observed, priors=priors,
        summary_vars=summary_vars,
        engine_inputs={"lengths": lengths, "y": ey, "R": R, "E": e_E, "err_var": e_err, "mu": e_mu,
                       "log_scale": log_scale, "node_scale": node_scale, "E_species": E,
                       **({} if tip_mean is None else {"tip_mean": tip_scale[:, None] * tip_mean}),
                       **({} if fitted is None else {"fitted": fitted})},
        tree_data=tree_data, likelihood=likelihood, notes=notes,
        predictors=predictors, design=X, design_ok=design_ok, painting=painting, discrete=disc,
    )
