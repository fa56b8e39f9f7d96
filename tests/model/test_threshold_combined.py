"""Discrete traits together with measurement error, a species-level covariance and regressions.

No sampling: the model's tree likelihood and derived probabilities at fixed parameter
values are checked against outside references.

References: dense Gaussian algebra written in the test (vec(Y) ~ N(1 (x) mu, C (x) R
+ I (x) E + blockdiag(errors)); conditioning as in Rasmussen & Williams 2006, eq.
A.6) with scipy; the probit likelihood P(y = 1 | x) = Phi(x b) by statsmodels
``Probit.loglike``; the ordered probit by statsmodels ``OrderedModel`` (distr =
"probit"); treatment (indicator) coding of a factor against its first level
(statsmodels/patsy ``C(...)``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import integrate
from scipy.stats import multivariate_normal, norm
from treegen import random_tree, shared_path_cov

from cladewise.data.trees import FlatTree
from cladewise.errors import InputError
from cladewise.model.build import ModelData, ModelSpec, build_model


def star_tree(n: int) -> FlatTree:
    return FlatTree(np.array([n] * n + [-1]), np.r_[np.ones(n), 0.0], tuple(f"s{i}" for i in range(n)))


def random_point(built, rng, scale=0.4):
    """A random parameter point on each free variable's own (constrained) scale."""
    model = built.model
    pt0 = model.initial_point()
    point = {}
    for rv in model.free_RVs:
        val = model.rvs_to_values[rv]
        shape = pt0[val.name].shape
        z = scale * rng.standard_normal(shape)
        name = val.name
        if name.endswith("_log__"):
            point[rv.name] = np.exp(z)
        elif name.endswith("_logodds__"):
            point[rv.name] = 1.0 / (1.0 + np.exp(-z))
        else:
            point[rv.name] = z
    return point


def tree_loglik(built):
    """The model's tree-likelihood term as a function of the free variables' values."""
    import pytensor

    model = built.model
    f = pytensor.function(model.free_RVs, model["tree_loglik"], on_unused_input="ignore")
    names = [rv.name for rv in model.free_RVs]
    return lambda point: float(f(*[point[n] for n in names]))


def dense_loglik(tree, inputs, observed):
    """log N(observed cells | mean, C (x) R + I (x) E + errors), written densely."""
    n, k = observed.shape
    C = shared_path_cov(tree.with_lengths(inputs["lengths"]))
    err = inputs["err_var"]
    if err.ndim == 2:
        err = err[:, :, None] * np.eye(k)[None]
    V = np.kron(C, inputs["R"]) + np.kron(np.eye(n), inputs["E"])
    for i in range(n):
        V[i * k:(i + 1) * k, i * k:(i + 1) * k] += err[i]
    o = observed.ravel()
    y = inputs["y"].ravel()
    mean = np.tile(inputs["mu"], n)
    return multivariate_normal(mean[o], V[np.ix_(o, o)]).logpdf(y[o])


# --------------------------------------------------------------------------- measurement error
def test_known_standard_errors_enter_the_continuous_columns_only(rng):
    tree = random_tree(9, rng, ultrametric=False)
    names = list(tree.tip_names)
    x = rng.normal(size=(9, 2))
    x[2, 1] = np.nan  # a missing continuous value
    se = pd.DataFrame(rng.uniform(0.1, 0.5, (9, 2)), index=names, columns=["a", "b"])
    states = ["lo", "hi", "hi", "lo", "", "hi", "lo", "lo", "hi"]  # one species without a state
    data = ModelData(tree, pd.DataFrame(x, index=names, columns=["a", "b"]), se=se,
                     extra=pd.DataFrame({"s": states}, index=names))
    built = build_model(data, ModelSpec(traits=["a", "s", "b"], discrete={"s": ["lo", "hi"]},
                                        measurement_error="se"))
    point = random_point(built, rng)
    inputs = built.engine_function()(point)
    err = inputs["err_var"]
    np.testing.assert_allclose(err[:, 1], 0.0)  # the liability is not measured with error
    obs = built.observed
    np.testing.assert_allclose(err[:, 0], np.where(obs[:, 0], se["a"] ** 2, 0.0))
    np.testing.assert_allclose(err[:, 2], np.where(obs[:, 2], se["b"] ** 2, 0.0))
    assert not obs[4, 1] and not obs[2, 2]
    got = tree_loglik(built)(point)
    assert np.isclose(got, dense_loglik(tree, inputs, obs), rtol=1e-8)


