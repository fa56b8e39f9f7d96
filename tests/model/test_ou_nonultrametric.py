"""Exact Ornstein-Uhlenbeck likelihood on non-ultrametric trees.

Reference: Hansen (1997, Evolution 51:1341-1351) covariance of an OU process with
one optimum, written here densely from the root-to-tip path sets:
``V_ij = exp(-a (d_i + d_j - 2 s_ij)) (1 - exp(-2 a s_ij)) / (2a)`` with the root at
the optimum, and ``exp(-a (d_i + d_j - 2 s_ij)) / (2a)`` with a stationary root
(d_i root-to-tip distance, s_ij shared path). Both have mean ``mu`` at every tip.
Densities and conditionals come from scipy.stats.multivariate_normal.
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pandas as pd
import pymc as pm
import pytensor
import pytest
import scipy.stats

from cladewise.data.trees import FlatTree
from cladewise.inference.draws import pointwise_loglik
from cladewise.inference.fit import posterior_predictive
from cladewise.model.build import ModelData, ModelSpec, build_model

from treegen import random_tree

ALPHA = 0.9


def _hansen(tree: FlatTree, alpha: float, root: str) -> np.ndarray:
    """Dense Hansen (1997) OU covariance (unit rate) from the path sets of the tips."""
    paths = []
    for i in range(tree.n_tips):
        p, v = set(), i
        while v != tree.root:
            p.add(v)
            v = int(tree.parent[v])
        paths.append(p)
    n = tree.n_tips
    s = np.array([[sum(tree.length[b] for b in paths[i] & paths[j]) for j in range(n)] for i in range(n)])
    d = np.diag(s)
    decay = np.exp(-alpha * (d[:, None] + d[None, :] - 2 * s))
    return decay * (-np.expm1(-2 * alpha * s)) / (2 * alpha) if root == "fixed" else decay / (2 * alpha)


def _setup(k: int, root: str, species_cov: bool, seed: int = 4, n: int = 9):
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, False)
    assert not tree.is_ultrametric()
    traits = ["a", "b"][:k]
    vals = pd.DataFrame(rng.normal(size=(n, k)), index=list(tree.tip_names), columns=traits)
    vals.iloc[2, 0] = np.nan  # a missing cell
    if k == 2:
        vals.iloc[5, 1] = np.nan
    se = pd.DataFrame(rng.uniform(0.1, 0.5, size=(n, k)), index=vals.index, columns=traits)
    spec = ModelSpec(kind="correlated" if k == 2 else "independent", traits=traits, evolution="ou",
                     ou_root=root, measurement_error="se", species_covariance=species_cov)
    built = build_model(ModelData(tree, vals, se=se), spec)
    m = built.model
    point = dict(zip([rv.name for rv in m.free_RVs], pm.draw(m.free_RVs, random_seed=seed)))
    point["alpha"] = np.asarray(ALPHA)
    return tree, vals, se, built, point


def _reference_cov(tree, built, point, se, root):
    """Dense covariance of all (species, trait) cells: Hansen V (x) R + I (x) E + diag(se^2)."""
    inputs = built.engine_function()(point)
    R, mu = inputs["R"], inputs["mu"]
    n, k = built.observed.shape
    if "species_sd" in point:
        E = np.diag(np.asarray(point["species_sd"]) ** 2)
    elif "species_chol" in point:
        # LKJCholeskyCov's packed lower triangle, row by row (PyMC's documented layout)
        L = np.zeros((k, k))
        L[np.tril_indices(k)] = np.asarray(point["species_chol"])
        E = L @ L.T
    else:
        E = np.zeros((k, k))
    full = np.kron(_hansen(tree, ALPHA, root), R) + np.kron(np.eye(n), E)
    full += np.diag(se.to_numpy().ravel() ** 2)
    return full, np.tile(mu, n)


CASES = [(1, "fixed", False), (1, "stationary", True), (2, "fixed", False), (2, "stationary", False),
         (2, "fixed", True)]


@pytest.mark.parametrize("k,root,species_cov", CASES)
def test_loglik_equals_dense_hansen(k, root, species_cov):
    """The model's likelihood term equals scipy's multivariate normal log density with
    Hansen's covariance plus measurement error (and species-level variance for k = 1)."""
    tree, vals, se, built, point = _setup(k, root, species_cov)
    m = built.model
    fn = pytensor.function(m.free_RVs, m["tree_loglik"], on_unused_input="ignore")
    got = float(fn(*[point[rv.name] for rv in m.free_RVs]))
    full, mean = _reference_cov(tree, built, point, se, root)
    obs = built.observed.ravel()
    ref = scipy.stats.multivariate_normal(mean[obs], full[np.ix_(obs, obs)]).logpdf(vals.to_numpy().ravel()[obs])
    assert got == pytest.approx(ref, rel=1e-8)
    assert not any("approximation" in note for note in built.notes)


