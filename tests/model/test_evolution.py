"""Branch-length transforms against the published closed-form covariances."""

from __future__ import annotations

import numpy as np
import pytest

from cladewise.errors import InputError
from cladewise.model.evolution import model_warnings, transformed_lengths
from cladewise.data.trees import FlatTree, covariance

from treegen import random_tree


def shared_height(tree: FlatTree) -> np.ndarray:
    """s_ij: height of the most recent common ancestor (BM covariance, unit rate)."""
    return covariance(tree)


@pytest.fixture(params=[5, 12])
def ultra(request):
    return random_tree(request.param, np.random.default_rng(request.param), True)


def cov_of(tree: FlatTree, model: str, **p) -> np.ndarray:
    return covariance(tree.with_lengths(transformed_lengths(tree, model, **p)))


def test_lambda_matches_pagel_definition(ultra):
    # Pagel 1999 (Nature 401:877-884): off-diagonal elements times lambda, diagonal kept.
    for tree in (ultra, random_tree(9, np.random.default_rng(3), False)):
        C = covariance(tree)
        lam = 0.37
        expect = lam * C + (1 - lam) * np.diag(np.diag(C))
        np.testing.assert_allclose(cov_of(tree, "lambda", lam=lam), expect, atol=1e-12)


def test_ou_fixed_root_closed_form(ultra):
    # Hansen 1997 (Evolution 51:1341-1351); Butler & King 2004 (Am. Nat. 164:683-695):
    # V_ij = sigma^2/(2a) exp(-2a (T - s_ij)) (1 - exp(-2a s_ij)), root at the optimum.
    s = shared_height(ultra)
    T = s.diagonal().max()
    for a in (0.05, 0.8, 6.0):
        expect = np.exp(-2 * a * (T - s)) * (1 - np.exp(-2 * a * s)) / (2 * a)
        np.testing.assert_allclose(cov_of(ultra, "ou", alpha=a), expect, rtol=1e-10, atol=1e-14)


def test_ou_stationary_root_closed_form(ultra):
    # Stationary root: V_ij = sigma^2/(2a) exp(-2a (T - s_ij)) (Hansen 1997; form from memory,
    # obtained by letting the root value follow the stationary distribution N(theta, 1/(2a))).
    s = shared_height(ultra)
    T = s.diagonal().max()
    a = 0.7
    got = covariance(ultra.with_lengths(transformed_lengths(ultra, "ou", ou_root="stationary", alpha=a)))
    np.testing.assert_allclose(got, np.exp(-2 * a * (T - s)) / (2 * a), rtol=1e-10)


def test_ou_small_alpha_is_brownian(ultra):
    np.testing.assert_allclose(cov_of(ultra, "ou", alpha=1e-7), covariance(ultra), rtol=1e-5)


def test_early_burst_closed_form():
    # Harmon et al. 2010 (Evolution 64:2385-2396): rate sigma^2 exp(r t), so
    # V_ij = sigma^2 (exp(r s_ij) - 1) / r.
    tree = random_tree(10, np.random.default_rng(5), False)
    s = shared_height(tree)
    for r in (-1.3, 0.4):
        np.testing.assert_allclose(cov_of(tree, "early_burst", rate_change=r), np.expm1(r * s) / r, rtol=1e-10)
    np.testing.assert_allclose(cov_of(tree, "early_burst", rate_change=0.0), s, rtol=1e-8)


def test_delta_transforms_node_heights():
    # Pagel 1999: delta raises path lengths from the root to the power delta; cladewise
    # rescales to keep the tree height T: s_ij -> T (s_ij / T)^delta.
    tree = random_tree(11, np.random.default_rng(8), True)
    s = shared_height(tree)
    T = s.diagonal().max()
    np.testing.assert_allclose(cov_of(tree, "delta", delta=2.5), T * (s / T) ** 2.5, rtol=1e-10)


def test_kappa_raises_each_branch():
    # Pagel 1999: every branch length to the power kappa; the covariance is the sum of
    # the transformed branches shared by two tips. Computed here on the explicit path sets.
    tree = random_tree(8, np.random.default_rng(2), False)
    kappa = 0.4
    n = tree.n_tips
    paths = []
    for i in range(n):
        p, v = set(), i
        while v != tree.root:
            p.add(v)
            v = tree.parent[v]
        paths.append(p)
    expect = np.array([[sum(tree.length[b] ** kappa for b in paths[i] & paths[j]) for j in range(n)] for i in range(n)])
    np.testing.assert_allclose(cov_of(tree, "kappa", kappa=kappa), expect, rtol=1e-10)


@pytest.mark.parametrize(
    "model,params",
    [("lambda", {"lam": 0.6}), ("kappa", {"kappa": 0.7}), ("delta", {"delta": 1.4}),
     ("early_burst", {"rate_change": -0.3}), ("ou", {"alpha": 0.9})],
)
def test_pytensor_matches_numpy_and_has_gradient(model, params):
    import pytensor
    import pytensor.tensor as pt

    tree = random_tree(7, np.random.default_rng(11), model != "ou")
    (name, value), = params.items()
    x = pt.dscalar(name)
    out = transformed_lengths(tree, model, **{name: x})
    f = pytensor.function([x], [out, pt.grad(out.sum(), x)])
    val, grad = f(value)
    np.testing.assert_allclose(val, transformed_lengths(tree, model, **params), rtol=1e-12)
    h = 1e-6
    fd = (transformed_lengths(tree, model, **{name: value + h}).sum()
          - transformed_lengths(tree, model, **{name: value - h}).sum()) / (2 * h)
    np.testing.assert_allclose(grad, fd, rtol=1e-5)
    assert np.all(np.isfinite(grad))


def test_bad_model_and_parameters():
    tree = random_tree(4, np.random.default_rng(0), True)
    with pytest.raises(InputError, match="unknown evolution model 'brownie'"):
        transformed_lengths(tree, "brownie")
    with pytest.raises(InputError, match="missing"):
        transformed_lengths(tree, "lambda")


def test_ou_warns_on_non_ultrametric_tree():
    tree = random_tree(6, np.random.default_rng(4), False)
    assert any("ultrametric" in w for w in model_warnings(tree, "ou"))
    assert model_warnings(random_tree(6, np.random.default_rng(4), True), "ou") == []
