"""Discrete traits as thresholds on evolving liabilities (the threshold model).

Each binary or ordered trait has an unobserved continuous *liability* that evolves
on the tree like any other trait; the observed state is the interval between
thresholds the liability falls in (Wright 1934; Felsenstein 2005, Evolution
59:2488-2506; Felsenstein 2012, Am. Nat. 179:145-156). The liabilities of the species
with a state enter the likelihood engine as an exactly observed column of ``y`` (no
measurement error), so the tree likelihood, the rate matrix with its LKJ prior and
every evolution model apply unchanged. A species without a state simply has an
unobserved cell.

Sampling: each observed species' liability is a free parameter ``z`` mapped into its
state's interval, ``l = upper - exp(z)`` (lowest state), ``l = lower + exp(z)``
(highest state) or ``l = lower + (upper - lower) sigmoid(z)`` (a middle state), and
the log-Jacobian of that map is added to the density, so NUTS moves freely.

Identifiability: the liability's scale and origin are not seen by the data. The
first threshold is fixed at 0 (binary traits have only it) and the liability's
*tip variance* is fixed at 1: ``R_ll t = 1`` with t the mean root-to-tip variance of
the (transformed) tree, the same ``t`` the continuous traits' tip sd uses. So a
liability is measured in units of its own spread across species given the root.
Correlations do not depend on that choice. The evolutionary slope of a continuous
trait on a liability is per liability tip sd; the slope of a liability on a
continuous trait is in liability tip sds per unit of that trait. ``probit_coef``
rescales the latter to units of the liability's *residual* tip sd given all the
continuous traits: on a star tree it is the coefficient of a probit regression of
the state on the continuous traits.

The evolutionary correlation matrix is built from canonical partial correlations
(Lewandowski, Kurowicka & Joe 2009) with the LKJ density on its Cholesky factor,
because the liability's rate is fixed while the continuous traits' rates are free.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from cladewise.data.discrete import (DiscreteTrait, check_declaration, discrete_column, encode_states,
                                     one_state_per_species)
from cladewise.errors import InputError

__all__ = ["DiscreteSetup", "prepare_discrete", "discrete_terms", "probit_regression_terms", "continuous_error",
           "corr_cholesky", "lkj_cholesky_logp", "check_discrete_spec", "discrete_notes", "LIABILITY_ROOT_SD",
           "GAP_PRIOR"]

#: prior sd of a liability's root mean, in liability tip sds (common practice: weakly
#: informative; a state frequency between about 0.1% and 99.9% is well inside)
LIABILITY_ROOT_SD = 3.0
#: the gaps between successive thresholds of an ordered trait: LogNormal(0, 1) in
#: liability tip sds (common practice: keeps two thresholds from merging)
GAP_PRIOR = (0.0, 1.0)


@dataclass
class DiscreteSetup:
    """The discrete traits of a model, their columns and their parameter layout."""

    traits: list[DiscreteTrait]
    columns: list[int]  # column of each discrete trait among the model's traits
    cut_offsets: list[int] = field(default_factory=list)  # first cut of each trait in the cut vector
    n_cuts: int = 0
    cut_labels: list[str] = field(default_factory=list)  # labels of the estimated cuts

    def __post_init__(self) -> None:
        off = 0
        self.cut_offsets = []
        for t in self.traits:
            self.cut_offsets.append(off)
            off += t.n_states - 1
        self.n_cuts = off
        self.cut_labels = [f"{t.name}: {t.states[c]} | {t.states[c + 1]}"
                           for t in self.traits for c in range(1, t.n_states - 1)]

    @property
    def names(self) -> list[str]:
        return [t.name for t in self.traits]

    def cuts_from_free(self, free: np.ndarray) -> np.ndarray:
        """Full cut vectors ``(..., n_cuts)`` from the estimated thresholds (first cuts are 0)."""
        free = np.asarray(free, dtype=float)
        out = np.zeros(free.shape[:-1] + (self.n_cuts,))
        a = 0
        for t, off in zip(self.traits, self.cut_offsets):
            m = t.n_states - 2
            out[..., off + 1: off + 1 + m] = free[..., a: a + m]
            a += m
        return out

    def to_dict(self) -> dict[str, Any]:
        return {"traits": {t.name: list(t.states) for t in self.traits}, "columns": list(self.columns)}


def check_discrete_spec(spec: Any) -> None:
    """Checks of the ``discrete`` declaration against the rest of a model spec."""
    if not spec.discrete:
        return
    spec.discrete = {k: list(v) for k, v in check_declaration(spec.discrete).items()}
    if spec.kind == "regression":
        return  # which side of the formula each discrete trait is on: model/design.py
    extra = [t for t in spec.discrete if t not in spec.traits]
    if extra:
        raise InputError(f"discrete trait(s) {extra} are declared but not listed in traits = [...]; add them "
                         "to traits (their place there is their place in the model)")
    if spec.measurement_error != "none" and all(t in spec.discrete for t in spec.traits):
        raise InputError(f"measurement_error = {spec.measurement_error!r} applies to continuous traits, and every "
                         "trait of this model is discrete; use measurement_error = \"none\"")


def prepare_discrete(data: Any, spec: Any, traits: list[str]) -> tuple[np.ndarray, np.ndarray, DiscreteSetup]:
    """Trait values with state codes in the discrete columns, the observed mask and the setup."""
    n = len(data.species)
    y = np.full((n, len(traits)), np.nan)
    found, cols = [], []
    text = getattr(data, "extra", None)
    source = "the trait table"
    for j, name in enumerate(traits):
        if name in spec.discrete:
            one_state_per_species(getattr(data, "specimens", None), name)
            cells = discrete_column(data.values, text, name)
            found.append(encode_states(cells, data.species, name, spec.discrete[name], source))
            cols.append(j)
            y[:, j] = found[-1].codes
        elif name in data.values.columns:
            y[:, j] = data.values[name].to_numpy(dtype=float)
        else:
            raise InputError(
                f"trait {name!r} is not a numeric column of the trait table; if it holds states, declare it "
                f"with discrete = {{ {name} = [\"state_a\", \"state_b\"] }}"
            )
    return y, np.isfinite(y), DiscreteSetup(found, cols)


# --------------------------------------------------------------------------- LKJ
def corr_cholesky(x: Any, k: int) -> tuple[Any, Any]:
    """Cholesky factor of a correlation matrix from k(k-1)/2 unconstrained numbers.

    Canonical partial correlations ``z = tanh(x)`` filled row by row (Lewandowski,
    Kurowicka & Joe 2009, J. Multivariate Anal. 100:1989-2001). Returns ``(L,
    log_jac)`` with ``log_jac`` the log-Jacobian of ``x -> L`` (strictly lower part).
    """
    z = pt.tanh(x)
    log_jac = pt.sum(pt.log1p(-z**2))
    rows = [pt.concatenate([pt.ones(1), pt.zeros(k - 1)])]
    a = 0
    for i in range(1, k):
        entries = []
        rest = pt.ones(())  # 1 - sum of squares so far
        for j in range(i):
            zij = z[a]
            a += 1
            if j == 0:
                v = zij
            else:
                v = zij * pt.sqrt(rest)
                log_jac = log_jac + 0.5 * pt.log(rest)
            entries.append(v)
            rest = rest - v**2
        entries.append(pt.sqrt(rest))
        rows.append(pt.concatenate([pt.stack(entries), pt.zeros(k - 1 - i)]))
    return pt.stack(rows), log_jac


def lkj_cholesky_logp(L: Any, k: int, eta: float) -> Any:
    """LKJ(eta) log density of a correlation Cholesky factor, up to a constant.

    ``sum_{i>=1} (k - i - 1 + 2 (eta - 1)) log L_ii`` (0-based rows): the LKJ density
    ``det(C)^(eta - 1)`` times the Jacobian of ``C -> L``.
    """
    i = np.arange(1, k)
    w = k - i - 1 + 2.0 * (eta - 1.0)
    return pt.sum(w * pt.log(pt.diagonal(L)[1:]))


# --------------------------------------------------------------------------- terms
def _interval_liabilities(setup: DiscreteSetup, cuts: Any, z: Any, states: np.ndarray, trait_of: np.ndarray):
    """Map free ``z`` into each species' state interval; returns (liability, log_jac)."""
    n_states = np.array([t.n_states for t in setup.traits])[trait_of]
    off = np.array(setup.cut_offsets)[trait_of]
    s = states.astype(int)
    lo_idx = off + np.clip(s - 1, 0, n_states - 2)
    hi_idx = off + np.clip(s, 0, n_states - 2)
    bottom = s == 0
    top = s == n_states - 1
    middle = ~(bottom | top)
    lower, upper = cuts[lo_idx], cuts[hi_idx]
    width = pt.switch(middle, upper - lower, 1.0)
    ez = pt.exp(pt.switch(middle, 0.0, z))
    liab = pt.switch(bottom, upper - ez, pt.switch(top, lower + ez, lower + width * pt.sigmoid(z)))
    jac = pt.switch(middle, pt.log(width) + -pt.softplus(-z) - pt.softplus(z), z)
    return liab, pt.sum(jac)


