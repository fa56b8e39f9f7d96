"""Blomberg's K against its published formula, computed densely, and its behaviour
under simulated Brownian motion and under no phylogenetic structure."""

from __future__ import annotations

import numpy as np
import pytest

from cladewise.data.trees import FlatTree
from cladewise.errors import InputError
from cladewise.evaluation.blomberg import blomberg_k, k_statistics
from treegen import random_tree, shared_path_cov


def dense_k(tree: FlatTree, y: np.ndarray) -> float:
    """Blomberg, Garland & Ives 2003 (Evolution 57:717-745), K as the observed over the
    Brownian-motion-expected ratio of MSE0 to MSE, with the full C matrix (numpy)."""
    C = shared_path_cov(tree)
    n = len(y)
    Ci = np.linalg.inv(C)
    one = np.ones(n)
    a = one @ Ci @ y / (one @ Ci @ one)  # GLS root mean
    r = y - a
    observed = (r @ r) / (r @ Ci @ r)
    expected = (np.trace(C) - n / (one @ Ci @ one)) / (n - 1)
    return observed / expected


def polytomy_tree() -> FlatTree:
    # ((a:1,b:2,c:0.5):1,(d:1.5,e:0.7):0.3,f:2.2); one polytomy under the root and
    # one at the root (three children), non-ultrametric, with a root edge
    parent = np.array([6, 6, 6, 7, 7, 8, 8, 8, -1])
    length = np.array([1.0, 2.0, 0.5, 1.5, 0.7, 2.2, 1.0, 0.3, 0.4])
    return FlatTree(parent, length, ("a", "b", "c", "d", "e", "f"))


@pytest.mark.parametrize("case", ["ultrametric", "non-ultrametric", "root-edge", "polytomy"])
def test_k_equals_dense_formula(case):
    # source: Blomberg, Garland & Ives 2003, the K formula, evaluated densely with numpy
    rng = np.random.default_rng(11)
    for n in (4, 9, 25):
        if case == "polytomy":
            tree = polytomy_tree()
        else:
            tree = random_tree(n, rng, ultrametric=case == "ultrametric",
                               root_edge=0.7 if case == "root-edge" else 0.0)
        y = rng.normal(size=tree.n_tips) * 3 + 10
        assert blomberg_k(tree, y, permutations=0).k == pytest.approx(dense_k(tree, y), rel=1e-9)


def test_k_with_missing_values_uses_the_species_with_values():
    # dropping species = the dense formula on the submatrix of C of the others
    # (Blomberg, Garland & Ives 2003 formula with C restricted to those species)
    rng = np.random.default_rng(5)
    tree = random_tree(15, rng)
    y = rng.normal(size=15)
    y[[2, 7, 14]] = np.nan
    res = blomberg_k(tree, y, permutations=0)
    have = ~np.isnan(y)
    C = shared_path_cov(tree)[np.ix_(have, have)]
    n = have.sum()
    Ci, one, yy = np.linalg.inv(C), np.ones(n), y[have]
    a = one @ Ci @ yy / (one @ Ci @ one)
    r = yy - a
    k = (r @ r / (r @ Ci @ r)) / ((np.trace(C) - n / (one @ Ci @ one)) / (n - 1))
    assert res.k == pytest.approx(k, rel=1e-9)
    assert res.n_species == 12 and res.dropped == ["s2", "s7", "s14"]
    assert res.gls_mean == pytest.approx(a, rel=1e-9)


def _simulate(tree: FlatTree, C: np.ndarray, n_sim: int, rng) -> np.ndarray:
    L = np.linalg.cholesky(C)
    return L @ rng.normal(size=(tree.n_tips, n_sim))


