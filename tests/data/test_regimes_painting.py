"""Painting regimes on trees: Fitch parsimony worked by hand, ties, spec reading."""

from __future__ import annotations

import numpy as np
import pytest

from cladewise.data.regimes import paint_from_species
from cladewise.data.treefiles import parse_newick
from cladewise.errors import InputError


def _node(tree, names):
    """Index of the MRCA node whose tips are exactly ``names``."""
    below = tree.tips_below()
    want = {tree.tip_names.index(n) for n in names}
    return next(v for v in range(tree.n_nodes) if set(below[v].tolist()) == want)


def test_fitch_parsimony_worked_by_hand():
    # ((a:1,b:1):1,(c:1,(d:1,e:1):1):1); with a, b = land and c, d, e = water.
    # Fitch (1971) up pass: {a,b} -> {land}; {d,e} -> {water}; {c,(d,e)} -> {water};
    # root: {land} and {water} disjoint -> {land, water}: a tie, resolved to the first
    # regime of the order. One change on the branch leading to the other clade.
    tree = parse_newick("((a:1,b:1):1,(c:1,(d:1,e:1):1):1);")
    p = paint_from_species(tree, {"a": "land", "b": "land", "c": "water", "d": "water", "e": "water"},
                           order=["land", "water"])
    assert p.regimes == ("land", "water")
    assert p.node_regime[tree.root] == 0
    assert p.node_regime[_node(tree, ["a", "b"])] == 0
    assert p.node_regime[_node(tree, ["c", "d", "e"])] == 1
    assert p.node_regime[_node(tree, ["d", "e"])] == 1
    assert any("1 node(s) had tied" in n for n in p.notes)
    assert any("1 regime change" in n for n in p.notes)
    # with the other order the root tie goes to water; still one change (on the land clade)
    q = paint_from_species(tree, {"a": "land", "b": "land", "c": "water", "d": "water", "e": "water"},
                           order=["water", "land"])
    assert q.regimes[q.node_regime[tree.root]] == "water"
    assert q.regimes[q.node_regime[_node(tree, ["a", "b"])]] == "land"


def test_fitch_unknown_species_and_polytomy():
    # polytomy (a,b,c) with two 'x' and one 'y': the states shared by most children win
    tree = parse_newick("((a:1,b:1,c:1):1,(d:1,e:1):1);")
    p = paint_from_species(tree, {"a": "x", "b": "x", "c": "y", "d": "y", "e": None})
    v = _node(tree, ["a", "b", "c"])
    assert p.regimes[p.node_regime[v]] == "x"
    assert p.regimes[p.node_regime[tree.tip_names.index("e")]] == "y"  # unknown takes the parsimonious one
    assert any("without a regime" in n for n in p.notes)
    with pytest.raises(InputError, match="same regime"):
        paint_from_species(tree, dict.fromkeys("abcde", "x"))


def test_spec_regimes_table_is_read_and_checked(tmp_path):
    from cladewise.config.analysis import load_spec
    from cladewise.model.build import ModelSpec

    (tmp_path / "t.nwk").write_text("((a:1,b:1):1,(c:1,d:1):1);\n")
    (tmp_path / "s.csv").write_text("species,x\na,1\nb,2\nc,3\nd,4\n")
    base = '[data]\ntree = "t.nwk"\ntraits = "s.csv"\n[model]\nkind = "independent"\ntraits = ["x"]\n'
    ok = base + '[model.regimes]\nrates = "scaled"\n[model.regimes.clades.fast]\nspecies = ["a", "b"]\nstarts = "crown"\n'
    (tmp_path / "ok.toml").write_text(ok)
    spec = load_spec(tmp_path / "ok.toml")
    ms = ModelSpec.from_dict(dict(spec.model))
    assert ms.regimes["clades"]["fast"]["starts"] == "crown"
    (tmp_path / "bad.toml").write_text(base + '[model.regimes]\nrates = "fast"\n')
    with pytest.raises(InputError, match="rates"):
        load_spec(tmp_path / "bad.toml")
    (tmp_path / "bad2.toml").write_text(base + '[model.regimes]\noptima = true\ncolumn = "h"\n')
    with pytest.raises(InputError, match="evolution"):
        ModelSpec.from_dict(dict(load_spec(tmp_path / "bad2.toml").model))


def test_simulate_traits_with_regimes_covariance():
    # Monte Carlo check of the O'Meara et al. (2006) covariance sum_r C_r R_r on a 3-tip tree
    from cladewise.model.simulate import simulate_traits

    tree = parse_newick("((a:1,b:2):1,c:3);")
    regime = np.zeros(tree.n_nodes, np.int64)
    regime[tree.tip_names.index("b")] = 1
    R = np.array([[[1.0]], [[4.0]]])
    x = simulate_traits(tree, R, [0.0], rng=1, n_reps=40000, regime=regime)[..., 0]
    cov = np.cov(x.T)
    # a: 1 + 1 = 2; b: 1 (shared, regime 0) + 2 * 4 = 9; c: 3; cov(a, b) = 1
    ref = np.array([[2.0, 1.0, 0.0], [1.0, 9.0, 0.0], [0.0, 0.0, 3.0]])
    np.testing.assert_allclose(cov, ref, atol=0.15)


def test_simulation_spec_with_regimes(tmp_path):
    # [simulation.regimes]: the painted clade evolves at rate_ratio x R; with a zero
    # background rate ratio impossible, check the draws' variances by Monte Carlo
    # against sum_r C_r R_r (O'Meara et al. 2006) on a 4-tip tree.
    from cladewise.config.simulation import load_simulation_spec
    from cladewise.studies.simulate import simulate_dataset

    (tmp_path / "t.nwk").write_text("((a:1,b:1):1,(c:1,d:1):1);\n")
    (tmp_path / "sim.toml").write_text(
        '[data]\ntree = "t.nwk"\n[simulation]\ntraits = ["x"]\nrates = 1.0\n'
        '[simulation.regimes.clades.fast]\nspecies = ["a", "b"]\nstarts = "crown"\n'
        '[simulation.regimes.rate_ratios]\nfast = 9.0\n')
    spec = load_simulation_spec(tmp_path / "sim.toml")
    assert spec.settings["regime_rate_ratios"] == [1.0, 9.0]
    one = simulate_dataset(spec.tree, seed=1, **spec.settings)
    assert one.truth["regime_rate_ratios"] == [1.0, 9.0]
    from cladewise.model.simulate import simulate_traits

    ratios = np.asarray(spec.settings["regime_rate_ratios"])
    draws = simulate_traits(spec.tree, ratios[:, None, None] * np.ones((1, 1, 1)), [0.0], rng=2,
                            n_reps=20000, regime=spec.settings["regime"])[..., 0]
    order = list(spec.tree.tip_names)
    var = draws.var(axis=0)
    # a, b: 1 (stem, background) + 9 x 1 (crown branch); c, d: 2
    np.testing.assert_allclose(var[[order.index(s) for s in "abcd"]], [10, 10, 2, 2], rtol=0.05)
    (tmp_path / "bad.toml").write_text(
        '[data]\ntree = "t.nwk"\n[simulation]\ntraits = ["x"]\nrates = 1.0\n'
        '[simulation.regimes.clades.fast]\nspecies = ["a", "zz"]\n'
        '[simulation.regimes.rate_ratios]\nfast = 9.0\n')
    with pytest.raises(InputError, match="not in the tree"):
        load_simulation_spec(tmp_path / "bad.toml")
