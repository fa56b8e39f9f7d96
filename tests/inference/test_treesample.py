"""Fitting over a tree sample: padding, one compile, pooling, variance share.

Pooling follows de Villemereuil et al. 2012 (BMC Evol. Biol. 12:102): the posterior
under tree uncertainty is the equal-weight mixture of the per-tree posteriors, so
the pooled draws must be exactly the per-tree draws put side by side.

One nutpie compile (about a minute on this machine) is shared by the whole file
through a module-scoped fixture.
"""

from __future__ import annotations

import json

import arviz as az
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from cladewise.inference import sampling
from cladewise.model.build import ModelData, ModelSpec, tree_data_values
from cladewise.engine import loglik
from cladewise.errors import InputError
from cladewise.model.evolution import transformed_lengths
from cladewise.inference.fit import LOGLIK_VAR, finish_fit
from cladewise.inference.sampling import SamplingOptions
from cladewise.model.simulate import simulate_traits
from cladewise.inference.pooled import fit_tree_sample, pool_tree_fits
from cladewise.inference.tree_align import align_trees, choose_trees, pad_tree
from cladewise.inference.treesample import tree_disagreement, tree_variance_share
from cladewise.pipeline import fit_from_spec
from cladewise.data.trees import FlatTree, covariance, order_tips

from treegen import random_tree

N_SPECIES = 10
OPTS = SamplingOptions(chains=2, draws=100, tune=100, seed=7, progress=False)


def collapse(tree: FlatTree, v: int) -> FlatTree:
    """Remove internal node v (its children join v's parent): a polytomy."""
    par, ln = tree.parent.copy(), tree.length.copy()
    kids = np.flatnonzero(par == v)
    par[kids] = par[v]
    ln[kids] += ln[v]
    keep = np.r_[0:v, v + 1:tree.n_nodes]
    new = np.arange(tree.n_nodes)
    new[v + 1:] -= 1
    p = par[keep]
    return FlatTree(np.where(p >= 0, new[np.maximum(p, 0)], -1), ln[keep], tree.tip_names)


def dense_loglik(tree: FlatTree, y, R, err_var, mu) -> float:
    # vec(Y) ~ N(1 (x) mu, C (x) R + diag(err)), species-major ordering
    C = covariance(tree)
    cov = np.kron(C, R) + np.diag(err_var.ravel())
    return float(stats.multivariate_normal(np.tile(mu, tree.n_tips), cov).logpdf(y.ravel()))


# ------------------------------------------------------------------ padding
@pytest.mark.parametrize("extra", [1, 4])
def test_padding_keeps_tree_and_likelihood(extra):
    rng = np.random.default_rng(3)
    base = collapse(random_tree(9, rng, ultrametric=True), 11)
    tree = base.with_lengths(np.r_[base.length[:-1], 0.4])  # with a root edge
    padded = pad_tree(tree, tree.n_nodes + extra)
    n = padded.n_nodes
    assert n == tree.n_nodes + extra
    assert np.all(padded.parent[:-1] > np.arange(n - 1)) and padded.parent[-1] == -1
    assert np.array_equal(padded.n_children()[tree.n_nodes:], np.ones(extra, dtype=int))
    y = rng.normal(size=(9, 2))
    obs = np.ones((9, 2), bool)
    R = np.array([[1.0, 0.4], [0.4, 2.0]])
    err = np.full((9, 2), 0.05)
    args = (y, obs, R, np.zeros((2, 2)), err, np.zeros(2))
    # the padded tree against scipy's dense multivariate normal on the unpadded tree
    ref = dense_loglik(tree, y, R, err, np.zeros(2))
    assert loglik(padded.parent, padded.length, *args) == pytest.approx(ref, rel=1e-10)
    # every branch-length transform sees the same tree (Pagel 1999; Hansen 1997; Harmon et al. 2010)
    for model, kw in [("lambda", {"lam": 0.4}), ("ou", {"alpha": 0.8}), ("kappa", {"kappa": 0.6}),
                      ("delta", {"delta": 1.7}), ("early_burst", {"rate_change": -0.5})]:
        a = loglik(tree.parent, transformed_lengths(tree, model, **kw), *args)
        b = loglik(padded.parent, transformed_lengths(padded, model, **kw), *args)
        assert b == pytest.approx(a, rel=1e-10), model


def test_align_prunes_and_orders():
    tree = random_tree(8, np.random.default_rng(1), True)
    names = list(reversed(tree.tip_names[:6]))
    out = align_trees([tree], names)[0]
    assert list(out.tip_names) == names
    sub = covariance(tree)[np.ix_([7 - i for i in range(2, 8)], [7 - i for i in range(2, 8)])]
    assert np.allclose(covariance(out), sub)
    with pytest.raises(InputError, match="lacks"):
        align_trees([tree], names + ["not_there"])


