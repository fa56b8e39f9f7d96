"""Simulation-based calibration (Talts et al. 2018, arXiv:1804.06788).

The machinery (ranks, coverage, chi-square uniformity) is checked on a conjugate
normal model whose posterior is known exactly, so it must pass when the posterior is
right and fail when it is too narrow. The guard on the real model (one compile, then
20 short fits: about 20 s on an idle 2-core machine, up to ~70 s under load) is small;
benchmarks/bench_calibration.py runs the full study.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from cladewise.errors import InputError
from cladewise.studies.calibration import rank_of_truth, run_calibration, summarise_ranks
from cladewise.inference.sampling import SamplingOptions
from treegen import random_tree


def _conjugate_ranks(n_sets: int, sd_factor: float, seed: int) -> pd.DataFrame:
    """SBC ranks for theta ~ N(0, 1), y_1..m ~ N(theta, 1): posterior N(sum y / (m + 1), 1 / (m + 1))
    (conjugate normal, Gelman et al. 2013, Bayesian Data Analysis 3rd ed., sec. 2.5).
    ``sd_factor`` < 1 makes the "posterior" too narrow, i.e. miscalibrated."""
    rng = np.random.default_rng(seed)
    m = 5
    rows = []
    for d in range(n_sets):
        theta = rng.normal()
        y = rng.normal(theta, 1.0, size=m)
        post_mean, post_sd = y.sum() / (m + 1), np.sqrt(1.0 / (m + 1))
        draws = rng.normal(post_mean, sd_factor * post_sd, size=1000)
        rows.append({"dataset": d, "parameter": "theta", **rank_of_truth(theta, draws, 99)})
    return pd.DataFrame(rows)


def test_sbc_machinery_passes_an_exact_posterior():
    ranks = _conjugate_ranks(400, 1.0, seed=5)
    assert ranks["rank"].between(0, 99).all()
    coverage, uniformity = summarise_ranks(ranks, 99, 10)
    theta = coverage[coverage.parameter == "theta"]
    # calibrated: coverage within 4 binomial se of nominal (Talts et al. 2018; 4 se is common practice
    # for a test that should essentially never fail by chance)
    assert (np.abs(theta.coverage - theta.nominal) <= 4 * theta.mcse).all(), coverage
    # uniform ranks: the chi-square p-value is itself uniform, so p > 0.001 fails 0.1% of seeds
    assert uniformity.p_value.iloc[0] > 1e-3


def test_sbc_machinery_flags_an_overconfident_posterior():
    ranks = _conjugate_ranks(400, 0.5, seed=6)
    coverage, uniformity = summarise_ranks(ranks, 99, 10)
    # a posterior half as wide as it should be covers a central 90% interval only
    # P(|Z| < 0.5 * 1.645) = 0.59 of the time (standard normal)
    cov90 = coverage[(coverage.parameter == "theta") & (coverage.nominal == 0.9)].coverage.iloc[0]
    assert 0.45 < cov90 < 0.72
    assert not coverage[coverage.parameter == "theta"].within_2se.all()
    # too-narrow posteriors pile ranks at both ends (the U shape of Talts et al. 2018, fig. 3)
    assert uniformity.p_value.iloc[0] < 1e-6


def test_run_calibration_rejects_bad_settings_before_compiling():
    tree = random_tree(6, np.random.default_rng(0), True)
    with pytest.raises(InputError, match="divisible"):
        run_calibration(tree, 10, n_rank_draws=100)
    with pytest.raises(InputError, match="n_datasets"):
        run_calibration(tree, 1)


def test_sbc_guard_correlated_bm_with_known_se():
    # 20 data sets x 5 parameters = 100 intervals. If calibrated, each covers with
    # probability 0.9; intervals from one data set are dependent, so take the worst
    # case of 20 independent blocks: sd of the pooled share <= sqrt(0.9 * 0.1 / 20) = 0.067,
    # and [0.7, 1.0] is 3 sd below nominal. Gross miscalibration (e.g. intervals half
    # as wide: coverage near 0.6, see the conjugate check above) falls outside.
    tree = random_tree(25, np.random.default_rng(4), True)
    res = run_calibration(
        tree, 20, seed=3,
        options=SamplingOptions(chains=2, draws=250, tune=300, progress=False),
    )
    print(res.to_text())
    pooled = res.coverage[(res.coverage.parameter == "all") & (res.coverage.nominal == 0.9)]
    assert 0.7 <= pooled.coverage.iloc[0] <= 1.0, res.to_text()
    assert len(res.ranks) == 100
    assert res.ranks["rank"].between(0, 99).all()
    # parameters are labelled as in the summary table (the quantity catalogue)
    assert set(res.ranks["parameter"]) == {"evo_corr[trait_1, trait_2]", "evo_rate[trait_1]", "evo_rate[trait_2]",
                                           "root_mean[trait_1]", "root_mean[trait_2]"}
    # share of divergent draws per fit: divergent transitions / (chains x draws)
    fits = res.fits
    assert len(fits) == 20
    np.testing.assert_allclose(fits["divergent_share"], fits["divergences"] / (2 * 250))
    assert int(fits["divergences"].sum()) == res.settings["divergences"]


@pytest.mark.parametrize("model, evolution, labels", [
    ("regression", "lambda", {"coef[Intercept]", "coef[x]", "intercept_at_mean", "evo_rate[y]", "lambda"}),
    # the specimens model is compiled per data set (its specimen statistics are constants):
    # a cold compile in the tests' own cache plus two loads, over a minute
    pytest.param("specimens", "bm", {"evo_corr[trait_1, trait_2]", "within_corr[trait_1, trait_2]",
                                     "evo_rate[trait_1]", "evo_rate[trait_2]"}, marks=pytest.mark.slow),
])
def test_calibration_settings_run_end_to_end(model, evolution, labels):
    # 2 tiny data sets: only the shape of the tables is checked, no coverage
    tree = random_tree(8, np.random.default_rng(2), True)
    res = run_calibration(tree, 2, model=model, evolution=evolution, n_rank_draws=19, n_bins=4, seed=4,
                          options=SamplingOptions(chains=1, draws=40, tune=40, progress=False))
    assert set(res.ranks["parameter"]) == labels
    assert len(res.ranks) == 2 * len(labels)
    assert res.ranks["rank"].between(0, 19).all()
    # coverage: every checked parameter plus "all", at each of the three intervals
    assert len(res.coverage) == 3 * (len(labels) + 1)
    assert res.coverage["coverage"].between(0, 1).all()
    # binomial se at the nominal rate, e.g. sqrt(0.9 * 0.1 / 2) for one parameter over 2 data sets
    np.testing.assert_allclose(res.coverage["mcse"],
                               np.sqrt(res.coverage.nominal * (1 - res.coverage.nominal) / res.coverage.n))
    assert set(res.uniformity["parameter"]) == labels
    assert res.settings["recompiled_per_dataset"] == (model == "specimens")
    assert "within_2se" in res.coverage


def test_calibration_rejects_unknown_setting():
    tree = random_tree(6, np.random.default_rng(0), True)
    with pytest.raises(InputError, match="model must be one of"):
        run_calibration(tree, 4, model="ou")
    with pytest.raises(InputError, match="specimens"):
        run_calibration(tree, 4, model="specimens", measurement_error="se")