def test_specimen_covariance_of_the_continuous_traits_is_placed_around_the_liability(rng):
    # the within-species covariance of two continuous traits measured on the same
    # specimens, in a model with a discrete trait between them, equals the one of the
    # same model without the discrete trait; the liability's rows and columns are 0
    from cladewise.model import within_species as ws

    tree = random_tree(8, rng, ultrametric=True)
    names = list(tree.tip_names)
    counts = rng.integers(2, 5, 8)
    rows = ws.simulate_specimens(tree, np.eye(2) * 0.4, np.zeros(2), np.array([[0.2, 0.1], [0.1, 0.3]]),
                                 counts, rng, ["a", "b"])
    g = rows.groupby("species", sort=False)
    values = g[["a", "b"]].mean().reindex(names)
    n = g[["a", "b"]].count().reindex(names).astype(float)
    var = g[["a", "b"]].var(ddof=1).reindex(names)
    states = pd.DataFrame({"s": ["n", "y", "y", "n", "y", "n", "n", "y"]}, index=names)
    with_s = build_model(ModelData(tree, values, n=n, sample_var=var, specimens=rows, extra=states),
                         ModelSpec(traits=["a", "s", "b"], discrete={"s": ["n", "y"]},
                                   measurement_error="specimens"))
    plain = build_model(ModelData(tree, values, n=n, sample_var=var, specimens=rows),
                        ModelSpec(traits=["a", "b"], measurement_error="specimens"))
    point = random_point(with_s, rng)
    e1 = with_s.engine_function()(point)["err_var"]
    share = {rv.name for rv in plain.model.free_RVs}
    e0 = plain.engine_function()({**random_point(plain, rng), **{k: v for k, v in point.items() if k in share
                                                                   and k.startswith("within")}})["err_var"]
    np.testing.assert_allclose(e1[:, [0, 2]][:, :, [0, 2]], e0, rtol=1e-12)
    np.testing.assert_allclose(e1[:, 1, :], 0.0)
    np.testing.assert_allclose(e1[:, :, 1], 0.0)
    inputs = with_s.engine_function()(point)
    assert np.isclose(tree_loglik(with_s)(point), dense_loglik(tree, inputs, with_s.observed), rtol=1e-8)


def test_polymorphic_species_in_specimen_rows_are_refused(tmp_path):
    from cladewise.data.discrete import one_state_per_species
    from cladewise.data.traits import read_traits

    (tmp_path / "spec.csv").write_text("species,a,s\nA,1.0,day\nA,1.2,night\nB,0.3,day\nB,0.4,day\n")
    td = read_traits(tmp_path / "spec.csv", specimens=True)
    assert list(td.extra["s"]) == ["day | night", "day"]
    from cladewise.data.discrete import encode_states

    with pytest.raises(InputError, match="specimens of species 'A' are in more than one state"):
        encode_states(td.extra["s"], td.species, "s", ["day", "night"])
    rows = pd.DataFrame({"species": ["A", "A", "B"], "s": [0.0, 1.0, 1.0]})
    with pytest.raises(InputError, match="one state per species"):
        one_state_per_species(rows, "s")


# --------------------------------------------------------------------------- species covariance
def test_species_covariance_splits_the_liability_variance_and_predicts_with_it(rng):
    tree = random_tree(8, rng, ultrametric=True)
    names = list(tree.tip_names)
    x = rng.normal(size=8)
    states = ["n", "y", "", "n", "y", "y", "n", "y"]
    data = ModelData(tree, pd.DataFrame({"x": x}, index=names), extra=pd.DataFrame({"s": states}, index=names))
    built = build_model(data, ModelSpec(traits=["x", "s"], discrete={"s": ["n", "y"]}, species_covariance=True))
    point = random_point(built, rng)
    inputs = built.engine_function()(point)
    t = float(np.mean(np.diag(shared_path_cov(tree))))
    # the liability's total tip variance is 1: phylogenetic share + species-level rest
    assert np.isclose(inputs["R"][1, 1] * t + inputs["E"][1, 1], 1.0, rtol=1e-10)
    assert np.isclose(inputs["R"][1, 1] * t, point["liability_share"][0], rtol=1e-10)
    assert abs(inputs["E"][0, 1]) > 0  # species-level correlation between x and the liability
    obs = built.observed
    assert np.isclose(tree_loglik(built)(point), dense_loglik(tree, inputs, obs), rtol=1e-8)

    # the missing state: P(y) from the dense conditional of its liability (phylogenetic
    # part plus species-level deviation) given every observed cell
    from cladewise.evaluation.discrete import _conditionals

    m, c = _conditionals(built, built.engine_function(extra=("node_scale", "E_species"))(point), np.array([2]))
    C = shared_path_cov(tree)
    S = np.kron(C, inputs["R"]) + np.kron(np.eye(8), inputs["E"])
    o = obs.ravel()
    target = 2 * 2 + 1
    mean = np.tile(inputs["mu"], 8)
    K = S[target, o] @ np.linalg.inv(S[np.ix_(o, o)])
    ref_m = mean[target] + K @ (inputs["y"].ravel()[o] - mean[o])
    ref_v = S[target, target] - K @ S[o, target]
    assert np.isclose(m[0, 1], ref_m, rtol=1e-8) and np.isclose(c[0, 1, 1], ref_v, rtol=1e-8)


