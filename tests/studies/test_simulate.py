"""Checks of trait simulation against the model's dense covariance and sampling theory."""

from __future__ import annotations

import json

import dendropy
import numpy as np
import pandas as pd
import pytest

from cladewise.errors import InputError
from cladewise.model.evolution import transformed_lengths
from cladewise.studies.simulate import (
    simulate_dataset,
    simulate_traits,
    write_dataset,
)
from cladewise.data.trees import FlatTree, covariance
from treegen import random_tree

# z for per-entry Monte Carlo bounds: two-sided p about 7e-6 per entry, so a few
# hundred entries together stay below about 0.2% false alarms (common practice).
Z = 4.5


def poly_tree(root_edge: float = 0.4) -> FlatTree:
    """8 tips, two polytomies (one at the root), not ultrametric, with a root edge."""
    parent = [8, 8, 9, 9, 9, 11, 11, 12, 10, 10, 12, 12, -1]
    length = [0.3, 1.1, 0.5, 0.2, 0.9, 1.4, 0.6, 2.0, 0.7, 0.4, 0.5, 0.8, root_edge]
    return FlatTree(parent, length, tuple(f"sp{i}" for i in range(8)))




def assert_moments(draws: np.ndarray, mean: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """Empirical mean and covariance within Z Monte Carlo standard errors.

    Var(mean_a) = S_aa / n (law of large numbers / CLT); for Gaussian data
    Var(S_ab) = (S_aa S_bb + S_ab^2) / n to first order (Wishart moments, Anderson
    2003, An Introduction to Multivariate Statistical Analysis, ch. 7).
    Returns the empirical covariance.
    """
    n = draws.shape[0]
    d = np.diag(cov)
    emp_mean = draws.mean(axis=0)
    assert np.all(np.abs(emp_mean - mean) <= Z * np.sqrt(d / n))
    emp = np.cov(draws, rowvar=False)
    tol = Z * np.sqrt((np.outer(d, d) + cov**2) / n)
    worst = np.max(np.abs(emp - cov) / tol)
    assert worst <= 1.0, f"empirical covariance off by {worst:.2f} tolerances"
    return emp


def test_covariance_matches_dense_model():
    tree = poly_tree()
    R = np.array([[1.0, 0.6], [0.6, 0.8]])
    E = np.array([[0.3, -0.1], [-0.1, 0.2]])
    se = np.linspace(0.1, 0.5, 16).reshape(8, 2)
    mu = np.array([2.0, -1.0])
    reps = 20_000
    x = simulate_traits(tree, R, mu, E=E, se=se, rng=11, n_reps=reps)
    assert x.shape == (reps, 8, 2)
    flat = x.reshape(reps, 16)  # species-major rows: covariance kron(C, R)
    C = covariance(tree)  # includes the root edge
    dense = np.kron(C, R) + np.kron(np.eye(8), E) + np.diag(se.ravel() ** 2)
    emp = assert_moments(flat, np.tile(mu, 8), dense)
    # The check can fail: dropping the root edge (0.4 R on every entry) is detected.
    C0 = covariance(tree.with_lengths(np.r_[tree.length[:-1], 0.0]))
    wrong = np.kron(C0, R) + np.kron(np.eye(8), E) + np.diag(se.ravel() ** 2)
    d = np.diag(dense)
    assert np.max(np.abs(emp - wrong) / (Z * np.sqrt((np.outer(d, d) + dense**2) / reps))) > 1


def test_transformed_lengths_give_the_ou_covariance():
    # OU with the root at the optimum on an ultrametric tree: cov_ij =
    # R/(2a) exp(-2a(T - s_ij)) (1 - exp(-2a s_ij)) (Hansen 1997, Evolution
    # 51:1341-1351; Butler & King 2004, Am. Nat. 164:683-695).
    tree = random_tree(7, np.random.default_rng(3), ultrametric=True)
    alpha, r = 0.7, 1.3
    ln = transformed_lengths(tree, "ou", alpha=alpha)
    reps = 20_000
    x = simulate_traits(tree, r, 0.5, lengths=ln, rng=5, n_reps=reps)[:, :, 0]
    S = covariance(tree)
    T = S[0, 0]
    dense = r / (2 * alpha) * np.exp(-2 * alpha * (T - S)) * (1 - np.exp(-2 * alpha * S))
    assert_moments(x, np.full(7, 0.5), dense)


def test_seeded_draws_repeat_and_single_draw_shape():
    tree = poly_tree()
    a = simulate_traits(tree, np.eye(2), [0, 0], rng=4)
    b = simulate_traits(tree, np.eye(2), [0, 0], rng=4)
    assert a.shape == (8, 2)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, simulate_traits(tree, np.eye(2), [0, 0], rng=5))


def test_bad_inputs_raise_input_error():
    tree = poly_tree()
    with pytest.raises(InputError, match="positive semi-definite"):
        simulate_traits(tree, [[1.0, 2.0], [2.0, 1.0]], [0, 0])
    with pytest.raises(InputError, match="one entry per node"):
        simulate_traits(tree, 1.0, 0.0, lengths=[1.0, 2.0])
    with pytest.raises(InputError, match="mu"):
        simulate_traits(tree, np.eye(2), [0, 0, 0])
    with pytest.raises(InputError, match="within_var"):
        simulate_dataset(tree, ["a", "b"], np.eye(2), 0.0, n_specimens=3)


