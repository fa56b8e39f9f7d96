"""Convergence verdicts on synthetic draws whose properties are known by construction.

Thresholds: R-hat 1.01, bulk/tail ESS 400 (Vehtari, Gelman, Simpson, Carpenter &
Bürkner 2021, Bayesian Analysis 16:667-718); E-BFMI 0.3 (Betancourt 2016,
arXiv:1604.00695, common practice). The numbers are checked against ArviZ's
estimators and, for E-BFMI, against Betancourt's formula
sum (E_n - E_{n-1})^2 / sum (E_n - mean E)^2 computed here with numpy.
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pytest
import xarray as xr

from cladewise.inference.diagnostics import BFMI_MIN, ESS_MIN, RHAT_MAX, diagnose


def _idata(x: np.ndarray, energy: np.ndarray | None = None, diverging: np.ndarray | None = None,
           tree: list[int] | None = None) -> az.InferenceData:
    nc, nd = x.shape
    coords = {"chain": np.arange(nc), "draw": np.arange(nd)}
    post = xr.Dataset({"theta": (("chain", "draw"), x)}, coords=coords)
    rng = np.random.default_rng(99)
    stats = xr.Dataset({
        "energy": (("chain", "draw"), rng.standard_normal((nc, nd)) if energy is None else energy),
        "diverging": (("chain", "draw"), np.zeros((nc, nd), bool) if diverging is None else diverging),
    }, coords=coords)
    if tree is not None:
        post = post.assign_coords(tree=("chain", tree))
        stats = stats.assign_coords(tree=("chain", tree))
    return az.InferenceData(posterior=post, sample_stats=stats)


def _ar1(rng, phi, n_chains, n_draws):
    x = np.zeros((n_chains, n_draws))
    e = rng.standard_normal((n_chains, n_draws))
    x[:, 0] = e[:, 0] / np.sqrt(1 - phi ** 2)
    for t in range(1, n_draws):
        x[:, t] = phi * x[:, t - 1] + e[:, t]
    return x


def test_thresholds_are_the_published_ones():
    assert (RHAT_MAX, ESS_MIN, BFMI_MIN) == (1.01, 400, 0.3)


def test_well_mixed_chains_pass():
    rng = np.random.default_rng(1)
    x = rng.standard_normal((4, 1000))
    d = diagnose(_idata(x), ["theta"])
    assert d.ok and "no problems found" in d.to_text()
    assert d.max_rhat == pytest.approx(float(az.rhat(x)), rel=1e-12)
    assert d.min_ess_bulk == pytest.approx(float(az.ess(x, method="bulk")), rel=1e-12)
    assert d.n_draws == 4000


def test_disagreeing_chains_fail_rhat():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((4, 1000)) + np.array([0.0, 0.0, 0.0, 0.5])[:, None]
    d = diagnose(_idata(x), ["theta"])
    assert d.max_rhat == pytest.approx(float(az.rhat(x)), rel=1e-12) and d.max_rhat > RHAT_MAX
    assert any("R-hat" in p and "chains disagree" in p for p in d.problems)


def test_sticky_chains_fail_ess():
    # AR(1) with phi = 0.99: ESS ~ n (1 - phi) / (1 + phi) = 4000 * 0.01 / 1.99 ~ 20
    # (the AR(1) integrated autocorrelation time; Geyer 1992, Stat. Sci. 7:473)
    x = _ar1(np.random.default_rng(3), 0.99, 4, 1000)
    d = diagnose(_idata(x), ["theta"])
    assert d.min_ess_bulk < ESS_MIN
    assert any(p.startswith("bulk ESS") and "draw more" in p for p in d.problems)


def test_low_bfmi_and_divergences():
    rng = np.random.default_rng(4)
    x = rng.standard_normal((4, 1000))
    energy = np.cumsum(rng.standard_normal((4, 1000)), axis=1)  # a random walk: tiny E-BFMI
    div = np.zeros((4, 1000), bool)
    div[1, [5, 50, 500]] = True
    d = diagnose(_idata(x, energy=energy, diverging=div), ["theta"])
    by_hand = np.sum(np.diff(energy, axis=1) ** 2, axis=1) / np.sum((energy - energy.mean(axis=1, keepdims=True)) ** 2, axis=1)
    assert d.min_bfmi == pytest.approx(by_hand.min(), rel=1e-10) and d.min_bfmi < BFMI_MIN
    assert d.divergences == 3
    text = " | ".join(d.problems)
    assert "E-BFMI" in text and "3 divergent transitions" in text and not d.ok


def test_one_chain_is_flagged():
    x = np.random.default_rng(5).standard_normal((1, 2000))
    d = diagnose(_idata(x), ["theta"])
    assert any("only one chain" in p for p in d.problems)


def test_pooled_chains_are_judged_within_each_tree():
    rng = np.random.default_rng(6)
    # two trees, two chains each; the trees' posteriors differ on purpose
    x = rng.standard_normal((4, 1000)) + np.array([0.0, 0.0, 3.0, 3.0])[:, None]
    d = diagnose(_idata(x, tree=[0, 0, 1, 1]), ["theta"])
    within = [float(az.rhat(x[:2])), float(az.rhat(x[2:]))]
    assert d.max_rhat == pytest.approx(max(within), rel=1e-12)
    assert float(az.rhat(x)) > 1.5  # across trees R-hat would be meaningless
    ess = float(az.ess(x[:2], method="bulk")) + float(az.ess(x[2:], method="bulk"))
    assert d.min_ess_bulk == pytest.approx(ess, rel=1e-12)
    assert d.ok
    # one tree whose chains disagree is named
    y = x.copy()
    y[3] += 0.5
    bad = diagnose(_idata(y, tree=[0, 0, 1, 1]), ["theta"])
    assert any("within 1 of 2 trees" in p and "tree 1" in p for p in bad.problems)
