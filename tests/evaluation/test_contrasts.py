"""Independent contrasts against GLS (statsmodels), dense algebra and a hand example."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from cladewise.evaluation.contrasts import (
    independent_contrasts,
    resolve_polytomies,
    standardized_contrasts,
)
from cladewise.errors import InputError
from cladewise.data.trees import FlatTree, covariance
from treegen import random_tree




def gls_reml(C: np.ndarray, y: np.ndarray, x: np.ndarray) -> dict[str, float]:
    """Intercept-only GLS root mean and REML (co)variance of two traits.

    sigma2_REML = (y - 1 b)' C^-1 (y - 1 b) / (n - 1) (Blomberg et al. 2012,
    Syst. Biol. 61:382-391).
    """
    n = len(y)
    ones = np.ones((n, 1))
    fy = sm.GLS(y, ones, sigma=C).fit()
    fx = sm.GLS(x, ones, sigma=C).fit()
    ry, rx = y - fy.params[0], x - fx.params[0]
    return {
        "root_y": fy.params[0],
        "yy": ry @ np.linalg.solve(C, ry) / (n - 1),
        "xx": rx @ np.linalg.solve(C, rx) / (n - 1),
        "xy": ry @ np.linalg.solve(C, rx) / (n - 1),
    }


@pytest.mark.parametrize("n, seed, root_edge", [(5, 1, 0.0), (12, 2, 0.0), (30, 3, 0.7), (60, 4, 0.0)])
def test_contrasts_equal_gls(n, seed, root_edge):
    # Felsenstein 1985 (Am. Nat. 125:1-15); Blomberg et al. 2012 (Syst. Biol.
    # 61:382-391): mean squared standardized contrast = REML BM rate; regression
    # through the origin = GLS slope with covariance C; root value = GLS root mean.
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, root_edge=root_edge)
    C = covariance(tree)
    x = rng.normal(size=n) * 2 + 1
    y = 0.7 * x + rng.normal(size=n)
    res = independent_contrasts(tree, np.c_[y, x], traits=["y", "x"])
    ref = gls_reml(C, y, x)
    assert res.n_contrasts == n - 1
    assert res.rates["y"] == pytest.approx(ref["yy"], rel=1e-8)
    assert res.rates["x"] == pytest.approx(ref["xx"], rel=1e-8)
    assert res.rate_matrix.loc["y", "x"] == pytest.approx(ref["xy"], rel=1e-8)
    assert res.root_values["y"] == pytest.approx(ref["root_y"], rel=1e-8)

    gls = sm.GLS(y, sm.add_constant(x), sigma=C).fit()
    row = res.pairs.set_index(["response", "predictor"]).loc[("y", "x")]
    assert row["slope"] == pytest.approx(gls.params[1], rel=1e-8)
    assert row["slope_se"] == pytest.approx(gls.bse[1], rel=1e-8)
    assert row["t"] == pytest.approx(gls.tvalues[1], rel=1e-8)
    assert row["df"] == gls.df_resid == n - 2
    assert row["p_value"] == pytest.approx(gls.pvalues[1], rel=1e-8)
    # correlation through the origin = REML evolutionary correlation
    r = ref["xy"] / np.sqrt(ref["xx"] * ref["yy"])
    assert row["correlation"] == pytest.approx(r, rel=1e-8)


def test_standardized_contrasts_are_orthonormal_under_bm():
    # Under BM the n - 1 standardized contrasts are independent with unit variance
    # per unit rate and blind to the root value (Felsenstein 1985): the linear map A
    # (contrasts = A y) satisfies A C A' = I and A 1 = 0, root edge included.
    rng = np.random.default_rng(9)
    tree = random_tree(15, rng, root_edge=0.5)
    A = standardized_contrasts(tree, np.eye(15))  # column i = contrasts of tip i
    np.testing.assert_allclose(A @ covariance(tree) @ A.T, np.eye(14), atol=1e-10)
    np.testing.assert_allclose(A @ np.ones(15), 0, atol=1e-12)


def test_hand_worked_three_species():
    # ((a:1,b:1):1,c:2), Felsenstein 1985 steps by hand: node ab: a - b, sd sqrt(2),
    # value (a+b)/2, extended branch 1 + 1*1/2 = 1.5; root: c - (a+b)/2 (children in
    # index order, c is node 2), sd sqrt(2 + 1.5).
    tree = FlatTree([3, 3, 4, 4, -1], [1.0, 1.0, 2.0, 1.0, 0.0], ("a", "b", "c"))
    table = pd.DataFrame({"species": ["c", "a", "b"], "v": [1.0, 4.0, 2.0]})
    res = independent_contrasts(tree, table)
    nodes = res.nodes.set_index("node")
    assert nodes.loc[3, "v_contrast"] == pytest.approx(2.0)
    assert nodes.loc[3, "sd"] == pytest.approx(np.sqrt(2.0))
    assert nodes.loc[3, "v_ancestor"] == pytest.approx(3.0)
    assert nodes.loc[3, "height"] == pytest.approx(1.0)
    assert nodes.loc[4, "v_contrast"] == pytest.approx(-2.0)
    assert nodes.loc[4, "sd"] == pytest.approx(np.sqrt(3.5))
    assert nodes.loc[4, "height"] == pytest.approx(0.0)
    # root value: weights 1/1.5 and 1/2 on 3 and 1
    assert res.root_values["v"] == pytest.approx((3 / 1.5 + 1 / 2) / (1 / 1.5 + 1 / 2))
    assert res.rates["v"] == pytest.approx((4 / 2 + 4 / 3.5) / 2)


def test_adequacy_diagnostics():
    # Garland, Harvey & Ives 1992 (Syst. Biol. 41:18-32): Pearson correlation of
    # |standardized contrast| with its sd and with node height, against scipy.
    rng = np.random.default_rng(5)
    tree = random_tree(25, rng)
    vals = rng.normal(size=(25, 2))
    res = independent_contrasts(tree, vals, traits=["p", "q"])
    for t in ["p", "q"]:
        a = res.nodes[f"{t}_standardized"].abs()
        row = res.adequacy.set_index("trait").loc[t]
        ref_sd = stats.pearsonr(a, res.nodes["sd"])
        ref_h = stats.pearsonr(a, res.nodes["height"])
        assert row["r_sd"] == pytest.approx(ref_sd.statistic, rel=1e-10)
        assert row["p_sd"] == pytest.approx(ref_sd.pvalue, rel=1e-10)
        assert row["r_height"] == pytest.approx(ref_h.statistic, rel=1e-10)
        assert row["p_height"] == pytest.approx(ref_h.pvalue, rel=1e-10)
    # sd and height columns: sd^2 = v_a + v_b, so standardizing by it gives the
    # orthonormal map checked above; heights against the tree's own root distances.
    np.testing.assert_allclose(res.nodes["height"], tree.heights()[res.nodes["node"]])
    assert "Garland" in res.to_text()


def poly_tree() -> FlatTree:
    # a 5-way polytomy and a 3-way root polytomy
    parent = [8, 8, 8, 8, 8, 9, 9, 10, 10, 10, -1]
    length = [0.5, 0.7, 0.2, 1.1, 0.4, 0.3, 0.9, 1.0, 0.6, 0.8, 0.0]
    return FlatTree(parent, length, tuple("abcdefgh"))


def test_polytomy_message_and_seeded_resolution():
    tree = poly_tree()
    vals = np.random.default_rng(0).normal(size=(8, 1))
    with pytest.raises(InputError, match="bifurcating") as err:
        independent_contrasts(tree, vals)
    assert "resolve_polytomies" in str(err.value)
    t1, note1 = resolve_polytomies(tree, 4)
    t2, note2 = resolve_polytomies(tree, 4)
    np.testing.assert_array_equal(t1.parent, t2.parent)
    np.testing.assert_array_equal(t1.length, t2.length)
    assert note1 == note2 and "2 polytomies" in note1 and "4 zero-length" in note1
    assert t1.tip_names == tree.tip_names
    assert np.all(t1.n_children()[8:] == 2)
    # zero-length new branches leave the BM covariance unchanged
    np.testing.assert_allclose(covariance(t1), covariance(tree), atol=1e-14)
    shapes = {tuple(resolve_polytomies(tree, s)[0].parent) for s in range(10)}
    assert len(shapes) > 1
    res = independent_contrasts(tree, vals, resolve=True, seed=4)
    assert res.n_contrasts == 7 and note1 in res.notes[0]
    # contrast slopes equal GLS on the original (unresolved) tree's covariance
    y = vals[:, 0]
    x = np.arange(8.0) ** 1.5
    res2 = independent_contrasts(tree, np.c_[y, x], traits=["y", "x"], resolve=True, seed=1)
    gls = sm.GLS(y, sm.add_constant(x), sigma=covariance(tree)).fit()
    assert res2.pairs.iloc[0]["slope"] == pytest.approx(gls.params[1], rel=1e-8)


def test_missing_values_and_bad_tables():
    rng = np.random.default_rng(1)
    tree = random_tree(6, rng)
    vals = rng.normal(size=(6, 2))
    vals[2, 1] = np.nan
    with pytest.raises(InputError, match="complete data"):
        independent_contrasts(tree, vals)
    table = pd.DataFrame({"species": list(tree.tip_names[:5]), "m": np.ones(5)})
    with pytest.raises(InputError, match="not in the table"):
        independent_contrasts(tree, table)
    # a table in another order with se/n columns gives the array result
    full = pd.DataFrame({"species": list(tree.tip_names), "m": rng.normal(size=6),
                         "m_se": 0.1, "m_n": 3})[::-1]
    a = independent_contrasts(tree, full)
    b = independent_contrasts(tree, full.set_index("species").loc[list(tree.tip_names), ["m"]]
                              .to_numpy(), traits=["m"])
    assert list(a.rates.index) == ["m"]
    assert a.rates["m"] == pytest.approx(b.rates["m"], rel=1e-14)
    zero = FlatTree([3, 3, 4, 4, -1], [0.0, 0.0, 1.0, 1.0, 0.0], ("a", "b", "c"))
    with pytest.raises(InputError, match="zero length"):
        independent_contrasts(zero, np.ones((3, 1)))
