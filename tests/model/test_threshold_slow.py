"""Threshold model: sampling checks (slow) against statsmodels Probit and by recovery.

All data are simulated here; liabilities have tip variance 1 and the first threshold
at 0, as in the model (cladewise.model.threshold).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from treegen import random_tree

from cladewise.data.trees import FlatTree
from cladewise.inference.fit import fit
from cladewise.inference.sampling import SamplingOptions
from cladewise.model.build import ModelData, ModelSpec
from cladewise.model.simulate import simulate_traits

pytestmark = pytest.mark.slow

OPTS = SamplingOptions(chains=2, draws=600, tune=600, seed=11, progress=False)


def _row(res, label):
    s = res.summary
    return s[s["quantity"] == label].iloc[0]


def _data(tree, x, **text):
    names = list(tree.tip_names)
    return ModelData(tree, pd.DataFrame({"x": x}, index=names), extra=pd.DataFrame(text, index=names))


def test_star_tree_probit_coefficient_matches_statsmodels_probit():
    # Star tree with equal branches: species independent, and the liability given x is
    # a probit regression; probit_coef is its slope (model/threshold.py). Reference:
    # statsmodels Probit maximum likelihood. Allowed difference: 3 Monte Carlo standard
    # errors (posterior sd / sqrt(bulk ESS)) plus 0.25 ML standard errors for prior
    # influence and posterior mean versus mode with 200 species (common practice).
    rng = np.random.default_rng(5)
    n = 200
    tree = FlatTree(np.array([n] * n + [-1]), np.r_[np.ones(n), 0.0], tuple(f"s{i}" for i in range(n)))
    x = rng.normal(size=n)
    yb = (0.3 + 0.9 * x + rng.normal(size=n) > 0).astype(int)
    ml = sm.Probit(yb, sm.add_constant(x)).fit(disp=0)
    res = fit(_data(tree, x, s=np.where(yb == 1, "yes", "no")),
              ModelSpec(traits=["x", "s"], discrete={"s": ["no", "yes"]}), OPTS, predictive_draws=0)
    row = _row(res, "probit_coef[s, x]")
    mcse = row["sd"] / np.sqrt(row["ess_bulk"])
    assert abs(row["mean"] - ml.params[1]) < 3 * mcse + 0.25 * ml.bse[1]
    assert res.diagnostics.divergences == 0


def _simulated(n, rho, seed, cuts=(0.0,), labels=("no", "yes")):
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, ultrametric=True)
    t = float(np.mean(tree.tip_heights()))
    R = np.array([[1.0, rho], [rho, 1.0]]) / t  # tip variances 1
    Y = simulate_traits(tree, R, [0.0, 0.2], rng=rng)
    codes = np.searchsorted(np.asarray(cuts), Y[:, 1])
    state = np.array(labels, dtype=object)[codes]
    state[rng.choice(n, n // 20, replace=False)] = None  # some species without a state
    return _data(tree, Y[:, 0], s=state), list(labels)


def test_recovers_liability_continuous_correlation_0_6_on_300_species():
    # recovery on simulated data: the 95% HDI of evo_corr covers the true 0.6
    data, labels = _simulated(300, 0.6, seed=21)
    res = fit(data, ModelSpec(traits=["x", "s"], discrete={"s": labels}), OPTS, predictive_draws=0)
    row = _row(res, "evo_corr[x, s]")
    assert row["hdi_low"] <= 0.6 <= row["hdi_high"]
    assert row["prob_positive"] > 0.99


def test_no_correlation_gives_an_undecided_sign():
    # correlation 0: P(>0) away from 0 and 1 (a 95% two-sided band)
    data, labels = _simulated(300, 0.0, seed=22)
    res = fit(data, ModelSpec(traits=["x", "s"], discrete={"s": labels}), OPTS, predictive_draws=0)
    assert 0.025 < _row(res, "evo_corr[x, s]")["prob_positive"] < 0.975


def test_recovers_thresholds_of_an_ordered_trait():
    # three ordered states split at liability 0 and 0.8 (tip sds): HDI covers 0.8
    data, labels = _simulated(300, 0.5, seed=23, cuts=(0.0, 0.8), labels=("open", "edge", "forest"))
    res = fit(data, ModelSpec(traits=["x", "s"], discrete={"s": labels}), OPTS, predictive_draws=0)
    row = _row(res, "threshold[s: edge | forest]")
    assert row["hdi_low"] <= 0.8 <= row["hdi_high"]
    assert _row(res, "evo_corr[x, s]")["hdi_low"] <= 0.5 <= _row(res, "evo_corr[x, s]")["hdi_high"]


# --------------------------------------------------------------------------- regressions, errors
def test_star_tree_probit_regression_matches_statsmodels_probit():
    # kind = "regression" with a discrete response: on a star tree its coef are those of
    # an ordinary probit regression. Reference: statsmodels Probit ML; allowed
    # difference as above (3 MC standard errors + 0.25 ML standard errors; common practice)
    rng = np.random.default_rng(6)
    n = 200
    tree = FlatTree(np.array([n] * n + [-1]), np.r_[np.ones(n), 0.0], tuple(f"s{i}" for i in range(n)))
    x = rng.normal(1.5, 0.8, size=n)  # a predictor far from zero
    yb = (-0.8 + 0.7 * x + rng.normal(size=n) > 0).astype(int)
    ml = sm.Probit(yb, sm.add_constant(x)).fit(disp=0)
    res = fit(_data(tree, x, s=np.where(yb == 1, "yes", "no")),
              ModelSpec(kind="regression", formula="s ~ x", discrete={"s": ["no", "yes"]}), OPTS,
              predictive_draws=0)
    for j, label in enumerate(["coef[Intercept]", "coef[x]"]):
        row = _row(res, label)
        mcse = row["sd"] / np.sqrt(row["ess_bulk"])
        assert abs(row["mean"] - ml.params[j]) < 3 * mcse + 0.25 * ml.bse[j], label
    assert res.diagnostics.divergences == 0


def test_phylogenetic_probit_regression_recovers_its_coefficients():
    # liability = -0.5 + 0.8 x + residual evolving on the tree with tip variance 1;
    # x itself evolves on the tree (a phylogenetically structured predictor). The 95%
    # HDIs cover the true coefficients.
    rng = np.random.default_rng(31)
    n = 250
    tree = random_tree(n, rng, ultrametric=True)
    t = float(np.mean(tree.tip_heights()))
    x = simulate_traits(tree, np.array([[1.0 / t]]), [2.0], rng=rng)[:, 0]
    e = simulate_traits(tree, np.array([[1.0 / t]]), [0.0], rng=rng)[:, 0]
    state = np.where(-0.5 + 0.8 * x + e > 0, "yes", "no").astype(object)
    res = fit(_data(tree, x, s=state), ModelSpec(kind="regression", formula="s ~ x",
                                                 discrete={"s": ["no", "yes"]}), OPTS, predictive_draws=0)
    for label, truth in [("coef[Intercept]", -0.5), ("coef[x]", 0.8)]:
        row = _row(res, label)
        assert row["hdi_low"] <= truth <= row["hdi_high"], label


def test_correlation_with_a_measured_trait_is_recovered_with_its_standard_errors():
    # x observed with known standard errors (error sd 0.6 against a tip sd of 1): the
    # model with measurement_error = "se" covers the true liability-x correlation 0.6
    rng = np.random.default_rng(41)
    n = 300
    tree = random_tree(n, rng, ultrametric=True)
    t = float(np.mean(tree.tip_heights()))
    Y = simulate_traits(tree, np.array([[1.0, 0.6], [0.6, 1.0]]) / t, [0.0, 0.1], rng=rng)
    se = rng.uniform(0.4, 0.8, n)
    x = Y[:, 0] + se * rng.standard_normal(n)
    names = list(tree.tip_names)
    data = ModelData(tree, pd.DataFrame({"x": x}, index=names), se=pd.DataFrame({"x": se}, index=names),
                     extra=pd.DataFrame({"s": np.where(Y[:, 1] > 0, "yes", "no")}, index=names))
    res = fit(data, ModelSpec(traits=["x", "s"], discrete={"s": ["no", "yes"]}, measurement_error="se"),
              OPTS, predictive_draws=0)
    row = _row(res, "evo_corr[x, s]")
    assert row["hdi_low"] <= 0.6 <= row["hdi_high"]
