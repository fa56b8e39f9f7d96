"""Regime models (model/regimes.py) against dense references written here.

Multi-rate Brownian motion: O'Meara, Ané, Sanderson & Wainwright (2006, Evolution
60:922-933), tip covariance ``sum_r C_r (x) R_r`` with C_r the shared path spent in
regime r. Multi-optimum Ornstein-Uhlenbeck: Hansen (1997, Evolution 51:1341-1351) and
Butler & King (2004, Am. Nat. 164:683-695): tip mean
``E[y_i] = exp(-a d_i) theta_root + sum_b theta_r(b) (exp(-a (d_i - h_end)) - exp(-a (d_i - h_start)))``
over the branches b on the root-to-tip path, covariance as for one optimum (shared
alpha and rate). Densities with scipy.stats.multivariate_normal.
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pandas as pd
import pymc as pm
import pytensor
import pytest
import scipy.stats

from cladewise.data.regimes import Clade, paint_clades
from cladewise.inference.draws import pointwise_loglik
from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.model.regimes import ou_regime_weights

from treegen import random_tree


def _paths(tree):
    out = []
    for i in range(tree.n_tips):
        p, v = [], i
        while v != tree.root:
            p.append(v)
            v = int(tree.parent[v])
        out.append(set(p))
    return out


def _regime_cov(tree, regime, n_reg):
    paths = _paths(tree)
    n = tree.n_tips
    C = np.zeros((n_reg, n, n))
    for i in range(n):
        for j in range(n):
            for b in paths[i] & paths[j]:
                C[regime[b], i, j] += tree.length[b]
    return C


def _hansen_mean_weights(tree, regime, alpha):
    """Hansen (1997) weights of each regime's optimum, by explicit path loops."""
    h = tree.heights()
    n_reg = int(regime.max()) + 1
    W = np.zeros((tree.n_tips, n_reg))
    for i, path in enumerate(_paths(tree)):
        d = h[i]
        W[i, regime[tree.root]] += np.exp(-alpha * d)
        for b in path:
            h_end, h_start = h[b], h[tree.parent[b]]
            W[i, regime[b]] += np.exp(-alpha * (d - h_end)) - np.exp(-alpha * (d - h_start))
    return W


def _hansen_cov(tree, alpha):
    paths = _paths(tree)
    n = tree.n_tips
    s = np.array([[sum(tree.length[b] for b in paths[i] & paths[j]) for j in range(n)] for i in range(n)])
    d = np.diag(s)
    return np.exp(-alpha * (d[:, None] + d[None, :] - 2 * s)) * (-np.expm1(-2 * alpha * s)) / (2 * alpha)


def _clade_spec(tree, starts="stem"):
    # the clade below the root's first child with at least 3 tips
    below = tree.tips_below()
    v = max((u for u in range(tree.n_tips, tree.root) if 3 <= len(below[u]) <= tree.n_tips - 3),
            key=lambda u: len(below[u]))
    names = [tree.tip_names[i] for i in below[v]]
    return {"clades": {"fast": {"species": names, "starts": starts}}}


def _point(built, seed):
    m = built.model
    return dict(zip([rv.name for rv in m.free_RVs], pm.draw(m.free_RVs, random_seed=seed)))


def _loglik_term(built, point):
    m = built.model
    fn = pytensor.function(m.free_RVs, m["tree_loglik"], on_unused_input="ignore")
    return float(fn(*[point[rv.name] for rv in m.free_RVs]))


@pytest.mark.parametrize("rates,ultra", [("own", True), pytest.param("scaled", False, marks=pytest.mark.slow)])
def test_multirate_bm_likelihood_equals_dense_closed_form(rates, ultra):
    rng = np.random.default_rng(3)
    tree = random_tree(16, rng, ultra)
    vals = pd.DataFrame(rng.normal(size=(16, 2)), index=list(tree.tip_names), columns=["a", "b"])
    vals.iloc[3, 1] = np.nan
    se = pd.DataFrame(rng.uniform(0.1, 0.3, size=(16, 2)), index=vals.index, columns=["a", "b"])
    spec = ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="se",
                     regimes=dict(_clade_spec(tree), rates=rates))
    built = build_model(ModelData(tree, vals, se=se), spec)
    point = _point(built, 5)
    inputs = built.engine_function()(point)
    R = inputs["R"]
    assert R.shape == (2, 2, 2)
    regime = built.painting.node_regime
    C = _regime_cov(tree, regime, 2)
    full = sum(np.kron(C[r], R[r]) for r in range(2)) + np.diag(se.to_numpy().ravel() ** 2)
    obs = built.observed.ravel()
    ref = scipy.stats.multivariate_normal(np.tile(inputs["mu"], 16)[obs], full[np.ix_(obs, obs)]).logpdf(
        vals.to_numpy().ravel()[obs])
    assert _loglik_term(built, point) == pytest.approx(ref, rel=1e-8)
    # the dense PyMC path of the same model agrees
    dense = build_model(ModelData(tree, vals, se=se), spec, likelihood="dense")
    assert _loglik_term(dense, point) == pytest.approx(ref, rel=1e-8)
    # LOO: one species against dense Gaussian conditioning
    idata = az.from_dict(posterior={k: np.asarray(v)[None, None] for k, v in point.items()})
    ll = pointwise_loglik(built, idata).values[0, 0]
    i = 4
    a = np.zeros((16, 2), bool)
    a[i] = True
    a = a.ravel() & obs
    b = ~np.zeros((16, 2), bool).ravel() & obs & ~a
    b[i * 2:(i + 1) * 2] = False
    mean = np.tile(inputs["mu"], 16)
    y = vals.to_numpy().ravel()
    gain = np.linalg.solve(full[np.ix_(b, b)], full[np.ix_(b, a)]).T
    cm = mean[a] + gain @ (y[b] - mean[b])
    cc = full[np.ix_(a, a)] - gain @ full[np.ix_(b, a)]
    assert ll[i] == pytest.approx(scipy.stats.multivariate_normal(cm, cc).logpdf(y[a]), rel=1e-8)


