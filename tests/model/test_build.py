"""Model builders and fits checked against outside references.

Fits use short chains to keep the suite quick; every tolerance below is stated in
Monte Carlo standard errors or follows from the interval's nominal level.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.errors import InputError
from cladewise.inference.fit import fit
from cladewise.inference.sampling import SamplingOptions, compile_model, sample
from cladewise.studies.simulate import simulate_dataset
from cladewise.data.trees import covariance

from treegen import random_tree

QUICK = SamplingOptions(chains=2, draws=500, tune=500, seed=11, progress=False)


def model_data(sim, specimens: bool = False) -> ModelData:
    """ModelData straight from simulated tables (no files)."""
    tree = sim.tree
    sp = sim.species.set_index("species").loc[list(tree.tip_names)]
    traits = list(sim.truth["traits"])
    values = sp[traits].astype(float)
    se = sp[[f"{t}_se" for t in traits]].astype(float).set_axis(traits, axis=1) if f"{traits[0]}_se" in sp else None
    n = sp[[f"{t}_n" for t in traits]].astype(float).set_axis(traits, axis=1) if f"{traits[0]}_n" in sp else None
    var = None
    if specimens:
        var = sim.specimens.groupby("species")[traits].var(ddof=1).loc[list(tree.tip_names)]
    return ModelData(tree, values, se=se, n=n, sample_var=var)


def mcse(idata, var: str, **sel) -> np.ndarray:
    import arviz as az

    return az.mcse(idata.posterior[var].sel(**sel) if sel else idata.posterior[var]).to_array().values.ravel()


# ---------------------------------------------------------------- GLS / OLS
def test_regression_matches_gls_and_ols_with_fixed_lambda():
    """Flat priors on coefficients: the marginal posterior of beta is a multivariate t
    centred on the GLS estimate, so posterior means equal statsmodels GLS within Monte
    Carlo error (lambda = 1); with lambda = 0 on an ultrametric tree the covariance is
    T*I and GLS is OLS (Pagel 1999, Nature 401:877-884; Grafen 1989)."""
    rng = np.random.default_rng(3)
    tree = random_tree(40, rng, True)
    C = covariance(tree)
    x = rng.multivariate_normal(np.zeros(40), C)
    y = 1.5 + 0.7 * x + rng.multivariate_normal(np.zeros(40), 0.5 * C)
    data = ModelData(tree, pd.DataFrame({"x": x, "y": y}, index=list(tree.tip_names)))
    spec = ModelSpec(kind="regression", formula="y ~ x", evolution="lambda", fixed={"lambda": 1.0},
                     priors={"coef_scale": "flat"})
    built = build_model(data, spec)
    compiled = compile_model(built)
    X = sm.add_constant(x)
    for lam, ref in ((1.0, sm.GLS(y, X, sigma=C).fit()), (0.0, sm.OLS(y, X).fit())):
        idata = sample(built, QUICK, compiled=compiled, tree_values={"fixed_lambda": np.asarray(lam)})
        post = idata.posterior["coef"].stack(s=("chain", "draw")).values
        err = mcse(idata, "coef")
        diff = post.mean(axis=1) - ref.params
        assert np.all(np.abs(diff) < 4 * err), (lam, diff, err)
        # posterior sd is close to the GLS standard error (t with n-2 df inflates it a little)
        np.testing.assert_allclose(post.std(axis=1), ref.bse, rtol=0.25)


# ---------------------------------------------------------------- recovery
def test_recovery_of_correlation_slopes_lambda_and_rates():
    """Fixed-seed simulated data, 150 species: every true value lies in its 95% HDI
    (for one dataset each check fails with probability about 5%, so the seed is fixed;
    common practice for recovery checks)."""
    rng = np.random.default_rng(20)
    tree = random_tree(150, rng, True)
    sd = np.array([0.3, 0.5])
    rho = 0.6
    R = np.outer(sd, sd) * np.array([[1, rho], [rho, 1]])
    lam = 0.7
    sim = simulate_dataset(tree, ["a", "b"], R, [1.0, -1.0], se=np.full((150, 2), 0.05),
                           model="lambda", model_params={"lam": lam}, seed=5)
    data = model_data(sim)
    res = fit(data, ModelSpec(kind="correlated", traits=["a", "b"], evolution="lambda", measurement_error="se"),
              SamplingOptions(chains=2, draws=600, tune=600, seed=3, progress=False))
    s = res.summary.set_index("quantity")
    truth = {
        "evo_corr[a, b]": rho,
        "evo_slope[b ~ a]": R[1, 0] / R[0, 0],
        "evo_slope[a ~ b]": R[0, 1] / R[1, 1],
        "evo_rate[a]": R[0, 0],
        "evo_rate[b]": R[1, 1],
        "lambda": lam,
    }
    for q, v in truth.items():
        assert s.loc[q, "hdi_low"] <= v <= s.loc[q, "hdi_high"], (q, v, s.loc[q].to_dict())
    assert res.diagnostics.divergences == 0


# ---------------------------------------------------------------- measurement error
def test_measurement_error_removes_attenuation():
    """Few specimens and large within-species variance: ignoring measurement error
    inflates the x 'rate' and attenuates the evolutionary slope of y on x toward zero;
    modelling it recovers the true slope (Ives, Midford & Garland 2007, Syst. Biol.
    56:252-270)."""
    rng = np.random.default_rng(7)
    tree = random_tree(120, rng, True)
    tree = tree.with_lengths(tree.length / tree.tip_heights().max())  # unit height
    R = np.array([[1.0, 0.8], [0.8, 1.0]]) * 0.05
    true_slope = R[1, 0] / R[0, 0]
    # within-species variance comparable to the phylogenetic variance, 2-3 specimens
    sim = simulate_dataset(tree, ["x", "y"], R, [0.0, 0.0], within_var=[0.1, 0.1],
                           n_specimens=(2, 3), seed=9)
    data = model_data(sim, specimens=True)
    opts = SamplingOptions(chains=2, draws=400, tune=500, seed=4, progress=False)
    with_me = fit(data, ModelSpec(kind="correlated", traits=["x", "y"], measurement_error="specimens"), opts)
    no_me = fit(data, ModelSpec(kind="correlated", traits=["x", "y"], measurement_error="none"), opts)
    a = with_me.summary.set_index("quantity").loc["evo_slope[y ~ x]"]
    b = no_me.summary.set_index("quantity").loc["evo_slope[y ~ x]"]
    assert a["hdi_low"] <= true_slope <= a["hdi_high"], a.to_dict()
    assert b["hdi_high"] < true_slope, b.to_dict()  # attenuated: the interval misses the truth from below
    assert b["mean"] < a["mean"]


# ---------------------------------------------------------------- log-likelihood group
def test_log_likelihood_group_holds_loo_conditionals():
    """The stored pointwise values equal the log density of each species given all
    others, from explicit Gaussian conditioning of the dense covariance (scipy;
    Bürkner, Gabry & Vehtari 2021, Computational Statistics 36:1243-1261)."""
    from scipy.stats import multivariate_normal

    rng = np.random.default_rng(1)
    tree = random_tree(12, rng, False)
    R = np.array([[1.0, 0.5], [0.5, 2.0]])
    sim = simulate_dataset(tree, ["a", "b"], R, [0.0, 1.0], se=np.full((12, 2), 0.3), missing_share=0.1, seed=2)
    data = model_data(sim)
    res = fit(data, ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="se"),
              SamplingOptions(chains=1, draws=30, tune=100, seed=1, progress=False), predictive_draws=0)
    post = res.idata.posterior
    ll = res.idata.log_likelihood["y"].values[0]
    C = covariance(tree)
    y = data.values.to_numpy()
    obs = np.isfinite(y)
    se2 = data.se.to_numpy() ** 2
    for d in (0, 17, 29):
        Rd = np.array(post["evo_rate"].values[0, d])
        corr = post["evo_corr"].values[0, d]
        Rm = np.sqrt(np.outer(Rd, Rd)) * corr
        mu = post["root_mean"].values[0, d]
        full = np.kron(C, Rm) + np.diag(np.where(obs, se2, 0).ravel())
        idx = np.flatnonzero(obs.ravel())
        S = full[np.ix_(idx, idx)]
        v = y.ravel()[idx]
        m = np.tile(mu, 12)[idx]
        species_of = idx // 2
        for i in range(12):
            a = species_of == i
            if not a.any():
                continue
            b = ~a
            K = S[np.ix_(a, b)] @ np.linalg.inv(S[np.ix_(b, b)])
            cm = m[a] + K @ (v[b] - m[b])
            cv = S[np.ix_(a, a)] - K @ S[np.ix_(b, a)]
            np.testing.assert_allclose(ll[d, i], multivariate_normal(cm, cv).logpdf(v[a]), rtol=1e-7)


# ---------------------------------------------------------------- bad input
def _tiny(n=6, seed=0):
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, True)
    vals = pd.DataFrame(rng.normal(size=(n, 3)), index=list(tree.tip_names), columns=["a", "b", "c"])
    return ModelData(tree, vals)


def test_formula_with_absent_column_is_explained():
    with pytest.raises(InputError, match=r"names \['wingspan'\].*not columns"):
        build_model(_tiny(), ModelSpec(kind="regression", formula="a ~ wingspan"))


def test_unknown_evolution_model_is_explained():
    with pytest.raises(InputError, match="unknown evolution model 'brownian-ish'"):
        ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"], "evolution": "brownian-ish"})


def test_unknown_model_key_suggests_fix():
    with pytest.raises(InputError, match="did you mean 'traits'"):
        ModelSpec.from_dict({"kind": "correlated", "trait": ["a", "b"]})


def test_one_species_is_refused():
    from cladewise.data.trees import FlatTree

    tree = FlatTree(np.array([-1]), np.array([0.0]), ("only",))
    data = ModelData(tree, pd.DataFrame({"a": [1.0], "b": [2.0]}, index=["only"]))
    with pytest.raises(InputError, match="at least 3"):
        build_model(data, ModelSpec(kind="correlated", traits=["a", "b"]))


def test_trait_without_variance_is_refused():
    d = _tiny()
    d.values["b"] = 2.5
    with pytest.raises(InputError, match="no variance"):
        build_model(d, ModelSpec(kind="correlated", traits=["a", "b"]))


def test_fixed_parameter_must_belong_to_the_model():
    with pytest.raises(InputError, match="not a parameter"):
        ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"], "evolution": "ou", "fixed": {"lambda": 0.5}})


def test_measurement_error_without_standard_errors_is_explained():
    with pytest.raises(InputError, match="needs standard errors"):
        build_model(_tiny(), ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="se"))


@pytest.mark.parametrize("kind,evolution", [
    ("correlated", "bm"), ("independent", "lambda"), ("regression", "ou"), ("correlated", "kappa"),
    ("regression", "delta"), ("independent", "early_burst"), ("regression", "lambda"), ("correlated", "ou"),
])
def test_every_model_builds_and_evaluates(kind, evolution):
    """Each kind with each evolution model gives a finite log density and gradient at the
    initial point (no sampling), and its tree likelihood equals the dense reference."""
    d = _tiny(8, 4)
    spec = ModelSpec(kind=kind, traits=["a", "b"] if kind != "regression" else [],
                     formula="a ~ b + c" if kind == "regression" else None, evolution=evolution,
                     species_covariance=(kind == "correlated"))
    fast = build_model(d, spec)
    dense = build_model(d, spec, likelihood="dense")
    pt_fast = fast.model.initial_point()
    mode = "FAST_COMPILE"  # tiny graphs: skip the C compiler, evaluate in Python
    lp_fast = fast.model.compile_logp(mode=mode)(pt_fast)
    lp_dense = dense.model.compile_logp(mode=mode)(dense.model.initial_point())
    assert np.isfinite(lp_fast)
    np.testing.assert_allclose(lp_fast, lp_dense, rtol=1e-8)
    grad = fast.model.compile_dlogp(mode=mode)(pt_fast)
    assert np.all(np.isfinite(grad))