@pytest.mark.parametrize("k,root,species_cov", [(2, "fixed", False), (1, "stationary", True), (2, "stationary", True)])
def test_loo_conditionals_equal_dense_conditioning(k, root, species_cov):
    """log p(y_i | y_-i) per species equals Gaussian conditioning on the dense Hansen
    covariance (scipy logpdf of the conditional normal)."""
    tree, vals, se, built, point = _setup(k, root, species_cov)
    idata = az.from_dict(posterior={name: np.asarray(v)[None, None] for name, v in point.items()})
    got = pointwise_loglik(built, idata).values[0, 0]
    full, mean = _reference_cov(tree, built, point, se, root)
    y = vals.to_numpy().ravel()
    obs = built.observed.ravel()
    n = tree.n_tips
    for i in range(n):
        cell = np.zeros((n, k), bool)
        cell[i] = True
        a = cell.ravel() & obs
        b = ~cell.ravel() & obs
        if not a.any():  # nothing of species i to predict
            assert got[i] == 0.0
            continue
        gain = np.linalg.solve(full[np.ix_(b, b)], full[np.ix_(b, a)]).T
        cmean = mean[a] + gain @ (y[b] - mean[b])
        ccov = full[np.ix_(a, a)] - gain @ full[np.ix_(b, a)]
        ref = scipy.stats.multivariate_normal(cmean, ccov).logpdf(y[a])
        assert got[i] == pytest.approx(ref, rel=1e-8)


def test_ultrametric_tree_keeps_the_plain_path():
    """On an ultrametric tree D = 1 and the model keeps the plain path (no rescaling);
    with a species-level covariance between traits on a non-ultrametric tree the
    likelihood is exact (E / D_i^2 joins each species' k x k error) and unwarned."""
    *_, built, point = _setup(2, "fixed", True)
    assert not any("approximation" in note for note in built.notes)
    assert np.any(built.engine_function()(point)["log_scale"] != 0.0)
    rng = np.random.default_rng(1)
    ultra = random_tree(7, rng, True)
    vals = pd.DataFrame(rng.normal(size=(7, 1)), index=list(ultra.tip_names), columns=["a"])
    b = build_model(ModelData(ultra, vals), ModelSpec(kind="independent", traits=["a"], evolution="ou"))
    assert not any("approximation" in note for note in b.notes)
    draw = dict(zip([rv.name for rv in b.model.free_RVs], pm.draw(b.model.free_RVs, random_seed=0)))
    assert np.all(b.engine_function()(draw)["log_scale"] == 0.0)


def test_posterior_predictive_has_hansen_covariance():
    """Replicates at one fixed parameter value have Hansen's covariance plus measurement
    error: whitened by the reference, their sample covariance is the identity within
    sampling error (3000 replicates: entry se about 0.02; bound 0.1). The approximation
    without the per-tip scale would fail this by far (diagonal off by > 10%)."""
    tree, vals, se, built, point = _setup(1, "fixed", False, seed=6, n=6)
    S = 3000
    idata = az.from_dict(posterior={name: np.broadcast_to(np.asarray(v), (1, S) + np.shape(v)).copy()
                                    for name, v in point.items()})
    reps = posterior_predictive(built, idata, n_draws=S, seed=1).values[0][:, :, 0]
    full, mean = _reference_cov(tree, built, point, se, "fixed")
    L = np.linalg.cholesky(full)
    w = np.linalg.solve(L, (reps - mean).T)
    np.testing.assert_allclose(np.cov(w), np.eye(tree.n_tips), atol=0.1)
    np.testing.assert_allclose(w.mean(axis=1), 0.0, atol=0.1)


def test_clade_loo_equals_dense_conditioning():
    """Leave-one-clade-out at one parameter value (every draw equal, so PSIS returns the
    draw's value): log p(y_c | y_rest) equals Gaussian conditioning on the dense Hansen
    covariance with scipy, for every clade cut from the tree."""
    from cladewise.evaluation.refits import loo_clades

    tree, vals, se, built, point = _setup(2, "fixed", False)
    S = 8
    idata = az.from_dict(posterior={name: np.broadcast_to(np.asarray(v), (1, S) + np.shape(v)).copy()
                                    for name, v in point.items()})
    height = float(tree.tip_heights().max())
    res = loo_clades(built, idata, cut_height=0.5 * height)
    full, mean = _reference_cov(tree, built, point, se, "fixed")
    y = vals.to_numpy().ravel()
    obs = built.observed.ravel()
    names = list(tree.tip_names)
    assert len(res.members) >= 2
    for clade, members in res.members.items():
        cell = np.zeros(built.observed.shape, bool)
        cell[[names.index(s) for s in members]] = True
        a, b = cell.ravel() & obs, ~cell.ravel() & obs
        gain = np.linalg.solve(full[np.ix_(b, b)], full[np.ix_(b, a)]).T
        ref = scipy.stats.multivariate_normal(mean[a] + gain @ (y[b] - mean[b]),
                                              full[np.ix_(a, a)] - gain @ full[np.ix_(b, a)]).logpdf(y[a])
        assert res.pointwise.loc[clade, "elpd_i"] == pytest.approx(ref, rel=1e-8)