# --------------------------------------------------------------------------- probit regression
def test_binary_response_regression_integrates_to_the_probit_likelihood_on_a_star_tree():
    # star tree with unit branches: species independent, residual liability N(0, 1).
    # Integrating species i's free liability parameter out of the model density leaves
    # P(state_i | x_i) = Phi(+-x_i b): summed, statsmodels' Probit.loglike at the
    # model's coefficients. The density is separable over species, so the integral of
    # exp(logp(z_i) - logp(0)) times the species' own term at z_i = 0 (liability +-1,
    # zero log-Jacobian) is its probability.
    tree = star_tree(4)
    names = list(tree.tip_names)
    x = np.array([-1.0, 0.4, 1.5, 0.2])
    states = ["no", "yes", "yes", "no"]
    data = ModelData(tree, pd.DataFrame({"x": x}, index=names), extra=pd.DataFrame({"s": states}, index=names))
    built = build_model(data, ModelSpec(kind="regression", formula="s ~ x", discrete={"s": ["no", "yes"]},
                                        priors={"coef_scale": "flat"}))
    model = built.model
    fn = model.compile_logp()
    p0 = model.initial_point()
    p0["coef_z"] = np.array([0.3, 0.8])
    p0["liability_free"] = np.zeros(4)
    fitted = built.engine_function()({"coef_z": p0["coef_z"], "liability_free": p0["liability_free"]})["fitted"][:, 0]
    coef = np.linalg.lstsq(built.design, fitted, rcond=None)[0]
    base = fn(p0)
    total = 0.0
    for i in range(4):
        def f(z, i=i):
            q = dict(p0)
            q["liability_free"] = p0["liability_free"].copy()
            q["liability_free"][i] = z
            return np.exp(fn(q) - base)

        integral, _ = integrate.quad(f, -40, 8, limit=200, epsabs=1e-13)
        l0 = 1.0 if states[i] == "yes" else -1.0
        log_p = np.log(integral) + norm.logpdf(l0 - fitted[i])
        sign = 1.0 if states[i] == "yes" else -1.0
        assert np.isclose(log_p, norm.logcdf(sign * fitted[i]), rtol=1e-6)
        total += log_p
    yb = np.array([s == "yes" for s in states], dtype=float)
    assert np.isclose(total, sm.Probit(yb, sm.add_constant(x)).loglike(coef), rtol=1e-6)


def test_probit_regression_loo_and_state_predictions_on_a_star_tree(rng):
    # LOO on a star tree: the rest says nothing about species i, so its term is the
    # probit probability of its state, log Phi(+-x_i b) (statsmodels Probit.loglikeobs);
    # a species without a state gets P(yes) = Phi(x_i b)
    from cladewise.evaluation.discrete import _conditionals, pointwise_loglik_discrete

    tree = star_tree(6)
    names = list(tree.tip_names)
    x = np.array([-1.0, 0.4, 1.5, 0.2, -0.3, 0.9])
    states = ["no", "yes", "yes", "no", "", "no"]
    data = ModelData(tree, pd.DataFrame({"x": x}, index=names), extra=pd.DataFrame({"s": states}, index=names))
    built = build_model(data, ModelSpec(kind="regression", formula="s ~ x", discrete={"s": ["no", "yes"]}))
    point = random_point(built, rng)
    point["coef_z"] = np.array([0.2, 0.7])
    d = built.engine_function()(point)
    coef = np.linalg.lstsq(built.design, d["fitted"][:, 0], rcond=None)[0]
    ll = pointwise_loglik_discrete(built, {k: np.asarray(v)[None] for k, v in d.items()}, np.zeros((1, 1)))[0]
    have = np.array([s != "" for s in states])
    yb = np.array([s == "yes" for s in states], dtype=float)
    ref = sm.Probit(yb[have], sm.add_constant(x[have])).loglikeobs(coef)
    np.testing.assert_allclose(ll[have], ref, rtol=1e-8)
    m, c = _conditionals(built, built.engine_function(extra=("node_scale", "E_species"))(point), np.array([4]))
    p_yes = norm.sf(0.0, m[0, 0], np.sqrt(c[0, 0, 0]))
    assert np.isclose(p_yes, norm.cdf(coef[0] + coef[1] * x[4]), rtol=1e-8)