def test_subset_choice():
    a = choose_trees(100, 20, 5)
    assert len(a) == 20 and len(set(a)) == 20 and np.all(np.diff(a) > 0) and a.max() < 100
    assert np.array_equal(a, choose_trees(100, 20, 5))
    assert not np.array_equal(a, choose_trees(100, 20, 6))
    assert np.array_equal(choose_trees(7, None, 1), np.arange(7))
    for bad in (0, 101):
        with pytest.raises(InputError, match="n_trees"):
            choose_trees(100, bad, 1)


# ------------------------------------------------------------------ one shared fit
@pytest.fixture(scope="module")
def sample_fit():
    rng = np.random.default_rng(1)
    t0 = random_tree(N_SPECIES, rng, True)
    other = collapse(random_tree(N_SPECIES, np.random.default_rng(2), True), 12)  # one node fewer
    scaled = t0.with_lengths(t0.length * 4.0)  # rates must shrink by 4 on this tree
    # tips in another order than the data, as a tree file may give them
    trees = [t0, order_tips(other, list(reversed(other.tip_names))), scaled]
    y = simulate_traits(t0, np.array([[1.0, 0.6], [0.6, 1.0]]), np.zeros(2), rng=rng)
    y[3, 1] = np.nan  # a missing cell: observed data must still pool to one copy
    data = ModelData(tree=t0, values=pd.DataFrame(y, index=list(t0.tip_names), columns=["a", "b"]))
    spec = ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"]})
    from cladewise.inference import compile_cache

    real = compile_cache.compile_cached  # every nutpie compile goes through it
    calls = []

    def counting(*a, **k):
        calls.append(1)
        return real(*a, **k)

    mp = pytest.MonkeyPatch()
    mp.setattr(compile_cache, "compile_cached", counting)
    try:
        res = fit_tree_sample(data, spec, trees, OPTS, progress=False)
    finally:
        mp.undo()
    return res, len(calls), trees, data


def test_one_compile_for_the_whole_sample(sample_fit):
    res, n_compiles, trees, _ = sample_fit
    assert len(trees) == 3 and len({t.n_nodes for t in trees}) == 2
    assert n_compiles == 1


def test_pooled_draws_are_the_per_tree_draws(sample_fit):
    # de Villemereuil et al. 2012: equal-weight mixture = per-tree posteriors side by side
    res, _, trees, data = sample_fit
    post = res.idata.posterior
    assert list(post.coords["tree"].values) == [0, 0, 1, 1, 2, 2]
    assert res.seeds == [7, 8, 9]
    n_nodes = res.built.data.tree.n_nodes
    for i, tree in enumerate(trees):
        padded = pad_tree(align_trees([tree], data.species)[0], n_nodes)
        values = tree_data_values(res.built, padded)
        values = {k: v for k, v in values.items() if k in res.compiled.shared_data}
        alone = sampling.sample(res.built, SamplingOptions(chains=2, draws=100, tune=100, seed=7 + i, progress=False),
                                compiled=res.compiled, tree_values=values)
        mine = post.isel(chain=np.flatnonzero(post.coords["tree"].values == i))
        for name in ("evo_corr", "evo_rate", "root_mean"):
            assert np.array_equal(mine[name].values, alone.posterior[name].values), (i, name)


def test_loglik_uses_each_draws_own_tree(sample_fit):
    res, _, trees, data = sample_fit
    post, ll = res.idata.posterior, res.idata.log_likelihood[LOGLIK_VAR]
    y = data.values[["a", "b"]].to_numpy()
    for chain, i in ((2, 1), (5, 2)):
        assert int(post.coords["tree"].values[chain]) == i
        rate = post["evo_rate"].values[chain, 5]
        corr = post["evo_corr"].values[chain, 5]
        R = np.sqrt(np.outer(rate, rate)) * corr
        mu = post["root_mean"].values[chain, 5]
        tree = align_trees([trees[i]], data.species)[0]
        wrong = align_trees([trees[0]], data.species)[0]
        for s in (0, 6):
            # Gaussian conditioning of species s on the others (e.g. Rasmussen &
            # Williams 2006, Gaussian Processes for ML, eq. A.6), checked with scipy
            def cond(t):
                S = np.kron(covariance(t), R)
                a = [2 * s, 2 * s + 1]
                b = [j for j in range(2 * N_SPECIES) if j not in a and np.isfinite(y.ravel()[j])]
                K = S[np.ix_(a, b)] @ np.linalg.inv(S[np.ix_(b, b)])
                m = mu + K @ (y.ravel()[b] - np.tile(mu, N_SPECIES)[b])
                V = S[np.ix_(a, a)] - K @ S[np.ix_(b, a)]
                return stats.multivariate_normal(m, V).logpdf(y[s])

            assert ll.values[chain, 5, s] == pytest.approx(cond(tree), rel=1e-8)
            assert ll.values[chain, 5, s] != pytest.approx(cond(wrong), rel=1e-3)
    loo = az.loo(res.idata)
    assert np.isfinite(loo.elpd_loo) and loo.n_samples == 600