@pytest.mark.parametrize("ultra", [True, False])
def test_ou_weights_match_hansen_path_sums(ultra):
    rng = np.random.default_rng(8)
    tree = random_tree(12, rng, ultra)
    regime = rng.integers(0, 3, tree.n_nodes)
    from cladewise.model.evolution import ou_tip_scale, tree_arrays

    arrays = tree_arrays(tree)
    for alpha in (0.05, 0.7, 3.0):
        W = ou_regime_weights(arrays, tree.parent, regime, alpha, tree.n_tips, 3, int(regime[-1]))
        D = ou_tip_scale(arrays, alpha)[: tree.n_tips]
        ref = _hansen_mean_weights(tree, regime, alpha)
        np.testing.assert_allclose(W * D[:, None], ref, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(ref.sum(axis=1), 1.0, rtol=1e-12)  # weights sum to one


def test_path_sums_gradient_by_finite_differences():
    import pytensor.tensor as pt

    from cladewise.model.regimes import path_sums

    rng = np.random.default_rng(2)
    tree = random_tree(9, rng, False)
    regime = rng.integers(0, 2, tree.n_nodes)
    pytensor.gradient.verify_grad(
        lambda b: pt.sum(path_sums(tree.parent, regime, b, 9, 2) ** 2),
        [rng.uniform(0, 1, tree.n_nodes)], rng=rng, mode="FAST_COMPILE")


@pytest.mark.parametrize("k,ultra", [(1, False), pytest.param(2, True, marks=pytest.mark.slow)])
def test_multi_optimum_ou_likelihood_equals_hansen(k, ultra):
    rng = np.random.default_rng(11)
    tree = random_tree(14, rng, ultra)
    traits = ["a", "b"][:k]
    vals = pd.DataFrame(rng.normal(size=(14, k)), index=list(tree.tip_names), columns=traits)
    vals.iloc[2, 0] = np.nan
    se = pd.DataFrame(rng.uniform(0.1, 0.3, size=(14, k)), index=vals.index, columns=traits)
    spec = ModelSpec(kind="correlated" if k == 2 else "independent", traits=traits, evolution="ou",
                     measurement_error="se",
                     regimes=dict(_clade_spec(tree, "crown"), rates="shared", optima=True))
    built = build_model(ModelData(tree, vals, se=se), spec)
    point = _point(built, 7)
    alpha = float(point["alpha"])
    inputs = built.engine_function()(point)
    R = inputs["R"][0]
    theta = np.asarray(point["root_mean"])[None, :] + np.concatenate(
        [np.zeros((1, k)), np.asarray(point["optimum_diff"])])
    regime = built.painting.node_regime
    mean = _hansen_mean_weights(tree, regime, alpha) @ theta
    full = np.kron(_hansen_cov(tree, alpha), R) + np.diag(se.to_numpy().ravel() ** 2)
    obs = built.observed.ravel()
    ref = scipy.stats.multivariate_normal(mean.ravel()[obs], full[np.ix_(obs, obs)]).logpdf(
        vals.to_numpy().ravel()[obs])
    assert _loglik_term(built, point) == pytest.approx(ref, rel=1e-8)


def test_painting_rules_and_bad_input():
    from cladewise.errors import InputError

    rng = np.random.default_rng(1)
    tree = random_tree(10, rng, True)
    below = tree.tips_below()
    v = next(u for u in range(tree.n_tips, tree.root) if len(below[u]) >= 3)
    names = [tree.tip_names[i] for i in below[v]]
    stem = paint_clades(tree, [Clade("x", tuple(names), starts="stem")])
    crown = paint_clades(tree, [Clade("x", tuple(names), starts="crown")])
    assert stem.node_regime[v] == 1 and crown.node_regime[v] == 0
    assert all(stem.node_regime[i] == 1 and crown.node_regime[i] == 1 for i in below[v])
    with pytest.raises(InputError, match="not in the tree"):
        paint_clades(tree, [Clade("x", (names[0], "no_such_species"))])
    with pytest.raises(InputError, match="same most recent common ancestor"):
        paint_clades(tree, [Clade("x", tuple(names)), Clade("y", tuple(names[::-1]))])
    with pytest.raises(InputError, match="no crown"):
        paint_clades(tree, [Clade("x", (names[0],), starts="crown")])
    spec = ModelSpec(kind="correlated", traits=["a", "b"],
                     regimes={"clades": {"x": {"species": names[:1]}}, "rates": "own"})
    vals = pd.DataFrame(rng.normal(size=(10, 2)), index=list(tree.tip_names), columns=["a", "b"])
    with pytest.raises(InputError, match="too few branches"):
        build_model(ModelData(tree, vals), spec)