def _cut_terms(setup: DiscreteSetup, priors: list) -> Any:
    """The full cut vector: each trait's first threshold 0, then LogNormal gaps (ordered traits)."""
    from cladewise.model.priors import PriorInfo

    cuts = pt.zeros(setup.n_cuts)
    n_free = len(setup.cut_labels)
    if n_free:
        gap = pm.LogNormal("threshold_gap", mu=GAP_PRIOR[0], sigma=GAP_PRIOR[1], shape=n_free)
        a = 0
        for t, off in zip(setup.traits, setup.cut_offsets):
            m = t.n_states - 2
            if m:
                cuts = pt.set_subtensor(cuts[off + 1: off + 1 + m], pt.cumsum(gap[a: a + m]))
                a += m
        free_idx = np.concatenate([np.arange(off + 1, off + t.n_states - 1)
                                   for t, off in zip(setup.traits, setup.cut_offsets)]).astype(int)
        pm.modelcontext(None).add_coord("cut", setup.cut_labels)
        pm.Deterministic("threshold", cuts[free_idx], dims="cut")
        priors.append(PriorInfo("thresholds of ordered traits", f"first at 0; gaps LogNormal{GAP_PRIOR}",
                                "in liability tip sds; keeps neighbouring thresholds apart"))
    return cuts


