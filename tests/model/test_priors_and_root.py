"""Priors that allow each model's limits; the root edge; exact OU on non-ultrametric trees."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pymc as pm
import pytensor
import pytest
import scipy.stats

from cladewise.data.trees import FlatTree, covariance
from cladewise.errors import InputError
from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.model.evolution import ou_tip_scale, transformed_lengths, tree_arrays

from treegen import random_tree


def _paths(tree: FlatTree) -> list[set[int]]:
    """Branches (below the root) on each root-to-tip path, from the parent array."""
    out = []
    for i in range(tree.n_tips):
        p, v = set(), i
        while v != tree.root:
            p.add(v)
            v = int(tree.parent[v])
        out.append(p)
    return out


def _shared_and_depth(tree: FlatTree) -> tuple[np.ndarray, np.ndarray]:
    """s_ij (shared path below the root) and d_i (root-to-tip distance), from path sets."""
    P = _paths(tree)
    n = tree.n_tips
    s = np.array([[sum(tree.length[b] for b in P[i] & P[j]) for j in range(n)] for i in range(n)])
    return s, np.diag(s).copy()


def _with_root_edge(tree: FlatTree, r: float) -> FlatTree:
    ln = tree.length.copy()
    ln[tree.root] = r
    return tree.with_lengths(ln)


# --------------------------------------------------------------------------- kappa prior
def test_kappa_prior_covers_both_limits():
    """The prior is Uniform(0, 1.5): P(kappa < 0.25) = 1/6 from scipy's cdf, against
    0.003 under the former LogNormal(0, 0.5); P(kappa > 1) = 1/3 keeps Brownian motion
    and a little above in reach. The model's log density is scipy's."""
    prior = scipy.stats.uniform(0.0, 1.5)
    assert prior.cdf(0.25) == pytest.approx(1 / 6)
    assert scipy.stats.lognorm(0.5).cdf(0.25) < 0.005  # the former prior, for contrast
    assert 1 - prior.cdf(1.0) == pytest.approx(1 / 3)
    tree = random_tree(8, np.random.default_rng(0), True)
    vals = pd.DataFrame(np.random.default_rng(1).normal(size=(8, 2)), index=list(tree.tip_names), columns=["a", "b"])
    built = build_model(ModelData(tree, vals), ModelSpec(kind="correlated", traits=["a", "b"], evolution="kappa"))
    for v in (0.05, 0.9, 1.4):
        assert pm.logp(built.model["kappa"], np.float64(v)).eval() == pytest.approx(prior.logpdf(v), rel=1e-10)
    with pytest.raises(InputError, match="kappa_max"):
        build_model(ModelData(tree, vals), ModelSpec(kind="correlated", traits=["a", "b"], evolution="kappa",
                                                     priors={"kappa_max": 0.8}))


# --------------------------------------------------------------------------- rate prior
@pytest.mark.parametrize("kind", ["correlated", "independent", "regression"])
def test_rate_is_tip_variance_over_mean_ou_tip_variance(kind):
    """The prior sits on the tip sd; the rate is tip_sd^2 over the mean diagonal of the
    OU covariance (Hansen 1997, Evolution 51:1341-1351: V_ii = (1 - exp(-2 a T)) / (2a)
    on an ultrametric tree of height T, root at the optimum). With a large alpha the
    rate the data need is then in the bulk of the prior, not its tail."""
    tree = random_tree(10, np.random.default_rng(2), True)
    T = tree.tip_heights().max()
    a = 20.0 / T
    rng = np.random.default_rng(3)
    vals = pd.DataFrame(rng.normal(size=(10, 2)), index=list(tree.tip_names), columns=["a", "b"])
    spec = ModelSpec(kind=kind, traits=[] if kind == "regression" else ["a", "b"],
                     formula="a ~ b" if kind == "regression" else None, evolution="ou", fixed={"alpha": a})
    built = build_model(ModelData(tree, vals), spec)
    m = built.model
    tip_sd = np.array([0.7, 1.3])
    # evaluate on the free random variables themselves (no sampler transforms)
    fn = pytensor.function(m.free_RVs, m["evo_rate"], on_unused_input="ignore")
    point = {rv.name: np.zeros(rv.type.shape) if None not in rv.type.shape else None for rv in m.free_RVs}
    if kind == "correlated":
        # packed lower-triangular factor [L00, L10, L11], zero off-diagonal: tip sds on the diagonal
        point["tip_chol"] = np.array([tip_sd[0], 0.0, tip_sd[1]])
    elif kind == "independent":
        point["tip_sd"] = tip_sd
    else:
        tip_sd = tip_sd[:1]
        point["tip_sd"] = np.asarray(tip_sd[0])
    point = {k: (v if v is not None else np.zeros(2)) for k, v in point.items()}
    rate = fn(*[point[rv.name] for rv in m.free_RVs])
    v_ii = (1 - np.exp(-2 * a * T)) / (2 * a)
    np.testing.assert_allclose(rate, tip_sd**2 / v_ii, rtol=1e-10)


# --------------------------------------------------------------------------- root edge
@pytest.mark.parametrize("model,params", [
    ("kappa", {"kappa": 0.4}), ("delta", {"delta": 1.7}), ("early_burst", {"rate_change": -0.8}),
    ("ou", {"alpha": 0.6}),
])
def test_root_edge_stays_brownian_in_every_transform(model, params):
    """A root edge of length r adds r to every covariance entry (a shared stretch of
    Brownian motion), whatever the transform below the root."""
    tree = random_tree(7, np.random.default_rng(5), True)
    r = 0.9
    base = covariance(tree.with_lengths(transformed_lengths(tree, model, **params)))
    rooted = _with_root_edge(tree, r)
    got = covariance(rooted.with_lengths(transformed_lengths(rooted, model, **params)))
    np.testing.assert_allclose(got, base + r, rtol=1e-12)


def test_lambda_scales_the_root_edge_with_the_shared_part():
    """Pagel 1999 (Nature 401:877-884): every off-diagonal entry times lambda, the
    diagonal kept, with the root edge's share counted in both."""
    tree = _with_root_edge(random_tree(7, np.random.default_rng(6), False), 0.5)
    s, _ = _shared_and_depth(tree)
    C = s + 0.5
    lam = 0.3
    got = covariance(tree.with_lengths(transformed_lengths(tree, "lambda", lam=lam)))
    np.testing.assert_allclose(got, lam * C + (1 - lam) * np.diag(np.diag(C)), atol=1e-12)