def test_specimen_reduction_and_within_variance():
    rng = np.random.default_rng(8)
    tree = random_tree(80, rng)
    W = np.array([0.5, 2.0])
    sim = simulate_dataset(tree, ["mass", "length"], np.diag([0.2, 0.1]), [1.0, 3.0],
                           E=np.diag([0.05, 0.05]), within_var=W, n_specimens=(2, 25),
                           missing_specimen_share=0.05, seed=21)
    spec, table = sim.specimens, sim.species
    assert list(table.columns) == ["species", "mass", "length", "mass_se", "length_se",
                                   "mass_n", "length_n"]
    assert list(table["species"]) == list(tree.tip_names)
    assert int(spec[["mass", "length"]].isna().sum().sum()) == round(0.05 * spec.shape[0] * 2)
    # Reduction against numpy on each species' rows: mean, sd (ddof 1) / sqrt(n), n.
    for t in ["mass", "length"]:
        for _, row in table.iterrows():
            v = spec.loc[spec["species"] == row["species"], t].to_numpy()
            v = v[np.isfinite(v)]
            assert (row[f"{t}_n"] if v.size else 0) == v.size
            assert pd.isna(row[f"{t}_n"]) == (v.size == 0)
            if v.size:
                assert row[t] == pytest.approx(v.mean(), rel=1e-12, abs=1e-12)
            if v.size > 1:
                assert row[f"{t}_se"] == pytest.approx(v.std(ddof=1) / np.sqrt(v.size), rel=1e-12)
    # And against pandas' own group reduction.
    g = spec.groupby("species")[["mass", "length"]]
    pd.testing.assert_series_equal(
        table.set_index("species")["mass_se"].sort_index(),
        (g.std() / np.sqrt(g.count()))["mass"].sort_index().rename("mass_se"),
    )
    # Pooled within-species variance: df * s^2 / sigma^2 ~ chi-square(df), so its
    # standard error is sigma^2 sqrt(2 / df) (Cochran's theorem).
    truth = sim.truth["true_means"]
    for j, t in enumerate(["mass", "length"]):
        dev = spec[t] - spec["species"].map(truth[t])
        grp = spec.assign(dev=dev).groupby("species")[t]
        ss = grp.var(ddof=1).fillna(0) * (grp.count() - 1)
        dof = int((grp.count() - 1).clip(lower=0).sum())
        pooled = ss.sum() / dof
        assert abs(pooled - W[j]) <= Z * W[j] * np.sqrt(2 / dof)
        # species means scatter around the true means with variance W / n
        z = (table[t] - truth[t].to_numpy()) / np.sqrt(W[j] / table[f"{t}_n"].astype(float))
        assert abs(np.mean(z**2) - 1) <= Z * np.sqrt(2 / len(z))


def test_missing_cells_and_known_se_mode():
    rng = np.random.default_rng(2)
    tree = random_tree(40, rng)
    sim = simulate_dataset(tree, ["a", "b", "c"], np.eye(3), 0.0, se=[0.1, 0.2, 0.3],
                           missing_share=0.25, seed=3)
    tab = sim.species
    assert sim.specimens is None
    assert int(tab[["a", "b", "c"]].isna().sum().sum()) == 30  # 0.25 * 40 * 3
    for t in "abc":
        np.testing.assert_array_equal(tab[t].isna(), tab[f"{t}_se"].isna())
    # Specimen mode: a blank species x trait cell removes the trait from all of the
    # species' specimens, so its mean, se and n are blank.
    sim2 = simulate_dataset(tree, ["a", "b"], np.eye(2), 0.0, within_var=1.0,
                            n_specimens=4, missing_share=0.1, seed=3)
    counts = sim2.species[["a_n", "b_n"]]
    assert int(counts.isna().sum().sum()) == 8
    known = counts.to_numpy(dtype=float, na_value=np.nan)
    assert set(known[np.isfinite(known)]) == {4.0}
    for t in "ab":
        np.testing.assert_array_equal(sim2.species[t].isna(), counts[f"{t}_n"].isna())


def test_write_dataset_refuses_to_overwrite(tmp_path):
    tree = poly_tree()
    sim = simulate_dataset(tree, ["x", "y"], np.eye(2), 0.0, within_var=0.1,
                           n_specimens=3, seed=1)
    out = tmp_path / "sim"
    out.mkdir()  # an existing empty folder is fine
    paths = write_dataset(sim, out)
    assert set(paths) == {"species", "specimens", "true_means", "truth", "tree"}
    with pytest.raises(InputError, match="not empty"):
        write_dataset(sim, out)
    write_dataset(sim, out, overwrite=True)
    back = pd.read_csv(paths["species"])
    pd.testing.assert_frame_equal(back, sim.species, check_dtype=False)
    assert json.loads(paths["truth"].read_text())["traits"] == ["x", "y"]
    # The written Newick read by an independent library gives the same tree:
    # patristic d_ij = C_ii + C_jj - 2 C_ij (dendropy).
    dt = dendropy.Tree.get(path=str(paths["tree"]), schema="newick",
                           preserve_underscores=True)
    pdm = dt.phylogenetic_distance_matrix()
    taxa = {t.label: t for t in dt.taxon_namespace}
    C = covariance(tree)
    for i in range(8):
        for j in range(i + 1, 8):
            d = pdm.patristic_distance(taxa[f"sp{i}"], taxa[f"sp{j}"])
            assert d == pytest.approx(C[i, i] + C[j, j] - 2 * C[i, j], rel=1e-12)