def test_variance_share_is_the_anova_share(sample_fit):
    # law of total variance with equal groups = between sum of squares / total sum
    # of squares of a one-way ANOVA (statsmodels)
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    res, _, _, _ = sample_fit
    share = tree_variance_share(res).set_index("quantity")
    post = res.idata.posterior
    x = post["evo_rate"].sel(trait="a").values
    df = pd.DataFrame({"x": x.ravel(), "tree": np.repeat(post.coords["tree"].values, x.shape[1])})
    table = anova_lm(smf.ols("x ~ C(tree)", data=df).fit())
    eta2 = table.loc["C(tree)", "sum_sq"] / table["sum_sq"].sum()
    assert share.loc["evo_rate[a]", "tree_share"] == pytest.approx(eta2, rel=1e-9)
    # one tree is the first stretched 4 times: the rates differ by tree far more
    # than the correlation does
    assert share.loc["evo_rate[a]", "tree_share"] > 0.5
    assert share.loc["evo_corr[a, b]", "tree_share"] < share.loc["evo_rate[a]", "tree_share"]
    assert np.allclose(share["total_sd"] ** 2, share["within_tree_sd"] ** 2 + share["between_sd"] ** 2)


def test_variance_share_zero_for_identical_trees(sample_fit):
    res, _, _, _ = sample_fit
    # the reference tree three times with the same seed: identical draws
    fits = []
    for _ in range(3):
        idata = sampling.sample(res.built, OPTS, compiled=res.compiled)
        fits.append(finish_fit(res.built, idata, OPTS, predictive_draws=10))
    pooled = pool_tree_fits(fits, [0, 1, 2], [7, 7, 7], built=res.built)
    share = tree_variance_share(pooled)
    assert np.all(np.abs(share["tree_share"].to_numpy()) < 1e-12)
    assert pooled.warnings == []


def test_summary_diagnostics_are_within_tree(sample_fit):
    res, _, _, _ = sample_fit
    per = [d.max_rhat for d in res.tree_diagnostics]
    assert res.diagnostics.max_rhat == pytest.approx(max(per))
    # pooled chains of different trees disagree on purpose: arviz's R-hat across
    # all chains is larger than the worst within-tree R-hat for the rates
    across = float(az.rhat(res.idata.posterior["evo_rate"].sel(trait="a").values))
    assert across > res.summary.set_index("quantity").loc["evo_rate[a]", "r_hat"]


def test_save_and_reload(sample_fit, tmp_path):
    res, _, _, _ = sample_fit
    out = res.save(tmp_path / "fit")
    for f in ("posterior.nc", "summary.csv", "summary.json", "per_tree.csv", "tree_variance.csv",
              "tree_sample.png", "tree_sample.svg"):
        assert (out / f).is_file(), f
    js = json.loads((out / "summary.json").read_text())
    assert js["tree_sample"]["seeds"] == [7, 8, 9] and js["tree_sample"]["n_trees"] == 3
    back = az.from_netcdf(out / "posterior.nc")
    assert list(back.posterior.coords["tree"].values) == [0, 0, 1, 1, 2, 2]
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]
    assert "Tree uncertainty" in res.to_text()
    # identical observed data across trees are kept once, so the report can read them
    assert back.observed_data["y"].dims == ("species", "trait")
    from cladewise.report import write_fit_report

    assert write_fit_report(out).is_file()


# ------------------------------------------------------------------ disagreement and inputs
def test_disagreement_warnings():
    def table(means, lows, highs):
        return pd.DataFrame({"tree": range(len(means)), "quantity": "evo_corr[a, b]", "variable": "evo_corr",
                             "mean": means, "hdi_low": lows, "hdi_high": highs})

    assert tree_disagreement(table([0.3, 0.5], [0.1, 0.2], [0.6, 0.8])) == []
    sign = tree_disagreement(table([0.3, -0.1], [-0.1, -0.5], [0.6, 0.3]))
    assert len(sign) == 1 and "positive on 1 and negative on 1" in sign[0]
    hdi = tree_disagreement(table([0.3, 0.5], [-0.1, 0.2], [0.6, 0.8]))
    assert len(hdi) == 1 and "excludes zero on 1 of 2" in hdi[0]
    rates = table([1.0, -1.0], [0.5, -2], [2, -0.5]).assign(variable="evo_rate")
    assert tree_disagreement(rates) == []


def test_spec_without_tree_sample(tmp_path):
    tree = random_tree(5, np.random.default_rng(0), True)
    from cladewise.data.treefiles import format_newick

    (tmp_path / "t.nwk").write_text(format_newick(tree))
    (tmp_path / "d.csv").write_text("species,a,b\n" + "".join(f"{n},{i},{i * i}\n" for i, n in enumerate(tree.tip_names)))
    (tmp_path / "s.toml").write_text('[data]\ntree = "t.nwk"\ntraits = "d.csv"\n[model]\nkind = "correlated"\ntraits = ["a", "b"]\n')
    with pytest.raises(InputError, match="no tree sample"):
        fit_from_spec(tmp_path / "s.toml", n_trees=2)
    with pytest.raises(InputError, match="not found"):
        fit_from_spec(tmp_path / "s.toml", trees=tmp_path / "missing.nex")