def test_exact_refit_likelihood_with_a_species_held_out():
    """The refit model's likelihood with species i masked out equals scipy's density of
    the remaining cells under the dense Hansen covariance (the log D terms of the
    held-out cells must leave with them)."""
    from cladewise.evaluation.refits import _HOLDOUT, _holdout_model

    tree, vals, se, built, point = _setup(2, "stationary", False)
    hb = _holdout_model(built)
    m = hb.model
    fn = pytensor.function(m.free_RVs, m["tree_loglik"] + m["holdout_correction"], on_unused_input="ignore")
    full, mean = _reference_cov(tree, built, point, se, "stationary")
    y = vals.to_numpy().ravel()
    for i in (0, 5):
        mask = hb.observed.copy()
        mask[i] = False
        m[_HOLDOUT].set_value(mask.astype("float64"))
        got = float(fn(*[point[rv.name] for rv in m.free_RVs]))
        keep = mask.ravel()
        ref = scipy.stats.multivariate_normal(mean[keep], full[np.ix_(keep, keep)]).logpdf(y[keep])
        assert got == pytest.approx(ref, rel=1e-8)


def test_regression_loglik_and_replicates_follow_dense_hansen():
    """Regression under OU: the response given the predictors is normal with mean
    X beta and covariance rate x Hansen V + se^2 (scipy logpdf); replicates of the
    posterior predictive at that point, whitened by it, have mean 0 and identity
    covariance within sampling error (3000 replicates, bound 0.1 as above)."""
    rng = np.random.default_rng(11)
    n = 7
    tree = random_tree(n, rng, False)
    vals = pd.DataFrame({"a": rng.normal(size=n), "b": rng.normal(3.0, 1.0, size=n)}, index=list(tree.tip_names))
    se = pd.DataFrame({"a": rng.uniform(0.1, 0.4, n), "b": np.nan}, index=vals.index)
    spec = ModelSpec(kind="regression", formula="a ~ b", evolution="ou", ou_root="fixed", measurement_error="se")
    built = build_model(ModelData(tree, vals, se=se), spec)
    m = built.model
    point = dict(zip([rv.name for rv in m.free_RVs], pm.draw(m.free_RVs, random_seed=2)))
    point["alpha"] = np.asarray(ALPHA)
    args = [point[rv.name] for rv in m.free_RVs]
    got = float(pytensor.function(m.free_RVs, m["tree_loglik"], on_unused_input="ignore")(*args))
    coef = pytensor.function(m.free_RVs, m["coef"], on_unused_input="ignore")(*args)
    rate = built.engine_function()(point)["R"][0, 0]
    obs = built.observed[:, 0]
    cov = rate * _hansen(tree, ALPHA, "fixed") + np.diag(se["a"].to_numpy() ** 2)
    ref = scipy.stats.multivariate_normal((built.design @ coef)[obs], cov[np.ix_(obs, obs)]).logpdf(vals["a"].to_numpy()[obs])
    assert got == pytest.approx(ref, rel=1e-8)
    S = 3000
    idata = az.from_dict(posterior={name: np.broadcast_to(np.asarray(v), (1, S) + np.shape(v)).copy()
                                    for name, v in point.items()})
    reps = posterior_predictive(built, idata, n_draws=S, seed=2).values[0][:, :, 0]
    w = np.linalg.solve(np.linalg.cholesky(cov), (reps - built.design @ coef).T)
    np.testing.assert_allclose(np.cov(w), np.eye(n), atol=0.1)
    np.testing.assert_allclose(w.mean(axis=1), 0.0, atol=0.1)


def test_tree_sample_with_an_ultrametric_reference_still_rescales():
    """A tree sample whose reference tree is ultrametric but another tree is not gets the
    exact path; with the non-ultrametric tree's data the likelihood is scipy's with that
    tree's Hansen covariance."""
    from cladewise.inference.tree_align import build_for_sample
    from cladewise.model.build import tree_data_values

    rng = np.random.default_rng(8)
    n = 8
    ultra, other = random_tree(n, rng, True), random_tree(n, rng, False)
    vals = pd.DataFrame(rng.normal(size=(n, 1)), index=list(ultra.tip_names), columns=["a"])
    spec = ModelSpec(kind="independent", traits=["a"], evolution="ou", ou_root="stationary")
    built, padded = build_for_sample(ModelData(ultra, vals), spec, [ultra, other])
    m = built.model
    for name, value in tree_data_values(built, padded[1]).items():
        m[name].set_value(np.asarray(value, dtype=m[name].type.dtype))
    point = dict(zip([rv.name for rv in m.free_RVs], pm.draw(m.free_RVs, random_seed=3)))
    point["alpha"] = np.asarray(ALPHA)
    got = float(pytensor.function(m.free_RVs, m["tree_loglik"], on_unused_input="ignore")(
        *[point[rv.name] for rv in m.free_RVs]))
    inputs = built.engine_function()(point)
    cov = inputs["R"][0, 0] * _hansen(padded[1], ALPHA, "stationary")
    ref = scipy.stats.multivariate_normal(np.full(n, inputs["mu"][0]), cov).logpdf(vals["a"].to_numpy())
    assert got == pytest.approx(ref, rel=1e-8)