def test_k_near_one_under_brownian_motion_and_near_zero_without_structure():
    # from memory: under Brownian motion K averages about 1 (Blomberg et al. 2003 scaled K
    # by its Brownian-motion expectation); for values independent of the tree (a star-like
    # covariance) K is near 0 on a tree whose species share long stretches of history.
    # How near 0 depends on the tree (measured: about 0.4 on a 40-tip coalescent tree, 0.2
    # on this 100-tip one, 0.01 with short terminal branches), so the star case is checked
    # loosely on the 100-tip tree and tightly on the same topology with short terminal branches.
    rng = np.random.default_rng(2024)
    tree = random_tree(100, rng, ultrametric=True)
    C = shared_path_cov(tree)
    k_bm, _ = k_statistics(tree, _simulate(tree, C, 2000, rng))
    se = k_bm.std() / np.sqrt(k_bm.size)
    assert abs(k_bm.mean() - 1.0) < 0.08, (k_bm.mean(), se)
    k_star, _ = k_statistics(tree, rng.normal(size=(100, 2000)))
    assert k_star.mean() < 0.35, k_star.mean()
    ln = tree.length.copy()
    ln[:100] = 0.05  # the species hang on short branches below a deep shared history
    short = FlatTree(tree.parent, ln, tree.tip_names)
    k_short, _ = k_statistics(short, rng.normal(size=(100, 2000)))
    assert k_short.mean() < 0.05, k_short.mean()
    k_short_bm, _ = k_statistics(short, _simulate(short, shared_path_cov(short), 2000, rng))
    assert abs(k_short_bm.mean() - 1.0) < 0.08, k_short_bm.mean()


def test_permutation_p_values():
    # Brownian-motion data: the shuffles almost always give smaller K (small p);
    # data independent of the tree are exchangeable, so p is uniform and P(p <= 0.05)
    # is at most 0.05 (permutation-test theory, e.g. Lehmann & Romano, Testing
    # Statistical Hypotheses, ch. 15; from memory)
    rng = np.random.default_rng(7)
    tree = random_tree(40, rng, ultrametric=True)
    C = shared_path_cov(tree)
    Y = _simulate(tree, C, 30, rng)
    p_bm = np.array([blomberg_k(tree, Y[:, s], permutations=199, seed=s).p_value for s in range(30)])
    assert np.mean(p_bm <= 0.05) > 0.8
    p_null = np.array([blomberg_k(tree, rng.normal(size=40), permutations=99, seed=s).p_value
                       for s in range(300)])
    # 300 tests at size 0.05: binomial sd 0.0126, so 0.05 + 3.5 sd = 0.094
    assert 0.01 < np.mean(p_null <= 0.05) < 0.095
    assert 0.4 < p_null.mean() < 0.6  # uniform on (0, 1]: mean 0.5 (sd of the mean about 0.017)


def test_permutation_p_value_formula_and_seed():
    rng = np.random.default_rng(3)
    tree = random_tree(12, rng)
    y = rng.normal(size=12)
    a = blomberg_k(tree, y, permutations=499, seed=9)
    b = blomberg_k(tree, y, permutations=499, seed=9)
    assert a.p_value == b.p_value and np.array_equal(a.null, b.null)
    assert a.p_value == (1 + np.sum(a.null >= a.k)) / 500
    # the null distribution: K of shuffled values (the same draws of the generator),
    # each equal to the dense formula
    shuffled = np.random.default_rng(9).permuted(np.broadcast_to(y, (256, 12)), axis=1)
    for r in range(3):
        assert sorted(shuffled[r]) == sorted(y)
        assert dense_k(tree, shuffled[r]) == pytest.approx(a.null[r], rel=1e-9)


def test_k_bad_input():
    rng = np.random.default_rng(1)
    tree = random_tree(6, rng)
    with pytest.raises(InputError, match="at least 3 species"):
        blomberg_k(tree, [1.0, np.nan, np.nan, np.nan, np.nan, 2.0])
    with pytest.raises(InputError, match="same value"):
        blomberg_k(tree, np.ones(6))
    with pytest.raises(InputError, match="one value per species"):
        blomberg_k(tree, np.ones(5))


def _large_tree(n: int, rng) -> FlatTree:
    """Random joins of two lineages (swap-remove keeps it linear), random lengths."""
    active = list(range(n))
    parent = np.full(2 * n - 1, -1)
    for node in range(n, 2 * n - 1):
        pair = []
        for _ in range(2):
            j = int(rng.integers(len(active)))
            active[j], active[-1] = active[-1], active[j]
            pair.append(active.pop())
        parent[pair] = node
        active.append(node)
    length = rng.uniform(0.1, 1.0, 2 * n - 1)
    length[-1] = 0.0
    return FlatTree(parent, length, tuple(f"t{i}" for i in range(n)))


def test_k_linear_time_on_10000_tips():
    # 10,000 species with 99 permutations: no N x N matrix (the dense C would be 800 MB)
    rng = np.random.default_rng(4)
    tree = _large_tree(10_000, rng)
    res = blomberg_k(tree, rng.normal(size=10_000), permutations=99, seed=1)
    assert 0 < res.k < 0.5 and res.null.size == 99
