"""Ancestral values and predictions of missing cells against dense Gaussian conditioning.

The references are written here with numpy/scipy: the joint covariance of the values
at every node (tips and internal nodes) is built from the tree's node heights, the
observations add the species-level covariance and the measurement error, and the
conditional given the observed cells is the textbook Gaussian formula
(Anderson 2003, An Introduction to Multivariate Statistical Analysis, Thm 2.5.1).
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pandas as pd
import pymc as pm
import pytest
import scipy.linalg
import statsmodels.api as sm

from cladewise.inference.ancestral import (
    hdi_along_first,
    node_conditionals,
    node_names,
    reconstruct,
    thinned_draws,
)
from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.model.evolution import transformed_lengths
from treegen import random_tree


# --------------------------------------------------------------------------- dense reference
def mrca_heights(tree) -> np.ndarray:
    """Height (from the root) of the most recent common ancestor of every pair of nodes."""
    N = tree.n_nodes
    h = tree.heights()
    anc = [None] * N
    anc[N - 1] = {N - 1}
    for v in range(N - 2, -1, -1):
        anc[v] = anc[tree.parent[v]] | {v}
    S = np.empty((N, N))
    for u in range(N):
        for v in range(u, N):
            S[u, v] = S[v, u] = max(h[w] for w in anc[u] & anc[v])
    return S


def bm_node_cov(tree, lengths) -> np.ndarray:
    """Brownian motion: Cov(X_u, X_v) = shared path from the top of the root edge (Felsenstein 1973)."""
    return mrca_heights(tree.with_lengths(lengths)) + lengths[-1]


def ou_node_cov(tree, alpha: float, stationary: bool) -> np.ndarray:
    """Ornstein-Uhlenbeck, root at the optimum or stationary (Hansen 1997, Evolution 51:1341, eq. 6
    with the start at the optimum; Butler & King 2004 for the stationary root): for nodes at heights
    h_u, h_v with MRCA height s, exp(-alpha (h_u + h_v - 2 s)) (1 - exp(-2 alpha s)) / (2 alpha);
    the stationary root drops the ``- exp(-2 alpha s)`` term."""
    h = tree.heights()
    s = mrca_heights(tree)
    decay = np.exp(-alpha * (h[:, None] + h[None, :] - 2 * s))
    return decay * ((1.0 if stationary else (1 - np.exp(-2 * alpha * s)))) / (2 * alpha)


def dense_conditional(Cn, R, E, err, mu, y, observed):
    """Conditional of every node's phylogenetic value and of every species' true mean.

    Joint model: X = vec over nodes (cov Cn (x) R, mean mu); true species means
    Y_i = X_i + eps_i (eps ~ N(0, E)); observations Y_i + e_i (e ~ N(0, err_i)).
    """
    N, k = y.shape
    covX = np.kron(Cn, R)
    covY = np.kron(Cn[:N, :N], R) + np.kron(np.eye(N), E)
    errb = scipy.linalg.block_diag(*[np.diag(e) if e.ndim == 1 else e for e in err])
    obs = observed.ravel()
    cov_obs = (covY + errb)[np.ix_(obs, obs)]
    r = y.ravel()[obs] - np.tile(mu, N)[obs]
    out = []
    for cross, prior in ((np.kron(Cn[:, :N], R)[:, obs], covX), (covY[:, obs], covY)):
        A = scipy.linalg.solve(cov_obs, cross.T, assume_a="pos").T
        m = np.tile(mu, prior.shape[0] // k) + A @ r
        c = prior - A @ cross.T
        blocks = np.stack([c[i * k:(i + 1) * k, i * k:(i + 1) * k] for i in range(prior.shape[0] // k)])
        out += [m.reshape(-1, k), blocks]
    return out  # node mean, node cov, species mean, species cov


def fixed_posterior(built, S: int, seed: int, **values) -> tuple[az.InferenceData, dict]:
    """S identical posterior draws of a prior draw of the free variables (``values`` override)."""
    free = built.model.free_RVs
    drawn = pm.draw(free, random_seed=seed)
    point = {rv.name: np.asarray(v, dtype=float) for rv, v in zip(free, drawn)}
    point.update({k: np.asarray(v, dtype=float) for k, v in values.items()})
    post = {k: np.broadcast_to(v, (1, S) + v.shape).copy() for k, v in point.items()}
    return az.from_dict(posterior=post), point


def make_data(tree, k, rng, p_missing=0.25, se=False, tree_only=0):
    N = tree.n_tips
    y = rng.normal(size=(N, k)) + np.arange(k)
    y[rng.random((N, k)) < p_missing] = np.nan
    y[:tree_only] = np.nan  # species with no data at all (kept tips)
    for j in range(k):  # every trait needs observations
        y[N - 3:, j] = rng.normal(size=3)
    traits = [f"t{j}" for j in range(k)]
    values = pd.DataFrame(y, index=list(tree.tip_names), columns=traits)
    sed = None
    if se:
        sed = pd.DataFrame(rng.uniform(0.1, 0.4, (N, k)), index=values.index, columns=traits)
    return ModelData(tree=tree, values=values, se=sed), traits


CASES = [
    # (kind, evolution, k, measurement error, species covariance, ultrametric, extra)
    ("correlated", "bm", 2, "se", True, False, {}),
    ("independent", "lambda", 2, "none", False, False, {}),
    ("correlated", "ou", 2, "se", False, True, {}),
    ("correlated", "ou", 2, "none", False, True, {"ou_root": "stationary"}),
    ("independent", "ou", 1, "se", True, False, {}),
    ("independent", "kappa", 2, "se", False, False, {}),
    ("independent", "delta", 1, "none", True, True, {}),
    ("correlated", "early_burst", 2, "none", False, True, {}),
]


@pytest.mark.parametrize("kind,evolution,k,me,spc,ultra,extra", CASES)
def test_nodes_and_predictions_match_dense_conditioning(kind, evolution, k, me, spc, ultra, extra):
    rng = np.random.default_rng(abs(hash((kind, evolution, k, me, spc))) % 2**32)
    tree = random_tree(14, rng, ultrametric=ultra)
    data, traits = make_data(tree, k, rng, se=(me == "se"), tree_only=2)
    spec = ModelSpec(kind=kind, traits=traits, evolution=evolution, measurement_error=me,
                     species_covariance=spc, **extra)
    built = build_model(data, spec)
    idata, point = fixed_posterior(built, 3, seed=5)
    d = built.engine_function(extra=("node_scale", "E_species"))(point)
    R, E, mu = d["R"], d["E_species"], d["mu"]
    err = np.asarray(data.se.to_numpy() ** 2 if me == "se" else np.zeros((tree.n_tips, k)))
    err = np.where(built.observed, err, 0.0)
    if evolution == "ou":
        Cn = ou_node_cov(tree, float(point["alpha"]), extra.get("ou_root") == "stationary")
    else:
        par = {"lambda": "lam", "kappa": "kappa", "delta": "delta", "early_burst": "rate_change"}.get(evolution)
        params = {par: float(point["lambda" if par == "lam" else par])} if par else {}
        Cn = bm_node_cov(tree, transformed_lengths(tree, evolution, **params))
    nm, nc, sm_, sc = dense_conditional(Cn, R, E, err, mu, np.nan_to_num(built.y), built.observed)

    # per-draw conditionals of every node, trait scale (OU mapped back with D_v)
    mean, cov = node_conditionals(tree.parent, d, built.observed)
    N = tree.n_tips
    np.testing.assert_allclose(mean[N:], nm[N:], rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(cov[N:], nc[N:], rtol=1e-7, atol=1e-9)

    # the saved summaries: identical draws, so mean and sd are the conditional ones exactly
    rec = reconstruct(built, idata, seed=1)
    got = rec.nodes.pivot(index="node", columns="trait", values="mean")[rec.ancestral.trait.values]
    np.testing.assert_allclose(got.to_numpy(), nm[N:], rtol=1e-7, atol=1e-8)
    sd = rec.nodes.pivot(index="node", columns="trait", values="sd")[rec.ancestral.trait.values]
    np.testing.assert_allclose(sd.to_numpy(), np.sqrt(np.diagonal(nc[N:], axis1=1, axis2=2)), rtol=1e-6)

    # predictions of missing cells: the species' true mean (E included, no measurement error)
    miss = ~built.observed
    assert len(rec.predictions) == miss.sum()
    idx = {s: i for i, s in enumerate(built.species)}
    for r in rec.predictions.itertuples():
        i, j = idx[r.species], traits.index(r.trait)
        assert miss[i, j]
        np.testing.assert_allclose(r.mean, sm_[i, j], rtol=1e-7, atol=1e-8)
        np.testing.assert_allclose(r.sd, np.sqrt(sc[i, j, j]), rtol=1e-6)


def test_regression_predicts_response_and_reconstructs_residuals():
    rng = np.random.default_rng(3)
    tree = random_tree(16, rng)
    N = tree.n_tips
    x = rng.normal(size=N)
    yv = 1.0 + 0.5 * x + rng.normal(scale=0.3, size=N)
    yv[[0, 3, 5]] = np.nan
    x[5] = np.nan  # no predictor: cannot be predicted
    values = pd.DataFrame({"y": yv, "x": x}, index=list(tree.tip_names))
    data = ModelData(tree=tree, values=values)
    built = build_model(data, ModelSpec(kind="regression", formula="y ~ x", evolution="lambda"))
    idata, point = fixed_posterior(built, 2, seed=2)
    d = built.engine_function(extra=("node_scale", "E_species"))(point)
    beta = built.model.compile_fn(built.model["coef"], inputs=built.model.free_RVs,
                                  on_unused_input="ignore")(point)
    idata.posterior["coef"] = (("chain", "draw", "term"), np.broadcast_to(beta, (1, 2, 2)).copy())
    lam = float(point["lambda"])
    Cn = bm_node_cov(tree, transformed_lengths(tree, "lambda", lam=lam))
    X = np.column_stack([np.ones(N), np.nan_to_num(x)])
    resid = np.nan_to_num(yv) - X @ beta  # PGLS residuals (Grafen 1989)
    nm, nc, sm_, sc = dense_conditional(Cn, d["R"], np.zeros((1, 1)), np.zeros((N, 1)), np.zeros(1),
                                        resid[:, None], built.observed)
    rec = reconstruct(built, idata)
    np.testing.assert_allclose(rec.nodes["mean"].to_numpy(), nm[N:, 0], rtol=1e-7, atol=1e-8)
    assert list(rec.predictions["species"]) == [tree.tip_names[0], tree.tip_names[3]]
    for r in rec.predictions.itertuples():
        i = tree.tip_names.index(r.species)
        np.testing.assert_allclose(r.mean, X[i] @ beta + sm_[i, 0], rtol=1e-7)
        np.testing.assert_allclose(r.sd, np.sqrt(sc[i, 0, 0]), rtol=1e-6)
    assert any("lack a predictor" in n for n in rec.notes)


def test_root_with_diffuse_prior_is_the_gls_mean():
    # Under Brownian motion with a fixed rate, the root value given the tips under a flat
    # prior (a very long root edge) is the GLS estimate of the mean with the tree
    # covariance, and its variance the GLS variance (Grafen 1989; Garland & Ives 2000).
    rng = np.random.default_rng(8)
    tree = random_tree(25, rng)
    N = tree.n_tips
    y = rng.normal(size=N)
    lengths = tree.length.copy()
    lengths[-1] = 1e7
    R = np.array([[0.7]])
    d = {"lengths": lengths, "y": y[:, None], "R": R, "E": np.zeros((1, 1)), "err_var": np.zeros((N, 1)),
         "mu": np.zeros(1)}
    mean, cov = node_conditionals(tree.parent, d, np.ones((N, 1), bool))
    C = bm_node_cov(tree, tree.length)[:N, :N]
    gls = sm.GLS(y, np.ones((N, 1)), sigma=C * R[0, 0]).fit()
    np.testing.assert_allclose(mean[-1, 0], gls.params[0], rtol=1e-6)
    np.testing.assert_allclose(cov[-1, 0, 0], gls.normalized_cov_params[0, 0], rtol=1e-5)


def test_draws_follow_the_conditional_within_monte_carlo_error():
    # S identical parameter draws: the node-value draws are S independent draws from the
    # conditional, so their mean is within a few standard errors sd/sqrt(S) of the mean.
    rng = np.random.default_rng(4)
    tree = random_tree(12, rng)
    data, traits = make_data(tree, 2, rng)
    built = build_model(data, ModelSpec(kind="correlated", traits=traits))
    idata, point = fixed_posterior(built, 2000, seed=3)
    rec = reconstruct(built, idata, max_draws=2000, seed=9)
    draws = rec.ancestral["node_value"].values[0].astype(float)
    S = draws.shape[0]
    m, sd = rec.ancestral["node_mean"].values, rec.ancestral["node_sd"].values
    fixed = sd == 0  # the root without a root edge is the root mean itself
    assert fixed[-1].all()
    np.testing.assert_allclose(draws[:, fixed], np.broadcast_to(m[fixed], (S, fixed.sum())), rtol=1e-6)
    z = (draws.mean(axis=0)[~fixed] - m[~fixed]) / (sd[~fixed] / np.sqrt(S))
    assert np.all(np.abs(z) < 4.5)  # 20 values; |z| > 4.5 has probability < 2e-4 in all
    ratio = draws.std(axis=0, ddof=1)[~fixed] / sd[~fixed]  # sd of a sample sd: about sd / sqrt(2 S) = 1.6%
    assert np.all(np.abs(ratio - 1) < 0.08)


def test_prediction_intervals_cover_hidden_values_at_the_nominal_rate():
    # Simulate Brownian motion with fixed, known parameters (trait correlation 0.6), hide
    # 30% of the cells and predict them with those parameters. Each hidden value lies in
    # its 95% interval with probability 0.95; over 6 datasets x 50 species x 2 traits
    # about 180 cells are hidden, so the coverage has a Monte Carlo sd of
    # sqrt(0.95 * 0.05 / 180) = 0.016 (cells of one tree are correlated, so a little more);
    # the test allows 3.5 sd. Ancestral intervals are checked the same way against the
    # simulated internal-node values (6 x 49 nodes x 2 traits = 588 values, sd 0.009).
    rng = np.random.default_rng(11)
    R = np.array([[1.0, 0.6], [0.6, 1.0]])
    L = np.linalg.cholesky(R)
    hit = n_cells = hit_nodes = n_nodes = 0
    for rep in range(6):
        tree = random_tree(50, rng)
        N = tree.n_tips
        x = np.zeros((tree.n_nodes, 2))
        for v in range(tree.n_nodes - 2, -1, -1):  # pre-order: parents before children
            x[v] = x[tree.parent[v]] + np.sqrt(tree.length[v]) * L @ rng.standard_normal(2)
        x += np.array([1.0, -1.0])
        y = x[:N].copy()
        y[rng.random((N, 2)) < 0.3] = np.nan
        y[-2:] = x[N - 2:N]  # both traits observed somewhere
        values = pd.DataFrame(y, index=list(tree.tip_names), columns=["a", "b"])
        built = build_model(ModelData(tree=tree, values=values), ModelSpec(kind="correlated", traits=["a", "b"]))
        # parameters: root mean and tip_chol such that the model's R (tip_chol^2 / mean
        # root-to-tip distance, model/priors.py) equals R
        t_mean = float(tree.tip_heights().mean() + tree.length[-1])
        chol = np.linalg.cholesky(R * t_mean)
        packed = chol[np.tril_indices(2)]
        idata, _ = fixed_posterior(built, 400, seed=rep, root_mean=np.array([1.0, -1.0]), tip_chol=packed)
        rec = reconstruct(built, idata, seed=rep)
        idx = {s: i for i, s in enumerate(built.species)}
        for r in rec.predictions.itertuples():
            truth = x[idx[r.species], ["a", "b"].index(r.trait)]
            hit += r.hdi_low <= truth <= r.hdi_high
            n_cells += 1
        lo = rec.ancestral["node_hdi_low"].values
        hi = rec.ancestral["node_hdi_high"].values
        true_nodes = x[rec.ancestral["node"].values]
        hit_nodes += int(((lo <= true_nodes) & (true_nodes <= hi)).sum())
        n_nodes += true_nodes.size
    cov = hit / n_cells
    assert abs(cov - 0.95) < 3.5 * np.sqrt(0.95 * 0.05 / n_cells), (cov, n_cells)
    cov_nodes = hit_nodes / n_nodes
    assert abs(cov_nodes - 0.95) < 3.5 * np.sqrt(0.95 * 0.05 / n_nodes), (cov_nodes, n_nodes)


def test_hdi_matches_arviz_and_thinning():
    rng = np.random.default_rng(0)
    x = rng.gamma(2.0, size=(1001, 3))
    lo, hi = hdi_along_first(x)
    for j in range(3):  # ArviZ's hdi is the reference implementation of the same rule
        np.testing.assert_allclose([lo[j], hi[j]], az.hdi(x[:, j], hdi_prob=0.95))
    assert list(thinned_draws(10, 100)) == list(range(10))
    t = thinned_draws(4000, 1000)
    assert len(t) == 1000 and t[0] == 0 and t[-1] == 3999


def test_node_names_give_a_defining_pair():
    rng = np.random.default_rng(2)
    tree = random_tree(9, rng)
    names = node_names(tree)
    below = tree.tips_below()
    for r in names.itertuples():
        assert r.n_species == len(below[r.node])
        a, b = tree.tip_names.index(r.tip_a), tree.tip_names.index(r.tip_b)
        # the node is the most recent common ancestor of the pair: both below it, and in
        # different children
        kids = [c for c in range(tree.n_nodes - 1) if tree.parent[c] == r.node]
        sides = [next(i for i, c in enumerate(kids) if t in below[c]) for t in (a, b)]
        assert sides[0] != sides[1]


def test_summaries_integrate_over_parameter_draws():
    # Two different parameter draws: the posterior of a node value is the equal mixture of
    # the two conditionals, whose mean is the average of the means and whose variance is
    # the average variance plus the variance of the means (law of total variance).
    rng = np.random.default_rng(6)
    tree = random_tree(10, rng)
    data, traits = make_data(tree, 1, rng, se=True)
    built = build_model(data, ModelSpec(kind="independent", traits=traits, evolution="lambda",
                                        measurement_error="se"))
    _, p1 = fixed_posterior(built, 1, seed=1)
    _, p2 = fixed_posterior(built, 1, seed=2)
    post = {k: np.stack([p1[k], p2[k]])[None] for k in p1}
    rec = reconstruct(built, az.from_dict(posterior=post))
    fn = built.engine_function(extra=("node_scale", "E_species"))
    err = np.where(built.observed, data.se.to_numpy() ** 2, 0.0)
    means, variances = [], []
    for p in (p1, p2):
        d = fn(p)
        Cn = bm_node_cov(tree, transformed_lengths(tree, "lambda", lam=float(p["lambda"])))
        nm, nc, _, _ = dense_conditional(Cn, d["R"], np.zeros((1, 1)), err, d["mu"], np.nan_to_num(built.y),
                                         built.observed)
        means.append(nm[tree.n_tips:, 0])
        variances.append(nc[tree.n_tips:, 0, 0])
    means, variances = np.array(means), np.array(variances)
    np.testing.assert_allclose(rec.ancestral["node_mean"].values[:, 0], means.mean(0), rtol=1e-7, atol=1e-9)
    total = variances.mean(0) + means.var(0)
    np.testing.assert_allclose(rec.ancestral["node_sd"].values[:, 0], np.sqrt(total), rtol=1e-6)