def _liability_values(setup: DiscreteSetup, cuts: Any, usable: np.ndarray, base: Any) -> Any:
    """``base`` (N, k) with every usable state cell replaced by its sampled liability."""
    rows, cols, states, trait_of = [], [], [], []
    for a, (t, j) in enumerate(zip(setup.traits, setup.columns)):
        idx = np.flatnonzero(np.isfinite(t.codes) & usable[:, j])
        rows.append(idx)
        cols.append(np.full(idx.size, j))
        states.append(t.codes[idx].astype(int))
        trait_of.append(np.full(idx.size, a))
    rows, cols = np.concatenate(rows), np.concatenate(cols)
    z = pm.Flat("liability_free", shape=rows.size)
    liab, jac = _interval_liabilities(setup, cuts, z, np.concatenate(states), np.concatenate(trait_of))
    pm.Potential("liability_jacobian", jac)
    return pt.set_subtensor(base[rows, cols], liab)


def _liability_shares(spec: Any, n: int, priors: list) -> Any:
    """With a species-level covariance: each liability's phylogenetic share of its unit tip variance."""
    from cladewise.model.priors import PriorInfo

    if not spec.species_covariance:
        return None
    priors.append(PriorInfo("phylogenetic share of each liability's variance", "Beta(1, 1)",
                            "uniform; a liability's total variance is fixed at 1, split between the tree "
                            "(share) and the species level (1 - share)"))
    return pm.Beta("liability_share", 1.0, 1.0, shape=n)


