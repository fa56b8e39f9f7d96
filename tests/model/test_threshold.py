"""Threshold model for discrete traits: fast checks against outside references (no sampling).

References: the probit likelihood P(state | x) = Phi(a + b x) (statsmodels Probit and
scipy.stats.norm); the LKJ density det(C)^(eta - 1) (Lewandowski, Kurowicka & Joe
2009) as PyMC's LKJCorr computes it; Gaussian conditioning written densely in the
test (e.g. Rasmussen & Williams 2006, eq. A.6).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pymc as pm
import pytensor
import pytensor.tensor as pt
import pytest
import statsmodels.api as sm
from scipy import integrate
from scipy.stats import multivariate_normal, norm
from treegen import random_tree, shared_path_cov

from cladewise.config.analysis import MODEL
from cladewise.config.tables import read_table
from cladewise.data.discrete import encode_states
from cladewise.data.trees import FlatTree
from cladewise.errors import InputError
from cladewise.evaluation.discrete import interval_logprob, pointwise_loglik_discrete, states_from_liabilities
from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.model.threshold import corr_cholesky, lkj_cholesky_logp


def star_tree(n: int) -> FlatTree:
    return FlatTree(np.array([n] * n + [-1]), np.r_[np.ones(n), 0.0], tuple(f"s{i}" for i in range(n)))


def data_for(tree, x, **text) -> ModelData:
    names = list(tree.tip_names)
    return ModelData(tree, pd.DataFrame({"x": x}, index=names), extra=pd.DataFrame(text, index=names))


# --------------------------------------------------------------------------- LKJ
def test_lkj_cholesky_density_matches_pymc_lkjcorr(rng):
    # LKJ density det(C)^(eta-1) (Lewandowski et al. 2009) from PyMC's LKJCorr, pushed
    # to the unconstrained x by a finite-difference Jacobian of x -> upper triangle of C
    k, eta = 3, 1.7
    xv = pt.dvector("x")
    L, log_jac = corr_cholesky(xv, k)
    mine = pytensor.function([xv], lkj_cholesky_logp(L, k, eta) + log_jac)
    corr_fn = pytensor.function([xv], pt.dot(L, L.T))
    cv = pt.dvector("c")
    ref_lkj = pytensor.function([cv], pm.logp(pm.LKJCorr.dist(n=k, eta=eta), cv))
    iu = np.triu_indices(k, 1)

    def reference(x):
        h = 1e-6
        J = np.empty((3, 3))
        for a in range(3):
            e = np.zeros(3)
            e[a] = h
            J[:, a] = (corr_fn(x + e)[iu] - corr_fn(x - e)[iu]) / (2 * h)
        return float(ref_lkj(corr_fn(x)[iu])) + np.log(abs(np.linalg.det(J)))

    xs = [rng.normal(0, 0.8, 3) for _ in range(4)]
    diffs = [float(mine(x)) - reference(x) for x in xs]  # equal up to the normalising constant
    assert np.ptp(diffs) < 1e-6
    C = corr_fn(xs[0])
    assert np.allclose(np.diag(C), 1.0) and np.linalg.eigvalsh(C).min() > 0


# --------------------------------------------------------------------------- intervals
def test_interval_logprob_against_scipy():
    m = np.array([0.0, 3.0, -9.0, 9.0, 0.5])
    s = np.array([1.0, 0.5, 1.0, 1.0, 2.0])
    lo = np.array([-np.inf, -np.inf, 0.0, -np.inf, -1.0])
    hi = np.array([0.0, 0.0, np.inf, -5.0, 2.0])
    ref = np.log(norm.cdf(hi, m, s) - norm.cdf(lo, m, s))
    got = interval_logprob(m, s, lo, hi)
    # the far tails: scipy's log survival/cdf functions (norm.logsf, norm.logcdf)
    ref[1] = norm.logcdf(0.0, 3.0, 0.5)
    ref[2] = norm.logsf(0.0, -9.0, 1.0)
    assert np.allclose(got, ref, rtol=1e-10)


# --------------------------------------------------------------------------- model density
def _logp_point(built, values):
    model = built.model
    fn = model.compile_logp()
    pt0 = model.initial_point()
    pt0.update(values)
    return fn, pt0


def test_liabilities_integrate_to_probit_likelihood_on_a_star_tree():
    # Star tree, unit branches: species independent given the parameters. Integrating
    # the model density over each species' free liability parameter (exp transform and
    # its Jacobian) must give the probit probability Phi(+-(a + b x)) with a, b from the
    # dense bivariate-normal conditional of the liability given x; the sum over species
    # is statsmodels' Probit log-likelihood at (a, b).
    tree = star_tree(4)
    x = np.array([-1.0, 0.3, 1.2, 0.1])
    states = ["no", "yes", "yes", "no"]
    built = build_model(data_for(tree, x, s=states), ModelSpec(traits=["x", "s"], discrete={"s": ["no", "yes"]}))
    fn, p0 = _logp_point(built, {"root_mean": np.array([0.2, -0.3]), "tip_sd_log__": np.array([np.log(1.3)]),
                                 "evo_corr_free": np.array([np.arctanh(0.55)])})
    eng = built.engine_function()({"root_mean": p0["root_mean"], "tip_sd": np.exp(p0["tip_sd_log__"]),
                                   "evo_corr_free": p0["evo_corr_free"], "liability_free": p0["liability_free"]})
    S, mu = eng["R"] * 1.0, eng["mu"]  # tip covariance = R t, t = 1
    assert np.isclose(S[1, 1], 1.0)  # liability tip variance fixed at 1
    b_raw = S[0, 1] / S[0, 0]
    v = S[1, 1] - S[0, 1] ** 2 / S[0, 0]
    a, b = (mu[1] - b_raw * mu[0]) / np.sqrt(v), b_raw / np.sqrt(v)
    base = fn(p0)
    total = 0.0
    for i in range(4):
        def f(z, i=i):
            q = dict(p0)
            q["liability_free"] = p0["liability_free"].copy()
            q["liability_free"][i] = z
            return np.exp(fn(q) - base)
        integral, _ = integrate.quad(f, -40, 6, limit=200, epsabs=1e-13)
        l0 = 1.0 if states[i] == "yes" else -1.0  # liability at z = 0
        log_p = (np.log(integral) + multivariate_normal(mu, S).logpdf([x[i], l0])
                 - norm.logpdf(x[i], mu[0], np.sqrt(S[0, 0])))
        sign = 1.0 if states[i] == "yes" else -1.0
        assert np.isclose(log_p, norm.logcdf(sign * (a + b * x[i])), rtol=1e-6)
        total += log_p
    yb = np.array([s == "yes" for s in states], dtype=float)
    probit = sm.Probit(yb, sm.add_constant(x)).loglike(np.array([a, b]))
    assert np.isclose(total, probit, rtol=1e-6)


def test_middle_state_of_an_ordered_trait_integrates_to_its_interval_probability():
    # sigmoid transform of a middle state and the threshold gap: P(0 < L < c1 | x), scipy norm
    tree = star_tree(4)
    x = np.array([-0.5, 0.4, 1.0, 0.0])
    states = ["low", "mid", "high", "mid"]
    built = build_model(data_for(tree, x, h=states),
                        ModelSpec(traits=["x", "h"], discrete={"h": ["low", "mid", "high"]}))
    gap = 0.8
    fn, p0 = _logp_point(built, {"threshold_gap_log__": np.array([np.log(gap)]),
                                 "evo_corr_free": np.array([np.arctanh(-0.3)])})
    ins = {n: p0[n] for n in ("root_mean", "evo_corr_free", "liability_free")}
    ins.update(tip_sd=np.exp(p0["tip_sd_log__"]), threshold_gap=np.exp(p0["threshold_gap_log__"]))
    eng = built.engine_function()(ins)
    S, mu = eng["R"], eng["mu"]
    i = 1  # a 'mid' species; its liability at z = 0 is gap / 2, Jacobian log(gap / 4)
    base = fn(p0)

    def f(z):
        q = dict(p0)
        q["liability_free"] = p0["liability_free"].copy()
        q["liability_free"][i] = z
        return np.exp(fn(q) - base)
    integral, _ = integrate.quad(f, -40, 40, limit=200, epsabs=1e-13)
    log_p = (np.log(integral) + multivariate_normal(mu, S).logpdf([x[i], gap / 2]) + np.log(gap / 4)
             - norm.logpdf(x[i], mu[0], np.sqrt(S[0, 0])))
    m = mu[1] + S[0, 1] / S[0, 0] * (x[i] - mu[0])
    sd = np.sqrt(S[1, 1] - S[0, 1] ** 2 / S[0, 0])
    assert np.isclose(log_p, np.log(norm.cdf(gap, m, sd) - norm.cdf(0.0, m, sd)), rtol=1e-6)


# --------------------------------------------------------------------------- LOO
def test_loo_term_is_conditional_density_times_state_probability(rng):
    # log p(x_i | rest) + log P(state_i | x_i, rest), rest = other species' values and
    # liabilities, by dense Gaussian conditioning on vec(Y) ~ N(1 (x) mu, C (x) R)
    tree = random_tree(7, rng, ultrametric=False)
    x = rng.normal(size=7)
    x[2] = np.nan
    states = np.array(["a", "b", "b", "a", None, "b", "a"], dtype=object)
    built = build_model(data_for(tree, x, s=states), ModelSpec(traits=["x", "s"], discrete={"s": ["a", "b"]}))
    obs = built.observed
    R = np.array([[1.5, 0.4], [0.4, 0.7]])
    mu = np.array([0.1, -0.2])
    y = np.zeros((7, 2))
    y[:, 0] = np.nan_to_num(x)
    codes = built.y[:, 1]
    y[:, 1] = np.where(codes == 1, rng.uniform(0.1, 2, 7), -rng.uniform(0.1, 2, 7))
    y[4, 1] = 0.0
    d = {"lengths": tree.length[None], "y": y[None], "R": R[None], "E": np.zeros((1, 2, 2)),
         "err_var": np.zeros((1, 7, 2)), "mu": mu[None], "log_scale": np.zeros((1, 7))}
    got = pointwise_loglik_discrete(built, d, np.zeros((1, 1)))[0]
    C = shared_path_cov(tree)
    full = np.kron(C, R)
    vec_y, vec_o = y.ravel(), obs.ravel()
    for i in range(7):
        mine = np.zeros(14, dtype=bool)
        mine[2 * i: 2 * i + 2] = True
        other = vec_o & ~mine
        K = full[np.ix_(mine, other)] @ np.linalg.inv(full[np.ix_(other, other)])
        m = np.tile(mu, 7)[mine] + K @ (vec_y[other] - np.tile(mu, 7)[other])
        V = full[np.ix_(mine, mine)] - K @ full[np.ix_(other, mine)]
        ref = 0.0
        if obs[i, 0]:
            ref += norm.logpdf(x[i], m[0], np.sqrt(V[0, 0]))
            m1 = m[1] + V[0, 1] / V[0, 0] * (x[i] - m[0])
            v1 = V[1, 1] - V[0, 1] ** 2 / V[0, 0]
        else:
            m1, v1 = m[1], V[1, 1]
        if obs[i, 1]:
            p1 = norm.sf(0.0, m1, np.sqrt(v1))
            ref += np.log(p1 if codes[i] == 1 else 1 - p1)
        assert np.isclose(got[i], ref, rtol=1e-8), i


def test_replicated_liabilities_become_states():
    tree = star_tree(4)
    built = build_model(data_for(tree, np.arange(4.0), h=["p", "q", "r", "q"]),
                        ModelSpec(traits=["x", "h"], discrete={"h": ["p", "q", "r"]}))
    vals = np.array([[[0.0, -0.1], [1.0, 0.2], [2.0, 0.9], [3.0, 1.5]]])
    out = states_from_liabilities(built, vals, np.array([[0.0, 1.0]]))
    assert out[0, :, 1].tolist() == [0, 1, 1, 2] and out[0, :, 0].tolist() == [0, 1, 2, 3]


# --------------------------------------------------------------------------- input
def test_states_are_validated_with_clear_messages():
    sp = ["s1", "s2", "s3", "s4"]
    with pytest.raises(InputError, match="all 3 species with a value are 'day'; no species is 'night'"):
        encode_states(["day", "day", None, "day"], sp, "active", ["day", "night"])
    with pytest.raises(InputError, match=r"species 's2' has active = 'nigth'.*Did you mean 'night'"):
        encode_states(["day", "nigth", "night", "day"], sp, "active", ["day", "night"])
    with pytest.raises(InputError, match=r"no species is in the declared state\(s\) 'edge'"):
        encode_states(["open", "forest", "open", "forest"], sp, "habitat", ["open", "edge", "forest"])
    with pytest.raises(InputError, match="case-sensitive"):
        encode_states(["Day", "night", "night", "day"], sp, "active", ["day", "night"])
    t = encode_states([0.0, 1.0, np.nan, 1.0], sp, "flag", [0, 1])  # numeric 0/1 columns
    assert t.counts() == {"0": 1, "1": 2} and "1 without a value" in t.summary_line()


def test_spec_declaration_and_model_checks():
    d = read_table({"kind": "correlated", "traits": ["x", "s"], "discrete": {"s": ["no", "yes"]}}, MODEL)
    spec = ModelSpec.from_dict(d)
    assert spec.discrete == {"s": ["no", "yes"]}
    with pytest.raises(InputError, match="not listed in traits"):
        ModelSpec.from_dict({"traits": ["x", "y"], "discrete": {"s": ["no", "yes"]}})
    with pytest.raises(InputError, match="declares 1 state"):
        ModelSpec.from_dict(read_table({"traits": ["x", "s"], "discrete": {"s": ["only"]}}, MODEL))
    with pytest.raises(InputError, match="twice"):
        read_table({"traits": ["x", "s"], "discrete": {"s": ["a", "a"]}}, MODEL)
    with pytest.raises(InputError, match="every trait of this model is discrete"):
        ModelSpec.from_dict({"traits": ["s", "t"], "discrete": {"s": ["a", "b"], "t": ["a", "b"]},
                             "measurement_error": "se"})
    tree = star_tree(4)
    with pytest.raises(InputError, match="not a declared state"):
        build_model(data_for(tree, np.arange(4.0), s=["a", "b", "c", "a"]),
                    ModelSpec(traits=["x", "s"], discrete={"s": ["a", "b"]}))


def test_spec_file_with_a_text_state_column_builds(tmp_path, rng):
    # the one path from a spec file: text states in the table, [model] discrete, model
    # built and its log density finite at the starting point (no sampling)
    from cladewise.data.treefiles import format_newick
    from cladewise.pipeline import check_spec

    tree = random_tree(12, rng, ultrametric=True)
    (tmp_path / "tree.nwk").write_text(format_newick(tree) + "\n")
    states = ["day", "night"] * 5 + ["", "night"]
    rows = [f"{n},{v:.4f},{s}" for n, v, s in zip(tree.tip_names, rng.normal(size=12), states)]
    (tmp_path / "species.csv").write_text("species,head_width,activity\n" + "\n".join(rows) + "\n")
    (tmp_path / "spec.toml").write_text(
        '[data]\ntree = "tree.nwk"\ntraits = "species.csv"\n[model]\nkind = "correlated"\n'
        'traits = ["head_width", "activity"]\ndiscrete = { activity = ["day", "night"] }\n')
    report = check_spec(tmp_path / "spec.toml")
    assert any("activity (binary" in p and "5 day, 6 night, 1 without a value" in p for p in report.problems)


def test_loo_term_with_two_binary_traits_uses_the_joint_orthant_probability(rng):
    # two observed states of one species: P(both intervals | x_i, rest), the bivariate
    # normal rectangle probability of the dense conditional (scipy multivariate_normal.cdf)
    tree = random_tree(5, rng, ultrametric=True)
    x = rng.normal(size=5)
    a = ["n", "y", "y", "n", "y"]
    b = ["y", "y", "n", "n", "n"]
    built = build_model(data_for(tree, x, a=a, b=b),
                        ModelSpec(traits=["x", "a", "b"], discrete={"a": ["n", "y"], "b": ["n", "y"]}))
    R = np.array([[1.0, 0.3, -0.2], [0.3, 1.0, 0.4], [-0.2, 0.4, 1.0]])
    mu = np.array([0.0, 0.1, -0.1])
    y = np.column_stack([x, np.where(np.array(a) == "y", 0.7, -0.6), np.where(np.array(b) == "y", 0.5, -0.9)])
    d = {"lengths": tree.length[None], "y": y[None], "R": R[None], "E": np.zeros((1, 3, 3)),
         "err_var": np.zeros((1, 5, 3)), "mu": mu[None], "log_scale": np.zeros((1, 5))}
    got = pointwise_loglik_discrete(built, d, np.zeros((1, 2)))[0]
    full = np.kron(shared_path_cov(tree), R)
    i = 0
    mine = np.zeros(15, dtype=bool)
    mine[:3] = True
    K = full[np.ix_(mine, ~mine)] @ np.linalg.inv(full[np.ix_(~mine, ~mine)])
    m = mu + K @ (y.ravel()[~mine] - np.tile(mu, 5)[~mine])
    V = full[np.ix_(mine, mine)] - K @ full[np.ix_(~mine, mine)]
    m2 = m[1:] + V[1:, 0] / V[0, 0] * (x[i] - m[0])
    V2 = V[1:, 1:] - np.outer(V[1:, 0], V[0, 1:]) / V[0, 0]
    # species 0: a = n (L_a < 0), b = y (L_b > 0)
    p = multivariate_normal(m2, V2).cdf(np.array([0.0, np.inf]), lower_limit=np.array([-np.inf, 0.0]))
    ref = norm.logpdf(x[i], m[0], np.sqrt(V[0, 0])) + np.log(p)
    assert np.isclose(got[i], ref, rtol=1e-4)  # the cdf is computed by quasi-Monte Carlo