# --------------------------------------------------------------------------- exact OU
@pytest.mark.parametrize("seed", [1, 7])
@pytest.mark.parametrize("alpha", [0.05, 0.7, 4.0])
def test_ou_tip_scale_gives_hansen_covariance_on_non_ultrametric_tree(seed, alpha):
    """Hansen 1997: V_ij = exp(-a (d_i + d_j - 2 s_ij)) (1 - exp(-2 a s_ij)) / (2a)
    (root at the optimum) and exp(-a (d_i + d_j - 2 s_ij)) / (2a) (stationary root),
    written from the path sets; D C D reproduces them (Ho & Ane 2014, Syst. Biol.
    63:397-408), while C alone (the approximation) does not."""
    tree = random_tree(9, np.random.default_rng(seed), False)
    s, d = _shared_and_depth(tree)
    decay = np.exp(-alpha * (d[:, None] + d[None, :] - 2 * s))
    ref = {"fixed": decay * (-np.expm1(-2 * alpha * s)) / (2 * alpha), "stationary": decay / (2 * alpha)}
    D = ou_tip_scale(tree_arrays(tree), alpha)[: tree.n_tips]
    for root, V in ref.items():
        C = covariance(tree.with_lengths(transformed_lengths(tree, "ou", ou_root=root, alpha=alpha)))
        np.testing.assert_allclose(D[:, None] * C * D[None, :], V, rtol=1e-8, atol=1e-14)
        if alpha > 0.5:
            assert np.max(np.abs(np.diag(C) - np.diag(V)) / np.diag(V)) > 0.05  # the approximation is off
    ultra = random_tree(9, np.random.default_rng(seed), True)
    np.testing.assert_allclose(ou_tip_scale(tree_arrays(ultra), alpha)[: ultra.n_tips], 1.0, atol=1e-10)