def _species_covariance(y: np.ndarray, observed: np.ndarray, liab_cols: list[int], share: Any, pri: dict,
                        priors: list) -> Any:
    """Species-level covariance E when some traits are liabilities: their E sd is sqrt(1 - share).

    The continuous traits' sds and the correlation are as in
    :func:`cladewise.model.priors.species_terms` (HalfNormal of one trait sd, LKJ(2)).
    """
    from cladewise.model.priors import PriorInfo, scale_facts

    k = y.shape[1]
    sd = pt.zeros(k)
    sd = pt.set_subtensor(sd[liab_cols], pt.sqrt(1.0 - share))
    cont = [j for j in range(k) if j not in liab_cols]
    if cont:
        scales = float(pri.get("species_scale", 1.0)) * np.array(
            [scale_facts(y[observed[:, j], j])[1] for j in cont])
        sd = pt.set_subtensor(sd[cont], pm.HalfNormal("species_sd", sigma=scales, shape=len(cont)))
        priors.append(PriorInfo("species-level sds of the continuous traits",
                                "HalfNormal(" + ", ".join(f"{s:.3g}" for s in scales) + ")", "one trait sd"))
    if k == 1:
        return pt.reshape(sd**2, (1, 1))
    free = pm.Flat("species_corr_free", shape=k * (k - 1) // 2)
    L, log_jac = corr_cholesky(free, k)
    pm.Potential("species_corr_prior", lkj_cholesky_logp(L, k, 2.0) + log_jac)
    pm.Deterministic("species_corr", pt.dot(L, L.T), dims=("trait", "trait_"))
    priors.append(PriorInfo("species-level correlation matrix", "LKJ(eta=2)",
                            "mildly favours small residual correlations"))
    chol = sd[:, None] * L
    return pt.dot(chol, chol.T)


def discrete_terms(spec: Any, setup: DiscreteSetup, y: np.ndarray, observed: np.ndarray, traits: list[str],
                   t_mean: Any, pri: dict, priors: list) -> tuple[Any, Any, Any, Any]:
    """Rates, root means, the engine's ``y`` and the species-level covariance (or None).

    Call inside the model context. Returns ``(R, mu, y_t, E)``. With
    ``species_covariance`` a liability's unit tip variance is split into a
    phylogenetic share and a species-level rest.
    """
    from cladewise.model.priors import PriorInfo, scale_facts

    k = len(traits)
    is_disc = np.zeros(k, dtype=bool)
    is_disc[setup.columns] = True
    cont = np.flatnonzero(~is_disc)
    # --- root means
    means, root_sd = np.zeros(k), np.full(k, LIABILITY_ROOT_SD)
    sds = np.ones(k)
    for j in cont:
        means[j], sds[j] = scale_facts(y[observed[:, j], j])
        root_sd[j] = float(pri.get("root_sd", 5.0)) * sds[j]
    mu = pm.Normal("root_mean", mu=means, sigma=root_sd, dims="trait")
    priors.append(PriorInfo("root_mean", "Normal(trait mean, " + ", ".join(f"{s:.3g}" for s in root_sd) + ")",
                            f"5 trait sds around the observed mean; a liability: Normal(0, {LIABILITY_ROOT_SD:g})"))
    # --- tip sds: free for continuous traits, 1 (or sqrt(share)) for liabilities (identifiability)
    tip = pt.ones(k)
    if cont.size:
        scales = 2.0 * float(pri.get("rate_scale", 1.0)) * sds[cont]
        tip_sd = pm.HalfNormal("tip_sd", sigma=scales, shape=cont.size)
        tip = pt.set_subtensor(tip[cont], tip_sd)
        priors.append(PriorInfo("tip sd of each continuous trait (sqrt of rate x tree variance)",
                                "HalfNormal(" + ", ".join(f"{s:.3g}" for s in scales) + ")", "2 x trait sd"))
    priors.append(PriorInfo("liability scale", "tip variance fixed at 1 (rate = 1 / mean root-to-tip variance)",
                            "a liability's scale is not identified; its first threshold is fixed at 0"))
    share = _liability_shares(spec, len(setup.columns), priors)
    if share is not None:
        tip = pt.set_subtensor(tip[setup.columns], pt.sqrt(share))
    sigma = tip / pt.sqrt(t_mean)
    if spec.kind == "independent":
        R = pt.diag(sigma**2)
    else:
        eta = float(pri.get("lkj_eta", 1.0))
        free = pm.Flat("evo_corr_free", shape=k * (k - 1) // 2)
        L, log_jac = corr_cholesky(free, k)
        pm.Potential("evo_corr_prior", lkj_cholesky_logp(L, k, eta) + log_jac)
        corr = pt.dot(L, L.T)
        chol = sigma[:, None] * L
        R = pt.dot(chol, chol.T)
        pm.Deterministic("evo_corr", corr, dims=("trait", "trait_"))
        pm.Deterministic("evo_slope", R / pt.diag(R)[None, :], dims=("trait", "trait_"))
        priors.append(PriorInfo("evolutionary correlation matrix", f"LKJ(eta={eta:g})",
                                "eta = 1 is uniform over correlation matrices"))
        if cont.size:
            _probit_coefficients(R, setup, cont, traits)
    pm.Deterministic("evo_rate", pt.diag(R), dims="trait")
    cuts = _cut_terms(setup, priors)
    base = pm.Data("obs_values", np.where(observed & ~is_disc[None, :], y, 0.0))
    y_t = _liability_values(setup, cuts, observed, base)
    E = None if share is None else _species_covariance(y, observed, list(setup.columns), share, pri, priors)
    return R, mu, y_t, E


def probit_regression_terms(spec: Any, setup: DiscreteSetup, observed: np.ndarray, X: np.ndarray,
                            predictors: list[str], t_mean: Any, pri: dict, priors: list
                            ) -> tuple[Any, Any, Any, Any, Any]:
    """A discrete response regressed on predictors: phylogenetic (ordered) probit regression.

    The response's liability is ``X beta + e`` with ``e`` evolving on the tree; e's tip
    variance is fixed at 1 (with ``species_covariance``: split into a phylogenetic
    share and a species-level rest), so ``coef`` are probit coefficients: on a star
    tree, those of an ordinary probit regression. The first threshold is 0, so the
    intercept is identified. Returns ``(R, mu, residuals, E or None, fitted (N, 1))``.
    """
    from cladewise.model.priors import PriorInfo, regression_coefficients

    # coefficients on the liability scale: 'y sd' is the unit residual sd
    fitted = regression_coefficients(X, predictors, observed, 0.0, 1.0, pri, priors)
    priors.append(PriorInfo("liability scale", "residual tip variance fixed at 1; first threshold at 0",
                            "coefficients are then probit coefficients"))
    share = _liability_shares(spec, 1, priors)
    tip = pt.ones(1) if share is None else pt.sqrt(share)
    R = pt.reshape(tip**2 / t_mean, (1, 1))
    pm.Deterministic("evo_rate", pt.diag(R), dims="trait")
    cuts = _cut_terms(setup, priors)
    liab = _liability_values(setup, cuts, observed, pt.zeros(observed.shape))
    resid = pt.where(observed, liab - fitted[:, None], 0.0)
    E = None if share is None else pt.reshape(1.0 - share, (1, 1))
    return R, pt.zeros(1), resid, E, fitted[:, None]


def continuous_error(err_fn: Any, traits: list[str], observed: np.ndarray, setup: DiscreteSetup) -> Any:
    """Measurement error of the continuous traits, with zero error on the liabilities.

    ``err_fn(columns, observed_subset)`` builds the error of the continuous columns
    (:func:`cladewise.model.measurement.measurement_error`); its ``(N, c)`` variances
    or ``(N, c, c)`` covariances are placed into the model's k traits.
    """
    k = len(traits)
    cont = [j for j in range(k) if j not in setup.columns]
    sub = err_fn([traits[j] for j in cont], observed[:, cont])
    n = observed.shape[0]
    if sub.ndim == 2:
        return pt.set_subtensor(pt.zeros((n, k))[:, cont], sub)
    ci = np.array(cont)
    return pt.set_subtensor(pt.zeros((n, k, k))[:, ci[:, None], ci[None, :]], sub)


def _probit_coefficients(R: Any, setup: DiscreteSetup, cont: np.ndarray, traits: list[str]) -> None:
    """``probit_coef[liability, continuous]``: the regression of each liability on all continuous
    traits, in units of its residual tip sd (a probit regression's coefficients on a star tree)."""
    Rcc = R[cont][:, cont]
    rows = []
    for j in setup.columns:
        r_lc = R[j, cont]
        b = pt.linalg.solve(Rcc, r_lc, assume_a="pos")  # R_cc^-1 R_cl
        resid = R[j, j] - pt.dot(r_lc, b)
        rows.append(b / pt.sqrt(resid / R[j, j]))
    model = pm.modelcontext(None)
    model.add_coord("liability", setup.names)
    model.add_coord("continuous", [traits[j] for j in cont])
    pm.Deterministic("probit_coef", pt.stack(rows), dims=("liability", "continuous"))


def discrete_notes(regression: bool = False) -> list[str]:
    """What the threshold model's numbers mean, for the notes of every fit that has one."""
    from cladewise.evaluation.discrete import LOO_MEANING

    if regression:
        first = ("The discrete response follows the threshold model: an unobserved liability equals the "
                 "predictors' linear term plus a residual that evolves on the tree, and the state is the interval "
                 "between thresholds the liability falls in. The residual's tip variance is fixed at 1 and the "
                 "first threshold at 0, so coef are probit coefficients (per residual liability sd); on a tree "
                 "without structure they are those of an ordinary probit regression.")
    else:
        first = ("Discrete traits follow the threshold model: an unobserved liability evolves like a continuous "
                 "trait and the state is the interval between thresholds it falls in. Each liability's tip "
                 "variance is fixed at 1 and its first threshold at 0, so slopes involving a liability are per "
                 "liability tip sd; probit_coef gives the liability's regression on the continuous traits per "
                 "residual liability sd.")
    return [first, LOO_MEANING]