def test_ordered_response_regression_matches_the_ordered_probit(rng):
    # three ordered states on a star tree: the LOO terms equal statsmodels' ordered
    # probit log-likelihood per observation, with its thresholds t0 = 0 - intercept,
    # t1 = c1 - intercept (OrderedModel has no intercept; params = slopes, t0, log(t1 - t0))
    from statsmodels.miscmodels.ordinal_model import OrderedModel

    from cladewise.evaluation.discrete import pointwise_loglik_discrete

    tree = star_tree(7)
    names = list(tree.tip_names)
    x = np.array([-1.2, 0.4, 1.5, 0.2, -0.3, 0.9, 2.0])
    states = ["low", "mid", "high", "mid", "low", "mid", "high"]
    data = ModelData(tree, pd.DataFrame({"x": x}, index=names), extra=pd.DataFrame({"s": states}, index=names))
    built = build_model(data, ModelSpec(kind="regression", formula="s ~ x",
                                        discrete={"s": ["low", "mid", "high"]}))
    point = random_point(built, rng)
    point["coef_z"] = np.array([0.5, 0.9])
    point["threshold_gap"] = np.array([1.3])
    d = built.engine_function()(point)
    coef = np.linalg.lstsq(built.design, d["fitted"][:, 0], rcond=None)[0]
    cuts = np.array([[0.0, 1.3]])
    ll = pointwise_loglik_discrete(built, {k: np.asarray(v)[None] for k, v in d.items()}, cuts)[0]
    codes = pd.Series(pd.Categorical(states, categories=["low", "mid", "high"], ordered=True))
    om = OrderedModel(codes, x[:, None], distr="probit")
    t0, t1 = 0.0 - coef[0], 1.3 - coef[0]
    ref = om.loglikeobs(np.array([coef[1], t0, np.log(t1 - t0)]))
    np.testing.assert_allclose(ll, ref, rtol=1e-8)


def test_discrete_predictor_enters_as_indicators_against_its_first_state(rng):
    # a continuous response on a discrete predictor: the design equals treatment coding
    # against the first declared state (patsy/statsmodels C(s, Treatment('day'))), a
    # species without a state is left out (not coded as the reference), and the tree
    # likelihood equals the dense GLS likelihood of the residuals
    import patsy

    tree = random_tree(9, rng, ultrametric=True)
    names = list(tree.tip_names)
    y = rng.normal(size=9)
    states = ["night", "day", "dusk", "day", "", "night", "dusk", "day", "night"]
    data = ModelData(tree, pd.DataFrame({"y": y}, index=names), extra=pd.DataFrame({"s": states}, index=names))
    built = build_model(data, ModelSpec(kind="regression", formula="y ~ s",
                                        discrete={"s": ["day", "dusk", "night"]}))
    assert built.predictors == ["Intercept", "s[T.dusk]", "s[T.night]"]
    have = np.array([s != "" for s in states])
    frame = pd.DataFrame({"s": [s for s in states if s]})
    ref = np.asarray(patsy.dmatrix("C(s, Treatment('day'))", frame))
    np.testing.assert_allclose(built.design[have], ref)
    assert not built.observed[4, 0] and not built.design_ok[4]
    point = random_point(built, rng)
    inputs = built.engine_function()(point)
    assert np.isclose(tree_loglik(built)(point), dense_loglik(tree, inputs, built.observed), rtol=1e-8)


def test_discrete_regressions_refuse_what_they_cannot_do(rng):
    tree = star_tree(5)
    names = list(tree.tip_names)
    data = ModelData(tree, pd.DataFrame({"x": np.arange(5.0)}, index=names),
                     se=pd.DataFrame({"x": np.full(5, 0.1)}, index=names),
                     extra=pd.DataFrame({"s": ["a", "b", "a", "b", "a"], "t": list("ababa")}, index=names))
    with pytest.raises(InputError, match="no measurement error"):
        build_model(data, ModelSpec(kind="regression", formula="s ~ x", discrete={"s": ["a", "b"]},
                                    measurement_error="se"))
    with pytest.raises(InputError, match="does not use"):
        build_model(data, ModelSpec(kind="regression", formula="x ~ s", discrete={"s": ["a", "b"], "t": ["a", "b"]}))
    with pytest.raises(InputError, match="hold text: declare a discrete trait"):
        build_model(data, ModelSpec(kind="regression", formula="x ~ t"))
