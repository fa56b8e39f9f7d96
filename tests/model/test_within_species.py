"""Within-species covariance between traits measured on the same specimens.

References: scipy.stats.wishart / chi2 / multivariate_normal for every density; the
Wishart distribution of a normal sample's scatter matrix (Anderson 2003, An
Introduction to Multivariate Statistical Analysis, section 7.2); Helmert
contrasts from scipy.linalg.helmert; the Brownian-motion covariance of shared path
lengths (Felsenstein 1973). All data are invented (simulated here).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import scipy.stats

from cladewise.data.trees import covariance
from cladewise.errors import InputError
from cladewise.model import within_species as ws
from cladewise.model.build import ModelData, ModelSpec, build_model

from treegen import random_tree


# ---------------------------------------------------------------- the Wishart term
@pytest.mark.parametrize("k,nu", [(1, 3.0), (2, 2.0), (2, 5.0), (3, 4.0), (4, 9.0)])
def test_wishart_logp_matches_scipy(k, nu):
    import pytensor

    rng = np.random.default_rng(k * 10 + int(nu))
    B = rng.normal(size=(k, k))
    W = B @ B.T + 0.3 * np.eye(k)
    A = scipy.stats.wishart.rvs(df=nu, scale=W, size=3, random_state=rng).reshape(3, k, k)
    Wt = pytensor.tensor.dtensor3("W")
    f = pytensor.function([Wt], ws.wishart_logp(A, nu, Wt), mode="FAST_COMPILE")
    got = f(np.broadcast_to(W, (3, k, k)).copy())
    ref = [scipy.stats.wishart.logpdf(A[i] if k > 1 else A[i, 0, 0], df=nu, scale=W) for i in range(3)]
    np.testing.assert_allclose(got, ref, rtol=1e-10)


# ---------------------------------------------------------------- data with gaps
def _specimens(rng, tree, k, W, missing=0.15):
    """Invented specimen rows with every situation the rule has to cover."""
    names = list(tree.tip_names)
    N = len(names)
    counts = rng.integers(1, 6, N)
    counts[0], counts[1], counts[2] = 1, 2, 3  # one specimen; nu = 1 < k; nu = 2
    traits = [f"t{j}" for j in range(k)]
    rows = ws.simulate_specimens(tree, np.eye(k) * 0.4, np.zeros(k), W, counts, rng, traits)
    X = rows[traits].to_numpy(copy=True)
    X[rng.random(X.shape) < missing] = np.nan
    X[np.isnan(X).all(axis=1), 0] = 0.1  # keep every row with at least one value
    rows[traits] = X
    # species 3: only one specimen measured for t0, the rest lack it
    sp3 = rows["species"] == names[3]
    rows.loc[sp3, "t0"] = np.nan
    rows.loc[rows.index[sp3][0], "t0"] = 0.5
    rows.loc[rows.index[sp3][0], "t1"] = np.nan
    return rows, traits


def _model_data(tree, rows, traits):
    names = list(tree.tip_names)
    g = rows.groupby("species", sort=False)
    values = g[traits].mean().reindex(names)
    n = g[traits].count().reindex(names).astype(float)
    var = g[traits].var(ddof=1).reindex(names)
    return ModelData(tree, values, n=n, sample_var=var, specimens=rows)


def _reference_within(rows, names, traits, sd, corr):
    """Sum of the specimen terms by scipy, following the rule in the module docstring."""
    k = len(traits)
    total = 0.0
    for i, name in enumerate(names):
        X = rows.loc[rows["species"] == name, traits].to_numpy(dtype=float)
        have = np.isfinite(X)
        full = have.all(axis=1)
        Xc = X[full]
        c = len(Xc)
        Wi = sd[i][:, None] * sd[i][None, :] * corr
        ss_c = np.zeros(k)
        if c >= 2:
            D = Xc - Xc.mean(axis=0)
            A = D.T @ D
            ss_c = np.diag(A)
            if c - 1 >= k and np.linalg.det(A) > 0:
                total += scipy.stats.wishart.logpdf(A if k > 1 else A[0, 0], df=c - 1, scale=Wi)
            else:
                Z = scipy.linalg.helmert(c) @ Xc  # c - 1 orthonormal contrasts, iid N(0, W)
                total += scipy.stats.multivariate_normal.logpdf(Z, np.zeros(k), Wi).sum()
        for a in range(k):
            col = X[have[:, a], a]
            d = col.size - c if c >= 1 else col.size - 1
            if col.size < 2 or d < 1:
                continue
            inc = ((col - col.mean()) ** 2).sum() - ss_c[a]
            s2 = Wi[a, a]
            total += scipy.stats.chi2.logpdf(inc / s2, d) - np.log(s2)
    return total


def _reference_tree(tree, rows, traits, R, mu, sd, corr):
    """Dense multivariate normal of the observed species means (scipy)."""
    names = list(tree.tip_names)
    k = len(traits)
    N = len(names)
    g = rows.groupby("species", sort=False)
    means = g[traits].mean().reindex(names).to_numpy()
    cov = np.kron(covariance(tree), R)
    for i, name in enumerate(names):
        have = np.isfinite(rows.loc[rows["species"] == name, traits].to_numpy(dtype=float))
        na = have.sum(axis=0)
        nab = have.T.astype(float) @ have
        Wi = sd[i][:, None] * sd[i][None, :] * corr
        with np.errstate(divide="ignore", invalid="ignore"):
            Si = np.where(np.outer(na, na) > 0, Wi * nab / np.outer(na, na), 0.0)
        cov[i * k:(i + 1) * k, i * k:(i + 1) * k] += Si
    obs = np.isfinite(means).ravel()
    return scipy.stats.multivariate_normal.logpdf(means.ravel()[obs], np.tile(mu, N)[obs],
                                                  cov[np.ix_(obs, obs)])


@pytest.mark.parametrize("eta", [1.0, 2.0, 4.5])
def test_two_trait_correlation_prior_is_lkj(eta):
    """The 2 x 2 form (a Beta on (r + 1) / 2) has the LKJ density of r.

    References: the LKJ density of a 2 x 2 correlation, (1 - r^2)^(eta - 1) /
    (2^(2 eta - 1) B(eta, eta)) (Lewandowski, Kurowicka & Joe 2009), and PyMC's
    LKJCorr up to its constant (PyMC 5's constant for n = 2 is off by log 4; an additive
    constant does not change a posterior).
    """
    import pymc as pm
    import scipy.special

    r = np.array([-0.95, -0.4, 0.0, 0.3, 0.8])
    with pm.Model() as m:
        corr = ws.lkj_corr("c", 2, eta)
    ours = pm.logp(m["c_half"], (r + 1.0) / 2.0).eval() - np.log(2.0)  # density of r = 2 u - 1
    exact = (eta - 1.0) * np.log1p(-r * r) - (2.0 * eta - 1.0) * np.log(2.0) - scipy.special.betaln(eta, eta)
    np.testing.assert_allclose(ours, exact, atol=1e-7)  # PyMC's Beta normaliser is good to ~2e-8
    lkj = pm.LKJCorr.dist(n=2, eta=eta)
    pymc_lkj = np.array([pm.logp(lkj, np.array([v])).eval() for v in r])
    np.testing.assert_allclose(np.diff(ours), np.diff(pymc_lkj), atol=1e-6)  # PyMC computes in float32
    got = pm.draw(corr, random_seed=1)
    assert got.shape == (2, 2) and got[0, 0] == 1.0 and got[0, 1] == got[1, 0]


@pytest.mark.parametrize("k,seed", [(2, 3), (3, 4)])
def test_model_log_density_matches_dense_scipy_plus_wishart(k, seed):
    rng = np.random.default_rng(seed)
    tree = random_tree(14, rng, True)
    B = rng.normal(size=(k, k))
    Wt = 0.1 * (B @ B.T + np.eye(k))
    rows, traits = _specimens(rng, tree, k, Wt)
    built = build_model(_model_data(tree, rows, traits),
                        ModelSpec(kind="correlated", traits=traits, measurement_error="specimens"))
    m = built.model
    assert "within_corr" in built.summary_vars
    ip = m.initial_point()
    point = {n: v + rng.normal(scale=0.3, size=np.shape(v)) for n, v in ip.items()}
    outs = [built.engine_inputs["R"], built.engine_inputs["mu"], m["within_corr"],
            m["within_log_var_mean"], m["within_log_var_sd"], m["within_z"],
            m["tree_loglik"], m["within_species_loglik"]]
    f = m.compile_fn(m.replace_rvs_by_values(outs), inputs=m.value_vars, point_fn=True)
    R, mu, corr, lm, ls, z, tree_lp, within_lp = f(point)
    sd = np.exp(0.5 * (lm[None, :] + ls[None, :] * z))
    assert abs(corr[0, 1]) > 0.0
    ref_tree = _reference_tree(tree, rows, traits, R, mu, sd, corr)
    ref_within = _reference_within(rows, list(tree.tip_names), traits, sd, corr)
    assert float(tree_lp) == pytest.approx(ref_tree, rel=1e-8)
    assert float(within_lp) == pytest.approx(ref_within, rel=1e-8)


def test_specimens_missing_a_trait_keep_working_and_zero_precision():
    # A species whose specimens lack a trait entirely: that cell is unobserved and
    # its error row/column is dropped; the model still builds and evaluates.
    rng = np.random.default_rng(8)
    tree = random_tree(10, rng, True)
    rows, traits = _specimens(rng, tree, 2, np.array([[0.2, 0.1], [0.1, 0.2]]))
    rows.loc[rows["species"] == tree.tip_names[5], "t1"] = np.nan
    built = build_model(_model_data(tree, rows, traits),
                        ModelSpec(kind="correlated", traits=traits, measurement_error="specimens"))
    assert not built.observed[5, 1]
    lp = built.model.compile_logp()(built.model.initial_point())
    assert np.isfinite(lp)


def test_error_correlation_for_species_means():
    # S_i = D_i Rho D_i from the table's SEs: the engine's value equals the scipy
    # density with that block added; 0 (default) is the diagonal model.
    rng = np.random.default_rng(5)
    tree = random_tree(10, rng, True)
    names = list(tree.tip_names)
    vals = pd.DataFrame(rng.normal(size=(10, 2)), index=names, columns=["a", "b"])
    se = pd.DataFrame(rng.uniform(0.1, 0.4, (10, 2)), index=names, columns=["a", "b"])
    data = ModelData(tree, vals, se=se)
    spec = ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="se", error_correlation=0.6)
    built = build_model(data, spec)
    m = built.model
    point = m.initial_point()
    outs = [built.engine_inputs["R"], built.engine_inputs["mu"], m["tree_loglik"]]
    R, mu, lp = m.compile_fn(m.replace_rvs_by_values(outs), inputs=m.value_vars, point_fn=True)(point)
    cov = np.kron(covariance(tree), R)
    for i in range(10):
        d = se.to_numpy()[i]
        cov[2 * i:2 * i + 2, 2 * i:2 * i + 2] += np.outer(d, d) * np.array([[1, 0.6], [0.6, 1]])
    ref = scipy.stats.multivariate_normal.logpdf(vals.to_numpy().ravel(), np.tile(mu, 10), cov)
    assert float(lp) == pytest.approx(ref, rel=1e-8)
    with pytest.raises(InputError, match="between -1 and 1"):
        ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="se", error_correlation=1.2).validate()
    with pytest.raises(InputError, match="only used with measurement_error = 'se'"):
        ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="specimens",
                  error_correlation=0.3).validate()


def test_draw_errors_has_the_stated_covariance():
    # Sample covariance of many draws against the given S (law of large numbers;
    # tolerance ~5 standard errors of a covariance estimate, from memory).
    rng = np.random.default_rng(2)
    S = np.array([[[0.5, 0.3], [0.3, 0.4]], [[0.2, 0.0], [0.0, 0.0]]])
    draws = np.stack([ws.draw_errors(S, rng) for _ in range(20000)])
    np.testing.assert_allclose(np.cov(draws[:, 0].T), S[0], atol=0.03)
    assert np.all(draws[:, 1, 1] == 0.0)


def test_fit_stores_loo_conditionals_with_correlated_errors_of_the_means():
    # End to end (short chain): the stored pointwise log-likelihood of each species
    # equals its leave-one-out density by explicit Gaussian conditioning of the
    # dense covariance C (x) R + blockdiag(W_i n_ab / (n_a n_b)) (scipy; Bürkner,
    # Gabry & Vehtari 2021, Computational Statistics 36:1243-1261). LOO holds out the
    # species' means only: its specimen (co)variances stay in the fit.
    from cladewise.inference.fit import fit
    from cladewise.inference.sampling import SamplingOptions

    rng = np.random.default_rng(21)
    tree = random_tree(12, rng, True)
    rows, traits = _specimens(rng, tree, 2, np.array([[0.2, 0.15], [0.15, 0.2]]))
    data = _model_data(tree, rows, traits)
    res = fit(data, ModelSpec(kind="correlated", traits=traits, measurement_error="specimens"),
              SamplingOptions(chains=1, draws=20, tune=100, seed=2, progress=False), predictive_draws=5)
    assert "within_corr[t0, t1]" in set(res.summary["quantity"])
    assert np.isfinite(res.idata.posterior_predictive["y_rep"].values).all()
    post = res.idata.posterior
    ll = res.idata.log_likelihood["y"].values[0]
    names = list(tree.tip_names)
    C = covariance(tree)
    means = data.values.to_numpy()
    obs = np.isfinite(means).ravel()
    for d in (0, 19):
        rate = post["evo_rate"].values[0, d]
        R = np.sqrt(np.outer(rate, rate)) * post["evo_corr"].values[0, d]
        corr = post["within_corr"].values[0, d]
        sd = np.exp(0.5 * (post["within_log_var_mean"].values[0, d][None, :]
                           + post["within_log_var_sd"].values[0, d][None, :] * post["within_z"].values[0, d]))
        full = np.kron(C, R)
        for i, name in enumerate(names):
            have = np.isfinite(rows.loc[rows["species"] == name, traits].to_numpy(dtype=float))
            na, nab = have.sum(axis=0), have.T.astype(float) @ have
            with np.errstate(divide="ignore", invalid="ignore"):
                Si = np.where(np.outer(na, na) > 0, np.outer(sd[i], sd[i]) * corr * nab / np.outer(na, na), 0.0)
            full[2 * i:2 * i + 2, 2 * i:2 * i + 2] += Si
        mu = post["root_mean"].values[0, d]
        v, m = means.ravel(), np.tile(mu, len(names))
        for i in range(len(names)):
            a = np.zeros(2 * len(names), bool)
            a[2 * i:2 * i + 2] = True
            a &= obs
            if not a.any():
                continue
            b = obs & ~a
            K = full[np.ix_(a, b)] @ np.linalg.inv(full[np.ix_(b, b)])
            cm = m[a] + K @ (v[b] - m[b])
            cv = full[np.ix_(a, a)] - K @ full[np.ix_(b, a)]
            ref = scipy.stats.multivariate_normal(cm, cv).logpdf(v[a])
            np.testing.assert_allclose(ll[d, i], ref, rtol=1e-7)


# ---------------------------------------------------------------- recovery
# Setting of issue 12 part 1 ("same-specimen traits"): 150 species, 3 specimens
# each, within-species correlation 0.8; evolutionary rates 0.05 on a unit-height
# tree and within-species variance 0.1, so the error variance of a mean (0.033)
# is comparable to the phylogenetic signal of recent splits.
N_SPECIES, N_SPECIMENS, WITHIN_CORR = 150, 3, 0.8


def _setting(evo_corr, seed):
    rng = np.random.default_rng(seed)
    tree = random_tree(N_SPECIES, rng, True)
    tree = tree.with_lengths(tree.length / tree.tip_heights().max())  # unit height
    R = 0.05 * np.array([[1.0, evo_corr], [evo_corr, 1.0]])
    W = 0.1 * np.array([[1.0, WITHIN_CORR], [WITHIN_CORR, 1.0]])
    rows = ws.simulate_specimens(tree, R, np.zeros(2), W, N_SPECIMENS, rng, ["x", "y"])
    return tree, _model_data(tree, rows, ["x", "y"])


def _fit_setting(evo_corr, seed, draws):
    from cladewise.inference.fit import summarise
    from cladewise.inference.sampling import SamplingOptions, sample

    tree, data = _setting(evo_corr, seed)
    opts = SamplingOptions(chains=2, draws=draws, tune=draws, seed=seed, progress=False)
    spec = ModelSpec(kind="correlated", traits=["x", "y"], measurement_error="specimens")
    out = {}
    # "diagonal": the same specimens model without the rows, i.e. per-trait
    # variances only (errors of the means independent across traits)
    for label, d in (("full", data), ("diagonal", ModelData(tree, data.values, n=data.n,
                                                             sample_var=data.sample_var))):
        built = build_model(d, spec)
        out[label] = summarise(sample(built, opts), built).set_index("quantity")
    return out


def _ml_evo_corr(tree, data, full: bool) -> float:
    """Maximum-likelihood evolutionary correlation with W fixed at its pooled estimate."""
    import scipy.optimize

    from cladewise.engine import loglik

    names = list(tree.tip_names)
    st = ws.specimen_statistics(data.specimens, names, ["x", "y"])
    W = st.scatter.sum(axis=0) / st.nu.sum()  # pooled within-species covariance
    err = np.broadcast_to(W / N_SPECIMENS, (len(names), 2, 2)).copy()
    if not full:
        err = err * np.eye(2)
    y = data.values.to_numpy()
    obs = np.ones_like(y, bool)

    def nll(p):
        L = np.array([[np.exp(p[0]), 0.0], [p[1], np.exp(p[2])]])
        return -loglik(tree.parent, tree.length, y, obs, L @ L.T, np.zeros((2, 2)), err, p[3:5])

    r = scipy.optimize.minimize(nll, [np.log(0.2), 0.0, np.log(0.2), 0.0, 0.0], method="Nelder-Mead",
                                options=dict(maxiter=4000, xatol=1e-7, fatol=1e-9))
    L = np.array([[np.exp(r.x[0]), 0.0], [r.x[1], np.exp(r.x[2])]])
    R = L @ L.T
    return float(R[0, 1] / np.sqrt(R[0, 0] * R[1, 1]))


def test_same_specimen_traits_point_estimates_quick():
    # Cheap check of the same setting without sampling: the maximum-likelihood
    # evolutionary correlation is near the truth (0) with correlated errors of the
    # means and far from it when they are taken as independent. Tolerances: the
    # posterior sd of the correlation in this setting is about 0.2 (the slow test).
    tree, data = _setting(0.0, seed=15)
    assert abs(_ml_evo_corr(tree, data, full=True)) < 0.2
    assert _ml_evo_corr(tree, data, full=False) > 0.4


@pytest.mark.slow
def test_same_specimen_traits_null_evolutionary_correlation():
    out = _fit_setting(0.0, seed=15, draws=1000)
    full = out["full"].loc["evo_corr[x, y]"]
    diag = out["diagonal"].loc["evo_corr[x, y]"]
    assert full["hdi_low"] <= 0.0 <= full["hdi_high"], full.to_dict()
    assert diag["hdi_low"] > 0.0, diag.to_dict()  # the bias is real: a false evolutionary correlation
    w = out["full"].loc["within_corr[x, y]"]
    assert w["hdi_low"] <= WITHIN_CORR <= w["hdi_high"], w.to_dict()


@pytest.mark.slow
def test_same_specimen_traits_recover_nonzero_evolutionary_correlation():
    out = _fit_setting(0.6, seed=16, draws=1000)
    full = out["full"].loc["evo_corr[x, y]"]
    assert full["hdi_low"] <= 0.6 <= full["hdi_high"], full.to_dict()
    assert full["hdi_low"] > 0.0, full.to_dict()
